"""Step and spike tests: changes between successive reports larger than the plausible change over
that interval.
"""

from __future__ import annotations

import numpy as np

# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------

def station_runs(codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and last index of each element's station run (consecutive equal codes: data sorted by station)."""
    n = codes.size
    new = np.empty(n, bool)
    new[:1] = True
    np.not_equal(codes[1:], codes[:-1], out=new[1:])
    starts = np.flatnonzero(new)
    lengths = np.diff(np.append(starts, n))
    return np.repeat(starts, lengths), np.repeat(np.append(starts[1:], n) - 1, lengths)


def step_limit(table: list[tuple[float, float]] | list[list[float]], minutes: np.ndarray) -> np.ndarray:
    """Largest plausible change over ``minutes``, interpolated log-log in ``table``.

    Below the first and above the last entry the end values are used, so
    the limit never shrinks below the shortest-interval value.
    """
    tm = np.log([float(a) for a, _ in table])
    lim = np.log([float(b) for _, b in table])
    m = np.log(np.clip(minutes, 1e-6, None))
    return np.exp(np.interp(m, tm, lim))


def exceeds_step(change: np.ndarray, minutes: np.ndarray, table) -> np.ndarray:
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
    run_start, run_end = station_runs(codes)
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
    ex_in = fin & has_p & (dt_in <= max_gap) & exceeds_step(d_in, dt_in, table)
    ex_out = fin & has_n & (dt_out <= max_gap) & exceeds_step(d_out, dt_out, table)
    spike = ex_in & ex_out & (np.sign(d_in) != np.sign(d_out))
    after_spike = np.zeros_like(spike)
    after_spike[has_p] = spike[p[has_p]]
    step = ex_in & ~spike & ~after_spike
    return ~step, ~spike
