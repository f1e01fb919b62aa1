"""Unit tests of the audit helpers: dry-run parsing, bitwise comparison, digests, bad input (exit 2, one line).

The DAG-based checks of `show`, `verify`, `runs` and `status` on real runs are in tests/test_reruns.py
(they share its tiny base run).
"""

import json
import struct
from pathlib import Path

import pytest
import torch

from pipeline import audit, outdated
from pipeline.cli import main
from pipeline.verify import check_data, compare_metrics, compare_weights
from pipeline.errors import InputError

REPO = Path(__file__).resolve().parents[1]

DRY_RUN = """Building DAG of jobs...
[Wed Dec  2 02:16:43 2026]
rule fit_baselines:
    input: data/clean/a.parquet, results/splits/pairs-a-to-b-123abc.json
    output: results/runs/pairs-a-to-b-123abc/ridge/na/0.json
    jobid: 10
    reason: Params have changed since last execution: before: 'x' now: 'y'
    wildcards: split_id=pairs-a-to-b-123abc
    resources: tmpdir=/tmp
[Wed Dec  2 02:16:43 2026]
localrule render_report:
    input: results/grid.parquet
    output: results/report.html
    reason: Input files updated by another job: results/grid.parquet
    resources: tmpdir=/tmp
[Wed Dec  2 02:16:43 2026]
rule all:
    input: results/grid.csv, results/report.html
    jobid: 0
    reason: Input files updated by another job: results/grid.csv, results/report.html
Job stats:
job               count
--------------  -------
fit_baselines          1
render_report         1
all                   1
total                 3
"""


def test_parse_dry_run_reads_rule_wildcards_reason_and_leaves_out_all():
    jobs = outdated.parse_dry_run(DRY_RUN)
    assert [j.rule for j in jobs] == ["fit_baselines", "render_report"]
    assert jobs[0].wildcards == {"split_id": "pairs-a-to-b-123abc"}  # a split's baselines job: no model
    assert jobs[0].output == ["results/runs/pairs-a-to-b-123abc/ridge/na/0.json"]
    assert jobs[0].reason.startswith("Params have changed")
    assert outdated.count_by_rule(jobs) == {"fit_baselines": 1, "render_report": 1}


def test_format_status_nothing_to_do():
    assert outdated.format_status([], []) == "up to date: nothing to run"


def test_stored_params_and_slice_change_name_the_changed_section(tmp_path):
    output = "results/runs/x/ridge/na/0.json"
    meta_dir = tmp_path / ".snakemake" / "metadata"
    meta_dir.mkdir(parents=True)
    import base64
    def units(alpha):
        job = {"model_name": "ridge", "penalty_name": "na", "model": {"alpha": alpha}, "fit": {"lr": 0.1}}
        return json.dumps([{"job": job, "seed": 0}], sort_keys=True)
    before = units(1.0)
    (meta_dir / base64.urlsafe_b64encode(output.encode()).decode()).write_text(
        json.dumps({"params": [repr(before), repr("abc123")]}))
    old = outdated.stored_params(outdated.stored_metadata(tmp_path, output))
    assert old == [before, "abc123"]
    assert outdated.unit_changes(old, units(2.0)) == [("ridge", "na", "model")]


def test_raw_content_changed_compares_stored_sha256(tmp_path):
    import hashlib
    raw = tmp_path / "dump.csv"
    raw.write_text("a,b\n1,2\n")
    meta = {"input_checksums": {"dump.csv": "sha256:" + hashlib.sha256(raw.read_bytes()).hexdigest()}}
    assert outdated.raw_content_changed(meta, tmp_path) == []
    raw.write_text("a,b\n1,2\n3,4\n")
    assert outdated.raw_content_changed(meta, tmp_path) == ["dump.csv"]


def test_compare_metrics_is_bitwise_and_skips_timing():
    a = {"target_mae": 1.0, "fit_seconds": 3.0, "x": float("nan")}
    assert compare_metrics(a, {"target_mae": 1.0, "fit_seconds": 9.0, "x": float("nan")}) == []
    next_up = struct.unpack("<d", struct.pack("<q", struct.unpack("<q", struct.pack("<d", 1.0))[0] + 1))[0]
    differences = compare_metrics(a, {"target_mae": next_up, "fit_seconds": 3.0, "x": float("nan")})
    assert len(differences) == 1 and "target_mae" in differences[0]  # one ulp apart is a difference
    assert "only in the original" in compare_metrics({"y": 1.0}, {})[0]


def test_compare_weights_exact(tmp_path):
    state = {"w": torch.arange(6, dtype=torch.float32).reshape(2, 3), "b": torch.zeros(3)}
    torch.save(state, tmp_path / "a.pt")
    torch.save({k: v.clone() for k, v in state.items()}, tmp_path / "b.pt")
    assert compare_weights(tmp_path / "a.pt", tmp_path / "b.pt") == []
    changed = {k: v.clone() for k, v in state.items()}
    changed["w"][0, 0] = torch.nextafter(torch.tensor(0.0), torch.tensor(1.0))
    torch.save(changed, tmp_path / "c.pt")
    assert compare_weights(tmp_path / "a.pt", tmp_path / "c.pt") == ["weights w: differ (largest absolute difference 1.4e-45)"]


def test_digests_then_now_and_refusal(tmp_path):
    clean = tmp_path / "data" / "clean"
    clean.mkdir(parents=True)
    (clean / "a.parquet").write_bytes(b"one")
    then = audit.digests_then({"data_digest.a": audit.provenance.file_digest(clean / "a.parquet"),
                               "data_digest.b": "0" * 64, "model": "x"})
    assert list(then) == ["a", "b"]
    now = audit.digests_now(list(then), tmp_path, "data/clean")
    assert now["b"] is None and audit.changed_cities(then, now) == ["b"]
    with pytest.raises(InputError, match="--force"):
        check_data(then, now, "r1", force=False)
    assert check_data(then, now, "r1", force=True) == ["b"]


def test_find_record_by_run_id(tmp_path):
    folder = tmp_path / "runs" / "s" / "m" / "erm"
    folder.mkdir(parents=True)
    (folder / "0.json").write_text(json.dumps({"run_id": "new", "supersedes": ["old"]}))
    assert audit.find_record(tmp_path, "new")[1]["run_id"] == "new"
    assert audit.find_record(tmp_path, "old")[0] == folder / "0.json"
    assert audit.find_record(tmp_path, "other") == (None, None)


@pytest.mark.parametrize("command", [["show", "abc"], ["verify", "abc"], ["runs"]])
def test_missing_store_is_one_line_exit_2(command, tmp_path, capsys):
    missing = f"sqlite:///{tmp_path / 'none.db'}"
    assert main(["--root", str(REPO), *command, "--tracking-uri", missing]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "does not exist" in err
    assert not (tmp_path / "none.db").exists()  # no empty store created


def test_unknown_run_id_is_one_line_exit_2(tmp_path, capsys):
    from pipeline.tracking import setup_store

    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    setup_store(uri, "e", (tmp_path / "art").as_uri())
    capsys.readouterr()  # MLflow's own schema-creation log lines are not ours
    assert main(["--root", str(REPO), "show", "0123456789abcdef", "--tracking-uri", uri]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no MLflow run" in err
    assert main(["--root", str(REPO), "runs", "--tracking-uri", uri, "--experiment", "e", "--since", "yesterday"]) == 2
    assert "YYYY-MM-DD" in capsys.readouterr().err


def test_short_run_prefix_says_it_is_too_short(tmp_path, capsys):
    from pipeline.tracking import setup_store

    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    setup_store(uri, "e", (tmp_path / "art").as_uri())
    capsys.readouterr()
    assert main(["--root", str(REPO), "show", "abc", "--tracking-uri", uri]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "too short" in err and "at least 6" in err


def test_missing_experiment_names_the_override_that_finds_the_stored_one(tmp_path, capsys):
    from pipeline.tracking import setup_store

    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    setup_store(uri, "shiftgrid-demo", (tmp_path / "art").as_uri())  # the demo experiment's MLflow name
    capsys.readouterr()
    assert main(["--root", str(REPO), "runs", "--tracking-uri", uri]) == 2  # default config: experiment "shiftgrid"
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "experiment=demo" in err


def test_show_wraps_every_line_to_100_columns():
    lines = ["run " + "a" * 32 + "  (" + "x" * 80 + ")", "  " + "word " * 40, "short"]
    shown = audit.fit_to_screen(lines).splitlines()
    assert max(map(len, shown)) <= 100 and shown[-1] == "short"
    assert "".join(shown).replace(" ", "") == "".join(lines).replace(" ", "")  # nothing lost


def test_runs_table_has_the_target_city_in_its_own_column():
    from pipeline.commands.runs import format_table

    row = {"run_id": "f" * 32, "started": "2026-12-02 06:00", "split_id": "s", "sources": "arlenvik+brumeholt",
           "target": "corvessa", "model": "lstm", "penalty": "irm", "seed": "0", "state": "current",
           "superseded_by": "", "target_mae": 3.21}
    header, line, _ = format_table([row]).splitlines()
    target_at = header.index("target")
    assert line[target_at:target_at + len("corvessa")] == "corvessa"
    assert "->" not in header and max(len(header), len(line)) <= 100


def test_runs_names_each_runs_role_and_a_finished_trial_is_never_current(tmp_path):
    """The grid reads a search's parent, not its trials: `--current` must not list a trial."""
    from argparse import Namespace

    from pipeline import tracking
    from pipeline.commands.runs import search

    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    experiment = tracking.setup_store(uri, "e", (tmp_path / "art").as_uri())
    client = tracking.client_for(uri)
    ids = {}
    for name, tags in (("plain", {}), ("parent", {tracking.ROLE_TAG: "parent"}),
                       ("trial", {tracking.ROLE_TAG: "trial"})):
        ids[name] = client.create_run(experiment, tags={"model": "linear", **tags}).info.run_id
        client.set_terminated(ids[name])
    filters = dict(target=None, model=None, penalty=None, seed=None, variable=None, since=None, source=None,
                   superseded=False)
    listed = {row["run_id"]: row for row in search(client, experiment, Namespace(current=False, **filters))}
    assert {name: (listed[i]["role"], listed[i]["state"]) for name, i in ids.items()} == {
        "plain": ("run", "current"), "parent": ("parent", "current"), "trial": ("trial", "trial")}
    current = {row["run_id"] for row in search(client, experiment, Namespace(current=True, **filters))}
    assert current == {ids["plain"], ids["parent"]}


def test_a_damaged_config_artifact_is_one_line(tmp_path, monkeypatch):
    bad = tmp_path / "resolved_config.yaml"
    bad.write_text("job: !!python/object/apply:os.system ['true']\nsplit: {}\n")
    monkeypatch.setattr(audit, "download_artifact", lambda client, run_id, path, workdir: bad)
    with pytest.raises(InputError) as caught:
        audit.resolved_config(None, "abc123")
    assert "not readable YAML" in str(caught.value) and "\n" not in str(caught.value)


def test_an_artifact_is_found_after_the_project_folder_moved(tmp_path):
    """The SQLite store records absolute artifact paths; after `mv old new` the audit commands read each
    artifact beside the store's new place instead of failing on the old one."""
    import shutil

    from pipeline import tracking

    old = tmp_path / "old" / "results"
    old.mkdir(parents=True)
    uri = tracking.resolve_tracking_uri(None, old)
    experiment = tracking.setup_store(uri, "moved", tracking.artifact_location(old))
    client = tracking.client_for(uri)
    run_id = client.create_run(experiment).info.run_id
    note = tmp_path / "resolved_config.yaml"
    note.write_text("job: {}\nsplit: {}\n")
    client.log_artifact(run_id, str(note), "config")
    client.set_terminated(run_id)
    shutil.move(str(tmp_path / "old"), str(tmp_path / "new"))
    moved = tracking.client_for(tracking.resolve_tracking_uri(None, tmp_path / "new" / "results"))
    assert audit.resolved_config(moved, run_id) == {"job": {}, "split": {}}
    shutil.rmtree(tmp_path / "new" / "results" / "mlartifacts")
    with pytest.raises(InputError, match=f"run {run_id} has no readable artifact"):
        audit.resolved_config(moved, run_id)
