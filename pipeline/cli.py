"""`shiftgrid` command line: what Snakemake itself does not show.

Each command lives in its own module `pipeline/commands/<name>.py` with `add_arguments(parser)` and
`run(args) -> int`; this file only registers them. Bad input anywhere ends in one line
`error: ...` and exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from pipeline.errors import InputError

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
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="shiftgrid", description=__doc__.splitlines()[0])
    parser.add_argument("--root", default=".", help="project root holding Snakefile and config/ (default: .)")
    commands = parser.add_subparsers(dest="command", required=True)
    for name, help_text in COMMANDS.items():
        try:
            module = importlib.import_module(f"pipeline.commands.{name}")
        except ModuleNotFoundError as error:
            if error.name != f"pipeline.commands.{name}":
                raise
            continue
        sub = commands.add_parser(name, help=help_text, description=help_text)
        module.add_arguments(sub)
        sub.set_defaults(handler=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.handler(args) or 0)
    except InputError as error:
        print(f"error: {error}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
