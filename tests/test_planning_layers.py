"""Planning and the command line load neither torch nor MLflow; the plan is cached and re-checked.

Imports are checked in fresh interpreters (subprocess), since this test process has loaded torch already.
"""

import json
import subprocess
import sys
from pathlib import Path

import pytest

from project_copy import make_project

from pipeline.cli import COMMANDS

REPO = Path(__file__).resolve().parents[1]
HEAVY = ("torch", "mlflow")


def loaded_after(code: str, cwd: Path = REPO) -> list[str]:
    """Top-level heavy packages in sys.modules after running `code` in a fresh interpreter."""
    probe = (f"import sys, json\n{code}\n"
             f"print(json.dumps(sorted({{m.split('.')[0] for m in sys.modules}} & set({HEAVY!r}))))")
    done = subprocess.run([sys.executable, "-c", probe], cwd=cwd, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_importing_the_planning_layer_loads_neither_torch_nor_mlflow():
    assert loaded_after("import pipeline.workflow, pipeline.config, pipeline.models, pipeline.penalties, "
                        "pipeline.fit_config, pipeline.provenance, pipeline.outdated") == []


def test_help_of_the_command_and_of_every_sub_command_loads_neither():
    help_of = ("from pipeline import cli\nfor argv in {argvs!r}:\n    try:\n        cli.main(argv)\n"
               "    except SystemExit:\n        pass")
    argvs = [["--help"]] + [[name, "--help"] for name in COMMANDS]
    assert loaded_after(help_of.format(argvs=argvs)) == []


def test_planning_a_sweep_with_torch_families_loads_neither(tmp_path):
    project = make_project(tmp_path / "project")
    code = ("from pipeline.workflow import plan_workflow\n"
            f"plan = plan_workflow(['experiment=tiny', 'sweep.penalties=[erm]'], {str(project)!r}, cache=False)\n"
            "assert plan.trainable_models == ['linear', 'lstm'], plan.trainable_models")
    assert loaded_after(code) == []


def test_closed_form_families_fit_and_predict_without_torch():
    code = ("import numpy as np\nfrom pipeline.models import build_model\n"
            "from tiny_windows import TinyWindows\n"
            "rng = np.random.default_rng(0)\n"
            "train = TinyWindows(X=rng.normal(size=(40, 30, 2)).astype('float32'),\n"
            "                    y=rng.normal(size=(40, 3)).astype('float32'), env=np.zeros(40, dtype='int64'),\n"
            "                    env_names=['a'])\n"
            "for family in ('persistence', 'seasonal_naive', 'ridge', 'var'):\n"
            "    model = build_model(family, {}, seed=0).fit(train)\n"
            "    assert model.predict(train.X).shape == (40, 3)\n"
            "    fresh = build_model(family, {}, seed=0).load_state_dict(model.state_dict())\n"
            "    assert np.array_equal(fresh.predict(train.X), model.predict(train.X))")
    assert loaded_after(code, cwd=REPO / "tests") == []


def test_validation_checks_hyperparameter_values_not_only_names():
    from pipeline.config import compose_config, validate
    from pipeline.errors import InputError

    with pytest.raises(InputError, match="model.heads"):
        validate(compose_config(["model=transformer", "model.heads=3"], REPO))
    with pytest.raises(InputError, match="tracking.dependency_changes"):
        validate(compose_config(["tracking.dependency_changes=sometimes"], REPO))


def test_the_plan_is_cached_and_recomputed_when_an_input_changes(tmp_path, monkeypatch):
    from pipeline import workflow

    project = make_project(tmp_path / "project")
    overrides = ["experiment=tiny", "sweep.models=[persistence]"]
    first = workflow.plan_workflow(overrides, project)
    calls = []
    composed = workflow.compose_plan
    monkeypatch.setattr(workflow, "compose_plan", lambda *a: calls.append(a) or composed(*a))
    again = workflow.plan_workflow(overrides, project)
    assert calls == [] and again.to_data() == first.to_data()  # a hit: Hydra not asked again
    from pipeline.canonical import to_container

    monkeypatch.setattr("pipeline.config.compose_config", lambda *a: calls.append(a))
    assert to_container(workflow.plan_config(overrides, project)) == to_container(first.cfg) and calls == []
    monkeypatch.undo()
    monkeypatch.setattr(workflow, "compose_plan", lambda *a: calls.append(a) or composed(*a))
    stations = project / "config" / "stations.csv"
    stations.write_text(stations.read_text() + "\n")  # a file the plan read, checked on load
    workflow.plan_workflow(overrides, project)
    report = project / "config" / "config.yaml"
    report.write_text(report.read_text().replace("figure_dpi: 100", "figure_dpi: 120"))
    changed = workflow.plan_workflow(overrides, project)
    assert len(calls) == 2 and changed.cfg.report.figure_dpi == 120
    moved = tmp_path / "moved"
    project.rename(moved)  # the plan does not depend on where the folder sits: still a hit
    assert workflow.plan_workflow(overrides, moved).to_data() == changed.to_data() and len(calls) == 2
