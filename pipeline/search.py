"""Hyperparameter search: declared spaces, the trials of each run, and the rules that keep it fair.

Reads the `search` config group (schema `SearchConfig` below) and job slices (pipeline.config.job_slice);
writes nothing. Pure Python and numpy, no torch or MLflow: the DAG plan uses it. Config keys obeyed:
search.budget, search.seed, search.model.<model>.<key> and search.penalty.<penalty>.<key>, where
<model> and <penalty> are sweep names (config/model/<model>.yaml, config/penalty/<penalty>.yaml).

A space maps a dotted key of the job slice (fit.lr, fit.weight_decay, model.hidden, model.alpha,
penalty.weight, penalty.warmup_steps, penalty.extra.<name>, ...) to one spec: {choices: [...]},
{uniform: [low, high]} or {log_uniform: [low, high]}. A run's space is its model's entries plus its
penalty's. Trial i of a space is a pure function of (space, search.seed, i), so growing the budget keeps
the earlier trials and their unit digests: a re-run trains only the new ones.

- A finite space (choices only) is walked in one seeded order without repeats.
- Otherwise every key draws on its own: `choices` in seeded rounds that hold each choice once, ranges
  uniformly (on the log scale for log_uniform), rounded to 4 significant digits. Two runs that search
  the same key with the same spec (e.g. fit.lr for ERM and for IRMv1) get the same values, trial by trial.

Fairness (checked while planning): search.budget is one number for every model and penalty, ERM
included; a finite space must hold at least `budget` points; among the penalties of one gradient-trained
model either all are searched or none (an unsearched ERM against a searched penalty would compare one
try with `budget` tries). A run whose space is empty runs once, as without a search.
"""

from __future__ import annotations

import copy
import hashlib
import itertools
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict

import numpy as np

from pipeline.canonical import canonical_json
from pipeline.errors import InputError

KINDS = ("choices", "uniform", "log_uniform")
SEARCHABLE = ("model", "penalty", "fit")  # job slice sections a space may change
FIXED = ("model.family", "penalty.name")  # keys that name what runs, not how: never searched
TRIAL_KEY = "trial"  # job slice entry of a trial: its searched values (part of its identity and params)
SIGNIFICANT_DIGITS = 4  # drawn values are rounded: readable tags and tables, equal values across runs


@dataclass
class SearchConfig:
    """The `search` group (Hydra schema). Defaults: no search, every run trains once as before."""
    budget: int = 1  # trials per run (split x model x penalty x seed), the same for every method
    seed: int = 0  # seed of the trial values (not of the training)
    model: Dict[str, Any] = field(default_factory=dict)  # sweep model name -> {dotted key: spec}
    penalty: Dict[str, Any] = field(default_factory=dict)  # sweep penalty name -> {dotted key: spec}


def _stable_int(text: str) -> int:
    return int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "little")


def _finite_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def check_spec(spec: Any, field_name: str) -> dict:
    """One spec ({choices: [...]}, {uniform: [lo, hi]} or {log_uniform: [lo, hi]}), checked."""
    if not isinstance(spec, dict) or len(spec) != 1 or next(iter(spec)) not in KINDS:
        raise InputError(f"expected one of {{choices: [...]}}, {{uniform: [low, high]}}, "
                         f"{{log_uniform: [low, high]}}, got {spec!r}", file="config", field=field_name)
    kind, value = next(iter(spec.items()))
    if kind == "choices":
        if not isinstance(value, list) or not value or any(isinstance(v, (dict, list)) or v is None for v in value):
            raise InputError(f"choices must be a non-empty list of numbers or words, got {value!r}",
                             file="config", field=field_name)
        if len({canonical_json(v) for v in value}) != len(value):
            raise InputError(f"choices repeat a value: {value!r}", file="config", field=field_name)
        return {kind: list(value)}
    if (not isinstance(value, list) or len(value) != 2 or not all(map(_finite_number, value))
            or not value[0] < value[1] or (kind == "log_uniform" and value[0] <= 0)):
        bound = "0 < low < high" if kind == "log_uniform" else "low < high"
        raise InputError(f"{kind} needs [low, high] with finite {bound}, got {value!r}", file="config",
                         field=field_name)
    return {kind: [float(value[0]), float(value[1])]}


def _check_key(key: Any, job: dict, field_name: str) -> None:
    parts = str(key).split(".")
    if not isinstance(key, str) or len(parts) < 2 or parts[0] not in SEARCHABLE or key in FIXED:
        raise InputError(f"a searched key is a dotted key of the {', '.join(SEARCHABLE)} settings other than "
                         f"{', '.join(FIXED)}, got {key!r}", file="config", field=field_name)
    if parts[0] == "penalty" and job.get("penalty") is None:
        raise InputError(f"{job['model_name']} is not gradient-trained: it has no penalty to search",
                         file="config", field=field_name)
    node = job.get(parts[0])
    for part in parts[1:-1]:
        node = node.get(part) if isinstance(node, dict) else None
    free = parts[:2] == ["penalty", "extra"] and len(parts) == 3  # penalty-specific options, checked by the penalty
    if not free and (not isinstance(node, dict) or parts[-1] not in node or isinstance(node[parts[-1]], dict)):
        raise InputError(f"{key} is not a setting of {job['model_name']} + {job['penalty_name']}",
                         file="config", field=field_name)


def run_space(search: dict, job: dict) -> dict[str, dict]:
    """The space of one run (its model's entries plus its penalty's), every key and spec checked; the value
    of each key is {"spec": ..., "field": the config field that declared it, "owner": its group entry}."""
    space: dict[str, dict] = {}
    sources = [("model", job["model_name"])]
    if job.get("penalty") is not None:
        sources.append(("penalty", job["penalty_name"]))
    for group, name in sources:
        entries = (search.get(group) or {}).get(name) or {}
        if not isinstance(entries, dict):
            raise InputError(f"expected {{key: spec}}, got {entries!r}", file="config", field=f"search.{group}.{name}")
        for key, spec in entries.items():
            field_name = f"search.{group}.{name}.{key}"
            _check_key(key, job, field_name)
            if key in space:
                raise InputError(f"{key} is searched by both {space[key]['field']} and this entry",
                                 file="config", field=field_name)
            space[key] = {"spec": check_spec(spec, field_name), "field": field_name,
                          "owner": f"search.{group}.{name}"}
    return space


def space_size(space: dict) -> int | None:
    """Number of distinct points of a space of choices only; None when a key draws from a range."""
    if any("choices" not in entry["spec"] for entry in space.values()):
        return None
    return math.prod(len(entry["spec"]["choices"]) for entry in space.values())


def _draw(key: str, spec: dict, seed: int, index: int):
    """Value of one key at trial `index`: depends only on (key, spec, seed, index)."""
    stream = _stable_int(key + canonical_json(spec))
    kind, value = next(iter(spec.items()))
    if kind == "choices":  # round r holds every choice once, in its own seeded order
        round_, position = divmod(index, len(value))
        return value[int(np.random.default_rng([seed, stream, round_]).permutation(len(value))[position])]
    u = float(np.random.default_rng([seed, stream, index]).random())
    low, high = value
    drawn = low + u * (high - low) if kind == "uniform" else math.exp(math.log(low) + u * math.log(high / low))
    return float(f"{drawn:.{SIGNIFICANT_DIGITS}g}")


def trial_values(space: dict, seed: int, count: int) -> list[dict]:
    """The searched values of trials 0..count-1 ({} for an empty space: one trial, the run as configured)."""
    if not space:
        return [{}]
    keys = sorted(space)
    specs = {key: space[key]["spec"] for key in keys}
    size = space_size(space)
    if size is None:
        return [{key: _draw(key, specs[key], seed, index) for key in keys} for index in range(count)]
    points = list(itertools.product(*(specs[key]["choices"] for key in keys)))
    order = np.random.default_rng([seed, _stable_int(canonical_json(specs))]).permutation(size)
    return [dict(zip(keys, points[int(position)])) for position in order[:count]]


def apply(job: dict, values: dict) -> dict:
    """The job slice of one trial: the searched values set, and listed under `trial` (its identity)."""
    trial = copy.deepcopy(job)
    for key, value in values.items():
        *path, last = key.split(".")
        node = trial
        for part in path:
            node = node.setdefault(part, {})
        node[last] = value
    trial[TRIAL_KEY] = dict(sorted(values.items()))
    return trial


def trial_units(units: list[dict]) -> list[dict]:
    """Every trial of planned units as a unit of its own (units without a search stand for themselves)."""
    out = []
    for unit in units:
        if not unit.get("search"):
            out.append(unit)
            continue
        out += [{**{k: v for k, v in unit.items() if k != "search"}, "job": apply(unit["job"], values)}
                for values in unit["search"]["trials"]]
    return out


def check_config(search: dict, config_dir: Path) -> None:
    """budget and seed, the names under search.model / search.penalty (each has a config file), and a space
    somewhere when the budget asks for more than one trial."""
    budget, _ = _check_settings(search)
    if budget > 1 and not any((search.get(group) or {}).values() for group in ("model", "penalty")):
        raise InputError(f"{budget} trials but no search space is declared (search.model.<model> or "
                         f"search.penalty.<penalty>)", file="config", field="search.budget")
    for group in ("model", "penalty"):
        known = sorted(path.stem for path in (Path(config_dir) / group).glob("*.yaml"))
        for name in search.get(group) or {}:
            if name not in known:
                raise InputError(f"no {group} {name!r} (known: {', '.join(known)})", file="config",
                                 field=f"search.{group}.{name}")


def _check_settings(search: dict) -> tuple[int, int]:
    budget, seed = search.get("budget", 1), search.get("seed", 0)
    for name, value, lowest in (("budget", budget, 1), ("seed", seed, 0)):
        if isinstance(value, bool) or not isinstance(value, int) or value < lowest:
            raise InputError(f"must be an integer >= {lowest}, got {value!r}", file="config", field=f"search.{name}")
    return budget, seed


def _check_trial(job: dict, space: dict) -> None:
    """The values of a trial are valid settings (the same checks as pipeline.config.validate)."""
    from pipeline.fit_config import FitConfig
    from pipeline.models import MODEL_FAMILIES
    from pipeline.penalties import build_penalty

    values = job[TRIAL_KEY]
    try:
        FitConfig.from_dict(job["fit"])
        model = {k: v for k, v in job["model"].items() if k != "family"}
        MODEL_FAMILIES[job["model"]["family"]].Params(**model)
        penalty = job.get("penalty")
        if penalty is not None:
            build_penalty(penalty["name"], weight=penalty["weight"], warmup_steps=penalty["warmup_steps"],
                          **penalty.get("extra", {}))
    except InputError as error:
        named = next((key for key in values if error.field and key.endswith(error.field)), sorted(values)[0])
        raise InputError(f"the searched value {values[named]!r} is refused: {error}", file="config",
                         field=space[named]["field"]) from None


def attach(units: list[dict], search: dict, trainable: bool) -> list[dict]:
    """Units of one sweep model with their trials under "search" ({"budget", "trials": [values]}).

    Without a search (budget 1, no space) the units come back unchanged, so nothing re-runs. A unit whose
    space is empty gets no "search" entry: it runs once."""
    budget, seed = _check_settings(search)
    spaces = [run_space(search, unit["job"]) for unit in units]
    if budget == 1 and not any(spaces):
        return units
    searched = [unit["penalty"] for unit, space in zip(units, spaces) if space]
    bare = [unit["penalty"] for unit, space in zip(units, spaces) if not space]
    # an unsearched ERM against a searched penalty (or the reverse) would compare one try with `budget` tries
    if trainable and budget > 1 and searched and bare:
        model = units[0]["model"]
        raise InputError(f"{model} + {bare[0]} has no search space but {model} + {searched[0]} has one: every "
                         f"method gets the same budget of {budget} trials (declare a space for {bare[0]}, e.g. "
                         f"fit.lr)", file="config", field=f"search.penalty.{bare[0]}")
    out = []
    for unit, space in zip(units, spaces):
        if not space:
            out.append(unit)
            continue
        size = space_size(space)
        if size is not None and size < budget:
            raise InputError(f"the space of {unit['model']} + {unit['penalty']} holds {size} points, fewer than "
                             f"search.budget {budget}: every method gets the same budget (add choices or a range, "
                             f"or lower the budget)", file="config", field=min(e["owner"] for e in space.values()))
        trials = trial_values(space, seed, budget)
        for values in trials:
            _check_trial(apply(unit["job"], values), space)
        out.append({**unit, "search": {"budget": budget, "trials": trials}})
    return out


def trial_tags(job: dict) -> dict[str, str]:
    """Tags that make a trial's run its own: its role and its searched values (pipeline.tracking.TRIAL_TAG)."""
    from pipeline.tracking import ROLE_TAG, TRIAL_TAG

    if TRIAL_KEY not in job:
        return {}
    return {ROLE_TAG: "trial", TRIAL_TAG: canonical_json(job[TRIAL_KEY])}
