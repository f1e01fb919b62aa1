"""No number chosen with target data is shown without the upper-bound label (grid command and report).

Runs on the grid and report of a tiny real DAG run of the structural-equation scenario
(tests/sem_dag.py), whose runs log all three selection rules (source-holdout, source-rotation,
target-peek). Label text: pipeline.selection.label / UPPER_BOUND_LABEL.
"""

import io
import json
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from pipeline import selection

pytestmark = pytest.mark.e2e
RULES = ("source-holdout", "source-rotation", "target-peek")


@pytest.fixture(scope="module")
def finished(sem_runs):
    return sem_runs.results("settings_three_envs")


def peek_only_numbers(grid: pd.DataFrame) -> set[str]:
    """Report-formatted means (4 significant digits) that only the peek rule produced."""
    def formatted(rule):
        return {f"{v:.4g}" for v in grid.loc[grid["selection_rule"] == rule, "mean"] if np.isfinite(v)}
    return formatted("target-peek") - formatted("source-holdout") - formatted("source-rotation")


def test_every_rule_is_in_the_grid_side_by_side_and_the_peek_rows_carry_the_label(finished):
    _, results = finished
    grid = pd.read_csv(results / "grid.csv")
    assert set(grid["selection_rule"]) == set(RULES)
    for rule, rows in grid.groupby("selection_rule"):
        assert set(rows["selection_label"]) == {selection.label(rule)}
    assert (grid.loc[grid["selection_rule"] == "target-peek", "selection_label"].str.contains("upper bound")).all()
    assert not grid.loc[grid["selection_rule"] != "target-peek", "selection_label"].str.contains("upper bound").any()


def grid_command(project, results, capsys, *args) -> str:
    """`shiftgrid grid ...` in this process (the CLI entry point; a subprocess would cost seconds)."""
    from pipeline.cli import main

    capsys.readouterr()
    assert main(["--root", str(project), "grid", "--results", str(results), *args]) == 0
    return capsys.readouterr().out


def test_grid_command_labels_the_peek_in_every_format(finished, capsys):
    project, results = finished
    for fmt in ("table", "markdown", "csv", "json"):
        shown = grid_command(project, results, capsys, "--selection", "target-peek", "--format", fmt)
        if fmt == "json":
            rows = json.loads(shown)
            assert rows and all("upper bound" in row["selection_label"] for row in rows)
        elif fmt == "csv":
            rows = pd.read_csv(io.StringIO(shown))
            assert len(rows) and rows["selection_label"].str.contains("upper bound").all()
        else:  # the label heads the text, above every number
            assert "upper bound" in shown.splitlines()[0], fmt
        honest = grid_command(project, results, capsys, "--selection", "source-holdout", "--format", fmt)
        assert "upper bound" not in honest


class _Scanner(HTMLParser):
    """Records, for every text fragment, whether an enclosing element is marked as peek output."""

    def __init__(self):
        super().__init__()
        self.stack: list[tuple[str, str | None]] = []
        self.texts: list[tuple[str, bool]] = []
        self.blocks: list[tuple[str, str]] = []  # (data-selection, caption or text) of labelled blocks

    def handle_starttag(self, tag, attrs):
        self.stack.append((tag, dict(attrs).get("data-selection")))
        # a marked table cell is covered by its marked column header, which carries the label
        if dict(attrs).get("data-selection") and tag != "td":
            self.blocks.append((dict(attrs)["data-selection"], ""))

    def handle_endtag(self, tag):
        while self.stack:
            if self.stack.pop()[0] == tag:
                break

    def handle_data(self, data):
        marked = [rule for _, rule in self.stack if rule]
        if marked and self.blocks:
            rule, text = self.blocks[-1]
            self.blocks[-1] = (rule, text + data)
        self.texts.append((data, "target-peek" in marked))


def test_report_marks_every_peek_block_and_number_as_an_upper_bound(finished):
    _, results = finished
    scanner = _Scanner()
    scanner.feed((results / "report.html").read_text())
    peek_blocks = [text for rule, text in scanner.blocks if rule == "target-peek"]
    assert peek_blocks, "the report shows no target-peek block"
    for text in peek_blocks:
        assert selection.UPPER_BOUND_LABEL in text, text[:200]
    # Any number that only peek selection produced appears inside a peek-marked block only.
    numbers = peek_only_numbers(pd.read_csv(results / "grid.csv"))
    assert numbers, "peek and honest selection gave identical means: the check would be empty"
    for number in numbers:
        places = [marked for text, marked in scanner.texts if number in text.split()]
        assert all(places), f"{number} shown outside a block labelled as an upper bound"
    # Figures comparing the rules name the peek with its label in the caption.
    for caption in (text for text, _ in scanner.texts if "under each selection rule" in text):
        assert "target-peek" not in caption or selection.UPPER_BOUND_LABEL in caption
