"""Align irregular station reports onto the analysis time grid.

Reports are averaged into bins of one analysis interval.  A bin labelled
``t`` holds the reports with ``t - interval < time <= t`` (timestamps mark
the *end* of an averaging period, the usual logger convention).  Scalars are
bin means; winds are averaged as vectors (u, v), never as speed and
direction.  The result is a set of dense ``(time, station)`` arrays, which is
what the estimator works on.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([a-zA-Z]+)\s*$")
_UNITS = {"s": 1, "sec": 1, "second": 1, "seconds": 1, "min": 60, "minute": 60, "minutes": 60,
          "t": 60, "m": 60, "h": 3600, "hour": 3600, "hours": 3600, "hr": 3600,
          "d": 86400, "day": 86400, "days": 86400}


def parse_duration(text: str) -> pd.Timedelta:
    """Parse a duration such as ``'10min'``, ``'1h'``, ``'90s'`` or ``'7D'``."""
    m = _DURATION.match(text)
    if not m or m.group(2).lower() not in _UNITS:
        raise ValueError(f"not a duration: {text!r}")
    seconds = float(m.group(1)) * _UNITS[m.group(2).lower()]
    if seconds <= 0:
        raise ValueError(f"duration must be positive: {text!r}")
    return pd.Timedelta(seconds=seconds)


def format_duration(td: pd.Timedelta) -> str:
    """Short form of a duration: '5min', '1h', '90s', '7D'."""
    sec = int(round(pd.Timedelta(td).total_seconds()))
    for unit, n in (("D", 86400), ("h", 3600), ("min", 60)):
        if sec % n == 0 and sec >= n:
            return f"{sec // n}{unit}"
    return f"{sec}s"


def infer_interval(observations: pd.DataFrame) -> pd.Timedelta:
    """The typical reporting interval: median over stations of the median step.

    Sort-based and vectorised (no group-by): rows already in time order need
    only a stable sort by station.
    """
    ids = observations["station_id"]
    codes = ids.cat.codes.to_numpy() if isinstance(ids.dtype, pd.CategoricalDtype) else pd.factorize(ids)[0]
    t = pd.DatetimeIndex(observations["time"]).as_unit("ns").asi8
    if t.size > 1 and bool((t[1:] >= t[:-1]).all()):
        order = np.argsort(codes, kind="stable")  # time order kept within each station
    else:
        order = np.lexsort((t, codes))
    return interval_of_sorted(codes[order], t[order])


def interval_of_sorted(codes: np.ndarray, t: np.ndarray) -> pd.Timedelta:
    """:func:`infer_interval` of rows already sorted by (station code, time in ns); codes < 0 are ignored."""
    dt = np.diff(t)
    keep = (codes[1:] == codes[:-1]) & (dt > 0) & (codes[1:] >= 0)
    if not keep.any():
        return pd.Timedelta(minutes=10)
    group = codes[1:][keep]
    step = dt[keep]  # each station's steps are contiguous (the rows are sorted by station)
    starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
    counts = np.diff(np.r_[starts, group.size])
    # most stations report at one step: where both middle steps of a station's sorted steps equal a common
    # one (counted, no sort), that is its median; the others are sorted
    common = step[step.size // 2]
    below = np.add.reduceat((step < common).view(np.int8), starts, dtype=np.int64)
    equal = np.add.reduceat((step == common).view(np.int8), starts, dtype=np.int64)
    settled = (below <= (counts - 1) // 2) & (counts // 2 < below + equal)
    per_station = np.full(starts.size, _step_us(np.array([common]))[0])
    if not settled.all():
        rows = np.repeat(~settled, counts)
        per_station[~settled] = _sorted_medians(group[rows], step[rows])
    ns = float(np.median(per_station))
    # round to whole seconds
    return pd.Timedelta(seconds=max(1.0, round(ns / 1e9)))


def _step_us(step_ns: np.ndarray) -> np.ndarray:
    """Steps [ns] truncated to whole microseconds and capped at 2**43 us (about 100 days), as float ns."""
    return np.minimum(step_ns // 1000, (1 << 43) - 1).astype(np.float64) * 1000.0


def _sorted_medians(group: np.ndarray, step: np.ndarray) -> np.ndarray:
    """Median step of each station (``group`` sorted, ``step`` in ns), by one sort of (station, step in us)
    packed in one integer (stations below 2**20), else a two-key sort."""
    group = group.astype(np.int64)
    if group.max() < (1 << 20):
        key = np.sort((group << 43) | np.minimum(step // 1000, (1 << 43) - 1))
        group, us = key >> 43, (key & ((1 << 43) - 1)).astype(np.float64) * 1000.0
    else:  # a million stations or more
        srt = np.lexsort((step, group))
        group, us = group[srt], _step_us(step[srt])
    starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
    counts = np.diff(np.r_[starts, group.size])
    return (us[starts + (counts - 1) // 2] + us[starts + counts // 2]) / 2


@dataclass
class Grid:
    """Dense analysis arrays: ``values[name]`` has shape (n_times, n_stations).

    ``counts[name]`` is the number of reports averaged into each bin.
    """

    times: pd.DatetimeIndex
    stations: list[str]
    values: dict[str, np.ndarray]
    counts: dict[str, np.ndarray]
    interval: pd.Timedelta


def station_columns(ids: pd.Series, stations: list[str]) -> np.ndarray:
    """Position of each row's station in ``stations`` (-1 if absent); fast for categorical ids."""
    if isinstance(ids.dtype, pd.CategoricalDtype):
        where = pd.Index(stations).get_indexer(ids.cat.categories.astype(str))
        codes = ids.cat.codes.to_numpy()
        return np.where(codes >= 0, where[codes], -1)
    return pd.Index(stations).get_indexer(ids)


def bin_index(times: pd.Series | np.ndarray, start: pd.Timestamp, interval: pd.Timedelta) -> np.ndarray:
    """Index of the right-labelled bin each time falls in (bin 0 ends at ``start``)."""
    t = pd.DatetimeIndex(times).as_unit("ns").asi8
    step = interval.value
    return np.ceil((t - start.value) / step).astype(np.int64)


def grid_times(first: pd.Timestamp, last: pd.Timestamp, interval: pd.Timedelta) -> pd.DatetimeIndex:
    """The bin ends from ``first`` to the first one at or after ``last`` (at least one)."""
    n_t = max(int(np.ceil((last.value - first.value) / interval.value)) + 1, 1)
    return pd.date_range(first, periods=n_t, freq=interval)


def cell_means(x: np.ndarray, ok: np.ndarray, flat: np.ndarray, shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Means and counts of the finite ``x`` where ``ok``, by grid cell ``flat`` (row-major in ``shape``)."""
    sel = ok & np.isfinite(x)
    size = shape[0] * shape[1]
    s = np.bincount(flat[sel], weights=x[sel], minlength=size)
    n = np.bincount(flat[sel], minlength=size).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (s / n).reshape(shape), n.reshape(shape)


def to_grid(
    observations: pd.DataFrame,
    stations: list[str],
    variables: list[str],
    *,
    interval: pd.Timedelta,
    start: pd.Timestamp | None = None,
    end: pd.Timestamp | None = None,
    usable: dict[str, np.ndarray] | None = None,
    calm_speed: float = 0.5,
) -> Grid:
    """Bin-average ``variables`` onto a regular grid of ``interval``.

    Parameters
    ----------
    observations
        Tidy frame with ``station_id``, ``time`` and the variables.
    stations
        Station order of the output columns.
    variables
        Scalars to average.  When the frame has ``wind_speed`` and
        ``wind_from_direction``, ``u`` and ``v`` [m s-1] are added as vector
        means (calm reports count as zero wind).
    usable
        Optional per-variable boolean masks (aligned with ``observations``)
        of values that may be used (from QC); others are ignored.
    """
    t = observations["time"]
    first = pd.Timestamp(t.min()).ceil(interval) if start is None else pd.Timestamp(start)
    last = pd.Timestamp(t.max()) if end is None else pd.Timestamp(end)
    times = grid_times(first, last, interval)
    n_t = len(times)
    n_s = len(stations)
    col = station_columns(observations["station_id"], stations)
    row = bin_index(t, first, interval)
    inside = (col >= 0) & (row >= 0) & (row < n_t)
    flat = row * n_s + col
    everything = np.ones(len(observations), bool)

    def mean_of(x: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return cell_means(x, ok & inside, flat, (n_t, n_s))

    def mask(name: str) -> np.ndarray:
        return usable.get(name, everything) if usable else everything

    values: dict[str, np.ndarray] = {}
    counts: dict[str, np.ndarray] = {}
    for name in variables:
        if name in observations:
            values[name], counts[name] = mean_of(observations[name].to_numpy(float), mask(name))
    if "wind_speed" in observations and "wind_from_direction" in observations and "u" not in values:
        from stationflow.variables import wind_components

        s = observations["wind_speed"].to_numpy(float)
        d = observations["wind_from_direction"].to_numpy(float)
        calm = s < calm_speed
        u, v = wind_components(np.where(calm, 0.0, s), np.where(calm, 0.0, d))
        ok = mask("wind_speed") & (mask("wind_from_direction") | calm)
        values["u"], counts["u"] = mean_of(u, ok)
        values["v"], counts["v"] = mean_of(v, ok)
    return Grid(times=times, stations=list(stations), values=values, counts=counts, interval=interval)
