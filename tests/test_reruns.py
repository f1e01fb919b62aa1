"""Minimal re-runs, counted on the real DAG, plus `show` / `verify` / `runs` / `status` on real runs.

One tiny base run (3 cities, two explicit pairs so that some splits do not involve a given city,
persistence + ridge + linear x erm/irm, 1 seed) is shared by every case. Cases that only need to know
what Snakemake would schedule use `snakemake -n` and count its "Job stats" table per rule; case 1 (new
rows) and the superseded tag really execute. The temporary project holds its own copy of the `pipeline`
package (first on PYTHONPATH for every subprocess), so case 5 edits a model family's source file in that
copy, not in the repository: the digest the Snakefile computes is then the real one of the edited code.
"""

import hashlib
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from project_copy import make_project

from pipeline.outdated import count_by_rule, parse_dry_run

REPO = Path(__file__).resolve().parents[1]
OVERRIDES = ["experiment=rerun"]
PAIRS = [{"sources": ["arlenvik"], "target": "brumeholt"}, {"sources": ["brumeholt"], "target": "corvessa"}]
EXPERIMENT = {
    "data": {"generator": {"days": 12}},
    # One source city per pair: its stations are the environments, so the irm runs are really penalised.
    "split": {"schemes": ["pairs"], "pairs": PAIRS, "cities": ["arlenvik", "brumeholt", "corvessa"],
              "environment_fallback": "station"},
    "forecast": {"lookback_hours": 24, "horizon_hours": 6, "stride_hours": 2},
    "sweep": {"models": ["persistence", "ridge", "linear"], "penalties": ["erm", "irm"], "seeds": [0]},
    "fit": {"max_steps": 30, "eval_every": 10, "batch_size": 64},
    "penalty": {"warmup_steps": 10},
    "report": {"bootstrap_samples": 200},
    "tracking": {"experiment": "shiftgrid-rerun"},
}
TRAINING = ("train_model", "fit_baselines")


def write_experiment(project: Path, name: str, content: dict) -> None:
    import yaml

    text = "# @package _global_\n" + yaml.safe_dump(content, sort_keys=True)
    (project / "config" / "experiment" / f"{name}.yaml").write_text(text)


def environment(project: Path) -> dict:
    from pipeline.runner import job_environment

    return {**job_environment(), "PYTHONPATH": str(project)}


def shiftgrid(project: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "pipeline.cli", "--root", str(project), *args], cwd=project,
                          env=environment(project), capture_output=True, text=True, timeout=600)


def snakemake(project: Path, overrides: list[str], *extra: str) -> subprocess.CompletedProcess:
    from pipeline.runner import snakemake_command

    command = snakemake_command(overrides, root=project, extra=list(extra))
    return subprocess.run(command, cwd=project, env=environment(project), capture_output=True, text=True,
                          timeout=600)


def job_stats(text: str) -> dict[str, int]:
    """Snakemake's own per-rule table of a dry run (rule `all` and the total left out)."""
    counts, inside = {}, False
    for line in text.splitlines():
        if line.startswith("Job stats:"):
            inside = True
            continue
        parts = line.split()
        if inside and len(parts) == 2 and parts[1].isdigit() and parts[0] not in ("total", "all"):
            counts[parts[0]] = int(parts[1])
        elif inside and parts and parts[0] == "total":
            break
    return counts


def scheduled(project: Path, overrides: list[str] = OVERRIDES) -> tuple[dict[str, int], list]:
    result = snakemake(project, overrides, "-n")
    assert result.returncode == 0, result.stderr[-3000:]
    text = result.stdout + result.stderr
    jobs = parse_dry_run(text)
    counts = job_stats(text)
    assert counts == count_by_rule(jobs)  # our parser agrees with Snakemake's own table
    return counts, jobs


def training_jobs(jobs) -> set[tuple[str, str]]:
    """(split, model) of scheduled training jobs; the closed-form baselines of a split share one job
    (split, "baselines"), inside which unchanged runs are reused rather than retrained."""
    return {(j.wildcards["split_id"], j.wildcards.get("model", "baselines")) for j in jobs if j.rule in TRAINING}


def scheduled_while_edited(base: Path, path: Path, edited: bytes):
    """(job counts, jobs, `shiftgrid status` result) while `path` holds `edited`; the file is restored after."""
    original = path.read_bytes()
    path.write_bytes(edited)
    try:
        counts, jobs = scheduled(base)
        return counts, jobs, shiftgrid(base, "status", *OVERRIDES)
    finally:
        path.write_bytes(original)


def records(project: Path) -> dict[str, dict]:
    return {str(p.relative_to(project)): json.loads(p.read_text())
            for p in sorted((project / "results" / "runs").rglob("*.json"))}


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    project = make_project(tmp_path_factory.mktemp("rerun"), whole_package=True)
    write_experiment(project, "rerun", EXPERIMENT)
    written = shiftgrid(project, "demo", *OVERRIDES)
    assert written.returncode == 0, written.stderr[-3000:]
    ran = shiftgrid(project, "run", *OVERRIDES)
    assert ran.returncode == 0, (ran.stdout[-3000:], ran.stderr[-3000:])
    return project


@pytest.fixture(scope="module")
def plan(base):
    from pipeline.workflow import plan_workflow

    return plan_workflow(OVERRIDES, base)


def split_of(plan, source: str) -> str:
    return next(s for s, item in plan.splits.items() if item["sources"] == [source])


@pytest.mark.e2e
def test_base_run_is_complete_and_up_to_date(base, plan):
    assert len(records(base)) == 2 * (1 + 1 + 2)  # 2 splits x (persistence, ridge, linear erm + irm)
    counts, _ = scheduled(base)
    assert counts == {}
    status = shiftgrid(base, "status", *OVERRIDES)
    assert status.returncode == 0 and "up to date" in status.stdout


@pytest.mark.e2e
def test_a_copied_or_moved_project_stays_up_to_date(base, tmp_path):
    # Nothing that depends on where the folder sits is part of a job's identity (params): a copy with
    # timestamps kept, then the copy moved elsewhere, schedules nothing.
    copy = tmp_path / "copy"
    shutil.copytree(base, copy, symlinks=True, copy_function=shutil.copy2)
    assert (copy / "results" / "tracking.json").read_bytes() == (base / "results" / "tracking.json").read_bytes()
    assert scheduled(copy)[0] == {}
    moved = tmp_path / "elsewhere" / "moved"
    moved.parent.mkdir()
    os.rename(copy, moved)
    assert scheduled(moved)[0] == {}
    status = shiftgrid(moved, "status", *OVERRIDES)
    assert status.returncode == 0 and status.stdout.startswith("up to date"), (status.stdout, status.stderr)


@pytest.mark.e2e
def test_show_prints_every_section(base, plan):
    record = records(base)[plan.run_record(split_of(plan, "arlenvik"), {"model": "linear", "penalty": "irm", "seed": 0})]
    shown = shiftgrid(base, "show", record["run_id"], *OVERRIDES)
    assert shown.returncode == 0, shown.stderr
    out = shown.stdout
    for section in ("state: current", "sources     arlenvik", "target      brumeholt", "train ", "val ", "test ",
                    "data digests", "arlenvik", "-> same", "code digest", "git commit", "versions", "torch",
                    "resolved config", "model_name: linear", "metrics", "target_mae", "artifacts",
                    "model/model_state.pt", "run record", "linear/irm/0.json"):
        assert section in out, section
    assert out.index("target_mae") < out.index("compute_seconds")  # headline first
    assert "WARNING" not in out
    prefix = shiftgrid(base, "show", record["run_id"][:10], *OVERRIDES)
    assert prefix.returncode == 0 and record["run_id"] in prefix.stdout


@pytest.mark.e2e
def test_verify_reports_identical_and_touches_no_record(base, plan):
    before = records(base)
    record = before[plan.run_record(split_of(plan, "brumeholt"), {"model": "linear", "penalty": "irm", "seed": 0})]
    again = shiftgrid(base, "verify", record["run_id"], *OVERRIDES)
    assert again.returncode == 0, (again.stdout, again.stderr)
    assert "identical" in again.stdout and "timing metrics" in again.stdout
    assert records(base) == before  # no run record rewritten, nothing superseded
    from pipeline.tracking import client_for

    client = client_for(plan.tracking_uri)
    assert "superseded_by" not in client.get_run(record["run_id"]).data.tags
    scratch = client.get_experiment_by_name("shiftgrid-rerun-verify")
    assert scratch is not None and len(client.search_runs([scratch.experiment_id])) == 1


@pytest.mark.e2e
def test_case3_one_models_hyperparameter_reruns_only_that_model(base, plan):
    path = base / "config" / "model" / "ridge.yaml"
    counts, jobs, status = scheduled_while_edited(base, path, path.read_bytes().replace(b"alpha: 1.0", b"alpha: 3.0"))
    # every split's baselines job (ridge's runs are in each); persistence's runs are reused inside them
    assert counts == {"fit_baselines": 2, "aggregate_grid": 1, "render_report": 1}
    assert training_jobs(jobs) == {(split_id, "baselines") for split_id in plan.splits}
    assert "hyperparameters of model ridge changed: 2 training jobs" in status.stdout


@pytest.mark.e2e
def test_case4_report_option_reruns_only_aggregation(base):
    counts, jobs = scheduled(base, [*OVERRIDES, "report.figure_dpi=150"])
    assert counts == {"render_report": 1}
    counts, _ = scheduled(base, [*OVERRIDES, "report.metric=rmse"])
    assert counts == {"aggregate_grid": 1, "render_report": 1}
    status = shiftgrid(base, "status", *OVERRIDES, "report.figure_dpi=150")
    assert "report options" in status.stdout


@pytest.mark.e2e
def test_case5_code_of_one_family_reruns_only_that_family(base, plan):
    from pipeline import provenance

    # persistence lives in baselines.py; ridge and linear live elsewhere (the digest is per module file)
    assert provenance.family_module_file("persistence") != provenance.family_module_file("linear")
    module = base / "pipeline" / provenance.family_module_file("persistence")
    counts, jobs, status = scheduled_while_edited(base, module,
                                                  module.read_bytes() + b"\n# a comment changes the source digest\n")
    assert counts == {"fit_baselines": 2, "aggregate_grid": 1, "render_report": 1}
    assert training_jobs(jobs) == {(split_id, "baselines") for split_id in plan.splits}
    assert "code of persistence" in status.stdout
    assert scheduled(base)[0] == {}  # restored source: nothing to do again


@pytest.mark.e2e
def test_case6_new_city_runs_only_the_new_splits(base, plan):
    bigger = json.loads(json.dumps(EXPERIMENT))
    bigger["split"]["cities"].append("dunmarrow")
    bigger["split"]["pairs"].append({"sources": ["dunmarrow"], "target": "arlenvik"})
    write_experiment(base, "rerun_plus", bigger)
    counts, jobs = scheduled(base, ["experiment=rerun_plus"])
    assert counts == {"ingest_city": 1, "build_split": 1, "fit_baselines": 1, "train_model": 1,
                      "aggregate_grid": 1, "diagnose_shift": 1, "render_report": 1}
    assert [j.wildcards["city"] for j in jobs if j.rule == "ingest_city"] == ["dunmarrow"]
    new_splits = {split for split, _ in training_jobs(jobs)}  # the baselines of the old splits stay as they are
    assert len(new_splits) == 1 and new_splits.isdisjoint(plan.splits)
    status = shiftgrid(base, "status", "experiment=rerun_plus")
    assert "new splits: 1 (2 training jobs)" in status.stdout


@pytest.mark.e2e
def test_case2_touched_or_identical_dump_retrains_nothing(base, plan):
    raw = base / "data" / "raw"
    (raw / "corvessa").joinpath(next(p.name for p in (raw / "corvessa").iterdir())).touch()
    for path in (raw / "brumeholt").iterdir():
        path.write_bytes(path.read_bytes())  # rewritten, same content, newer time
    assert scheduled(base)[0] == {}  # Snakemake compares checksums of the raw inputs
    # Force a real re-ingestion of one city (phase 1 of `shiftgrid run`): the table is byte-identical ...
    clean = base / plan.clean_path("arlenvik")
    before = sha256(clean)
    forced = snakemake(base, OVERRIDES, "--until", "ingest_city", "--forcerun", plan.clean_path("arlenvik"))
    assert forced.returncode == 0, forced.stderr[-3000:]
    assert sha256(clean) == before
    # ... so phase 2 schedules no training (and nothing else) although the file is newer
    assert scheduled(base)[0] == {}


@pytest.mark.e2e
def test_case1_new_rows_rerun_only_splits_of_that_city_and_supersede(base, plan):
    from pipeline.runner import run_pipeline
    from pipeline.tracking import client_for

    touched = split_of(plan, "arlenvik")
    dump = next((base / "data" / "raw" / "arlenvik").glob("*.csv"))
    table = pd.read_csv(dump, dtype=str)
    times = pd.to_datetime(table["local_time"])
    last_day = table[times > times.max() - pd.Timedelta(days=1)].copy()  # 24 hours per station
    last_day["local_time"] = (times[last_day.index] + pd.Timedelta(days=1)).dt.strftime("%Y-%m-%d %H:%M")
    with open(dump, "a") as handle:
        last_day.to_csv(handle, header=False, index=False)
    counts, jobs = scheduled(base)
    assert counts == {"ingest_city": 1, "build_split": 1, "fit_baselines": 1, "train_model": 1,
                      "aggregate_grid": 1, "diagnose_shift": 1, "render_report": 1}
    assert training_jobs(jobs) == {(touched, "linear"), (touched, "baselines")}  # the other split is untouched
    status = shiftgrid(base, "status", *OVERRIDES)
    assert "new data for city arlenvik: 2 training jobs" in status.stdout

    before = records(base)
    env_before = dict(os.environ)
    os.environ["PYTHONPATH"] = str(base)  # the jobs import the project's copy of the package
    try:
        assert run_pipeline(OVERRIDES, root=base, quiet=True) == 0
    finally:
        os.environ.clear()
        os.environ.update(env_before)
    after = records(base)
    client = client_for(plan.tracking_uri)
    for path, old in before.items():
        new = after[path]
        if old["split_id"] == touched:
            assert new["run_id"] != old["run_id"] and new["supersedes"] == [old["run_id"]]
            assert client.get_run(old["run_id"]).data.tags["superseded_by"] == new["run_id"]
        else:
            # untouched split: none of its jobs ran, so its records are exactly as they were
            assert new == old
            assert "superseded_by" not in client.get_run(old["run_id"]).data.tags
    grid = pd.read_parquet(base / "results" / "grid.parquet")
    assert set(grid["run_id"]) == {r["run_id"] for r in after.values()}  # current runs only
    assert scheduled(base)[0] == {}

    listed = shiftgrid(base, "runs", *OVERRIDES, "--superseded", "--format", "json")
    assert {r["run_id"] for r in json.loads(listed.stdout)} == {r["run_id"] for r in before.values()
                                                                if r["split_id"] == touched}
    old_id = before[plan.run_record(touched, {"model": "linear", "penalty": "erm", "seed": 0})]["run_id"]
    shown = shiftgrid(base, "show", old_id, *OVERRIDES)
    assert "SUPERSEDED by run" in shown.stdout and "WARNING: the data of arlenvik changed" in shown.stdout
    refused = shiftgrid(base, "verify", old_id, *OVERRIDES)
    assert refused.returncode == 2 and refused.stderr.count("\n") == 1 and "--force" in refused.stderr
    forced = shiftgrid(base, "verify", old_id, *OVERRIDES, "--force")
    # on new data the re-trained run differs (exit 1, differences listed) unless nothing changed at all
    assert forced.returncode in (0, 1), forced.stderr
    assert ("identical" in forced.stdout) == (forced.returncode == 0)
    assert "WARNING: forced on changed data of arlenvik" in forced.stdout
    if forced.returncode == 1:
        assert "differences:" in forced.stdout
