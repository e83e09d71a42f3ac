"""Quality control: tests that return masks, and a separate step that makes flags.

Every test is a function named after what it checks; it returns a boolean
array that is True where the value *passed* (missing values pass: they are
flagged ``missing`` separately).  :func:`combine` turns the masks into CF
flags per variable, ``<name>_qc`` with ``flag_values = 0 1 2 3`` and
``flag_meanings = "good suspect bad missing"``, and ``<name>_qc_tests``, a
bitmask of the tests that fired (:data:`TEST_BITS`).  QC never deletes or
changes a value.

Test families follow Shafer et al. (2000), Fiebrich et al. (2010) and the
WMO AWS guidelines (Zahumensky 2004): range, step, persistence, internal
consistency and spatial (buddy).  Default thresholds and their sources are
in :data:`DEFAULT_RANGE`, :data:`DEFAULT_STEP` and
:data:`DEFAULT_PERSISTENCE`; values marked "from memory" should be read as
such.  Cold-air pools are real (Fiebrich and Crawford 2001): at night in
light wind the spatial test is relaxed and can only make a value suspect.
"""

from __future__ import annotations

import logging
from concurrent.futures import Future
from dataclasses import dataclass, field
from functools import partial
from typing import Callable

import numpy as np
import pandas as pd

from . import variables as V
from .align import interval_of_sorted, station_columns
from .config import Config

log = logging.getLogger(__name__)

GOOD, SUSPECT, BAD, MISSING = 0, 1, 2, 3
FLAG_NAMES = {GOOD: "good", SUSPECT: "suspect", BAD: "bad", MISSING: "missing"}
TEST_BITS = {"range": 1, "step": 2, "spike": 4, "persistence": 8, "consistency": 16, "spatial": 32}
#: severity of each test when it fires
SEVERITY = {"range": BAD, "step": SUSPECT, "spike": BAD, "persistence": SUSPECT, "consistency": BAD, "spatial": SUSPECT}
#: exceptions by variable: a vane that keeps reporting a direction in calm is a nuisance, not an error
SEVERITY_BY_VARIABLE = {("wind_from_direction", "consistency"): SUSPECT}

C0 = 273.15
#: plausible ranges [SI units]
DEFAULT_RANGE: dict[str, tuple[float, float, str]] = {
    "air_temperature": (C0 - 80, C0 + 60, "WMO AWS guidelines, Zahumensky 2004: -80..+60 degC (from memory)"),
    "dew_point_temperature": (C0 - 80, C0 + 35, "-80..+35 degC (from memory)"),
    "relative_humidity": (0.0, 103.0, "0-100 % plus sensor tolerance to 103 %, Shafer et al. 2000 (from memory)"),
    "air_pressure": (50000.0, 110000.0, "500-1100 hPa (from memory)"),
    "wind_speed": (0.0, 75.0, "0-75 m/s for a 2- or 10-min mean (from memory)"),
    "wind_speed_of_gust": (0.0, 150.0, "0-150 m/s (from memory)"),
    "wind_from_direction": (0.0, 360.0, "0-360 degree, EPA-454/R-99-005"),
}
#: largest plausible change over an interval [(minutes, limit in SI units)]
DEFAULT_STEP: dict[str, tuple[list[tuple[float, float]], str]] = {
    "air_temperature": ([(1, 3.0), (60, 4.0), (120, 7.0), (180, 9.0), (360, 15.0), (720, 25.0)],
                        "3 K per minute (from memory); 4/7/9/15/25 K over 1/2/3/6/12 h, WMO-No. 305 GDPS Guide (1993)"),
    "dew_point_temperature": ([(1, 2.0), (60, 4.0), (120, 6.0), (180, 8.0), (360, 12.0), (720, 20.0)],
                              "2 K per minute (from memory); 4/6/8/12/20 K over 1/2/3/6/12 h, WMO-No. 305"),
    "air_pressure": ([(1, 50.0), (60, 300.0), (120, 600.0), (180, 900.0), (360, 1800.0), (720, 3600.0)],
                     "0.5 hPa per minute (from memory); 3/6/9/18/36 hPa over 1/2/3/6/12 h, WMO-No. 305"),
    "relative_humidity": ([(1, 10.0), (60, 30.0)], "10 % per minute (from memory); 30 % per hour (common practice)"),
    "wind_speed": ([(1, 20.0), (60, 20.0)], "20 m/s between successive values (from memory)"),
}
#: (minimum range, window minutes): less variation over the window is suspect
DEFAULT_PERSISTENCE: dict[str, tuple[float, float, str]] = {
    "air_temperature": (0.1, 60.0, "< 0.1 K variation in 60 min (from memory)"),
    "dew_point_temperature": (0.1, 60.0, "< 0.1 K variation in 60 min (common practice)"),
    "relative_humidity": (1.0, 60.0, "< 1 % in 60 min (from memory); readings at 99-100 % are exempt (fog, dew)"),
    "air_pressure": (10.0, 60.0, "< 0.1 hPa in 60 min (from memory)"),
    "wind_speed": (0.1, 180.0, "< 0.1 m/s for 3 h, EPA-454/R-99-005; calm values are exempt"),
    "wind_from_direction": (1.0, 180.0, "< 1 degree for more than 3 h, EPA-454/R-99-005; calm is exempt"),
}
#: smallest spatial residual that can be flagged [SI units]
DEFAULT_SPATIAL_FLOOR = {"air_temperature": 1.5, "dew_point_temperature": 2.0}
SPATIAL_VARIABLES = ("air_temperature", "dew_point_temperature")
#: user scalars whose names look like particulate matter: non-negative
PM_NAMES = ("pm", "mass_concentration")


@dataclass
class QCResult:
    """Flags aligned with the observations frame.

    ``flags[name]`` is an int8 array (0 good, 1 suspect, 2 bad, 3 missing),
    ``tests[name]`` an int16 bitmask of :data:`TEST_BITS`.
    ``interval``: the reporting interval of the same observations
    (:func:`stationflow.align.infer_interval`), found while their rows were
    in station order; None when not known.
    """

    flags: dict[str, np.ndarray]
    tests: dict[str, np.ndarray]
    interval: pd.Timedelta | None = None

    def usable(self, *, use_suspect: bool = False) -> dict[str, np.ndarray]:
        """Masks of the values the estimator may use."""
        limit = SUSPECT if use_suspect else GOOD
        return {k: f <= limit for k, f in self.flags.items()}

    def columns(self) -> dict[str, np.ndarray]:
        """The ``<name>_qc`` and ``<name>_qc_tests`` columns."""
        out: dict[str, np.ndarray] = {}
        for k in self.flags:
            out[f"{k}_qc"] = self.flags[k]
            out[f"{k}_qc_tests"] = self.tests[k]
        return out


# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------

def _run_bounds(codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and last index of each element's station run (consecutive equal codes: data sorted by station)."""
    n = codes.size
    new = np.empty(n, bool)
    new[:1] = True
    np.not_equal(codes[1:], codes[:-1], out=new[1:])
    starts = np.flatnonzero(new)
    lengths = np.diff(np.append(starts, n))
    return np.repeat(starts, lengths), np.repeat(np.append(starts[1:], n) - 1, lengths)


def row_nanmedian(a: np.ndarray) -> np.ndarray:
    """Median of the finite values of each row of a 2-D array (NaN for a row without any).

    The same numbers as ``np.nanmedian(a, axis=1)``, by one sort of the whole
    array (NaN sort last) instead of a masked sort per row.
    """
    a = np.asarray(a, float)
    if a.shape[0] == 0 or a.shape[1] == 0:
        return np.full(a.shape[0], np.nan)
    s = np.sort(a, axis=1)
    n = np.count_nonzero(~np.isnan(a), axis=1)
    lo = np.maximum((n - 1) // 2, 0)
    hi = np.maximum(n // 2, 0)
    rows = np.arange(a.shape[0])
    out = (s[rows, lo] + s[rows, hi]) / 2.0
    return np.where(n > 0, out, np.nan)


def step_limit(table: list[tuple[float, float]] | list[list[float]], minutes: np.ndarray) -> np.ndarray:
    """Largest plausible change over ``minutes``, interpolated log-log in ``table``.

    Below the first and above the last entry the end values are used, so
    the limit never shrinks below the shortest-interval value.
    """
    tm = np.log([float(a) for a, _ in table])
    lim = np.log([float(b) for _, b in table])
    m = np.log(np.clip(minutes, 1e-6, None))
    return np.exp(np.interp(m, tm, lim))


def _exceeds(change: np.ndarray, minutes: np.ndarray, table) -> np.ndarray:
    """``|change| > step_limit(table, minutes)``, evaluated only where the change exceeds the smallest limit.

    The interpolated limit is never below the table's smallest entry, so the
    other rows cannot exceed it (a small margin covers the log/exp round trip).
    """
    big = np.abs(change) > min(float(b) for _, b in table) * (1 - 1e-9)
    out = np.zeros(change.shape, bool)
    idx = np.flatnonzero(big)
    if idx.size:
        out[idx] = np.abs(change[idx]) > step_limit(table, minutes[idx])
    return out


def rolling_range(x: np.ndarray, start: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Max and min of ``x[start[i]:i+1]`` for every i (NaN ignored).

    A sparse table (range-maximum query): O(n log w), vectorised.
    """
    n = x.size
    hi0 = np.where(np.isnan(x), -np.inf, x)
    lo0 = np.where(np.isnan(x), np.inf, x)
    length = np.arange(n) - start + 1
    levels = max(1, int(np.ceil(np.log2(max(1, length.max())))) + 1)
    his, los = [hi0], [lo0]
    for lev in range(1, levels):
        span = 1 << (lev - 1)
        h, l_ = his[-1], los[-1]
        nh = h.copy()
        nl = l_.copy()
        nh[:-span] = np.maximum(h[:-span], h[span:])
        nl[:-span] = np.minimum(l_[:-span], l_[span:])
        his.append(nh)
        los.append(nl)
    lev = np.floor(np.log2(np.maximum(length, 1))).astype(int)
    j2 = np.arange(n) - (1 << lev) + 1
    mx = np.empty(n)
    mn = np.empty(n)
    for k in range(levels):  # a few levels (log2 of the window length); each is one vector operation
        sel = np.flatnonzero(lev == k)
        if sel.size:
            mx[sel] = np.maximum(his[k][start[sel]], his[k][j2[sel]])
            mn[sel] = np.minimum(los[k][start[sel]], los[k][j2[sel]])
    return mx, mn


def solar_elevation(times: pd.DatetimeIndex | np.ndarray, latitude: float, longitude: float) -> np.ndarray:
    """Approximate solar elevation [degree] (Spencer 1971 declination and equation of time).

    Accurate to a fraction of a degree: enough to tell day from night.
    """
    t = pd.DatetimeIndex(times)
    doy = t.day_of_year.to_numpy()
    hours = t.hour.to_numpy() + t.minute.to_numpy() / 60.0 + t.second.to_numpy() / 3600.0
    g = 2 * np.pi / 365.0 * (doy - 1 + (hours - 12) / 24)
    decl = (0.006918 - 0.399912 * np.cos(g) + 0.070257 * np.sin(g) - 0.006758 * np.cos(2 * g)
            + 0.000907 * np.sin(2 * g) - 0.002697 * np.cos(3 * g) + 0.00148 * np.sin(3 * g))
    eqt = 229.18 * (0.000075 + 0.001868 * np.cos(g) - 0.032077 * np.sin(g) - 0.014615 * np.cos(2 * g)
                    - 0.040849 * np.sin(2 * g))
    solar_time = hours * 60 + eqt + 4 * longitude
    ha = np.deg2rad(solar_time / 4 - 180)
    lat = np.deg2rad(latitude)
    sin_el = np.sin(lat) * np.sin(decl) + np.cos(lat) * np.cos(decl) * np.cos(ha)
    return np.rad2deg(np.arcsin(np.clip(sin_el, -1, 1)))


# --------------------------------------------------------------------------
# the tests: each returns True where the value passed
# --------------------------------------------------------------------------

def within_range(values: np.ndarray, low: float, high: float) -> np.ndarray:
    """Plausible-value test: True where ``low <= value <= high`` or missing."""
    v = np.asarray(values, float)
    return np.isnan(v) | ((v >= low) & (v <= high))


def plausible_steps(values: np.ndarray, times_ns: np.ndarray, codes: np.ndarray,
                    table: list[tuple[float, float]]) -> tuple[np.ndarray, np.ndarray]:
    """Step and spike tests on each station's series (sorted by station, time).

    Returns ``(step_ok, spike_ok)``.  A change from the previous value larger
    than the limit for the elapsed time fails ``step``; a value that jumps
    away and straight back (both changes too large, opposite signs) fails
    ``spike`` instead.  The return from a spike is not a step.
    """
    x = np.asarray(values, float)
    n = x.size
    if n == 0:
        return np.ones(0, bool), np.ones(0, bool)
    fin = np.isfinite(x)
    # each row's previous and next finite row of the same station (-1: none), from running max / min of
    # the finite rows' positions, cut at the station's run of rows
    run_start, run_end = _run_bounds(codes)
    pos = np.arange(n)
    last = np.where(fin, pos, -1)
    np.maximum.accumulate(last, out=last)
    prev = np.empty(n, np.int64)
    prev[0] = -1
    prev[1:] = last[:-1]
    prev[prev < run_start] = -1
    nxt = np.minimum.accumulate(np.where(fin, pos, n)[::-1])[::-1]
    nxt[:-1] = nxt[1:]
    nxt[-1] = n
    nxt[nxt > run_end] = -1
    del last, pos, run_start, run_end
    has_p, has_n = prev >= 0, nxt >= 0
    p = np.where(has_p, prev, 0)
    q = np.where(has_n, nxt, 0)
    dt_in = (times_ns - times_ns[p]) / 6e10
    dt_out = (times_ns[q] - times_ns) / 6e10
    max_gap = max(float(a) for a, _ in table) * 1.5
    d_in = x - x[p]
    d_out = x[q] - x
    ex_in = fin & has_p & (dt_in <= max_gap) & _exceeds(d_in, dt_in, table)
    ex_out = fin & has_n & (dt_out <= max_gap) & _exceeds(d_out, dt_out, table)
    spike = ex_in & ex_out & (np.sign(d_in) != np.sign(d_out))
    after_spike = np.zeros_like(spike)
    after_spike[has_p] = spike[p[has_p]]
    step = ex_in & ~spike & ~after_spike
    return ~step, ~spike


@dataclass(frozen=True)
class Slots:
    """Where each row sits on a regular (station, time) grid: data sorted by station, then time.

    ``cell`` is the flat index ``code * n_slots + slot`` of each row, so a
    station's series is one row of an ``(n_stations, n_slots)`` array and a
    trailing time window is a fixed number of columns.
    """

    cell: np.ndarray
    n_stations: int
    n_slots: int
    step_ns: int


def regular_slots(times_ns: np.ndarray, codes: np.ndarray, *, max_fill: float = 3.0) -> Slots | None:
    """The :class:`Slots` of rows sorted by (station, time), or None when the times are not regular.

    Regular means every time is a whole number of one step (the greatest
    common divisor of the offsets) from the first, no (station, time) pair
    repeats, and the grid is at most ``max_fill`` times the number of rows
    (so sparse or jittered records keep the row-wise path).
    """
    n = times_ns.size
    if n < 2:
        return None
    off = times_ns - times_ns.min()
    step = int(np.gcd.reduce(off))
    if step <= 0:
        return None
    n_slots = int(off.max() // step) + 1
    n_st = int(codes.max()) + 1
    if n_slots * n_st > max_fill * n + 1024:
        return None
    cell = codes.astype(np.int64) * n_slots + off // step
    if not (np.diff(cell) > 0).all():  # duplicates or not sorted by (station, time)
        return None
    return Slots(cell, n_st, n_slots, step)


def _window_extreme(a: np.ndarray, k: int, fn, pad: float) -> np.ndarray:
    """``fn`` (np.maximum or np.minimum) over ``a[:, i-k .. i]`` for every column i (``pad`` before the start)."""
    n = a.shape[1]
    m = np.concatenate([np.full((a.shape[0], k), pad), a], axis=1)
    length, span = 1, k + 1
    while 2 * length <= span:  # doubling: m[:, s] is the extreme of `length` columns from s
        m = fn(m[:, :-length], m[:, length:])
        length *= 2
    return fn(m[:, :n], m[:, span - length:span - length + n])


def _window_count(a: np.ndarray, k: int) -> np.ndarray:
    """Number of True in ``a[:, i-k .. i]`` for every column i."""
    c = np.zeros((a.shape[0], a.shape[1] + 1), np.int32)
    np.cumsum(a, axis=1, out=c[:, 1:])
    lo = np.maximum(np.arange(a.shape[1]) - k, 0)
    return c[:, 1:] - c[:, lo]


def _persistent_on_slots(x: np.ndarray, slots: Slots, min_range: float, window_minutes: float) -> np.ndarray:
    """Rows that fall in a failing persistence window, on the regular grid (the rule of :func:`_persistent_on_rows`)."""
    shape = (slots.n_stations, slots.n_slots)
    k = int(int(window_minutes * 6e10) // slots.step_ns)
    fin = np.isfinite(x)
    hi = np.full(shape, -np.inf)
    lo = np.full(shape, np.inf)
    hi.reshape(-1)[slots.cell[fin]] = x[fin]
    lo.reshape(-1)[slots.cell[fin]] = x[fin]
    rng = _window_extreme(hi, k, np.maximum, -np.inf)
    rng -= _window_extreme(lo, k, np.minimum, np.inf)
    del hi, lo
    present = np.zeros(shape, bool)
    present.reshape(-1)[slots.cell] = True
    finite = np.zeros(shape, bool)
    finite.reshape(-1)[slots.cell[fin]] = True
    n_all = _window_count(present, k)
    n_in = _window_count(finite, k)
    # first present column of each window: the next present column at or after i - k
    cols = np.arange(slots.n_slots)
    nxt = np.where(present, cols[None, :], slots.n_slots)
    nxt = np.minimum.accumulate(nxt[:, ::-1], axis=1)[:, ::-1]
    first = nxt[:, np.maximum(cols - k, 0)]
    span = (cols[None, :] - first) * (slots.step_ns / 6e10)
    fail = finite & (n_in >= 3) & (n_in >= 0.5 * n_all) & (span >= 0.8 * window_minutes) & (rng < min_range)
    # every row inside a failing window fails: a failure at i covers columns i-k .. i
    c = np.zeros((shape[0], shape[1] + k + 1), np.int32)
    np.cumsum(fail, axis=1, out=c[:, 1:shape[1] + 1])
    c[:, shape[1] + 1:] = c[:, shape[1]:shape[1] + 1]
    covered = (c[:, k + 1:k + 1 + shape[1]] - c[:, :shape[1]]) > 0
    return covered.reshape(-1)[slots.cell]


def not_persistent(values: np.ndarray, times_ns: np.ndarray, codes: np.ndarray, min_range: float,
                   window_minutes: float, *, exempt: np.ndarray | None = None, slots: Slots | None = None) -> np.ndarray:
    """Persistence test: False for values in a window with less variation than ``min_range``.

    The trailing window of ``window_minutes`` must be at least 80 % covered
    and hold at least 3 values; then every value in a failing window fails.
    ``exempt`` marks values that may legitimately persist (calm, fog).
    ``slots`` (from :func:`regular_slots`) selects the faster grid form of
    the same rule for regular records.
    """
    x = np.asarray(values, float).copy()
    if exempt is not None:
        x[exempt] = np.nan
    if slots is not None:
        covered = _persistent_on_slots(x, slots, min_range, window_minutes)
    else:
        covered = _persistent_on_rows(x, times_ns, codes, min_range, window_minutes)
    exempt_mask = np.zeros(x.size, bool) if exempt is None else np.asarray(exempt, bool)
    return ~(covered & np.isfinite(np.asarray(values, float)) & ~exempt_mask)


def _persistent_on_rows(x: np.ndarray, times_ns: np.ndarray, codes: np.ndarray, min_range: float,
                        window_minutes: float) -> np.ndarray:
    """Rows that fall in a failing persistence window, on rows sorted by (station, time) (any spacing)."""
    n = x.size
    run_start, _ = _run_bounds(codes)
    w = int(window_minutes * 6e10)
    key = codes.astype(np.int64)
    # first index of the same station whose time is >= t - w
    t_rel = times_ns - times_ns.min()
    combo = key * (t_rel.max() + 2 * w + 1) + t_rel
    start = np.searchsorted(combo, combo - w, side="left")
    start = np.maximum(start, run_start)
    mx, mn = rolling_range(x, start)
    count_fin = np.concatenate([[0], np.cumsum(np.isfinite(x))])
    n_in = count_fin[np.arange(n) + 1] - count_fin[start]
    span = (times_ns - times_ns[start]) / 6e10
    n_all = np.arange(n) - start + 1
    fail = (np.isfinite(x) & (n_in >= 3) & (n_in >= 0.5 * n_all) & (span >= 0.8 * window_minutes)
            & ((mx - mn) < min_range))
    # every value inside a failing window fails
    mark = np.bincount(start[fail], minlength=n + 1) - np.bincount(np.flatnonzero(fail) + 1, minlength=n + 1)
    return np.cumsum(mark)[:n] > 0


def dew_point_not_above_temperature(dew_point: np.ndarray, temperature: np.ndarray, tolerance: float = 0.5) -> np.ndarray:
    """Internal consistency: dew point may not exceed air temperature (+ tolerance) [K]."""
    td, t = np.asarray(dew_point, float), np.asarray(temperature, float)
    return ~(np.isfinite(td) & np.isfinite(t) & (td > t + tolerance))


def gust_not_below_mean(gust: np.ndarray, speed: np.ndarray) -> np.ndarray:
    """Internal consistency: a gust may not be below the mean speed."""
    g, s = np.asarray(gust, float), np.asarray(speed, float)
    return ~(np.isfinite(g) & np.isfinite(s) & (g < s))


def direction_defined_when_moving(direction: np.ndarray, speed: np.ndarray, calm_speed: float) -> np.ndarray:
    """Internal consistency: with a speed of 0 there can be no direction."""
    d, s = np.asarray(direction, float), np.asarray(speed, float)
    return ~(np.isfinite(d) & np.isfinite(s) & (s == 0) & (d != 0))


def agrees_with_neighbours(values: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray, *,
                           neighbours: int = 6, max_distance_m: float = 0.0, suspect_z: float = 3.0,
                           bad_z: float = 6.0, floor: float = 0.0, relaxed: np.ndarray | None = None,
                           relax: float = 2.0, sigma: float = 1.0,
                           predictors: np.ndarray | None = None, passes: int = 2) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spatial (buddy) test on a (n_times, n_stations) grid.

    Each station is predicted from its ``neighbours`` nearest stations by a
    leave-one-out plane fit evaluated at the station, after adjusting all
    values to the station's height with the vertical gradient fitted over
    the whole network at that time (elevation-aware, and stable where a
    local fit with elevation would not be).  Its residual
    is studentised by the prediction's leverage (``r / sqrt(1 + h)``, h the
    prediction variance in units of one reading's, large where the station
    lies outside its neighbours) and compared with a robust spread of all
    stations' residuals at that time (1.4826 MAD): beyond ``suspect_z`` it
    fails, beyond ``bad_z`` it is bad,
    never below ``floor``.  Where ``relaxed`` (per time) is True, values
    *below* their prediction get thresholds multiplied by ``relax`` and are
    never made bad: a cold pool on a calm clear night is real.
    ``predictors`` (same shape) are the values the predictions are made
    from; default ``values`` (pass values already flagged as NaN here so a
    faulty station does not spoil its neighbours' predictions).  With
    ``passes = 2`` (default) the test is run again with the first pass's
    failures removed from the predictors.

    Returns ``(passed, bad, residual)`` arrays of shape (n_times, n_stations).
    """
    from scipy.spatial import cKDTree

    vals = np.asarray(values, float)
    n_t, n_s = vals.shape
    k = min(neighbours, n_s - 1)
    if k < 3:
        return np.ones(vals.shape, bool), np.zeros(vals.shape, bool), np.full(vals.shape, np.nan)
    tree = cKDTree(np.column_stack([x, y]))
    dist, idx = tree.query(np.column_stack([x, y]), k=k + 1)
    members = [idx[i, 1:] for i in range(n_s)]
    far = dist[:, 1:].max(axis=1) > max_distance_m if max_distance_m > 0 else None
    base = vals if predictors is None else np.asarray(predictors, float)
    pred, leverage = _buddy_predictions(base, x, y, z, members, sigma, far)
    judge = dict(suspect_z=suspect_z, bad_z=bad_z, floor=floor, relaxed=relaxed, relax=relax)
    for _ in range(passes - 1):
        # later passes leave out the values the previous pass failed; the fits are independent per
        # time, so only the times where a predictor changed are fitted again (the same numbers)
        first, _, _ = _judge(vals, pred, leverage, **judge)
        src = np.where(first, base, np.nan)
        rows = np.flatnonzero((np.isnan(src) != np.isnan(base)).any(axis=1))
        if rows.size:
            pred = pred.copy()
            leverage = leverage.copy()
            pred[rows], leverage[rows] = _buddy_predictions(src[rows], x, y, z, members, sigma, far)
        base = src
    return _judge(vals, pred, leverage, **judge)


def _buddy_predictions(src: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray, members: list[np.ndarray],
                       sigma: float, far: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-out predictions of every station from its neighbours, and their leverage (see above)."""
    from .gradient import fit_planes

    n_t, n_s = src.shape
    zz = np.asarray(z, float)
    centres = np.column_stack([x, y])
    # one vertical gradient per time from the whole network (stable), then a plain plane among
    # the neighbours of the lapse-adjusted values: pred_s = plane(v - g z)(s) + g z_s
    gamma = np.zeros(n_t)
    if np.isfinite(zz).all() and np.ptp(zz) > 30.0 and n_s >= 6:
        net = fit_planes(src, x, y, [np.arange(n_s)], z=zz, sigma=sigma, min_stations=5, residuals=False)
        gamma = np.nan_to_num(net.grad_z[:, 0])
    z0 = np.where(np.isfinite(zz), zz, 0.0)
    adjusted = src - gamma[:, None] * z0[None, :]
    fit = fit_planes(adjusted, x, y, members, sigma=sigma, centres=centres, residuals=False)
    pred = fit.value + gamma[:, None] * z0[None, :]
    leverage = fit.var_value / sigma ** 2  # prediction variance in units of one reading's
    if far is not None:
        pred[:, far] = np.nan
    return pred, leverage


def _judge(vals: np.ndarray, pred: np.ndarray, leverage: np.ndarray, *, suspect_z: float, bad_z: float,
           floor: float, relaxed: np.ndarray | None, relax: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Studentised residuals against the robust spread of each time: (passed, bad, residual)."""
    r = vals - pred
    # studentise: an extrapolated prediction (station outside its neighbours) is less certain
    rs = r / np.sqrt(1.0 + leverage)
    med = row_nanmedian(rs)[:, None]
    mad = 1.4826 * row_nanmedian(np.abs(rs - med))[:, None]
    dev = rs - med
    # relaxed (night, light wind) only for values colder/lower than predicted: cold pools are real
    cold_relax = np.zeros(vals.shape, bool) if relaxed is None else (np.asarray(relaxed)[:, None] & (dev < 0))
    scale = np.where(cold_relax, relax, 1.0)
    thr_s = np.fmax(suspect_z * mad, floor) * scale
    thr_b = np.fmax(bad_z * mad, 2 * floor) * scale
    fin = np.isfinite(dev)
    passed = ~(fin & (np.abs(dev) > thr_s))
    bad = fin & (np.abs(dev) > thr_b) & ~cold_relax
    return passed, bad, r


# --------------------------------------------------------------------------
# running all tests and combining
# --------------------------------------------------------------------------

def unit_slips(observations: pd.DataFrame, declared: dict[str, str], ranges: dict[str, tuple[float, float]], *,
               min_share: float = 0.5) -> list[str]:
    """One sentence per variable whose values look like another unit than the declared (or default) one.

    A slip: more than ``min_share`` of the values fail the range test as
    read, while at least 95 % would pass read in another usual unit of the
    same kind.  Each sentence names the key and the value(s) to set.
    """
    out = []
    for name, (lo, hi) in ranges.items():
        if name not in observations or name not in V.CANONICAL or name == "wind_from_direction":
            continue
        x = observations[name].to_numpy(float)
        x = x[np.isfinite(x)]
        if x.size == 0 or np.mean((x < lo) | (x > hi)) <= min_share:
            continue
        unit = declared.get(name)
        scale, offset = V.unit_factors(name, unit)
        raw = (x - offset) / scale
        table = V.UNITS_BY_KIND[V.CANONICAL[name].kind]
        fits = []
        for alt, (sc, off) in table.items():
            if (sc, off) == (scale, offset) or any(table[f] == (sc, off) for f in fits):
                continue  # the unit as read, or an alias of one already listed
            y = raw * sc + off
            share = float(np.mean((y >= lo) & (y <= hi)))
            if share >= 0.95:
                fits.append(alt)
        if fits:
            shown = " or ".join(f'"{f}"' for f in fits)
            out.append(f"{np.mean((x < lo) | (x > hi)):.0%} of the {name} values are outside the plausible range when read "
                       f"in {unit or V.CANONICAL[name].unit}, but fit in {shown}; set observations.units.{name} = {shown}")
    return out


def thresholds(config: Config) -> dict[str, dict]:
    """The thresholds in force: defaults merged with the configuration."""
    qc = config["qc"]
    rng = {k: (lo, hi) for k, (lo, hi, _) in DEFAULT_RANGE.items()}
    rng.update({k: tuple(v) for k, v in qc["range"].items()})
    step = {k: t for k, (t, _) in DEFAULT_STEP.items()}
    step.update({k: [tuple(p) for p in v] for k, v in qc["step"].items()})
    pers = {k: (a, b) for k, (a, b, _) in DEFAULT_PERSISTENCE.items()}
    pers.update({k: tuple(v) for k, v in qc["persistence"].items()})
    floor = dict(DEFAULT_SPATIAL_FLOOR)
    floor.update(qc["spatial_floor"])
    return {"range": rng, "step": step, "persistence": pers, "spatial_floor": floor}


def _is_pm(name: str) -> bool:
    return any(name.lower().startswith(p) for p in PM_NAMES)


def run_qc(observations: pd.DataFrame, stations: pd.DataFrame, config: Config | None = None) -> QCResult:
    """Run every test on the tidy observations and combine the results into flags.

    ``observations`` must be the ingest result (canonical names, SI units).
    Vectorised over stations and time.  After the internal-consistency tests
    (which read only the raw values) the variables are independent, so they
    are checked on two threads (the work is large numpy operations, which
    release the GIL): the buddy test's set-up (while the values are sorted),
    each tested variable's range/step and persistence tests, the other
    variables, then each buddy test (which skips what the other tests
    failed) in :data:`SPATIAL_PARTS` parts of the times, as separate tasks.
    """
    cfg = config or Config()
    qcfg = cfg["qc"]
    th = thresholds(cfg)
    variables = [c for c in observations.columns if c not in ("station_id", "time")]
    n = len(observations)
    first_seen = pd.factorize(observations["station_id"])[0]  # stations in order of first appearance
    if n and 0 <= first_seen.min() and first_seen.max() < 2 ** 15:
        first_seen = first_seen.astype(np.int16)  # a quarter of the memory, and sorted by radix
    t_all = observations["time"].to_numpy("datetime64[ns]").view(np.int64)
    if n > 1 and bool((t_all[1:] >= t_all[:-1]).all()):  # in time order (as ingest leaves it)
        order = np.argsort(first_seen, kind="stable")  # the same order as the two-key sort below
    else:
        order = np.lexsort((t_all, first_seen))
    codes = first_seen[order]  # the factorisation of the sorted rows: stations are now 0, 1, 2, ...
    tns = t_all[order]
    interval = interval_of_sorted(codes, tns)  # the rows are in (station, time) order: no sort needed
    buddy = [v for v in variables if qcfg["enabled"] and qcfg["spatial"] and (v in SPATIAL_VARIABLES or _is_pm(v))]
    threaded = qcfg["enabled"] and n >= THREADED_ROWS and (len(variables) > 1 or bool(buddy))
    pool = None
    if threaded:
        from concurrent.futures import ThreadPoolExecutor

        pool = ThreadPoolExecutor(max_workers=2, thread_name_prefix="stationflow-qc")
    try:
        return _run_tests(observations, stations, cfg, th, variables, buddy, order, codes, tns, interval, pool)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)


def _run_tests(observations: pd.DataFrame, stations: pd.DataFrame, cfg: Config, th: dict, variables: list[str],
               buddy: list[str], order: np.ndarray, codes: np.ndarray, tns: np.ndarray, interval: pd.Timedelta,
               pool) -> QCResult:
    """The tests of :func:`run_qc` on the rows sorted by (station, time) (``order``), on ``pool`` when given."""
    qcfg = cfg["qc"]
    calm_speed = qcfg["calm_speed"]
    n = len(observations)
    fired: dict[str, dict[str, np.ndarray]] = {v: {} for v in variables}
    shared: dict[str, _Spatial | None] = {}

    def spatial_setup() -> None:
        shared["spatial"] = _Spatial.setup(observations, stations, buddy, "wind_speed" in variables, cfg, th,
                                           interval, order)

    # the buddy test's set-up reads the rows in their own order and needs only the interval: it starts now,
    # beside the sorting of the values and the persistence slots
    setup = pool.submit(spatial_setup) if (pool is not None and buddy) else None
    arr = {v: observations[v].to_numpy(float)[order] for v in variables}
    # on threads, the persistence slots are found here after the tests are queued (the range and step
    # tests, which do not need them, start meanwhile); the persistence tests wait for them
    slots_ready: Future = Future()
    if pool is None:
        slots_ready.set_result(regular_slots(tns, codes))

    def first_tests(v: str) -> None:
        """Range, step and spike tests of ``v``."""
        x = arr[v]
        if v in th["range"]:
            fired[v]["range"] = ~within_range(x, *th["range"][v])
        elif _is_pm(v):
            fired[v]["range"] = ~within_range(x, 0.0, 1000.0)
        if v in th["step"]:
            step_ok, spike_ok = plausible_steps(x, tns, codes, th["step"][v])
            fired[v]["step"] = ~step_ok
            fired[v]["spike"] = ~spike_ok

    def persistence_test(v: str) -> None:
        x = arr[v]
        if v in th["persistence"] or _is_pm(v):
            mr, win = th["persistence"].get(v, (1e-9, 60.0))
            exempt = None
            if v == "wind_speed":
                exempt = x < calm_speed
            elif v == "wind_from_direction" and "wind_speed" in arr:
                exempt = ~(arr["wind_speed"] >= calm_speed)
            elif v == "relative_humidity":
                exempt = x >= 99.0
            fired[v]["persistence"] = ~not_persistent(x, tns, codes, mr, win, exempt=exempt, slots=slots_ready.result())

    def all_tests(v: str) -> None:
        first_tests(v)
        persistence_test(v)

    def spatial_for(v: str) -> "_Spatial | None":
        """The buddy test's shared set-up (waited for), or None where ``v`` is not tested."""
        if setup is not None:
            setup.result()
        spatial = shared.get("spatial")
        return spatial if spatial is not None and v in spatial.names else None

    def spatial_grid(v: str) -> None:
        """The bin means the buddy test of ``v`` reads: after its other tests, whose failures it skips."""
        if (spatial := spatial_for(v)) is not None:
            spatial.grid(v, fired[v], SPATIAL_PARTS)

    def spatial_part(v: str, part: int) -> None:
        if (spatial := spatial_for(v)) is not None:
            spatial.test(v, part)

    def spatial_finish(v: str) -> None:
        if (spatial := spatial_for(v)) is not None:
            spatial.finish(v, fired[v], np.isfinite(arr[v]))

    # the flags and fired tests of each variable, in the variables' order whichever is combined first
    flags: dict[str, np.ndarray | None] = dict.fromkeys(variables)
    tests: dict[str, np.ndarray | None] = dict.fromkeys(variables)
    inv = np.empty(n, np.int64)  # sorted row -> the row's own position
    inv[order] = np.arange(n)

    def combine(v: str) -> None:
        """Flags and test bits of ``v`` from its fired tests, back in the rows' own order."""
        present = ~np.isnan(arr[v])
        f = np.full(n, MISSING, np.int8)
        f[present] = GOOD
        bits = np.zeros(n, np.int16)
        spatial_bad = fired[v].pop("spatial_bad", None)
        for name in TEST_BITS:  # a fixed order: the result does not depend on which thread finished first
            if name not in fired[v]:
                continue
            mask = fired[v][name] & present  # in place below: no temporary arrays per test
            np.bitwise_or(bits, TEST_BITS[name], out=bits, where=mask)
            np.maximum(f, SEVERITY_BY_VARIABLE.get((v, name), SEVERITY[name]), out=f, where=mask)
        if spatial_bad is not None:
            np.maximum(f, BAD, out=f, where=spatial_bad & present)  # BAD is the highest flag of a present value
        flags[v] = f[inv]
        tests[v] = bits[inv]

    if qcfg["enabled"]:
        # the consistency tests use only the raw values: first, so that the buddy test skips what they fail
        if "dew_point_temperature" in arr and "air_temperature" in arr:
            fired["dew_point_temperature"]["consistency"] = ~dew_point_not_above_temperature(
                arr["dew_point_temperature"], arr["air_temperature"], qcfg["dew_point_tolerance"])
        if "wind_speed_of_gust" in arr and "wind_speed" in arr:
            fired["wind_speed_of_gust"]["consistency"] = ~gust_not_below_mean(arr["wind_speed_of_gust"], arr["wind_speed"])
        if "wind_from_direction" in arr and "wind_speed" in arr:
            fired["wind_from_direction"]["consistency"] = ~direction_defined_when_moving(
                arr["wind_from_direction"], arr["wind_speed"], calm_speed)
        # the tasks, each after the earlier ones it needs: the variables the buddy test checks first (their
        # range/step and persistence tests apart), then the others, then the buddy tests, each in
        # SPATIAL_PARTS parts of the times, so that the two threads finish together
        plan: list[tuple[Callable[[], None], tuple[int, ...]]] = []
        before: dict[str, tuple[int, ...]] = {}
        for v in buddy:
            before[v] = (len(plan), len(plan) + 1)
            plan += [(partial(first_tests, v), ()), (partial(persistence_test, v), ())]
        last: dict[str, int] = {}  # each variable's last task: when it is done, so are all of them
        for v in variables:
            if v not in buddy:
                last[v] = len(plan)
                plan.append((partial(all_tests, v), ()))
        for v in buddy:
            g = len(plan)
            plan.append((partial(spatial_grid, v), before[v]))
            plan += [(partial(spatial_part, v, k), (g,)) for k in range(SPATIAL_PARTS)]
            last[v] = len(plan)
            plan.append((partial(spatial_finish, v), tuple(range(g + 1, g + 1 + SPATIAL_PARTS))))
        if pool is not None:
            futures: list = []
            for task, needs in plan:  # a task waits only on tasks submitted (hence started) before it
                futures.append(pool.submit(_after, [futures[j] for j in needs], task))
            try:
                slots_ready.set_result(regular_slots(tns, codes))
            except BaseException as exc:  # the waiting persistence tests raise it
                slots_ready.set_exception(exc)
            # each variable's flags are combined here as soon as its tests are done, beside the others' tests
            for v in sorted(variables, key=last.__getitem__):
                futures[last[v]].result()
                combine(v)
            for fut in futures:
                fut.result()
        else:
            if buddy:
                spatial_setup()
            for task, _ in plan:
                task()
    for v in variables:
        if flags[v] is None:
            combine(v)
    return QCResult(flags, tests, interval)


#: rows above which the variables are checked on two threads
THREADED_ROWS = 200_000
#: the buddy test of a variable runs in this many parts of the times (independent per time), one per thread
SPATIAL_PARTS = 2


def _after(needs: list, task: Callable[[], None]) -> None:
    for fut in needs:
        fut.result()
    task()


@dataclass
class _Spatial:
    """What the buddy test of every variable shares: the surface stations, the grid, light-wind times.

    The set-up reads the rows in the order of the observations; ``order`` maps them to the (station,
    time) order the other tests use (sorted row ``i`` is row ``order[i]``).
    """

    values: dict[str, np.ndarray]
    cfg: Config
    th: dict
    names: list[str]
    surface_ids: list[str]
    sx: np.ndarray
    sy: np.ndarray
    sz: np.ndarray
    times: pd.DatetimeIndex
    inside: np.ndarray
    flat: np.ndarray
    lat0: float
    lon0: float
    light: np.ndarray | None
    order: np.ndarray
    work: dict = field(default_factory=dict)

    @classmethod
    def setup(cls, obs: pd.DataFrame, stations: pd.DataFrame, names: list[str], wind: bool, cfg: Config, th: dict,
              interval: pd.Timedelta, order: np.ndarray) -> "_Spatial | None":
        from .align import bin_index, grid_times
        from .geometry import assign_roles, project

        qcfg = cfg["qc"]
        st = stations.reset_index(drop=True)
        x, y, _, _ = project(st["latitude"].to_numpy(), st["longitude"].to_numpy())
        surface = assign_roles(st, x, y) == "surface"
        surface_ids = st["station_id"][surface].tolist()
        if len(surface_ids) < 5:
            return None
        t0 = obs["time"].min().ceil(interval)
        rows = bin_index(obs["time"], t0, interval)
        col = station_columns(obs["station_id"], surface_ids)
        times = grid_times(t0, obs["time"].max(), interval)
        inside = (col >= 0) & (rows >= 0) & (rows < len(times))
        flat = rows * len(surface_ids) + col  # each row's cell in the (time, station) grid
        # the values as arrays, taken here: the threads that test the variables share no pandas object
        values = {v: obs[v].to_numpy(float) for v in names + (["wind_speed"] if wind else [])}
        sp = cls(values, cfg, th, list(names), surface_ids, x[surface], y[surface], st["elevation"].to_numpy(float)[surface],
                 times, inside, flat,
                 float(st["latitude"].mean()), float(st["longitude"].mean()), None, order)
        if wind:
            sp.light = ~(row_nanmedian(sp.bin_means("wind_speed")) >= qcfg["spatial_light_wind"])
        return sp

    def bin_means(self, v: str, usable: np.ndarray | None = None) -> np.ndarray:
        """(time, station) bin means of the finite (and ``usable``) values of ``v``, as :func:`align.to_grid` gives."""
        from .align import cell_means

        ok = self.inside if usable is None else self.inside & usable
        return cell_means(self.values[v], ok, self.flat, (len(self.times), len(self.surface_ids)))[0]

    def grid(self, v: str, fired_v: dict[str, np.ndarray], parts: int) -> None:
        """Bin means of ``v`` at the surface stations, without the values its other tests failed, for a
        test in ``parts`` parts of the times."""
        already = np.zeros(len(self.order), bool)
        for m in fired_v.values():  # in (station, time) order
            already |= m
        usable = np.empty_like(already)
        usable[self.order] = ~already  # in the order of the observations
        data = self.bin_means(v, usable)
        night = solar_elevation(self.times, self.lat0, self.lon0) < 0
        relaxed = night & (self.light if self.light is not None else True)
        self.work[v] = (np.log(np.fmax(data, 0.5)) if _is_pm(v) else data, relaxed, [None] * parts)

    def test(self, v: str, part: int) -> None:
        """The buddy test of ``v`` at the times of ``part``: the test is independent per time."""
        qcfg = self.cfg["qc"]
        data, relaxed, results = self.work[v]
        a, b = (data.shape[0] * part) // len(results), (data.shape[0] * (part + 1)) // len(results)
        floor = self.th["spatial_floor"].get(v, np.log(2.0) if _is_pm(v) else 0.0)
        sigma = self.cfg["uncertainty"]["sensor"]
        opts = dict(neighbours=qcfg["spatial_neighbours"], max_distance_m=qcfg["spatial_max_distance_km"] * 1000.0,
                    suspect_z=qcfg["spatial_suspect"], bad_z=qcfg["spatial_bad"], floor=floor, relaxed=relaxed[a:b],
                    relax=qcfg["spatial_relax"], sigma=float(sigma.get(v, 1.0)))
        with np.errstate(all="ignore"):  # thread-safe, unlike warnings.catch_warnings (this runs on a thread)
            passed, bad, _ = agrees_with_neighbours(data[a:b], self.sx, self.sy, self.sz, **opts)
        results[part] = (passed, bad)

    def finish(self, v: str, fired_v: dict[str, np.ndarray], finite: np.ndarray) -> None:
        """Map the parts' results back to the rows (``finite``: the values present, in (station, time) order)."""
        results = self.work.pop(v)[2]
        passed = np.concatenate([r[0] for r in results])
        bad = np.concatenate([r[1] for r in results])
        n = len(self.order)
        fail = np.zeros(n, bool)
        badm = np.zeros(n, bool)
        inside, flat = self.inside, self.flat
        fail[inside] = ~passed.reshape(-1)[flat[inside]]
        badm[inside] = bad.reshape(-1)[flat[inside]]
        fired_v["spatial"] = fail[self.order] & finite
        fired_v["spatial_bad"] = badm[self.order] & finite


def flag_table(observations: pd.DataFrame, result: QCResult) -> pd.DataFrame:
    """The qc_flags.csv table: one row per value that is not good (and not missing)."""
    parts = []
    names = {bit: name for name, bit in TEST_BITS.items()}
    for v, f in result.flags.items():
        sel = (f == SUSPECT) | (f == BAD)
        if not sel.any():
            continue
        bits = result.tests[v][sel]
        uniq, inv = np.unique(bits, return_inverse=True)
        labels = np.array(["+".join(names[b] for b in sorted(names) if u & b) for u in uniq], dtype=object)
        parts.append(pd.DataFrame({
            "station_id": observations["station_id"].array[sel],  # typed take: no object conversion
            "time": observations["time"].array[sel],
            "variable": v,
            "flag": np.where(f[sel] == BAD, "bad", "suspect"),
            "tests": labels[inv],
        }))
    if not parts:
        return pd.DataFrame({"station_id": pd.Series([], dtype=str), "time": pd.Series([], dtype="datetime64[ns, UTC]"),
                             "variable": pd.Series([], dtype=str), "flag": pd.Series([], dtype=str),
                             "tests": pd.Series([], dtype=str)})
    out = pd.concat(parts, ignore_index=True)
    return out.sort_values(["time", "station_id", "variable"], kind="stable").reset_index(drop=True)


def summary(observations: pd.DataFrame, result: QCResult) -> dict[str, pd.DataFrame]:
    """Counts of fired tests per variable and test, and flags per station."""
    rows = []
    combos = np.arange(1 << 16)
    for v, bits in result.tests.items():
        # values per combination of fired tests (one pass), then per test the combinations that include it
        fired = bits[bits != 0]  # most values pass every test
        per_combo = np.bincount(fired.view(np.uint16), minlength=1 << 16)
        for name, b in TEST_BITS.items():
            c = int(per_combo[(combos & b) != 0].sum())
            if c:
                rows.append({"variable": v, "test": name, "values": c})
    per_test = pd.DataFrame(rows, columns=["variable", "test", "values"])
    if result.flags:
        codes, ids = pd.factorize(observations["station_id"], sort=True)
        n_s = len(ids)
        # values per (station, flag) of each variable, in one count of the values that are not good
        n = sum(np.bincount(codes[f != GOOD] * 4 + f[f != GOOD], minlength=4 * n_s)
                for f in result.flags.values()).reshape(n_s, 4)
        sus, bad = n[:, SUSPECT], n[:, BAD]
        per_station = pd.DataFrame({"station_id": np.asarray(ids, dtype=object), "suspect": np.asarray(sus, int),
                                    "bad": np.asarray(bad, int)})
    else:
        per_station = pd.DataFrame(columns=["station_id", "suspect", "bad"])
    return {"per_test": per_test, "per_station": per_station}


def flagged_periods(observations: pd.DataFrame, result: QCResult, *, gap: str = "2h",
                    table: pd.DataFrame | None = None) -> pd.DataFrame:
    """Contiguous periods of non-good values per station and variable (for the check summary)."""
    t = (flag_table(observations, result) if table is None else table).copy()
    if t.empty:
        return pd.DataFrame(columns=["station_id", "variable", "start", "end", "values", "bad_values", "flag", "tests"])
    # vectorised over flagged values: sort, cut into periods, reduce each period with ufunc.reduceat
    s_codes, s_ids = pd.factorize(t["station_id"], sort=True)
    v_codes, v_ids = pd.factorize(t["variable"], sort=True)
    ns = pd.DatetimeIndex(t["time"]).asi8
    order = np.lexsort((ns, v_codes, s_codes))
    s_codes, v_codes, ns = s_codes[order], v_codes[order], ns[order]
    new = np.ones(len(order), bool)
    new[1:] = (s_codes[1:] != s_codes[:-1]) | (v_codes[1:] != v_codes[:-1]) | (np.diff(ns) > pd.Timedelta(gap).value)
    starts = np.flatnonzero(new)
    t_codes, t_labels = pd.factorize(t["tests"].to_numpy()[order])
    names = sorted({n for lab in t_labels for n in str(lab).split("+")})
    masks = np.array([sum(1 << names.index(n) for n in str(lab).split("+")) for lab in t_labels], dtype=np.int64)
    union = np.bitwise_or.reduceat(masks[t_codes], starts)
    bad_values = np.add.reduceat((t["flag"].to_numpy()[order] == "bad").astype(np.int64), starts)
    is_bad = bad_values > 0
    time_sorted = pd.DatetimeIndex(ns).tz_localize("UTC")
    ends = np.append(starts[1:], len(order)) - 1
    return pd.DataFrame({
        "station_id": np.asarray(s_ids, dtype=object)[s_codes[starts]],
        "variable": np.asarray(v_ids, dtype=object)[v_codes[starts]],
        "start": time_sorted[starts], "end": time_sorted[ends], "values": ends - starts + 1,
        "bad_values": bad_values, "flag": np.where(is_bad, "bad", "suspect"),
        "tests": _mask_labels(union, names),
    })


def _mask_labels(masks: np.ndarray, names: list[str]) -> np.ndarray:
    """'a+b' labels of bit masks over ``names`` (one label built per distinct mask)."""
    uniq, inv = np.unique(masks, return_inverse=True)
    labels = np.array(["+".join(n for i, n in enumerate(names) if int(m) >> i & 1) for m in uniq], dtype=object)
    return labels[inv]
