"""Code digests come from the real import graph: every module a rule's job runs is in its digest, no other.

Edits are made on a copy of the package in tmp_path, never on the repository's files. The graph is read
with `ast` (pipeline.import_graph), so none of this imports the modules it digests.
"""

import shutil
from pathlib import Path

import pytest

from pipeline import provenance
from pipeline.errors import InputError
from pipeline.import_graph import ImportGraph, module_name

REPO = Path(__file__).resolve().parents[1]
CLOSED_FORM = ["persistence", "seasonal_naive", "ridge", "var"]
# (rule, model families its job runs): every rule with a script, training rules with typical families.
CASES = [(rule, None) for rule in provenance.rule_scripts() if rule not in ("train_model", "fit_baselines")] + [
    ("train_model", ["lstm"]), ("train_model", ["linear"]), ("fit_baselines", CLOSED_FORM)]


@pytest.fixture(scope="module")
def package(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("package") / "pipeline"
    shutil.copytree(REPO / "pipeline", folder, ignore=shutil.ignore_patterns("__pycache__"))
    return folder


def files_of(package: Path, rule: str, families) -> set[Path]:
    graph = provenance.import_graph(package)
    return set(graph.files(provenance.closure(provenance.rule_entry(rule, package), families, package)))


def test_every_rule_script_is_a_case():
    assert {rule for rule, _ in CASES} == set(provenance.rule_scripts())
    assert {"ingest_city", "build_split", "setup_tracking", "train_model", "fit_baselines", "aggregate_grid",
            "diagnose_shift", "render_report"} <= set(provenance.rule_scripts())


@pytest.mark.parametrize("rule,families", CASES, ids=[f"{r}-{'+'.join(f or [])}" for r, f in CASES])
def test_one_byte_edit_changes_the_digest_exactly_inside_the_closure(package, rule, families):
    inside = files_of(package, rule, families)
    before = provenance.code_digest(rule, families, package)
    for path in sorted(package.rglob("*.py")):
        original = path.read_bytes()
        path.write_bytes(original + b"#")
        try:
            changed = provenance.code_digest(rule, families, package) != before
        finally:
            path.write_bytes(original)
        assert changed == (path in inside), (path.relative_to(package), "in closure" if path in inside else "outside")
    assert provenance.code_digest(rule, families, package) == before  # every file restored


def test_closures_hold_what_the_hand_lists_missed(package):
    def names(rule, families=None):
        return {module_name(package, p) for p in files_of(package, rule, families)}

    training = names("train_model", ["lstm"])
    assert {"pipeline.features", "pipeline.variables", "pipeline.splits", "pipeline.train_loop",
            "pipeline.scripts.train_model"} <= training
    assert {"pipeline.models.neural", "pipeline.models.networks"} <= names("train_model", ["linear"])
    assert {"pipeline.selection", "pipeline.ingest.qc", "pipeline.caution"} <= names("render_report")
    # other families' modules are pruned; the closed-form job runs neither the networks nor the torch loop
    assert "pipeline.models.baselines" not in training
    baselines = names("fit_baselines", CLOSED_FORM)
    assert {"pipeline.models.baselines", "pipeline.models.linear_models"} <= baselines
    assert not {"pipeline.models.neural", "pipeline.models.networks", "pipeline.train_loop"} & baselines
    # the report does not run command-line code, and no job runs the command line
    assert not any(name.startswith("pipeline.commands") for name in names("render_report"))
    assert all("pipeline.cli" not in names(rule, families) for rule, families in CASES)


def test_family_edits_rerun_only_their_family(package):
    neural = package / provenance.family_module_file("lstm", package)
    baselines = package / provenance.family_module_file("persistence", package)
    assert neural.name == "neural.py" and baselines.name == "baselines.py"
    lstm, closed = provenance.code_digest("train_model", ["lstm"], package), \
        provenance.code_digest("fit_baselines", CLOSED_FORM, package)
    original = neural.read_bytes()
    neural.write_bytes(original + b"#")
    try:
        assert provenance.code_digest("train_model", ["lstm"], package) != lstm
        assert provenance.code_digest("fit_baselines", CLOSED_FORM, package) == closed
    finally:
        neural.write_bytes(original)


def write(folder: Path, name: str, text: str) -> None:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)


def test_graph_follows_relative_function_level_and_submodule_imports(tmp_path):
    package = tmp_path / "pipeline"
    write(package, "__init__.py", "")
    write(package, "a.py", "import numpy as np\n\ndef later():\n    from pipeline.sub import b\n")
    write(package, "sub/__init__.py", "")
    write(package, "sub/b.py", "from . import c\nfrom .c import VALUE\nimport torch.nn\n")
    write(package, "sub/c.py", "VALUE = 1\n")
    write(package, "d.py", "from pipeline import a\n")
    write(package, "unused.py", "import pipeline.d\n")
    graph = ImportGraph(package)
    reached = graph.closure(["pipeline.d"])
    assert reached == {"pipeline", "pipeline.a", "pipeline.d", "pipeline.sub", "pipeline.sub.b", "pipeline.sub.c"}
    assert graph.external(reached) == {"numpy", "torch"}
    assert graph.closure(["pipeline.d"], prune={"pipeline.sub.b"}) == {"pipeline", "pipeline.a", "pipeline.d",
                                                                       "pipeline.sub"}


def test_family_modules_are_found_in_the_source_without_importing():
    found = provenance.import_graph().family_modules()
    from pipeline.models import MODEL_FAMILIES

    assert set(found) == set(MODEL_FAMILIES)
    assert all(found[name] == cls.__module__ for name, cls in MODEL_FAMILIES.items())


def test_a_module_that_does_not_parse_is_named_in_one_line(tmp_path):
    package = tmp_path / "pipeline"
    write(package, "__init__.py", "")
    write(package, "broken.py", "def f(:\n")
    with pytest.raises(InputError) as caught:
        ImportGraph(package).closure(["pipeline.broken"])
    assert "broken.py:1" in str(caught.value) and "\n" not in str(caught.value)


def test_unknown_family_and_rule_are_input_errors():
    with pytest.raises(InputError, match="prophet"):
        provenance.code_digest("train_model", ["prophet"])
    with pytest.raises(InputError, match="no_such_rule"):
        provenance.code_digest("no_such_rule")
