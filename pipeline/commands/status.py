"""`shiftgrid status [OVERRIDES...]`: what is out of date and why, in plain reasons.

Runs `snakemake -n` on the whole DAG (ingestion included) with the same overrides as `shiftgrid run` and
explains its job list with pipeline.outdated (stored params and input checksums under .snakemake/).
Writes nothing. Config keys obeyed: everything the Snakefile plan reads (data, split, sweep, report, ...).
"""

from pathlib import Path

from pipeline import outdated
from pipeline.errors import InputError
from pipeline.runner import dry_run
from pipeline.workflow import plan_workflow


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, the same as for `shiftgrid run`")
    parser.add_argument("--jobs", action="store_true", help="also list every job Snakemake would schedule")


def run(args) -> int:
    plan = plan_workflow(args.overrides, args.root)
    result = dry_run(args.overrides, root=Path(args.root))
    if result.returncode != 0:
        tail = [line for line in (result.stderr + result.stdout).splitlines() if line.strip()][-1:]
        raise InputError(f"snakemake dry run failed: {tail[0] if tail else 'no output'}", field="status")
    jobs = outdated.parse_dry_run(result.stdout + "\n" + result.stderr)
    print(outdated.format_status(jobs, outdated.explain(jobs, plan, Path(args.root))))
    if args.jobs:
        for job in jobs:
            where = ", ".join(f"{k}={v}" for k, v in job.wildcards.items())
            print(f"  {job.rule:<15} {where[:60]:<60} {job.reason[:20]}")
    return 0
