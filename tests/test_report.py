"""The HTML report on the hand-made grid: self-contained, cautious, peek always labelled."""

import base64
import re
import struct

import matplotlib.pyplot as plt
import pandas as pd
import pytest

from grid_fixture import build_report
from pipeline import selection
from pipeline.commands.demo import CAUTION
from pipeline.report import figures

PEEK_LABEL = selection.label("target-peek")


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    page, out = build_report(root, {"selection": "source-holdout", "figure_dpi": 60, "top_rows": 5,
                                    "title": "grid test"}, n_boot=200)
    return {"root": root, "page": page, "path": out}


def test_report_carries_the_caution_twice_and_the_title(report):
    assert report["path"].read_text(encoding="utf-8") == report["page"]
    assert report["page"].count(CAUTION) == 2 and "<title>grid test</title>" in report["page"]


def test_report_references_nothing_outside_itself(report):
    page = report["page"]
    text = re.sub(r"base64,[A-Za-z0-9+/=]+", "base64,", page)  # image bytes may spell anything
    assert "http" not in text.lower() and "www." not in text
    sources = re.findall(r'src="([^"]*)"', page)
    assert sources and all(src.startswith("data:image/png;base64,") for src in sources)
    assert all(href.startswith("#") for href in re.findall(r'href="([^"]*)"', page))
    assert "url(" not in text and "@import" not in text
    assert not re.search(r"<(link|script|iframe)\b", page)


def test_every_embedded_image_is_a_png_of_nonzero_size(report):
    for data in re.findall(r'src="data:image/png;base64,([^"]+)"', report["page"]):
        raw = base64.b64decode(data)
        assert raw[:8] == b"\x89PNG\r\n\x1a\n"
        width, height = struct.unpack(">II", raw[16:24])  # IHDR chunk (PNG specification)
        assert width > 50 and height > 50


def test_sections_are_all_there(report):
    for anchor in ("setup", "grid", "ranks", "horizon", "shift", "provenance"):
        assert f'id="{anchor}"' in report["page"]
    assert "Friedman" in report["page"] and "critical difference" in report["page"]


def test_every_number_is_traceable_to_run_ids(report):
    runs = pd.read_parquet(report["root"] / "results" / "grid.parquet")
    provenance = report["page"].split('id="provenance"')[1]
    assert all(run_id in provenance for run_id in runs["run_id"])


def test_peek_never_appears_without_its_upper_bound_label(report):
    page = report["page"]
    blocks = re.findall(r'<(figure|table|p|th) data-selection="target-peek".*?</\1>', page, flags=re.S)
    full = re.findall(r'<(?:figure|table|p|th) data-selection="target-peek".*?</(?:figure|table|p|th)>', page,
                      flags=re.S)
    assert len(blocks) >= 3
    for block in full:
        assert "upper bound" in block
    # any mention of the peek rule name in text comes with the label
    text = re.sub(r'data-selection="target-peek"', "", re.sub(r"base64,[^\"]+", "", page))
    for match in re.finditer("target-peek", text):
        assert text[match.start():match.start() + len(PEEK_LABEL)] == PEEK_LABEL


def _all_titles(fig) -> str:
    texts = [fig._suptitle.get_text() if fig._suptitle else ""] + [ax.get_title() for ax in fig.axes]
    plt.close(fig)
    return " ".join(texts)


def test_peek_figure_titles_say_upper_bound(report):
    runs = pd.read_parquet(report["root"] / "results" / "grid.parquet")
    summary = pd.read_csv(report["root"] / "results" / "grid.csv")
    peek = summary[summary.selection_rule == "target-peek"]
    assert "upper bound" in _all_titles(figures.grid_heatmap(peek, "target-peek"))
    assert "upper bound" in _all_titles(figures.horizon_curves(runs, "target-peek"))
    assert "upper bound" in _all_titles(figures.exceedance_bars(runs, "target-peek"))
    assert "upper bound" in _all_titles(figures.selection_comparison(summary))
    assert "upper bound" not in _all_titles(figures.grid_heatmap(summary[summary.selection_rule == "source-holdout"],
                                                                 "source-holdout"))


def test_qc_summary_shows_rows_read_kept_and_drop_reasons(report):
    for shown in ("<td>1000</td>", "<td>990</td>", "exact_duplicate 10"):
        assert shown in report["page"]
