"""Shared tiny DAG runs for the known-answer tests (imported by several test files, run once per session).

One temporary project folder (a copy of config/, Snakefile and the rule files, as tests/test_end_to_end.py
does) holds the SEM dumps (28 days), its clean tables and one results folder per experiment; each
experiment runs the real DAG once (`shiftgrid demo` + `shiftgrid run`) the first time a test asks for it.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from project_copy import REPO, make_project, shiftgrid  # noqa: E402,F401 (REPO: re-exported for the SEM tests)
# Small and fast: 28 days per station, the models that learn, one seed.
SEM_TEST_OVERRIDES = ["data.generator.days=28", "sweep.models=[ridge,linear]", "sweep.seeds=[0]",
                      "report.bootstrap_samples=100"]

_finished: dict[str, Path] = {}
_project: list[Path] = []




def sem_results(tmp_path_factory, experiment: str) -> tuple[Path, Path]:
    """(project folder, results folder) after one DAG run of `experiment` on the small SEM data."""
    if not _project:
        _project.append(make_project(tmp_path_factory.mktemp("sem_project")))
    project = _project[0]
    overrides = [f"experiment={experiment}", *SEM_TEST_OVERRIDES]
    if experiment not in _finished:
        if not (project / "data" / "sem" / "raw").exists():  # every experiment shares the same dumps
            written = shiftgrid(project, "demo", *overrides)
            assert written.returncode == 0, written.stderr[-3000:]
        ran = shiftgrid(project, "run", *overrides)
        assert ran.returncode == 0, (ran.stdout[-3000:], ran.stderr[-3000:])
        from pipeline.config import compose_config
        _finished[experiment] = project / compose_config(overrides, project).results_dir
    return project, _finished[experiment]
