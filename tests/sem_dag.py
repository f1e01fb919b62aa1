"""Shared tiny DAG runs for the known-answer tests (the session fixture `sem_runs` in conftest.py).

One temporary project folder (a copy of config/, Snakefile and the rule files, as tests/test_end_to_end.py
does) holds the SEM dumps (28 days), its clean tables and one results folder per experiment; each
experiment runs the real DAG once (`shiftgrid demo` + `shiftgrid run`) the first time a test asks for it.
"""

from __future__ import annotations

from pathlib import Path

from project_copy import make_project, shiftgrid

# Small and fast: 28 days per station, the models that learn, one seed.
SEM_TEST_OVERRIDES = ["data.generator.days=28", "sweep.models=[ridge,linear]", "sweep.seeds=[0]",
                      "report.bootstrap_samples=100"]


class SemRuns:
    """One temporary project holding the SEM dumps (shared by every experiment) and a results folder per
    experiment; `results(experiment)` runs the real DAG the first time an experiment is asked for."""

    def __init__(self, folder: Path):
        self.project = make_project(folder)
        self._finished: dict[str, Path] = {}

    def results(self, experiment: str) -> tuple[Path, Path]:
        """(project folder, results folder) after one DAG run of `experiment` on the small SEM data."""
        overrides = [f"experiment={experiment}", *SEM_TEST_OVERRIDES]
        if experiment not in self._finished:
            if not (self.project / "data" / "sem" / "raw").exists():  # every experiment shares the dumps
                written = shiftgrid(self.project, "demo", *overrides)
                assert written.returncode == 0, written.stderr[-3000:]
            ran = shiftgrid(self.project, "run", *overrides)
            assert ran.returncode == 0, (ran.stdout[-3000:], ran.stderr[-3000:])
            from pipeline.config import compose_config
            self._finished[experiment] = self.project / compose_config(overrides, self.project).results_dir
        return self.project, self._finished[experiment]
