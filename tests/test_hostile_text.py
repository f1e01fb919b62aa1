"""Hostile text: names and values from data files and configs never reach a shell, a loader or a page raw.

- names that become paths, wildcards and tags are checked at the boundary (station table, sweep names);
- everything the report shows is escaped (a name holding <script> included);
- error lines on the terminal carry no control characters;
- YAML is loaded safely, config values are never evaluated, weights go through torch's weights-only
  loader, and the package opens no listening socket (a listener would bind 127.0.0.1): a static scan of the
  package finds any call that would break this, and the scan itself is shown to see each one.
"""

from __future__ import annotations

import ast
import json
from pathlib import Path

import pytest

from pipeline.errors import InputError

REPO = Path(__file__).resolve().parents[1]
HOSTILE = "<script>alert('x')</script>"


# ---- the static scan ---------------------------------------------------------------------------------

UNSAFE_ATTRIBUTE_CALLS = {
    ("yaml", "load"), ("yaml", "unsafe_load"), ("yaml", "full_load"), ("yaml", "load_all"),
    ("yaml", "unsafe_load_all"), ("yaml", "full_load_all"), ("pickle", "load"), ("pickle", "loads"),
    ("marshal", "loads"), ("os", "system"), ("os", "popen"), ("OmegaConf", "register_new_resolver"),
    ("socket", "socket"), ("socket", "create_server"), ("http.server", "HTTPServer"),
}
UNSAFE_NAMES = {"eval", "exec", "compile", "instantiate", "HTTPServer", "ThreadingHTTPServer", "make_server"}
UNSAFE_METHODS = {"bind", "listen", "serve_forever"}


def _dotted(node) -> str:
    if isinstance(node, ast.Name):
        return node.id
    if isinstance(node, ast.Attribute):
        return f"{_dotted(node.value)}.{node.attr}"
    return ""


def unsafe_calls(path: Path) -> list[str]:
    """`LINE: what` for every call that could run delivered text, unpickle, or listen on a socket."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Constant) and node.value == "0.0.0.0":
            found.append(f"{node.lineno}: binds every interface")
        if not isinstance(node, ast.Call):
            continue
        name = _dotted(node.func)
        owner, _, attribute = name.rpartition(".")
        keywords = {k.arg: k.value for k in node.keywords}
        if (owner, attribute) in UNSAFE_ATTRIBUTE_CALLS or (not owner and name in UNSAFE_NAMES) \
                or attribute in UNSAFE_METHODS:
            found.append(f"{node.lineno}: {name}")
        elif name == "torch.load" and not (isinstance(keywords.get("weights_only"), ast.Constant)
                                           and keywords["weights_only"].value is True):
            found.append(f"{node.lineno}: torch.load without weights_only=True")
        elif isinstance(keywords.get("shell"), ast.Constant) and keywords["shell"].value is True:
            found.append(f"{node.lineno}: {name} with shell=True")
    return found


def test_the_package_loads_nothing_unsafely_evaluates_nothing_and_listens_nowhere():
    files = sorted((REPO / "pipeline").rglob("*.py")) + sorted((REPO / "bench").glob("*.py"))
    found = [f"{path.relative_to(REPO)}:{hit}" for path in files for hit in unsafe_calls(path)]
    assert not found, "; ".join(found)


def test_the_scan_sees_each_unsafe_call(tmp_path):
    sample = tmp_path / "sample.py"
    sample.write_text("import yaml, pickle, os, socket, subprocess, torch\n"
                      "yaml.load(t)\npickle.loads(b)\neval(s)\nos.system(c)\ntorch.load(p)\n"
                      "torch.load(p, weights_only=False)\nsubprocess.run(c, shell=True)\ns.bind(('0.0.0.0', 80))\n"
                      "instantiate(cfg)\ntorch.load(p, weights_only=True)\nyaml.safe_load(t)\n")
    lines = [hit.split(":")[0] for hit in unsafe_calls(sample)]
    assert sorted(set(map(int, lines))) == [2, 3, 4, 5, 6, 7, 8, 9, 10]


# ---- weights ------------------------------------------------------------------------------------------

class _Payload:
    """Unpickling this object runs code (here: creates a file), as a hostile weights file would."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


def test_weights_go_through_the_weights_only_loader(tmp_path):
    import torch

    from pipeline.verify import load_weights

    marker, hostile = tmp_path / "payload-ran", tmp_path / "model_state.pt"
    torch.save({"layer.weight": torch.zeros(2), "extra": _Payload(marker)}, hostile)
    torch.load(hostile, weights_only=False)  # the payload is live: a plain unpickler runs it
    assert marker.exists()
    marker.unlink()
    with pytest.raises(InputError) as refused:
        load_weights(hostile)
    assert not marker.exists()
    assert "weights-only loader refused it" in str(refused.value) and "\n" not in str(refused.value)
    plain = tmp_path / "plain.pt"
    torch.save({"layer.weight": torch.ones(3)}, plain)
    assert torch.equal(load_weights(plain)["layer.weight"], torch.ones(3))


# ---- the report -----------------------------------------------------------------------------------------

def test_the_report_escapes_every_name_it_shows(tmp_path):
    """Hostile text in the title, the experiment, a QC report and a split record: shown escaped, never as markup."""
    from grid_fixture import build_grid_store, shift_table, write_side_inputs

    from pipeline.aggregate import aggregate
    from pipeline.report.html import render_report

    records, _ = build_grid_store(tmp_path)
    aggregate(records, tmp_path / "results", metric="mae", n_boot=50)
    meta_path = tmp_path / "results" / "grid_meta.json"
    meta = json.loads(meta_path.read_text())
    meta["experiment"] = [HOSTILE]
    meta_path.write_text(json.dumps(meta))
    qc_paths, split_paths = write_side_inputs(tmp_path)
    hostile_qc = json.loads(qc_paths[0].read_text())
    hostile_qc["gaps"] = {HOSTILE: {}}
    hostile_qc["unknown_station_codes"] = {HOSTILE: 3}
    qc_paths.append(tmp_path / "data" / "qc" / "<img src=x onerror=alert(1)>.json")
    qc_paths[-1].write_text(json.dumps(hostile_qc))
    split = json.loads(split_paths[0].read_text())
    split.update(scheme=HOSTILE, environment="<b onmouseover=alert(1)>")
    split_paths[0].write_text(json.dumps(split))
    shift_table().to_csv(tmp_path / "results" / "shift.csv", index=False)
    page = render_report(tmp_path / "results", tmp_path / "report.html", {"title": HOSTILE, "figure_dpi": 40},
                         qc_paths, split_paths, tmp_path / "results" / "shift.csv")
    lowered = page.lower()
    assert "<script" not in lowered and "<img src=x" not in lowered and "<b onmouseover" not in lowered
    # shown, as text: Jinja2's autoescape (MarkupSafe) writes the quote as &#39;
    assert "&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt;" in page
    assert "&lt;img src=x onerror=alert(1)&gt;" in page


# ---- names at the boundary and the terminal ---------------------------------------------------------------

@pytest.mark.parametrize("override,field", [("sweep.models=[persistence,../model/ridge]", "sweep.models"),
                                            ("penalty=../penalty/irm", "sweep.penalties"),
                                            ("model=../model/lstm", "sweep.models")])
def test_a_sweep_name_that_would_escape_the_results_folder_is_refused(override, field):
    from pipeline.workflow import plan_workflow

    with pytest.raises(InputError) as refused:
        plan_workflow([override, "sweep.seeds=[0]"], REPO)
    assert f"config: {field}: '" in str(refused.value) and "must match" in str(refused.value)


def test_an_error_line_on_the_terminal_carries_no_control_characters(capsys, tmp_path):
    from project_copy import make_project

    from pipeline.cli import main

    project = make_project(tmp_path / "project")
    status = main(["--root", str(project), "run", "experiment=tiny", "split.cities=[arlenvik,\x1b[2J\x07x]"])
    err = capsys.readouterr().err
    assert status == 2 and err.startswith("error: ") and err.count("\n") == 1
    assert not any(ord(c) < 32 and c != "\n" for c in err), repr(err)
    assert "\\x1b" in err  # shown escaped, so the user still sees what was typed


def test_yaml_in_the_config_tree_cannot_run_code(tmp_path):
    """Hydra's loader is a safe loader: a !!python tag in a config file is refused in one line."""
    from project_copy import make_project

    from pipeline.config import compose_config

    project = make_project(tmp_path / "project")
    marker = tmp_path / "pwned"
    (project / "config" / "experiment" / "evil.yaml").write_text(
        f"# @package _global_\nresults_dir: !!python/object/apply:os.system ['touch {marker}']\n")
    with pytest.raises(InputError) as refused:
        compose_config(["experiment=evil"], project)
    assert "evil.yaml:2" in str(refused.value) and "python/object/apply:os.system" in str(refused.value)
    assert not marker.exists()


def test_the_readme_shows_the_tracking_ui_bound_to_localhost():
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    hints = [line for line in readme.splitlines() if "mlflow ui" in line]
    assert hints and all("--host 127.0.0.1" in line for line in hints)
