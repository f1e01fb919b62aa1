"""Bookkeeping at scale: planning, `shiftgrid status`, aggregation and the report on a generated study (up
to 10,044 training jobs and 10,000 run records), each figure next to its goal (never pass/fail).

    .venv/bin/python bench/bookkeeping_scale.py [--records 1000] [--models 6] [--skip-dag] [--skip-grid]

Two parts, both in a temporary folder:

1. The DAG. A copy of the project (tests/project_copy.py) with the demo's six invented cities, every
   leave-one-city-out and source-subset split (186 splits) and --models variants of the `linear` family
   (config/model/linear_vNN.yaml, same settings): 186 x 6 = 1,116 training jobs by default, 186 x 54 =
   10,044 with --models 54 (the goal's scale; slow: see --help), ERM, seed 0. Nothing
   is trained; the demo's raw dumps are generated so that every input exists. Measured: planning (the
   Snakefile's plan, cold then cached, through pipeline.workflow.plan_workflow), and `shiftgrid status`
   against plain `snakemake -n` with the arguments status uses, on the same DAG, alternating, best of 2
   (goal: status <= 1.2 x snakemake -n).
2. The grid. --records run records (splits x 4 models x erm/irm x seeds 0/1, 2 rules) with their MLflow
   runs and predictions artifacts, generated without training: one run is logged through
   pipeline.tracking.log_run, the rest are copies of its rows in the SQLite store (new run ids, tags and
   headline metrics per run) and hard links to a few predictions files. Measured: pipeline.aggregate
   .aggregate with the shipped report.bootstrap_samples (goal <= 10 s for 10,000) and the HTML report,
   pipeline.report.html.render_report (goal <= 30 s). Each split has its own sources and target, so the
   report's heatmap and tables see as many splits as a real study of that size (625 at 10,000 records; past
   60 the heatmap shows one row per target city). The aggregation costs a fixed amount per run and per cell
   plus a fixed start (imports, the store), so with fewer --records it is also shown scaled linearly to
   10,000, labelled as such (an upper bound: the fixed part is scaled too); the report's figures summarise
   cells and target cities, so it is shown as measured.

The machine state (cores, load) is printed first: other work on the machine lengthens every figure, and
the ratio of part 1 is the figure to trust.
"""

from __future__ import annotations

import argparse
import functools
import itertools
import json
import os
import sqlite3
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "tests"))

import grid_fixture  # noqa: E402 (tests/: the hand-made grid's metrics and predictions)

from pipeline import tracking  # noqa: E402

BOOTSTRAP = 2000  # config/config.yaml report.bootstrap_samples
MODELS = ("lin", "mlp", "lstm", "transformer")
PENALTIES = ("erm", "irm")
SEEDS = (0, 1)
DEMO_CITIES = ("arlenvik", "brumeholt", "corvessa", "dunmarrow", "elsquay", "fenlowe")  # config/data/demo.yaml
CITIES = [f"c{i:02d}" for i in range(40)]  # invented target/source names for the generated splits


def timed(action) -> tuple[float, object]:
    started = time.perf_counter()
    result = action()
    return time.perf_counter() - started, result


# ---- part 1: the DAG ---------------------------------------------------------------------------------------
def scale_project(root: Path, n_models: int) -> tuple[Path, list[str]]:
    """A project copy with `n_models` linear variants and the experiment `scale`; returns (project, overrides)."""
    from project_copy import make_project

    project = make_project(root)
    linear = (project / "config" / "model" / "linear.yaml").read_text()
    models = [f"linear_v{i:02d}" for i in range(n_models)]
    for name in models:
        (project / "config" / "model" / f"{name}.yaml").write_text(linear)
    (project / "config" / "experiment" / "scale.yaml").write_text(
        "# @package _global_\n"
        "split:\n  schemes: [loco, subsets]\n  subset_sizes: [1, 2, 3, 4, 5]\n"
        f"  cities: [{', '.join(DEMO_CITIES)}]\n  environment_fallback: station\n"
        f"sweep:\n  models: [{', '.join(models)}]\n  penalties: [erm]\n  seeds: [0]\n")
    return project, ["experiment=scale"]


def measure_dag(root: Path, n_models: int) -> list[tuple[str, float, str]]:
    from project_copy import shiftgrid

    from pipeline.runner import job_environment, snakemake_command
    from pipeline.workflow import plan_workflow

    project, overrides = scale_project(root, n_models)
    done = shiftgrid(project, "demo", *overrides, cwd=project)  # raw dumps: every input of the DAG exists
    if done.returncode != 0:
        raise SystemExit(f"could not generate the demo data: {done.stderr[-2000:]}")
    cold, plan = timed(lambda: plan_workflow(overrides, project, cache=False))
    plan_workflow(overrides, project)  # fills the plan cache, as any earlier Snakemake call would have
    cached, _ = timed(lambda: plan_workflow(overrides, project))
    print(f"DAG: {len(plan.splits)} splits, {len(plan.jobs)} training jobs; plan cold {cold:.2f} s, "
          f"cached {cached:.2f} s", flush=True)  # shown at once: snakemake -n on 10,000 jobs takes long
    commands = {"status": [sys.executable, "-m", "pipeline.cli", "--root", str(project), "status", *overrides],
                "snakemake -n": snakemake_command(overrides, root=project, extra=["-n"])}
    best = {name: float("inf") for name in commands}
    for _ in range(2):  # alternate: both see the same load
        for name, command in commands.items():
            seconds, done = timed(lambda: subprocess.run(command, cwd=project, env=job_environment(),
                                                         capture_output=True, text=True))
            if done.returncode != 0:
                raise SystemExit(f"failed: {' '.join(command)}\n{done.stderr[-2000:]}")
            best[name] = min(best[name], seconds)
            print(f"  {name}: {seconds:.1f} s", flush=True)
    return [(f"plan {len(plan.jobs)} training jobs, cold", cold, "<= 3 s (issue, planning goal)"),
            ("plan, cached", cached, "<= 1 s (issue, planning goal)"),
            ("snakemake -n", best["snakemake -n"], "what status cannot avoid"),
            ("shiftgrid status", best["status"],
             f"<= 1.2 x snakemake -n: {best['status'] / best['snakemake -n']:.2f} x")]


# ---- part 2: the grid --------------------------------------------------------------------------------------
def clone_rows(db: Path, template: str, copies: list[dict]) -> None:
    """Copy every row of run `template` (runs, tags, params, metrics, latest_metrics, ...) once per entry of
    `copies` ({"run_id", "artifact_uri", "tags", "metrics"}), in one transaction."""
    connection = sqlite3.connect(db)
    columns_of = {}
    for (table,) in connection.execute("SELECT name FROM sqlite_master WHERE type='table'").fetchall():
        columns = [column[1] for column in connection.execute(f"PRAGMA table_info({table})")]
        if "run_uuid" in columns:
            columns_of[table] = columns
    with connection:
        for copy in copies:
            replaced = {"run_uuid": copy["run_id"], "artifact_uri": copy["artifact_uri"]}
            for table, columns in columns_of.items():
                new = [c for c in columns if c == "run_uuid" or (table == "runs" and c == "artifact_uri")]
                select = ", ".join("?" if c in new else c for c in columns)
                connection.execute(f"INSERT INTO {table} ({', '.join(columns)}) SELECT {select} FROM {table} "
                                   f"WHERE run_uuid = ?", [*(replaced[c] for c in new), template])
            connection.executemany("UPDATE tags SET value = ? WHERE run_uuid = ? AND key = ?",
                                   [(value, copy["run_id"], key) for key, value in copy["tags"].items()])
            for table in ("metrics", "latest_metrics"):
                connection.executemany(f"UPDATE {table} SET value = ? WHERE run_uuid = ? AND key = ?",
                                       [(value, copy["run_id"], key) for key, value in copy["metrics"].items()])
    connection.close()


@functools.cache
def source_sets(target: str) -> list[list[str]]:
    """Every single and pair of the other cities: each generated split of a target has its own sources, so
    every split is its own row wherever the report shows splits (39 + 741 per target, 31,200 splits)."""
    others = [city for city in CITIES if city != target]
    return [list(sources) for size in (1, 2) for sources in itertools.combinations(others, size)]


def generate_grid(root: Path, n_records: int) -> list[Path]:
    """n_records run records over as many splits as needed, their runs and artifacts; returns record paths."""
    results = root / "results"
    results.mkdir(parents=True)
    uri = tracking.resolve_tracking_uri(None, results)
    experiment_id = tracking.setup_store(uri, "bookkeeping", tracking.artifact_location(results))
    client = tracking.client_for(uri)
    variants = {}  # a few predictions files, hard-linked into every run's artifact folder
    for index, mae in enumerate((1.0, 1.1, 1.2, 1.3, 0.9, 0.8, 1.4, 1.5)):
        path = root / "predictions" / f"{index}.parquet"
        path.parent.mkdir(parents=True, exist_ok=True)
        grid_fixture.predictions(mae, index).to_parquet(path, index=False)
        variants[index] = (mae, path)
    tags = {"split_id": "", "model": "", "penalty": "", "seed": "", "sources": "", "target": "",
            "code_digest": "c0ffee", "git.commit": "0123456789abcdef", "selection_label": "source-holdout"}
    template = tracking.log_run(client, experiment_id, run_name="template", params=grid_fixture.PARAMS,
                                metrics=grid_fixture.metrics_for(1.0), curves={}, tags=tags,
                                artifacts={"predictions": variants[0][1]})
    template_artifacts = Path(client.get_run(template).info.artifact_uri.removeprefix("file://"))
    per_split = len(MODELS) * len(PENALTIES) * len(SEEDS)
    copies, records = [], []
    for number in range(n_records):
        split, rest = divmod(number, per_split)
        model_index, rest = divmod(rest, len(PENALTIES) * len(SEEDS))
        penalty, seed = PENALTIES[rest // len(SEEDS)], SEEDS[rest % len(SEEDS)]
        model = MODELS[model_index]
        target = CITIES[split % len(CITIES)]
        sources = source_sets(target)[split // len(CITIES)]
        split_id = f"gen-{split:05d}-{'+'.join(sources)}-to-{target}"
        mae, predictions = variants[(split + model_index + 2 * seed + (penalty == "irm")) % len(variants)]
        run_id = uuid.uuid4().hex
        artifacts = template_artifacts.parent / run_id / "artifacts"
        (artifacts / "predictions").mkdir(parents=True)
        os.link(predictions, artifacts / "predictions" / "target_predictions.parquet")
        metrics = grid_fixture.metrics_for(mae)
        copies.append({"run_id": run_id, "artifact_uri": artifacts.as_uri(), "metrics": metrics,
                       "tags": {"split_id": split_id, "model": model, "penalty": penalty, "seed": str(seed),
                                "sources": "+".join(sources), "target": target}})
        record = {"run_id": run_id, "experiment": "bookkeeping", "experiment_id": experiment_id,
                  "tracking_uri": uri, "split_id": split_id, "sources": sources, "target": target, "model": model,
                  "family": "linear", "penalty": penalty, "seed": seed, "selection_rule": "source-holdout",
                  "metrics": {k: metrics[k] for k in ("target_mae", "target_csi", "source_mae")}, "supersedes": []}
        path = results / "runs" / split_id / model / penalty / f"{seed}.json"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(record))
        records.append(path)
    clone_rows(results / tracking.STORE_FILE, template, copies)
    client.delete_run(template)  # only the copies belong to the study
    return records


def measure_grid(root: Path, n_records: int) -> list[tuple[str, float, str]]:
    from pipeline.aggregate import aggregate
    from pipeline.report.html import render_report

    generate_seconds, records = timed(lambda: generate_grid(root, n_records))
    print(f"generated {len(records)} run records with their runs and artifacts in {generate_seconds:.1f} s")
    results = root / "results"
    aggregate_seconds, _ = timed(lambda: aggregate(records, results, metric="mae", n_boot=BOOTSTRAP))
    qc_paths, split_paths = grid_fixture.write_side_inputs(root)
    report_seconds, _ = timed(lambda: render_report(results, results / "report.html", {}, qc_paths, split_paths))
    scale = 10_000 / len(records)  # every stage of both is per run or per cell: linear in the records
    rows = [(f"aggregate {len(records)} run records", aggregate_seconds, "<= 10 s at 10,000 records"),
            (f"report of {len(records)} runs", report_seconds, "<= 30 s at 10,000 runs")]
    if scale != 1:  # the report is not linear in the runs (figures and tables per cell, not per run): measured only
        rows += [("aggregate, x 10,000 / records", aggregate_seconds * scale, "<= 10 s (linear extrapolation)")]
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=1_000,
                        help="run records of part 2 (10000 measures the goal's scale directly: a few minutes "
                             "on 2 cores; fewer are extrapolated linearly)")
    parser.add_argument("--models", type=int, default=6,
                        help="linear variants in the DAG part: 6 gives 1,116 jobs; 54 gives 10,044 (about 4 min "
                             "on 2 cores)")
    parser.add_argument("--skip-dag", action="store_true")
    parser.add_argument("--skip-grid", action="store_true")
    args = parser.parse_args()
    print(f"cores: {os.cpu_count()}, load average: {' '.join(f'{x:.1f}' for x in os.getloadavg())}")
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        if not args.skip_dag:
            rows += measure_dag(Path(folder) / "dag", args.models)
        if not args.skip_grid:
            rows += measure_grid(Path(folder) / "grid", args.records)
    print(f"{'what':<40} {'seconds':>8}  goal")
    for name, seconds, goal in rows:
        print(f"{name:<40} {seconds:>8.2f}  {goal}")


if __name__ == "__main__":
    main()
