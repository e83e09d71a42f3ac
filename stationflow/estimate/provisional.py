"""The newest rows of a live budget: one-sided tendencies with an honest error.

A centred tendency at time t needs the value at ``t + h`` (half a window
later), so the newest ``h`` analysis times of a growing record have none.
For them the budget is answered now from the last complete window instead:

- the tendency, the window-mean advection and the in-situ part of row ``t``
  are those of the centred window that ends at the newest time ``t_n`` - the
  same estimator as a final row (the difference of the window's end values
  over its length, the trapezoid mean of the advection), over
  ``[t_n - 2h, t_n]`` (for ``t = t_n``; rows between take the window ending
  at themselves, which is complete too);
- that estimate belongs to the window's centre, ``h`` steps before ``t``;
  what the rate does in those ``h`` steps is unknown, so the change of the
  same term over the previous ``h`` steps (its observed drift) is added to
  its variance: ``se^2 = se_window^2 + (X(t - h) - X(t - 2h))^2``.  Where no
  drift can be measured yet (the first hour) the variance is doubled;
- the value, gradients and winds of row ``t`` are its own (instantaneous);
  the regime is classified again from the one-sided terms.

When later data arrive the row is recomputed with the centred window and
the flag ``one_sided`` drops; the two estimates are kept (revisions).
"""

from __future__ import annotations

import numpy as np

from .budget import REGIMES, BudgetSettings, classify_codes, implausible

#: the terms averaged over the window: replaced by their one-sided estimates
WINDOWED = ("tendency", "advection", "residual")


def one_sided(terms: dict[str, np.ndarray], h: int, settings: BudgetSettings) -> np.ndarray:
    """Give the last ``h`` rows of ``terms`` (n_times, n_clusters arrays, centred estimates, the newest time
    last) their one-sided estimates in place; returns the (n_times,) mask of the rows changed.

    Row ``i`` (one of the last ``h``) takes the centred terms of row ``i - h``, whose window ends at ``i``,
    with the drift ``X[i - h] - X[i - 2h]`` added to each variance (see the module docstring).
    """
    n = terms["tendency"].shape[0]
    h = max(1, int(h))
    changed = np.zeros(n, bool)
    rows = np.arange(max(0, n - h), n)
    rows = rows[rows - h >= 0]
    if rows.size == 0:
        return changed
    src = rows - h
    prev = src - h
    has_prev = prev >= 0
    for name in WINDOWED:
        x = terms[name]
        se = terms[f"{name}_se"]
        est = x[src]
        var = se[src] ** 2
        drift = np.full_like(est, np.nan)
        drift[has_prev] = est[has_prev] - x[prev[has_prev]]
        var = np.where(np.isfinite(drift), var + drift * drift, 2.0 * var)
        x[rows] = est
        se[rows] = np.sqrt(var)
    s = settings
    sub = {k: terms[k][rows] for k in ("tendency", "advection", "residual", "tendency_se", "advection_se", "residual_se")}
    regime = classify_codes(sub["tendency"], sub["advection"], sub["residual"], sub["advection_se"], sub["residual_se"],
                            significance=s.significance, dominance=s.dominance, min_rate=s.min_rate,
                            tendency_se=sub["tendency_se"])
    bad = implausible(sub["tendency"], sub["advection"], sub["residual"], min_rate=s.min_rate,
                      advection_se=sub["advection_se"], residual_se=sub["residual_se"], significance=s.significance)
    regime[bad] = np.int8(REGIMES.index("undetermined"))
    terms["regime"][rows] = regime
    if "implausible" in terms:
        terms["implausible"][rows] = bad
    changed[rows] = True
    return changed


def drift_per_hour(terms: dict[str, np.ndarray], name: str, h: int, interval_s: float) -> np.ndarray:
    """(n_clusters,) the change per hour of the centred ``name`` over the last ``h`` steps it is known for (its
    drift, ``X[n-1-h] - X[n-1-2h]`` over ``h`` intervals), NaN where unknown."""
    x = terms[name]
    n = x.shape[0]
    a, b = n - 1 - h, n - 1 - 2 * h
    if b < 0:
        return np.full(x.shape[1], np.nan)
    return (x[a] - x[b]) / (h * interval_s / 3600.0)
