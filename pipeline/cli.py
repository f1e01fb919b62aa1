"""`shiftgrid` command line: what Snakemake itself does not show.

Each command lives in its own module `pipeline/commands/<name>.py` (`-` in a name is `_` there) with `add_arguments(parser)` and
`run(args) -> int`; this file only registers them. Only the module of the command being run is imported
(`shiftgrid --help` imports none), so a command pays for its own libraries and no other's. Bad input
anywhere ends in one line `error: ...` and exit status 2, never a traceback. Reads and writes nothing.
"""

from __future__ import annotations

import argparse
import importlib
import sys
import traceback

from pipeline import variables
from pipeline.errors import InputError
from pipeline.tracking import redact

# name -> one-line help; the module pipeline.commands.<name> implements it.
COMMANDS = {
    "demo": "write the invented demo scenario's raw dumps (and with --run, run the whole DAG)",
    "run": "run the DAG with Hydra overrides, e.g. `shiftgrid run model=lstm,gru penalty=irm`",
    "status": "what is out of date and why, in plain reasons",
    "grid": "print or export the ranked comparison grid",
    "runs": "list tracked runs with filters",
    "show": "everything recorded about one run ID",
    "verify": "re-train one run from its logged config and compare it bit for bit",
    "shift": "pairwise city shift diagnostics next to geographic distance",
    "new-city": "draft a new city's dump format from a sample, then check it without writing anything",
}


def command_module(name: str) -> str:
    """The module implementing a command (a hyphen in the command is an underscore in the module)."""
    return f"pipeline.commands.{name.replace('-', '_')}"


def requested_command(argv: list[str]) -> str | None:
    """The sub-command named on the command line (the first word that is not an option or its value)."""
    words = list(argv)
    while words:
        word = words.pop(0)
        if word == "--root":
            words = words[1:]
        elif not word.startswith("-"):
            return word if word in COMMANDS else None
    return None


def build_parser(load: set[str] | None = None) -> argparse.ArgumentParser:
    """The parser; the commands in `load` (default: all) get their arguments and handler."""
    parser = argparse.ArgumentParser(prog="shiftgrid", description=__doc__.splitlines()[0])
    parser.add_argument("--root", default=".", help="project root holding Snakefile and config/ (default: .)")
    commands = parser.add_subparsers(dest="command", required=True)
    for name, help_text in COMMANDS.items():
        module = None
        if load is None or name in load:
            try:
                module = importlib.import_module(command_module(name))
            except ModuleNotFoundError as error:
                if error.name != command_module(name):
                    raise
                continue
        sub = commands.add_parser(name, help=help_text, description=help_text)
        if module is not None:
            module.add_arguments(sub)
            sub.set_defaults(handler=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    command = requested_command(argv)
    args = build_parser({command} if command else set()).parse_args(argv)
    variables.use_project(args.root)
    try:
        return int(args.handler(args) or 0)
    except InputError as error:
        print(f"error: {redact(str(error))}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except Exception:  # still a traceback, but MLflow quotes the URL it failed on: credentials redacted
        print(redact(traceback.format_exc()), file=sys.stderr, end="")
        return 1


if __name__ == "__main__":
    sys.exit(main())
