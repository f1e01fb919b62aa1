"""Leakage-free forecast windows for one split: inputs X (lookback steps), targets y (horizon steps).

Reads: a split record (pipeline.splits.build_split) and the clean tables of its cities as DataFrames
(columns station_id, time (UTC), one float column per canonical variable); writes nothing.
Config keys obeyed: `forecast.*` (schema ForecastConfig) and, from the split record, time_blocks,
admitted_target_block / target_train_fraction, environments, target_environments, gap_hours.

Cadence: the clean tables' time step (read from their time column: the step every city's grid shares;
hourly when no station has two rows). The forecast lengths are durations in hours (`lookback_hours`,
`horizon_hours`, `stride_hours`, `fill_limit_hours`; a split's `gap_hours`) and are cut in steps of that
cadence, so a daily study writes lookback_hours: 336 for 14 days; a length that is not a whole number of
steps is refused, naming the key. For a 10-min cadence an hour is 6 steps.

Rules (each one keeps information from crossing a block boundary or flowing from test to training):
- Everything is done per station AND per time block: a block's rows are cut out first (re-indexed onto
  the block's complete hourly grid), then filled, then cut into windows. A window belongs to a block when
  all its input and target hours lie inside it, so no window straddles a gap, and no value is carried
  from one block into another.
- Missing values: a missing input hour takes the last observed value of the same station when that value
  is at most `fill_limit_hours` old (forward fill with a limit; causal, because at forecast time nobody
  knows how long a running gap will last). Targets are never filled. A window whose inputs still hold a
  NaN is skipped as "input_missing"; otherwise one whose horizon holds ANY NaN is skipped as
  "target_missing". Counts are returned in `Windows.skipped`.
- Features: see pipeline.features. A canonical variable is dropped (reason in `dropped_features`) when
  some source city, or the target, delivers no value of it at all in the TRAIN block (e.g. a city without
  an SO2 monitor); otherwise every window of that city would be skipped. The same feature list is used
  for every set, target included; the target group is judged on its train block only, never on
  validation or test data. The target variable itself cannot be dropped.
- Scaling: per-feature mean/std fitted on the source stations' train-block rows ONLY (after filling,
  pooled over stations), applied to every set; y uses the mean/std of the target input feature.
- Stride: windows start every `stride_hours` (in steps of the cadence), counted from the start of the block.
- Environments: train/val_source/test_source windows get the environment of their station from the split's
  `environments`; val_target/test_target get `target_environments`; the admitted part of the target's
  train block (target_train_fraction > 0) is one more training environment "<target>-admitted".
  `env_names` lists them all in that order and is shared by every WindowSet.
- `origin` is the last input hour as numpy datetime64[ns] holding UTC (numpy has no time zone).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import List

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
import pandas as pd

from pipeline.errors import InputError, from_mapping
from pipeline.features import FeatureScaler, candidate_variables, derive_features, feature_names
from pipeline.metrics import SEASON_HOURS, seasonal_naive_scale
from pipeline.splits import ADMITTED_SUFFIX, admitted_target_block, plain_container

SKIP_REASONS = ("input_missing", "target_missing")
HOUR = pd.Timedelta(hours=1)


@dataclass
class ForecastConfig:
    target: str = "pm25"
    lookback_hours: int = 48
    horizon_hours: int = 24
    stride_hours: int = 1
    fill_limit_hours: int = 3
    calendar: bool = True
    exclude_features: List[str] = field(default_factory=list)


@dataclass
class WindowSet:
    X: np.ndarray  # float32 (n, lookback, features), scaled
    y: np.ndarray  # float32 (n, horizon), scaled with the target feature's mean/std
    env: np.ndarray  # int64 (n,), index into env_names
    station: np.ndarray  # object (n,)
    origin: np.ndarray  # datetime64[ns] (n,), UTC, last input hour
    feature_names: list
    env_names: list
    target_index: int
    step_hours: float = 1.0  # the cadence: hours between consecutive rows of a window

    def __len__(self) -> int:
        return len(self.y)


@dataclass
class Windows:
    train: WindowSet
    val_source: WindowSet
    test_source: WindowSet
    val_target: WindowSet
    test_target: WindowSet
    scaler: FeatureScaler
    skipped: dict  # reason -> windows skipped, over all sets
    target_naive_scales: dict  # target station -> MASE scale (canonical units; NaN: undefined)
    dropped_features: dict  # variable -> why it is not a feature
    feature_names: list
    env_names: list
    target_index: int
    target: str
    step_hours: float = 1.0  # the cadence

    def unscale_target(self, arr) -> np.ndarray:
        """Scaled target values (any shape) back to canonical units."""
        return self.scaler.unscale(arr, self.target)


def _as_config(cfg) -> ForecastConfig:
    if cfg is None:
        return ForecastConfig()
    cfg = from_mapping(ForecastConfig, plain_container(asdict(cfg) if isinstance(cfg, ForecastConfig) else cfg),
                       "forecast")
    for name in ("lookback_hours", "horizon_hours", "stride_hours"):
        if not isinstance(getattr(cfg, name), int) or getattr(cfg, name) < 1:
            raise InputError(f"must be an integer >= 1, got {getattr(cfg, name)!r}", field=f"forecast.{name}")
    if not isinstance(cfg.fill_limit_hours, int) or cfg.fill_limit_hours < 0:
        raise InputError(f"must be an integer >= 0, got {cfg.fill_limit_hours!r}",
                         field="forecast.fill_limit_hours")
    return cfg


def _steps(hours: int, step: pd.Timedelta, name: str) -> int:
    """A length in hours as a whole number of cadence steps; InputError naming the key otherwise."""
    steps = pd.Timedelta(hours=hours) / step
    if steps != int(steps):
        raise InputError(f"{hours} h is not a whole number of {step} steps (the clean tables' cadence)",
                         field=f"forecast.{name}")
    return int(steps)


def _cadence(frames: dict, city_of: dict) -> pd.Timedelta:
    """The one time step of every station's grid (hourly when no station has two rows)."""
    steps = {}
    for station_id, frame in frames.items():
        if len(frame) > 1:
            steps.setdefault(frame.index.to_series().diff().min(), city_of[station_id])
    if len(steps) > 1:
        found = ", ".join(f"{city} every {step}" for step, city in steps.items())
        raise InputError(f"the split's clean tables have different cadences ({found})", field="cadence")
    return next(iter(steps), HOUR)


def _station_frames(record: dict, tables: dict, variables: list[str]):
    """({station_id: frame indexed by UTC step with the variable columns}, {station_id: city})."""
    wanted = set(record["source_stations"]) | set(record["target_stations"])
    frames, city_of = {}, {}
    for city in sorted(set(record["sources"]) | {record["target"]}):
        if city not in tables:
            raise InputError(f"{record['split_id']}: no clean table given for city {city!r}", field="tables")
        table = tables[city]
        missing = sorted({"station_id", "time", *variables} - set(table.columns))
        if missing:
            raise InputError(f"clean table lacks columns {missing}", file=city, field="columns")
        dtype = table["time"].dtype
        if not (isinstance(dtype, pd.DatetimeTZDtype) and str(dtype.tz) == "UTC"):
            raise InputError(f"must be datetime64 with tz=UTC, got {dtype}", file=city, field="time")
        rows = table[table["station_id"].astype(str).isin(wanted)]
        for station_id, group in rows.groupby(rows["station_id"].astype(str), sort=True):
            frame = group.set_index("time")[variables].astype(np.float64)
            frame.index = frame.index.as_unit("ns")
            if frame.index.has_duplicates:
                raise InputError(f"station {station_id} has duplicated hours", file=city, field="time")
            frames[station_id], city_of[station_id] = frame.sort_index(), city
    return frames, city_of


def _block(frame: pd.DataFrame | None, span, columns: list[str], step: pd.Timedelta = HOUR) -> pd.DataFrame:
    """The rows of [start, end) on the complete grid of the cadence (absent steps become NaN rows)."""
    hours = pd.date_range(span[0].ceil(step), span[1], freq=step, inclusive="left").as_unit("ns")
    if frame is None:
        return pd.DataFrame(np.nan, index=hours, columns=columns)
    return frame[columns].reindex(hours)


def _kept_variables(frames, city_of, record, candidates, target, train_span, step):
    """Drop variables that a source city, or the target, does not deliver at all in the train block."""
    groups = {f"source city {city}": [s for s in record["source_stations"] if city_of.get(s) == city]
              for city in record["sources"]}
    groups[f"target {record['target']}"] = list(record["target_stations"])
    train_rows = {s: _block(frames.get(s), train_span, candidates, step) for s in frames}
    dropped: dict[str, str] = {}
    for variable in candidates:
        for group, station_ids in groups.items():
            if not any(s in train_rows and train_rows[s][variable].notna().any() for s in station_ids):
                dropped[variable] = f"not delivered by {group} in the train block"
                break
    if target in dropped:
        raise InputError(f"{record['split_id']}: target {target!r} {dropped[target]}", field="forecast.target")
    return [v for v in candidates if v not in dropped], dropped


def _cut_windows(features, target_raw, hours, lengths: dict, skipped: dict):
    """Windows of one station in one block: (X (n,L,F), raw y (n,H), origin (n,)); counts skips.

    `lengths`: lookback, horizon and stride in steps of the cadence."""
    lookback, horizon = lengths["lookback"], lengths["horizon"]
    starts = np.arange(0, max(len(target_raw) - lookback - horizon + 1, 0), lengths["stride"])
    # prefix sums of "row has a NaN" give the NaN count of any window in O(1)
    bad_input = np.concatenate([[0], np.cumsum(np.isnan(features).any(axis=1))])
    bad_target = np.concatenate([[0], np.cumsum(np.isnan(target_raw))])
    input_missing = bad_input[starts + lookback] > bad_input[starts]
    target_missing = bad_target[starts + lookback + horizon] > bad_target[starts + lookback]
    skipped["input_missing"] += int(input_missing.sum())
    skipped["target_missing"] += int((target_missing & ~input_missing).sum())
    keep = starts[~input_missing & ~target_missing]
    # numpy's sliding views (no copy) of every window, then one copy of the kept ones
    X = sliding_window_view(features, lookback, axis=0)[keep].transpose(0, 2, 1) if keep.size else \
        np.empty((0, lookback, features.shape[1]))
    y = sliding_window_view(target_raw[lookback:], horizon)[keep] if keep.size else np.empty((0, horizon))
    return X, y, hours[keep + lookback - 1]


def _naive_scales(frames, station_ids, target, train_span, step) -> dict[str, float]:
    """The MASE scale of every target station over its own train block (canonical units, m = 24 h).

    One scale per station (Hyndman & Koehler 2006 scale each series by its own in-sample naive error);
    pipeline.metrics.seasonal_naive_scale is the one implementation. A station without any pair of
    values 24 h apart gets NaN and is left out of the station mean of MASE; when no target station has
    a scale, MASE is undefined for the split and that is an error.
    """
    season = max(int(pd.Timedelta(hours=SEASON_HOURS) // step), 1)  # one step for a daily cadence
    scales = {s: seasonal_naive_scale(_block(frames.get(s), train_span, [target], step)[target].to_numpy(),
                                      season) for s in station_ids}
    if not any(np.isfinite(list(scales.values()))):
        raise InputError(f"no pair of {target} values {season * step} apart in the target train block "
                         f"of stations {list(station_ids)}: the MASE scale is undefined",
                         field="target_naive_scales")
    return scales


def _spans(record: dict) -> dict:
    return {name: tuple(pd.Timestamp(t) for t in span) for name, span in record["time_blocks"].items()}


def build_windows(split_record: dict, tables: dict, cfg: ForecastConfig | dict | None = None) -> Windows:
    """All window sets of one split (see the module docstring for every rule applied)."""
    cfg = _as_config(cfg)
    record = split_record
    if record["gap_hours"] < cfg.lookback_hours + cfg.horizon_hours:
        raise InputError(f"{record['split_id']}: gap {record['gap_hours']} h < lookback + horizon = "
                         f"{cfg.lookback_hours + cfg.horizon_hours} h; rebuild the split", field="gap_hours")
    spans = _spans(record)
    admitted = record.get("admitted_target_block",
                          admitted_target_block(record["time_blocks"], record["target_train_fraction"]))
    candidates = candidate_variables(cfg.target, list(cfg.exclude_features))
    frames, city_of = _station_frames(record, tables, candidates)
    step = _cadence(frames, city_of)
    lengths = {name: _steps(getattr(cfg, f"{name}_hours"), step, f"{name}_hours")
               for name in ("lookback", "horizon", "stride", "fill_limit")}
    short = [name for name in ("lookback", "horizon", "stride") if lengths[name] < 1]
    if short:
        raise InputError(f"shorter than one {step} step", field=f"forecast.{short[0]}_hours")
    variables, dropped = _kept_variables(frames, city_of, record, candidates, cfg.target, spans["train"], step)
    for name in cfg.exclude_features:
        dropped[name] = "excluded by forecast.exclude_features"
    names = feature_names(variables, cfg.calendar)

    def station_block(station_id, span):
        """(features before scaling, raw target, hours) of one station in one block."""
        rows = _block(frames.get(station_id), span, variables, step)
        filled = rows.ffill(limit=lengths["fill_limit"]) if lengths["fill_limit"] else rows
        hours = rows.index.tz_convert(None).to_numpy("datetime64[ns]")  # UTC wall clock, tz-naive
        return derive_features(filled, variables, cfg.calendar), rows[cfg.target].to_numpy(), hours

    source_train = {s: station_block(s, spans["train"]) for s in record["source_stations"]}
    scaler = FeatureScaler().fit(np.vstack([block[0] for block in source_train.values()]), names)

    env_of = {s: e for e, ids in record["environments"].items() for s in ids}
    target_env_of = {s: e for e, ids in record["target_environments"].items() for s in ids}
    admitted_env = f"{record['target']}{ADMITTED_SUFFIX}"
    env_names = list(record["environments"]) + list(record["target_environments"])
    env_names += [admitted_env] if admitted else []
    skipped = {reason: 0 for reason in SKIP_REASONS}

    def window_set(parts) -> WindowSet:
        """parts: list of (station_id, env name, (features, raw target, hours))."""
        # float32 before cutting: windows repeat every row up to L times, so halve the memory early
        pieces = [(s, env, _cut_windows(scaler.transform(f).astype(np.float32), t, h, lengths, skipped))
                  for s, env, (f, t, h) in parts]
        n_features, L, H = len(names), lengths["lookback"], lengths["horizon"]
        X = np.concatenate([p[2][0] for p in pieces] + [np.empty((0, L, n_features))]).astype(np.float32)
        y_raw = np.concatenate([p[2][1] for p in pieces] + [np.empty((0, H))])
        return WindowSet(
            X=X, y=scaler.scale(y_raw, cfg.target).astype(np.float32),
            env=np.concatenate([np.full(len(p[2][1]), env_names.index(p[1]), dtype=np.int64) for p in pieces]
                               + [np.empty(0, dtype=np.int64)]),
            station=np.array([p[0] for p in pieces for _ in range(len(p[2][1]))], dtype=object),
            origin=np.concatenate([p[2][2] for p in pieces] + [np.empty(0, "datetime64[ns]")]),
            feature_names=list(names), env_names=env_names, target_index=names.index(cfg.target),
            step_hours=step / HOUR)

    sources, targets = record["source_stations"], record["target_stations"]
    train_parts = [(s, env_of[s], source_train[s]) for s in sources]
    if admitted:
        admitted_span = tuple(pd.Timestamp(t) for t in admitted)
        train_parts += [(s, admitted_env, station_block(s, admitted_span)) for s in targets]
    windows = Windows(
        train=window_set(train_parts),
        val_source=window_set([(s, env_of[s], station_block(s, spans["val"])) for s in sources]),
        test_source=window_set([(s, env_of[s], station_block(s, spans["test"])) for s in sources]),
        val_target=window_set([(s, target_env_of[s], station_block(s, spans["val"])) for s in targets]),
        test_target=window_set([(s, target_env_of[s], station_block(s, spans["test"])) for s in targets]),
        scaler=scaler, skipped=skipped,
        target_naive_scales=_naive_scales(frames, targets, cfg.target, spans["train"], step),
        dropped_features=dropped, feature_names=list(names), env_names=env_names,
        target_index=names.index(cfg.target), target=cfg.target, step_hours=step / HOUR)
    if len(windows.train) == 0:
        raise InputError(f"{record['split_id']}: no training window (skipped: {skipped})", field="windows")
    return windows


def non_overlapping_targets(window_set: WindowSet, horizon_hours: float) -> np.ndarray:
    """Boolean mask of the windows whose forecast targets overlap no other kept window's: per station, in
    origin order, a window is kept when its origin is at least `horizon_hours` after the last kept one
    (the first window of every station is kept). Windows at a stride below the horizon share most of
    their target hours, so the kept ones carry nearly the same information at horizon / stride times
    fewer forecasts (pipeline.train evaluates fits on them: `fit.validation_windows`)."""
    keep = np.zeros(len(window_set.y), dtype=bool)
    if not len(keep):
        return keep
    gap = np.timedelta64(int(round(float(horizon_hours) * 3600)), "s")
    origins = np.asarray(window_set.origin).astype("datetime64[ns]")
    stations = np.asarray(window_set.station)
    for station in pd.unique(stations):
        rows = np.flatnonzero(stations == station)
        rows = rows[np.argsort(origins[rows], kind="stable")]
        ordered = origins[rows]
        position = 0
        while position < len(rows):  # jump to the first origin at least one horizon after the kept one
            keep[rows[position]] = True
            position = int(np.searchsorted(ordered, ordered[position] + gap, side="left"))
    return keep
