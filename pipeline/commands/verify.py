"""`shiftgrid verify RUN_ID [--force] [--tracking-uri URI] [OVERRIDES...]`: re-train one run and compare.

Reads the run's logged config (artifact config/resolved_config.yaml) and the current clean Parquet
(data.clean_dir); writes one new run into the scratch experiment `<experiment>-verify` of the same
store, never a run record under results/ and never a superseded tag. Exit 0 when identical, 1 when the
re-trained run differs, 2 on bad input (including changed data without --force).
"""

from pathlib import Path

from pipeline import audit, tracking
from pipeline import verify as verifying
from pipeline.commands.show import add_common


def add_arguments(parser) -> None:
    add_common(parser)
    parser.add_argument("--force", action="store_true",
                        help="re-train even though the data digests no longer match (differences expected)")


def run(args) -> int:
    uri, cfg = audit.tracking_uri_for(args.root, args.overrides, args.tracking_uri)
    client = tracking.open_existing_store(uri)
    found = audit.get_run(client, args.run_id)
    outcome = verifying.verify_run(client, found, uri, Path(args.root), cfg.data.clean_dir, force=args.force)
    print(verifying.format_outcome(found.info.run_id, outcome))
    return 0 if not outcome["differences"] else 1
