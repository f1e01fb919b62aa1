"""The malformed-deliveries corpus (tests/data/bad/cases.yaml): every case ends in its expected outcome.

Each case is a raw dump, station table and data config as a user's own city would arrive. Ingestion runs
in-process (pipeline.ingest.run_ingest); config cases go through composition, validation and planning
(pipeline.workflow.plan_workflow); split cases also build every split and its windows. An error must be one
line naming file, row and field (and nothing may be written); a QC outcome must show its reason and count in
the QC JSON, with every delivered line accounted for. Any other exception is a traceback: the test fails.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml

from pipeline.errors import InputError
from pipeline.ingest import run_ingest

BAD = Path(__file__).parent / "data" / "bad"
REPO = Path(__file__).resolve().parents[1]
MANIFEST = yaml.safe_load((BAD / "cases.yaml").read_text())["cases"]
# The planning stage runs the smallest sweep; a case's own overrides replace these key by key.
PLAN_OVERRIDES = ["data=badcorpus", "sweep.models=[persistence]", "sweep.penalties=[erm]", "sweep.seeds=[0]",
                  "forecast.lookback_hours=3", "forecast.horizon_hours=1"]


def delivery(case: str, folder: Path) -> Path:
    """The case's files laid over base/ in `folder`, with config/ (data config as group option badcorpus)."""
    shutil.copytree(BAD / "base", folder, dirs_exist_ok=True)
    shutil.copytree(BAD / case, folder, dirs_exist_ok=True)
    shutil.copytree(REPO / "config", folder / "config")
    shutil.copy(folder / "data.yaml", folder / "config" / "data" / "badcorpus.yaml")
    return folder


def overrides_of(spec: dict) -> list[str]:
    merged = {item.partition("=")[0]: item for item in PLAN_OVERRIDES}
    merged.update({item.partition("=")[0]: item for item in spec.get("overrides", [])})
    return list(merged.values())


def ingest(folder: Path, city: str) -> dict:
    data = yaml.safe_load((folder / "data.yaml").read_text())
    return run_ingest(city, data["cities"][city], folder / "raw", folder / "stations.csv",
                      folder / "clean" / f"{city}.parquet", folder / "qc" / f"{city}.json",
                      config_file=str(folder / "data.yaml"))


def plan_and_build(folder: Path, spec: dict) -> None:
    """Planning; for split cases also ingestion of every city and every split with its windows."""
    from pipeline.config import to_container
    from pipeline.splits import build_split
    from pipeline.windows import build_windows
    from pipeline.workflow import plan_workflow

    plan = plan_workflow(overrides_of(spec), folder)
    if spec.get("stage") != "split":
        return
    for city in plan.cities:
        ingest(folder, city)
    forecast = to_container(plan.cfg.forecast)
    for item in plan.splits.values():
        paths = {city: str(folder / "clean" / f"{city}.parquet") for city in plan.split_cities(item["split_id"])}
        record = build_split(item, paths, forecast["lookback_hours"], forecast["horizon_hours"])
        build_windows(record, {city: pd.read_parquet(path) for city, path in paths.items()}, forecast)


def run_case(case: str, folder: Path):
    spec = MANIFEST[case]
    if spec.get("stage", "ingest") == "ingest":
        return ingest(folder, spec.get("city", "vellmar"))
    return plan_and_build(folder, spec)


def lookup(report, dotted: str):
    value = report
    for part in dotted.split("."):
        value = value[int(part)] if isinstance(value, list) else value[part]
    return value


def written_files(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for sub in ("clean", "qc") if (folder / sub).exists()
                  for p in (folder / sub).rglob("*") if p.is_file())


def test_the_corpus_has_at_least_30_cases_each_with_a_folder_and_an_outcome():
    assert len(MANIFEST) >= 30
    for case, spec in MANIFEST.items():
        assert set(spec["expect"]) in ({"error"}, {"qc"}), case
        assert (BAD / case).is_dir() or spec.get("overrides"), f"{case}: no folder and no overrides"
    folders = {p.name for p in BAD.iterdir() if p.is_dir()} - {"base"}
    assert folders <= set(MANIFEST), f"folders without a case: {sorted(folders - set(MANIFEST))}"


@pytest.mark.parametrize("case", [c for c, s in MANIFEST.items() if "error" in s["expect"]])
def test_bad_input_ends_in_one_line_naming_file_row_and_field(case, tmp_path):
    folder = delivery(case, tmp_path / "project") if (BAD / case).is_dir() else delivery("base", tmp_path / "project")
    with pytest.raises(InputError) as caught:
        run_case(case, folder)
    message = f"error: {caught.value}"
    assert "\n" not in message and "\r" not in message and "Traceback" not in message
    for expected in MANIFEST[case]["expect"]["error"]:
        assert expected in message, f"{case}: {expected!r} not in {message!r}"
    if MANIFEST[case].get("stage", "ingest") == "ingest":
        assert written_files(folder) == [], "a failed ingestion writes nothing"
    assert not (folder / "pwned-by-yaml").exists() and not (REPO / "pwned-by-yaml").exists()


@pytest.mark.parametrize("case", [c for c, s in MANIFEST.items() if "qc" in s["expect"]])
def test_messy_input_is_counted_in_the_qc_report_and_nothing_is_lost(case, tmp_path):
    folder = delivery(case, tmp_path / "project")
    report = run_case(case, folder)
    for path, expected in MANIFEST[case]["expect"]["qc"].items():
        assert lookup(report, path) == expected, f"{case}: {path} = {lookup(report, path)!r}, expected {expected!r}"
    rows = report["rows"]
    assert rows["read"] == rows["kept"] + sum(rows["dropped_by_reason"].values())
    for entry in report["files"]:  # every line is a header, a blank line or a row read
        lines = len(Path(entry["path"]).read_bytes().splitlines())
        header = report["format"].get("header_line", 1) if report["layout"] != "jsonl" else 0
        assert lines == header + entry["blank_lines"] + entry["rows"], entry["path"]
    assert rows["read"] == sum(entry["rows"] for entry in report["files"])
    city = report["city"]
    assert written_files(folder) == [f"clean/{city}.parquet", f"qc/{city}.json"]  # no temporary left over
    assert len(pd.read_parquet(folder / "clean" / f"{city}.parquet")) == report["clean_rows"]


@pytest.mark.parametrize("case", ["non_utf8_bytes", "misspelt_format_key", "empty_file"])
def test_the_ingest_rule_script_prints_one_line_and_exits_2(case, tmp_path):
    """The rule's own shell (pipeline.scripts._step) in a fresh process: one line on stderr, status 2."""
    folder = delivery(case, tmp_path / "project")
    program = (
        "import json, types, yaml\n"
        "from pipeline.scripts._step import run_step\n"
        "from pipeline.ingest import run_ingest\n"
        f"folder = {str(folder)!r}\n"
        "fmt = yaml.safe_load(open(folder + '/data.yaml'))['cities']['vellmar']\n"
        "job = types.SimpleNamespace(log=[folder + '/ingest.log'])\n"
        "run_step(job, lambda _: run_ingest('vellmar', fmt, folder + '/raw', folder + '/stations.csv',\n"
        "         folder + '/clean/vellmar.parquet', folder + '/qc/vellmar.json', config_file=folder + '/data.yaml'))\n")
    done = subprocess.run([sys.executable, "-c", program], capture_output=True, text=True, timeout=120, cwd=REPO)
    assert done.returncode == 2, done.stderr
    assert len(done.stderr.strip().splitlines()) == 1 and done.stderr.startswith("error: "), done.stderr
    assert written_files(folder) == []


@pytest.mark.parametrize("overrides", [["model=nosuch_net"], ["forecast.lookbak_hours=3"]])
def test_shiftgrid_run_refuses_a_bad_config_in_one_line_before_any_job(overrides, tmp_path):
    from project_copy import shiftgrid

    folder = delivery("base", tmp_path / "project")
    done = shiftgrid(folder, "run", *overrides_of({"overrides": overrides}), timeout=120)
    assert done.returncode == 2
    assert len(done.stderr.strip().splitlines()) == 1 and done.stderr.startswith("error: "), done.stderr
    assert not (folder / ".snakemake").exists() and not (folder / "results").exists()
