"""Session fixtures shared by the test files.

pytest puts this folder on sys.path (rootdir-relative "prepend" import mode, no __init__.py here), so the
helper modules beside the tests (project_copy, grid_fixture, tiny_windows, synthetic_clean, sem_dag) import
by name, with no path edits in the test files.

`make test` runs the files on two pytest-xdist workers. A test file is one unit of work, sent whole to one
worker, so a module fixture (a DAG run shared by a file's tests) is built once; the files that share the
session's SEM runs form one unit, so each SEM experiment's DAG also runs once. Units start slowest first
(a greedy schedule then ends the two workers close together).
"""

from __future__ import annotations


import pytest

from sem_dag import SemRuns

# Files whose tests ask `sem_runs` for the same experiments: one unit of work.
SEM_RUN_FILES = ("test_classic_settings.py", "test_sem_known_answers.py")
# The files that run real DAGs, slowest first (measured with --durations); an unlisted file starts after
# them, in collection order. The order changes only how soon a worker is free, never what a test checks.
SLOWEST_FIRST = ("test_reruns.py", "test_end_to_end.py", *SEM_RUN_FILES, "test_faults_e2e.py",
                 "test_experiments_dry_run.py", "test_own_variable_e2e.py", "test_airports_scenario.py",
                 "test_store_faults.py", "test_report.py", "test_aggregate.py", "test_grid_command.py")


def _file_of(nodeid: str) -> str:
    return nodeid.split("::", 1)[0].rpartition("/")[2]


def pytest_collection_modifyitems(items):
    """Slowest files first; a stable sort keeps each file's tests together and in their own order."""
    rank = {name: position for position, name in enumerate(SLOWEST_FIRST)}
    items.sort(key=lambda item: rank.get(_file_of(item.nodeid), len(rank)))


@pytest.hookimpl(optionalhook=True, tryfirst=True)  # optional: plain pytest without xdist has no such hook
def pytest_xdist_make_scheduler(config, log):
    from xdist.scheduler import LoadScopeScheduling

    class FileUnits(LoadScopeScheduling):
        """One unit per test file (the SEM files together), sent in collection order."""

        def _split_scope(self, nodeid: str) -> str:
            name = _file_of(nodeid)
            return "sem_runs" if name in SEM_RUN_FILES else nodeid.split("::", 1)[0]

    config.option.loadscopereorder = False  # keep the slowest-first order instead of "most tests first"
    return FileUnits(config, log)


@pytest.fixture(scope="session")
def sem_runs(tmp_path_factory) -> SemRuns:
    """The small structural-equation project; each experiment's DAG runs once per session, when first asked."""
    return SemRuns(tmp_path_factory.mktemp("sem_project"))
