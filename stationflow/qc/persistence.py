"""Persistence tests: a sensor stuck at one value for longer than the field can stay that still.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .steps import station_runs


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
    run_start, _ = station_runs(codes)
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
