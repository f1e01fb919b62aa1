"""`shiftgrid show RUN_ID [--tracking-uri URI] [--all-metrics] [OVERRIDES...]`: everything about one run.

Reads the MLflow store (from the composed config: results_dir, tracking.uri; or --tracking-uri), the run's
artifacts, the run records under results_dir/runs and the current clean Parquet (data.clean_dir).
Writes nothing. A run ID prefix of 6+ characters works when it is unique.
"""

from pathlib import Path

from pipeline import audit, tracking


def add_common(parser) -> None:
    parser.add_argument("run_id", metavar="RUN_ID", help="MLflow run ID (or a unique prefix of 6+ characters)")
    parser.add_argument("overrides", nargs="*", help="Hydra overrides locating the store, e.g. experiment=demo")
    parser.add_argument("--tracking-uri", help="MLflow tracking URI (default: the config's store under results/)")


def add_arguments(parser) -> None:
    add_common(parser)
    parser.add_argument("--all-metrics", action="store_true", help="print every logged metric")


def run(args) -> int:
    uri, cfg = audit.tracking_uri_for(args.root, args.overrides, args.tracking_uri)
    client = tracking.open_existing_store(uri)
    found = audit.get_run(client, args.run_id)
    info = audit.describe_run(client, found, Path(args.root), cfg.results_dir, cfg.data.clean_dir)
    print(audit.format_show(info, all_metrics=args.all_metrics))
    return 0
