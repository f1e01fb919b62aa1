"""Plan and build splits: which cities/stations train and which are tested, and the time blocks.

Reads: the station table (a DataFrame from pipeline.stations.load_stations) for planning; for building,
only the `station_id` and `time` columns of data/clean/<city>.parquet plus the file bytes (digests).
Writes: results/splits/<split_id>.json through `write_split` (atomic, sorted keys).
Config keys obeyed: the `split` group, schema `SplitConfig` (schemes, cities, subset_sizes, subset_limit,
pairs, within_city, within_target_stations, environment, environment_fallback, cluster_km, blocks,
gap_hours, target_train_fraction) and, through the callers' arguments,
`forecast.lookback_hours`/`horizon_hours`.

Planning is pure and uses the configuration and station table only, so new data never changes the list
of splits. A split id is `<scheme>-<sources joined by +>-to-<target>-<6 hex>`, the hex being the first
six digits of the sha256 of every other plan field (canonical JSON), scheme excluded. Two schemes that
produce the same content (e.g. leave-one-city-out and the largest source subset) are listed once, under
the first scheme in the precedence loco > pairs > subsets > within; the plan is ordered by that
precedence, whatever the order of `split.schemes`.

Environment fallback: a split whose sources form fewer than two training environments in the configured
unit (e.g. one source city with `environment: city`) cannot host a penalised run (pipeline.environments).
With `environment_fallback: station` (or `cluster`) such a split uses that finer unit instead, and its
plan item records the unit it fell back from (`environment_fallback_from`), which runs carry as a tag
and the grid shows. Splits that need no fallback keep their content, hence their ids.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Dict, List, Optional

import pandas as pd

from pipeline.atomic import write_json_atomic
from pipeline.environments import training_environment_count
from pipeline.errors import InputError, from_mapping
from pipeline.geo import cluster_stations
from pipeline.provenance import file_digest

SCHEMES = ("loco", "pairs", "subsets", "within")  # also the de-duplication precedence
ENVIRONMENT_UNITS = ("city", "station", "cluster")
BLOCK_NAMES = ("train", "val", "test")
ADMITTED_SUFFIX = "-admitted"  # environment name of the admitted target fraction: "<target>-admitted"


@dataclass
class SplitConfig:
    """Schema of the `split` config group (registered in Hydra's ConfigStore by the lead)."""
    schemes: List[str] = field(default_factory=lambda: ["loco"])
    cities: Optional[List[str]] = None  # None = every city in the station table
    subset_sizes: List[int] = field(default_factory=lambda: [1, 2])
    subset_limit: Optional[int] = None  # cap on subsets splits, taken round-robin over targets
    pairs: List[Dict[str, Any]] = field(default_factory=list)  # [{sources: [...], target: ...}]
    within_city: Optional[str] = None
    within_target_stations: List[str] = field(default_factory=list)  # empty: every 3rd sorted id
    environment: str = "city"  # unit the invariance penalty sees: city | station | cluster
    # Finer unit used where `environment` gives a split fewer than two training environments (a penalised
    # run there would be ERM in disguise): station | cluster; None = no fallback (such runs are refused).
    environment_fallback: Optional[str] = None
    cluster_km: float = 10.0
    blocks: Dict[str, float] = field(default_factory=lambda: {"train": 0.6, "val": 0.2, "test": 0.2})
    gap_hours: Optional[int] = None  # None = lookback + horizon (the least that is allowed)
    target_train_fraction: float = 0.0  # last part of the target's train block admitted into training


def plain_container(value):
    """Plain Python containers from dicts, lists or OmegaConf containers (no omegaconf import)."""
    if isinstance(value, Mapping):
        return {str(k): plain_container(v) for k, v in value.items()}
    if isinstance(value, Sequence) and not isinstance(value, (str, bytes)):
        return [plain_container(v) for v in value]
    return value


def _as_config(cfg) -> SplitConfig:
    if isinstance(cfg, SplitConfig):
        cfg = asdict(cfg)
    return from_mapping(SplitConfig, plain_container(cfg), "split")


def _validate(cfg: SplitConfig, all_cities: list[str], lookback: int, horizon: int) -> int:
    """Check every field; return the resolved gap in hours."""
    for scheme in cfg.schemes:
        if scheme not in SCHEMES:
            raise InputError(f"unknown scheme {scheme!r} (known: {', '.join(SCHEMES)})",
                             field="split.schemes")
    if not cfg.schemes:
        raise InputError("no scheme given", field="split.schemes")
    for city in cfg.cities or []:
        if city not in all_cities:
            raise InputError(f"unknown city {city!r} (station table has: {', '.join(all_cities)})",
                             field="split.cities")
    if cfg.environment not in ENVIRONMENT_UNITS:
        raise InputError(f"unknown unit {cfg.environment!r} (known: {', '.join(ENVIRONMENT_UNITS)})",
                         field="split.environment")
    if cfg.environment_fallback is not None and (cfg.environment_fallback not in ENVIRONMENT_UNITS[1:]
                                                 or cfg.environment_fallback == cfg.environment):
        raise InputError(f"must be station or cluster and differ from split.environment "
                         f"({cfg.environment}), got {cfg.environment_fallback!r}", field="split.environment_fallback")
    if not (isinstance(cfg.cluster_km, (int, float)) and cfg.cluster_km > 0):
        raise InputError(f"must be a number > 0, got {cfg.cluster_km!r}", field="split.cluster_km")
    if not isinstance(cfg.blocks, dict) or sorted(cfg.blocks) != sorted(BLOCK_NAMES):
        raise InputError(f"needs exactly the keys train, val, test, got {cfg.blocks!r}", field="split.blocks")
    if any(not isinstance(v, (int, float)) or not v > 0 for v in cfg.blocks.values()) \
            or abs(sum(cfg.blocks.values()) - 1.0) > 1e-9:
        raise InputError(f"fractions must be > 0 and sum to 1, got {cfg.blocks!r}", field="split.blocks")
    fraction = cfg.target_train_fraction
    if not (isinstance(fraction, (int, float)) and 0.0 <= fraction < 1.0):
        raise InputError(f"must be in [0, 1), got {fraction!r}", field="split.target_train_fraction")
    if not (isinstance(lookback, int) and isinstance(horizon, int) and lookback >= 1 and horizon >= 1):
        raise InputError(f"lookback and horizon must be integers >= 1, got {lookback!r}, {horizon!r}",
                         field="forecast")
    if cfg.gap_hours is None:
        return lookback + horizon
    if not isinstance(cfg.gap_hours, int) or cfg.gap_hours < lookback + horizon:
        raise InputError(f"must be an integer >= lookback + horizon = {lookback + horizon}, "
                         f"got {cfg.gap_hours!r}", field="split.gap_hours")
    return cfg.gap_hours


def plan_splits(cfg: SplitConfig | dict, stations: pd.DataFrame, lookback: int, horizon: int) -> list[dict]:
    """Every split the config asks for, from the config and station table only (see module docstring)."""
    cfg = _as_config(cfg)
    missing = {"station_id", "city", "lat", "lon"} - set(stations.columns)
    if missing:
        raise InputError(f"lacks columns {sorted(missing)}", field="stations")
    stations = stations.assign(station_id=stations["station_id"].astype(str), city=stations["city"].astype(str))
    all_cities = sorted(stations["city"].unique())
    gap = _validate(cfg, all_cities, lookback, horizon)
    cities = sorted(set(cfg.cities)) if cfg.cities is not None else all_cities
    by_city = {c: sorted(stations.loc[stations["city"] == c, "station_id"]) for c in all_cities}

    wanted: list[tuple[str, list[str], str]] = []  # (scheme, sources, target)
    requested = set(cfg.schemes)
    if requested & {"loco", "subsets"} and len(cities) < 2:
        raise InputError(f"needs at least 2 cities, got {cities}", field="split.cities")
    if "loco" in requested:
        wanted += [("loco", [c for c in cities if c != t], t) for t in cities]
    if "pairs" in requested:
        wanted += [("pairs", *_pair(i, p, all_cities)) for i, p in enumerate(cfg.pairs)]
        if not cfg.pairs:
            raise InputError("scheme 'pairs' requested but no pair given", field="split.pairs")
    if "subsets" in requested:
        wanted += [("subsets", s, t) for s, t in _subsets(cfg, cities)]
    items = [_make_item(scheme, sources, target, [s for c in sources for s in by_city[c]],
                        by_city[target], cfg, stations, gap)
             for scheme, sources, target in wanted]
    if "within" in requested:
        items.append(_within_item(cfg, by_city, stations, gap))

    planned, seen = [], set()
    for item in items:  # already in precedence order; keep the first of equal contents
        key = _content_json(item)
        if key not in seen:
            seen.add(key)
            planned.append(item)
    return planned


def _pair(index: int, pair, all_cities: list[str]) -> tuple[list[str], str]:
    where = f"split.pairs[{index}]"
    if not isinstance(pair, dict) or set(pair) != {"sources", "target"}:
        raise InputError(f"must be a mapping with keys sources and target, got {pair!r}", field=where)
    sources, target = pair["sources"], pair["target"]
    if isinstance(sources, str):
        sources = [sources]
    for city in [*sources, target]:
        if city not in all_cities:
            raise InputError(f"unknown city {city!r}", field=where)
    if not sources or target in sources:
        raise InputError("needs at least one source and a target that is not a source", field=where)
    return sorted(set(sources)), target


def _subsets(cfg: SplitConfig, cities: list[str]) -> list[tuple[list[str], str]]:
    for size in cfg.subset_sizes:
        if not isinstance(size, int) or not 1 <= size <= len(cities) - 1:
            raise InputError(f"size {size!r} must be in 1..{len(cities) - 1} for {len(cities)} cities",
                             field="split.subset_sizes")
    per_target = {t: [list(s) for k in sorted(set(cfg.subset_sizes))
                      for s in itertools.combinations([c for c in cities if c != t], k)] for t in cities}
    if cfg.subset_limit is None:
        return [(s, t) for t in cities for s in per_target[t]]
    if not isinstance(cfg.subset_limit, int) or cfg.subset_limit < 1:
        raise InputError(f"must be an integer >= 1, got {cfg.subset_limit!r}", field="split.subset_limit")
    # Round-robin: the first subset of every target, then the second of every target, ... so that a cap
    # keeps every target city represented instead of exhausting the first target alphabetically.
    chosen = []
    for rank in range(max(len(v) for v in per_target.values())):
        for t in cities:
            if rank < len(per_target[t]) and len(chosen) < cfg.subset_limit:
                chosen.append((rank, t))
    chosen.sort(key=lambda rank_target: (rank_target[1], rank_target[0]))
    return [(per_target[t][rank], t) for rank, t in chosen]


def _within_item(cfg: SplitConfig, by_city: dict, stations: pd.DataFrame, gap: int) -> dict:
    city = cfg.within_city
    if city not in by_city:
        raise InputError(f"unknown or missing city {city!r}", field="split.within_city")
    ids = by_city[city]
    if len(ids) < 2:
        raise InputError(f"city {city} has {len(ids)} station; within-city needs at least 2",
                         field="split.within_city")
    if cfg.within_target_stations:
        unknown = sorted(set(cfg.within_target_stations) - set(ids))
        if unknown:
            raise InputError(f"not stations of {city}: {unknown}", field="split.within_target_stations")
        held_out = sorted(set(cfg.within_target_stations))
    else:
        held_out = ids[1::3]  # every third station in id order: deterministic, about a third
    sources = [s for s in ids if s not in held_out]
    if not held_out or not sources:
        raise InputError(f"city {city} needs at least one source and one held-out station",
                         field="split.within_target_stations")
    return _make_item("within", [city], city, sources, held_out, cfg, stations, gap)


def _environments(unit: str, station_ids: list[str], stations: pd.DataFrame, cluster_km: float,
                  city_name: str | None = None, cluster_label: str = "c") -> dict[str, list[str]]:
    rows = stations[stations["station_id"].isin(station_ids)]
    if unit == "city":
        names = {s: city_name or c for s, c in zip(rows["station_id"], rows["city"])}
    elif unit == "station":
        names = {s: s for s in rows["station_id"]}
    else:
        names = cluster_stations(rows, cluster_km, label=cluster_label)
    envs: dict[str, list[str]] = {}
    for station_id in sorted(names):
        envs.setdefault(names[station_id], []).append(station_id)
    return dict(sorted(envs.items()))


def _make_item(scheme, sources, target, source_stations, target_stations, cfg, stations, gap) -> dict:
    within = scheme == "within"
    unit = cfg.environment
    environments = _environments(unit, source_stations, stations, cfg.cluster_km)
    fallback = {}
    counted = {"environments": environments, "target_train_fraction": cfg.target_train_fraction}
    if cfg.environment_fallback and training_environment_count(counted) < 2:
        fallback = {"environment_fallback_from": unit}  # only where applied: other split ids stay as they were
        unit = cfg.environment_fallback
        environments = _environments(unit, source_stations, stations, cfg.cluster_km)
    item = {
        "scheme": scheme, "sources": list(sources), "target": target,
        "source_stations": sorted(source_stations), "target_stations": sorted(target_stations),
        "environment": unit, **fallback,
        "environments": environments,
        # evaluation environments of the target; names never collide with the source ones
        "target_environments": _environments(unit, target_stations, stations, cfg.cluster_km,
                                             city_name=f"{target}-heldout" if within else target,
                                             cluster_label="h" if within else "c"),
        "target_train_fraction": float(cfg.target_train_fraction),
        "blocks": {k: float(cfg.blocks[k]) for k in BLOCK_NAMES}, "gap_hours": int(gap),
    }
    digest = hashlib.sha256(_content_json(item).encode()).hexdigest()[:6]
    return {"split_id": f"{scheme}-{'+'.join(sources)}-to-{target}-{digest}", **item}


def _content_json(item: dict) -> str:
    return json.dumps({k: v for k, v in item.items() if k not in ("split_id", "scheme")}, sort_keys=True)


# ---- building: time blocks from the data's time range ---------------------------------------------

def _hour(ts: pd.Timestamp) -> str:
    return ts.isoformat()  # e.g. 2024-01-01T00:00:00+00:00


def _city_time_range(path, station_ids: list[str]) -> tuple[pd.Timestamp, pd.Timestamp]:
    """[first hour, last hour + 1 h) over the given stations of one clean table (reads 2 columns)."""
    try:
        frame = pd.read_parquet(path, columns=["station_id", "time"])
    except FileNotFoundError:
        raise InputError("clean table not found", file=str(path)) from None
    except (KeyError, ValueError, OSError) as error:  # missing column or not a Parquet file
        raise InputError(f"cannot read station_id and time: {str(error).splitlines()[0]}",
                         file=str(path)) from None
    dtype = frame["time"].dtype
    if not (isinstance(dtype, pd.DatetimeTZDtype) and str(dtype.tz) == "UTC"):
        raise InputError(f"must be datetime64 with tz=UTC, got {dtype}", file=str(path), field="time")
    times = frame.loc[frame["station_id"].astype(str).isin(station_ids), "time"].dropna()
    if times.empty:
        raise InputError(f"no rows for any of the split's stations {station_ids}", file=str(path),
                         field="station_id")
    if not (times.dt.floor("min") == times).all():  # any cadence of whole minutes (pipeline.ingest.cadence)
        raise InputError("times must be whole minutes", file=str(path), field="time")
    return times.min(), times.max() + pd.Timedelta(hours=1)


def block_lengths(total_hours: int, blocks: dict, gap_hours: int) -> dict[str, int]:
    """Hours of train/val/test when `total_hours` hold the three blocks and two gaps (floor rounding)."""
    usable = total_hours - 2 * gap_hours
    train = math.floor(usable * blocks["train"])
    val = math.floor(usable * blocks["val"])
    return {"train": train, "val": val, "test": usable - train - val}


def hours_needed(blocks: dict, gap_hours: int, min_block_hours: int) -> int:
    """Smallest range (hours) whose three blocks each hold at least `min_block_hours`."""
    total = 2 * gap_hours + math.ceil(min_block_hours / min(blocks.values()))
    while min(block_lengths(total, blocks, gap_hours).values()) < min_block_hours:
        total += 1  # floor rounding can cost an hour or two per block
    return total


def compute_time_blocks(start: pd.Timestamp, end: pd.Timestamp, blocks: dict, gap_hours: int,
                        min_block_hours: int, what: str = "split") -> dict[str, list[str]]:
    """train | gap | val | gap | test on [start, end); each block [start, end) as UTC ISO strings."""
    total = int((end - start) / pd.Timedelta(hours=1))
    lengths = block_lengths(total, blocks, gap_hours)
    if min(lengths.values()) < min_block_hours:
        raise InputError(
            f"{what}: common hourly range {_hour(start)} to {_hour(end)} has {max(total, 0)} h; blocks "
            f"{blocks} with 2 gaps of {gap_hours} h and at least lookback + horizon = {min_block_hours} h "
            f"per block need {hours_needed(blocks, gap_hours, min_block_hours)} h", field="time_blocks")
    time_blocks, cursor = {}, start
    for name in BLOCK_NAMES:
        block_end = cursor + pd.Timedelta(hours=lengths[name])
        time_blocks[name] = [_hour(cursor), _hour(block_end)]
        cursor = block_end + pd.Timedelta(hours=gap_hours)
    return time_blocks


def admitted_target_block(time_blocks: dict, fraction: float) -> list[str] | None:
    """The LAST `fraction` of the target's train block (whole hours, floor), or None when fraction == 0.

    The last part is the most recent target data before the validation block: the situation of a
    freshly monitored city whose first weeks of data become available before deployment.
    """
    if fraction <= 0:
        return None
    start, end = (pd.Timestamp(t) for t in time_blocks["train"])
    hours = math.floor(fraction * int((end - start) / pd.Timedelta(hours=1)))
    return [_hour(end - pd.Timedelta(hours=hours)), _hour(end)]


def build_split(plan_item: dict, clean_paths: dict, lookback: int, horizon: int) -> dict:
    """The plan item plus time_blocks, admitted_target_block, input_digests and inputs."""
    split_id = plan_item.get("split_id", "?")
    gap = plan_item["gap_hours"]
    if gap < lookback + horizon:
        raise InputError(f"{split_id}: gap {gap} h < lookback + horizon = {lookback + horizon} h",
                         field="gap_hours")
    station_ids = set(plan_item["source_stations"]) | set(plan_item["target_stations"])
    cities = sorted(set(plan_item["sources"]) | {plan_item["target"]})
    ranges, inputs, digests = [], {}, {}
    for city in cities:
        if city not in clean_paths:
            raise InputError(f"{split_id}: no clean table given for city {city!r}", field="clean_paths")
        path = clean_paths[city]
        ranges.append(_city_time_range(path, sorted(station_ids)))
        inputs[city], digests[city] = str(path), file_digest(path)
    start, end = max(r[0] for r in ranges), min(r[1] for r in ranges)
    time_blocks = compute_time_blocks(start, end, plan_item["blocks"], gap, lookback + horizon,
                                      what=f"{split_id} (cities {', '.join(cities)})")
    return {**plan_item, "time_blocks": time_blocks,
            "admitted_target_block": admitted_target_block(time_blocks, plan_item["target_train_fraction"]),
            "input_digests": digests, "inputs": inputs}


def write_split(record: dict, path) -> None:
    """Write `record` as JSON (sorted keys) atomically: a temp file in the same folder, then os.replace."""
    write_json_atomic(record, path)
