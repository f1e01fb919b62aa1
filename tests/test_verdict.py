"""The verdict: per-family tallies and the declared ground truth of the shipped scenarios (pipeline/verdict.py)."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from pipeline.errors import InputError
from pipeline.verdict import CAN, CANNOT, check_ground_truth, expectation, family_verdicts, ground_truth_verdicts

CONFIG = Path(__file__).resolve().parents[1] / "config" / "data"


def declared(name: str) -> dict:
    return yaml.safe_load((CONFIG / f"{name}.yaml").read_text())["ground_truth"]


def test_demo_ground_truth_matches_docs_demo_scenario():
    # docs/demo-scenario.md: aux drives pm25 in arlenvik, brumeholt, elsquay; noise in corvessa, fenlowe;
    # reversed in dunmarrow. The penalty can help only where the target's link breaks AND the sources disagree.
    truth = declared("demo")
    check_ground_truth(truth, ["arlenvik", "brumeholt", "corvessa", "dunmarrow", "elsquay", "fenlowe"])
    assert expectation("arlenvik+dunmarrow", "corvessa", truth) == CAN  # drives vs reversed; noise target
    assert expectation("brumeholt+corvessa", "dunmarrow", truth) == CAN
    assert expectation("arlenvik+brumeholt", "corvessa", truth) == CANNOT  # sources agree: nothing to see
    assert expectation("brumeholt+corvessa+dunmarrow", "arlenvik", truth) == CANNOT  # the link holds there


def test_sem_ground_truth_matches_the_known_answer_scenario():
    # docs/known-answers.md (Arjovsky et al. 2019, introductory example): the penalty can help where the
    # spurious mechanism changes (driftmere), not where only the noise variance changes (evenholt)
    truth = declared("sem")
    sources = "ashvale+birchmoor+copperby"
    assert expectation(sources, "driftmere", truth) == CAN
    assert expectation(sources, "evenholt", truth) == CANNOT


def test_bad_ground_truth_is_a_one_line_error_naming_the_field():
    truth = declared("demo")
    with pytest.raises(InputError, match="data.ground_truth.extra: unknown key"):
        check_ground_truth({**truth, "extra": 1})
    with pytest.raises(InputError, match="data.ground_truth.holds: missing key"):
        check_ground_truth({key: value for key, value in truth.items() if key != "holds"})
    with pytest.raises(InputError, match="data.ground_truth.holds"):
        check_ground_truth({**truth, "holds": ["nowhere"]})
    with pytest.raises(InputError, match="data.ground_truth.link: no link label for cities \\['gorse'\\]"):
        check_ground_truth(truth, ["arlenvik", "gorse"])
    check_ground_truth(None)  # a scenario without ground truth is fine


def summary_rows() -> pd.DataFrame:
    """Penalised cells of two families over three splits, with their DM outcome (Holm-adjusted)."""
    rows = [  # family, penalty, split target, sources, change, outcome, p_holm, mean_diff
        ("linear", "irm", "corvessa", "arlenvik+dunmarrow", -0.30, -1, 0.001, -2.0),
        ("linear", "irm", "dunmarrow", "brumeholt+corvessa", -0.05, -1, 0.20, -0.1),
        ("linear", "irm", "arlenvik", "brumeholt+corvessa", 0.004, 0, 0.70, 0.01),
        ("lstm", "irm", "corvessa", "arlenvik+dunmarrow", 0.10, 1, 0.01, 0.8),
        ("lstm", "irm", "dunmarrow", "brumeholt+corvessa", 0.20, 1, 0.04, 0.9),
        ("lstm", "irm", "arlenvik", "brumeholt+corvessa", np.nan, 2, np.nan, np.nan),
    ]
    frame = pd.DataFrame(rows, columns=["family", "penalty", "target", "sources", "vs_erm_change", "vs_erm_outcome",
                                        "dm_p_holm", "dm_mean_diff"])
    frame["split"] = frame["sources"] + " → " + frame["target"]
    return frame


def test_family_tallies_count_wins_ties_losses_and_the_significant_ones():
    table = family_verdicts(summary_rows()).set_index("family")
    linear, lstm = table.loc["linear"], table.loc["lstm"]
    assert (linear["wins"], linear["ties"], linear["losses"]) == (2, 1, 0)
    assert (linear["significant_wins"], linear["significant_losses"]) == (1, 0)  # 0.20 does not survive
    assert linear["median_change"] == pytest.approx(-0.05)
    assert (lstm["losses"], lstm["no_twin"], lstm["significant_losses"]) == (2, 1, 2)


def test_ground_truth_tallies_split_the_splits_by_expectation():
    table = ground_truth_verdicts(summary_rows(), declared("demo")).set_index(["family", "expectation"])
    can, cannot = table.loc[("linear", CAN)], table.loc[("linear", CANNOT)]
    assert (can["n"], can["significant_wins"], cannot["n"], cannot["ties"]) == (2, 1, 1, 1)
    assert ground_truth_verdicts(summary_rows(), None) is None
