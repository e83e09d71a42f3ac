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
    """The typical reporting interval: median over stations of the median step."""
    obs = observations[["station_id", "time"]].sort_values(["station_id", "time"])
    t = obs["time"].to_numpy("datetime64[ns]").astype(np.int64)
    codes = pd.factorize(obs["station_id"])[0]
    dt = np.diff(t)
    same = codes[1:] == codes[:-1]
    dt = dt[same & (dt > 0)]
    if dt.size == 0:
        return pd.Timedelta(minutes=10)
    per_station = pd.Series(dt).groupby(codes[1:][same & (np.diff(t) > 0)]).median()
    ns = float(np.median(per_station.to_numpy()))
    # round to whole seconds
    return pd.Timedelta(seconds=max(1.0, round(ns / 1e9)))


@dataclass
class Grid:
    """Dense analysis arrays: ``values[name]`` has shape (n_times, n_stations)."""

    times: pd.DatetimeIndex
    stations: list[str]
    values: dict[str, np.ndarray]
    counts: np.ndarray  # reports per bin of the budget variable (n_times, n_stations)
    interval: pd.Timedelta


def bin_index(times: pd.Series | np.ndarray, start: pd.Timestamp, interval: pd.Timedelta) -> np.ndarray:
    """Index of the right-labelled bin each time falls in (bin 0 ends at ``start``)."""
    t = pd.DatetimeIndex(times).as_unit("ns").asi8
    step = interval.value
    return np.ceil((t - start.value) / step).astype(np.int64)


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
        Scalars to average.  ``"u"``/``"v"`` are produced when both
        ``wind_speed`` and ``wind_from_direction`` are present (vector means;
        calm reports count as zero wind).
    usable
        Optional per-variable boolean masks (aligned with ``observations``)
        of values the estimator may use (from QC); others are ignored.
    """
    t = observations["time"]
    tmin = t.min() if start is None else start
    tmax = t.max() if end is None else end
    first = pd.Timestamp(tmin).ceil(interval) if start is None else start
    step = interval.value
    n_t = int(np.ceil((pd.Timestamp(tmax).value - first.value) / step)) + 1
    times = pd.date_range(first, periods=max(n_t, 1), freq=interval)
    col = pd.Index(stations).get_indexer(observations["station_id"])
    row = bin_index(t, first, interval)
    inside = (col >= 0) & (row >= 0) & (row < len(times))
    flat = row * len(stations) + col
    size = len(times) * len(stations)
    out: dict[str, np.ndarray] = {}
    counts = np.zeros(size)

    def mean_of(x: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        sel = ok & inside & np.isfinite(x)
        s = np.bincount(flat[sel], weights=x[sel], minlength=size)
        n = np.bincount(flat[sel], minlength=size).astype(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            m = s / n
        return m.reshape(len(times), len(stations)), n.reshape(len(times), len(stations))

    true = np.ones(len(observations), bool)
    for name in variables:
        if name not in observations:
            continue
        ok = usable.get(name, true) if usable else true
        out[name], n = mean_of(observations[name].to_numpy(float), ok)
        if name == variables[0]:
            counts = n
    if "wind_speed" in observations and "wind_from_direction" in observations:
        from .variables import wind_components

        s = observations["wind_speed"].to_numpy(float)
        d = observations["wind_from_direction"].to_numpy(float)
        calm = s < calm_speed
        u, v = wind_components(np.where(calm, 0.0, s), np.where(calm, 0.0, d))
        ok = true
        if usable:
            ok = usable.get("wind_speed", true) & (usable.get("wind_from_direction", true) | calm)
        out["u"], _ = mean_of(u, ok)
        out["v"], _ = mean_of(v, ok)
        out["wind_speed"], _ = mean_of(s, usable.get("wind_speed", true) if usable else true)
    return Grid(times=times, stations=list(stations), values=out,
                counts=counts if isinstance(counts, np.ndarray) and counts.ndim == 2 else np.zeros((len(times), len(stations))),
                interval=interval)
