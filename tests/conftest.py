"""Session fixtures shared by the test files.

pytest puts this folder on sys.path (rootdir-relative "prepend" import mode, no __init__.py here), so the
helper modules beside the tests (project_copy, grid_fixture, tiny_windows, synthetic_clean, sem_dag) import
by name, with no path edits in the test files.
"""

from __future__ import annotations


import pytest

from sem_dag import SemRuns


@pytest.fixture(scope="session")
def sem_runs(tmp_path_factory) -> SemRuns:
    """The small structural-equation project; each experiment's DAG runs once per session, when first asked."""
    return SemRuns(tmp_path_factory.mktemp("sem_project"))
