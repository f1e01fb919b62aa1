"""`shiftgrid run [OVERRIDES...] [-- SNAKEMAKE ARGS]`: the whole DAG, ingestion first, then the rest.

Overrides use Hydra syntax; `model=a,b`, `penalty=a,b` and `seed=0,1` sweep (see pipeline.config).
"""

from pathlib import Path


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, e.g. experiment=demo model=lstm,gru")
    parser.add_argument("--profile", default="local", help="Snakemake profile: local, slurm or a folder")
    # extend: each --snakemake adds its values, so options that start with "-" can be passed one per flag
    parser.add_argument("--snakemake", nargs="*", action="extend", default=[], metavar="ARG",
                        help="extra arguments handed to snakemake as they are, e.g. --snakemake=-n or "
                             "--snakemake=--forcerun --snakemake=FILE")


def run(args) -> int:
    from pipeline.sweep_guard import run_guarded
    from pipeline.workflow import plan_workflow

    plan = plan_workflow(args.overrides, args.root)  # fails early, in one line, on a bad override
    print(f"plan: {len(plan.cities)} cities, {len(plan.splits)} splits, {len(plan.jobs)} training jobs, "
          f"{len(plan.all_run_records())} runs")
    status = run_guarded(args.overrides, Path(args.root), plan.tracking_uri, profile=args.profile, extra=args.snakemake)
    if status == 0:
        print(f"grid: {Path(args.root) / plan.results_dir / 'grid.csv'}")
        print(f"report: {Path(args.root) / plan.results_dir / 'report.html'}")
    return status
