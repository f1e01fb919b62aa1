"""`shiftgrid runs [--target T] [--variable V] [--source S] [--model M] [--penalty P] [--seed N]
[--since DATE] [--current | --superseded] [--format table|csv|json] [--tracking-uri URI] [OVERRIDES...]`.

Reads the MLflow store of the composed config (results_dir, tracking.uri, tracking.experiment) and lists
its runs, newest first: table readable at 100 columns (run ID prefix; `show` accepts it), CSV or JSON
with full IDs. Writes nothing.

A run's role says what the grid makes of it: `run` (read as is), `parent` (a searched run, holding the
results of the trial its selection rule picked) or `trial` (one setting a search tried; the grid reads its
parent, so a finished trial's state is `trial`, never `current`).
"""

import json
from datetime import datetime, timezone

from pipeline import audit, names, tracking
from pipeline.commands import add_run_filters
from pipeline.errors import InputError

FORMATS = ("table", "csv", "json")
COLUMNS = ("run_id", "started", "split_id", "sources", "target", "variable", "model", "penalty", "seed", "role",
           "state", "superseded_by", "target_mae")
VARIABLE_PARAM = "forecast.target"  # the forecast variable (--variable); --target is the target city


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides locating the store, e.g. experiment=demo")
    parser.add_argument("--tracking-uri", help="MLflow tracking URI (default: the config's store)")
    parser.add_argument("--experiment", help="MLflow experiment (default: tracking.experiment)")
    add_run_filters(parser, several=False)
    parser.add_argument("--source", help="only runs that have this city among their source cities")
    parser.add_argument("--seed", type=int, help="only runs with this seed")
    parser.add_argument("--since", help="only runs started on or after this date (YYYY-MM-DD, UTC)")
    state = parser.add_mutually_exclusive_group()
    state.add_argument("--current", action="store_true", help="only runs the grid uses")
    state.add_argument("--superseded", action="store_true", help="only runs replaced by a re-run")
    parser.add_argument("--format", choices=FORMATS, default="table")


def _since_millis(text: str) -> int:
    try:
        moment = datetime.strptime(text, "%Y-%m-%d").replace(tzinfo=timezone.utc)
    except ValueError:
        raise InputError(f"expected a date YYYY-MM-DD, got {text!r}", field="--since") from None
    return int(moment.timestamp() * 1000)


def _quoted(value: str) -> str:
    if "'" in value:
        raise InputError(f"quote character in {value!r}", field="filter")
    return f"'{value}'"


def search(client, experiment_id: str, args) -> list[dict]:
    clauses = [f"tags.{name} = {_quoted(value)}" for name, value in
               (("target", args.target), ("model", args.model),
                ("penalty", args.penalty and names.penalty_label(args.penalty)),
                ("seed", None if args.seed is None else str(args.seed))) if value]
    if args.variable:  # every run logs its forecast variable as the param forecast.target (its job slice)
        clauses.append(f"params.`{VARIABLE_PARAM}` = {_quoted(args.variable)}")
    if args.since:
        clauses.append(f"attributes.start_time >= {_since_millis(args.since)}")
    runs = tracking.search_all_runs(client, [experiment_id], " and ".join(clauses))
    rows = []
    for found in runs:
        tags = found.data.tags
        sources = tags.get("sources", "").split("+")
        successor = tags.get(tracking.SUPERSEDED_TAG)
        role = tags.get(tracking.ROLE_TAG, "run")
        # a killed, failed or still running run is never current: the grid uses finished runs only, and of a
        # search only the parent
        finished = "trial" if role == "trial" else "current"
        state = "superseded" if successor else finished if found.info.status == "FINISHED" else found.info.status.lower()
        if (args.source and args.source not in sources) or (args.current and state != "current") or \
                (args.superseded and not successor):
            continue
        rows.append({"run_id": found.info.run_id, "started": audit.when(found.info.start_time)[:16],
                     "split_id": tags.get("split_id"), "sources": tags.get("sources"), "target": tags.get("target"),
                     "variable": found.data.params.get(VARIABLE_PARAM), "model": tags.get("model"),
                     "penalty": tags.get("penalty") and names.penalty_shown(tags["penalty"]),
                     "seed": tags.get("seed"), "role": role, "state": state,
                     "superseded_by": successor or "", "target_mae": found.data.metrics.get("target_mae"),
                     "_start": found.info.start_time or 0})
    rows.sort(key=lambda row: (-row["_start"], row["run_id"]))
    return [{k: v for k, v in row.items() if k != "_start"} for row in rows]


def format_table(rows: list[dict]) -> str:
    lines = [f"{'run':<12} {'started (UTC)':<16} {'target':<10} {'sources':<15} {'model':<11} {'penalty':<8} "
             f"{'seed':>4} {'state':<10} {'mae':>6}"]
    for row in rows:
        mae = f"{row['target_mae']:.3g}" if row["target_mae"] is not None else "-"
        lines.append(f"{row['run_id'][:12]:<12} {row['started']:<16} {str(row['target'])[:10]:<10} "
                     f"{str(row['sources'])[:15]:<15} {str(row['model'])[:11]:<11} {str(row['penalty'])[:8]:<8} "
                     f"{str(row['seed']):>4} {row['state']:<10} {mae:>6}")
    lines.append(f"{len(rows)} runs (`shiftgrid show RUN` accepts the 12-character prefix)")
    return "\n".join(lines)


def run(args) -> int:
    uri, cfg = audit.tracking_uri_for(args.root, args.overrides, args.tracking_uri)
    client = tracking.open_existing_store(uri)
    name = args.experiment or cfg.tracking.experiment
    experiment = audit.find_experiment(client, name, args.root)
    rows = search(client, experiment.experiment_id, args)
    if args.format == "json":
        print(json.dumps(rows, indent=1))
    elif args.format == "csv":
        import pandas as pd
        print(pd.DataFrame(rows, columns=list(COLUMNS)).to_csv(index=False).rstrip("\n"))
    else:
        print(format_table(rows))
    return 0
