"""The grid's verdict: did the invariance penalty beat its ERM twin, and did it where the scenario says it can?

Pure functions on the summary of one selection rule (pipeline.grid_stats.summarise + attach_tests) and
on the scenario's declared ground truth (`data.ground_truth`, e.g. config/data/demo.yaml); reads and
writes no file. Config keys obeyed (passed in): data.ground_truth.

Ground truth is declarative, so nothing about a particular scenario is written here:
    ground_truth:
      about: one line saying what the spurious relation is
      link: {city: label}   # how the spurious feature relates to the target in each city
      holds: [label, ...]   # labels under which a model that leans on the feature is right
Rule: the penalty CAN help on a split whose target's link is not in `holds` (the relation breaks there)
and whose source cities do not all share one link label (the sources disagree on it, so the penalty
has an unstable relation to see; with agreeing sources it is blind to it). Everywhere else it CANNOT
help: the relation holds in the target, so leaning on it is right, or the sources give no sign of it.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline import stats
from pipeline.errors import InputError, check_keys

GROUND_TRUTH_KEYS = ("about", "link", "holds")
CAN, CANNOT = "can help", "cannot help"


def check_ground_truth(ground_truth: dict | None, cities: list[str] | None = None) -> None:
    """A declared ground truth must have every key, a label for every configured city, and known labels."""
    if ground_truth is None:
        return
    field = "data.ground_truth"
    if not isinstance(ground_truth, dict):
        raise InputError(f"must be a mapping with keys {', '.join(GROUND_TRUTH_KEYS)}", file="config", field=field)
    check_keys(ground_truth, GROUND_TRUTH_KEYS, field, required=GROUND_TRUTH_KEYS, file="config")
    link, holds = ground_truth["link"], ground_truth["holds"]
    if not isinstance(link, dict) or not link:
        raise InputError("must map every city to a label", file="config", field=f"{field}.link")
    if not isinstance(holds, list) or not holds or not set(map(str, holds)) <= set(map(str, link.values())):
        raise InputError(f"must be a non-empty list of labels used in link, got {holds!r}", file="config",
                         field=f"{field}.holds")
    absent = sorted(set(cities or []) - set(link))
    if absent:
        raise InputError(f"no link label for cities {absent}", file="config", field=f"{field}.link")


def expectation(sources, target: str, ground_truth: dict) -> str:
    """CAN or CANNOT for one split (the rule in the module docstring)."""
    link = {str(city): str(label) for city, label in ground_truth["link"].items()}
    names = sources.split("+") if isinstance(sources, str) else list(sources)
    unknown = sorted({target, *names} - set(link))
    if unknown:
        raise InputError(f"no link label for cities {unknown}", file="config", field="data.ground_truth.link")
    breaks = link[target] not in set(map(str, ground_truth["holds"]))
    disagree = len({link[city] for city in names}) > 1
    return CAN if breaks and disagree else CANNOT


def _significant(rows: pd.DataFrame, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Penalised cells whose Holm-adjusted DM p is below alpha, split by the sign of the loss difference."""
    significant = rows["dm_p_holm"].to_numpy(np.float64) < alpha
    diff = rows["dm_mean_diff"].to_numpy(np.float64)
    return significant & (diff < 0), significant & (diff > 0)


def _tally(rows: pd.DataFrame, alpha: float) -> dict:
    codes = rows["vs_erm_outcome"].to_numpy(np.float64)
    wins, losses = _significant(rows, alpha)
    change = rows["vs_erm_change"].to_numpy(np.float64)
    return {"n": int(len(rows)), "wins": int(np.sum(codes == -1)), "ties": int(np.sum(codes == 0)),
            "losses": int(np.sum(codes == 1)), "no_twin": int(np.sum(codes == 2)),
            "median_change": float(np.nanmedian(change)) if np.isfinite(change).any() else float("nan"),
            "significant_wins": int(wins.sum()), "significant_losses": int(losses.sum())}


def family_verdicts(summary: pd.DataFrame, alpha: float = 0.05) -> pd.DataFrame:
    """Per model family x penalty: wins / ties / losses against the ERM twin over splits, the median change
    and the wins and losses that stay significant after the Holm correction.

    Wins, ties and losses compare the cell means (tie: within stats.TIE_TOLERANCE of the ERM mean).
    Significance is the paired Diebold-Mariano test on per-window losses with Holm-adjusted p (`dm_p_holm`);
    a significant win needs the penalty's mean loss difference to be negative.
    """
    penalised = summary[summary["vs_erm_outcome"].notna()]
    rows = [{"family": family, "penalty": penalty, **_tally(group, alpha)}
            for (family, penalty), group in penalised.groupby(["family", "penalty"], sort=True)]
    return pd.DataFrame(rows, columns=["family", "penalty", "n", "wins", "ties", "losses", "no_twin",
                                       "median_change", "significant_wins", "significant_losses"])


def ground_truth_verdicts(summary: pd.DataFrame, ground_truth: dict | None, alpha: float = 0.05) -> pd.DataFrame | None:
    """Per family x penalty x expectation (can / cannot help): the same tally as `family_verdicts`.

    None when the scenario declares no ground truth (the report then omits this part).
    """
    if not ground_truth:
        return None
    check_ground_truth(ground_truth)
    penalised = summary[summary["vs_erm_outcome"].notna()].copy()
    penalised["expectation"] = [expectation(s, t, ground_truth) for s, t in zip(penalised["sources"],
                                                                               penalised["target"])]
    rows = [{"family": family, "penalty": penalty, "expectation": expected,
             "splits": "; ".join(sorted(group["split"])), **_tally(group, alpha)}
            for (family, penalty, expected), group in penalised.groupby(["family", "penalty", "expectation"],
                                                                       sort=True)]
    return pd.DataFrame(rows)


def sentence(row, where: str | None = None) -> str:
    """One line of the verdict, e.g. 'linear + irm (where it can help, 2 splits): wins 2, ties 0, losses 0;
    median change -89.6 %; significant after Holm: wins 2, losses 0.'"""
    place = f" ({where}, {row['n']} splits)" if where else f" ({row['n']} splits)"
    median = f"{row['median_change'] * 100:+.1f} %" if np.isfinite(row["median_change"]) else "–"
    return (f"{row['family']} + {row['penalty']}{place}: wins {row['wins']}, ties {row['ties']}, losses "
            f"{row['losses']}; median change {median}; significant after Holm: wins {row['significant_wins']}, "
            f"losses {row['significant_losses']}.")


TIE_NOTE = (f"tie = the penalised mean within {stats.TIE_TOLERANCE:.0%} of its ERM twin's mean; significant = "
            "Diebold-Mariano on paired per-window losses, Holm-adjusted p below alpha over every penalised-vs-ERM "
            "comparison of the grid under this selection rule")
