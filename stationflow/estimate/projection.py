"""When does a cluster reach its critical value, if the present in-situ rate goes on?

The projection a frost officer asks for at 2 a.m.: with the latest value
``T`` (standard error ``s_T``), the critical value ``T_c`` and the in-situ
rate ``r`` (standard error ``s_r``, and its observed drift ``d`` per hour),
the time left is ``D = (T - T_c) / c`` with the closing rate ``c = -r``
for a temperature falling to ``T_c`` (``c = r`` for a concentration rising
to it).  Its standard error by first-order propagation, plus the drift as
an error (the rate may go on changing either way, so it widens the range
rather than bending the line):

    s_D^2 = (s_T / c)^2 + (D s_r / c)^2 + (d D^2 / (2 c))^2

The assumption is stated wherever the number is shown: the in-situ rate
continues as it is now.  Advection is left out on purpose (it stops or
starts with the wind) and shown beside it.  No projection is made when the
value is not closing in on the critical value (``c <= 0``) or the closing
rate is not distinguishable from zero (``c <= s_r``): "not approaching".
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Crossing:
    """Per cluster: hours until the critical value is reached, its standard error, and whether it is
    already reached (``past``) or not approached (``hours`` NaN)."""

    hours: np.ndarray
    hours_se: np.ndarray
    past: np.ndarray


def crossing(value: np.ndarray, value_se: np.ndarray, rate: np.ndarray, rate_se: np.ndarray, critical: np.ndarray,
             *, downward: bool, drift: np.ndarray | None = None) -> Crossing:
    """The projected time to the critical value (see the module docstring); rates per hour, times in hours."""
    value, value_se, rate, rate_se, critical = (np.asarray(a, float) for a in (value, value_se, rate, rate_se, critical))
    gap = (value - critical) if downward else (critical - value)
    closing = -rate if downward else rate
    past = np.isfinite(gap) & (gap <= 0)
    d = np.zeros_like(gap) if drift is None else np.nan_to_num(np.asarray(drift, float))
    with np.errstate(invalid="ignore", divide="ignore"):
        ok = ~past & np.isfinite(gap) & np.isfinite(closing) & (closing > rate_se) & np.isfinite(rate_se)
        hours = np.where(ok, gap / closing, np.nan)
        var = ((value_se / closing) ** 2 + (hours * rate_se / closing) ** 2
               + (d * hours * hours / (2.0 * closing)) ** 2)
    hours = np.where(past, 0.0, hours)
    return Crossing(hours, np.where(ok, np.sqrt(var), np.where(past, 0.0, np.nan)), past)
