"""`shiftgrid status [OVERRIDES...]`: what is out of date and why, in plain reasons.

Runs `snakemake -n` on the whole DAG (ingestion included) with the same overrides as `shiftgrid run` and
explains its job list with pipeline.outdated (stored params and input checksums under .snakemake/), plus
library versions that changed since finished jobs ran. Writes nothing but the plan cache (the dry run's
Snakefile does too). Config keys obeyed: everything the Snakefile plan reads (data, split, sweep,
report, ...) and tracking.dependency_changes.
"""

from pathlib import Path

from pipeline.errors import InputError


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, the same as for `shiftgrid run`")
    parser.add_argument("--jobs", action="store_true", help="also list every job Snakemake would schedule")


def run(args) -> int:
    from pipeline.runner import start_dry_run

    # Snakemake starts first: its own start-up takes most of the time, and the plan is read (from the
    # cache, pipeline.plan_cache) meanwhile. A bad override fails here in one line; the dry run is stopped.
    process = start_dry_run(args.overrides, root=Path(args.root))
    try:
        from pipeline import outdated
        from pipeline.workflow import plan_workflow

        plan = plan_workflow(args.overrides, args.root)
    except BaseException:
        process.kill()
        process.wait()
        raise
    stdout, stderr = process.communicate()
    if process.returncode != 0:
        tail = [line for line in (stderr + stdout).splitlines() if line.strip()][-1:]
        raise InputError(f"snakemake dry run failed: {tail[0] if tail else 'no output'}", field="status")
    jobs = outdated.parse_dry_run(stdout + "\n" + stderr)
    notes = (outdated.recorded_version_notes(Path(args.root) / plan.results_dir)
             if plan.cfg.tracking.dependency_changes == "report" else [])
    print(outdated.format_status(jobs, outdated.explain(jobs, plan, Path(args.root)), notes))
    if args.jobs:
        for job in jobs:
            where = ", ".join(f"{k}={v}" for k, v in job.wildcards.items())
            print(f"  {job.rule:<15} {where[:60]:<60} {job.reason[:20]}")
    return 0
