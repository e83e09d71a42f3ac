"""Words and times for people: the main periods as sentences, times in the data's own zone.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..read import is_utc
from ..read.times import tzinfo_for


def display_zone(config) -> str | None:
    """The zone times are shown in (``observations.display_timezone``, else ``observations.timezone``); None for UTC."""
    oc = config["observations"]
    zone = oc.get("display_timezone") or oc["timezone"]
    return None if is_utc(zone) else zone


def show_time(t, zone: str | None, *, date: bool = True) -> str:
    """A time as people read it: local with its zone abbreviation and UTC in brackets, or UTC alone."""
    ts = pd.Timestamp(t)
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    fmt = "%Y-%m-%d %H:%M" if date else "%H:%M"
    if zone is None:
        return f"{ts:{fmt}} UTC"
    local = ts.tz_convert(tzinfo_for(zone))
    return f"{local:{fmt}} {local.strftime('%Z') or zone} ({ts:%H:%M} UTC)"


def _span(start: pd.Timestamp, end: pd.Timestamp) -> str:
    end_fmt = "%H:%M" if start.date() == end.date() else "%Y-%m-%d %H:%M"
    return f"{start:%Y-%m-%d %H:%M}-{end.strftime(end_fmt)}"


def describe_period(p: dict, *, variable: str, timezone: str | None = None) -> str:
    """One line such as 'cluster T03, 2026-04-15 04:40-05:10 UTC: advective cooling -1.9 +/- 0.2 K/h'.

    With a ``timezone`` other than UTC the period is given in local time
    first, with UTC in brackets (frost staff think in local time).
    """
    temp = variable in ("air_temperature", "potential_temperature")
    if temp:
        word = "cooling" if p["rate"] < 0 else "warming"
    else:
        word = "fall" if p["rate"] < 0 else "rise"
    label = {"advective": "advective", "in_situ": "in-situ", "mixed": "mixed"}[p["regime"]]
    start, end = pd.Timestamp(p["start"]), pd.Timestamp(p["end"])
    if start.tzinfo is None:
        start, end = start.tz_localize("UTC"), end.tz_localize("UTC")
    when = f"{_span(start, end)} UTC"
    if timezone and not is_utc(timezone):
        tz = tzinfo_for(timezone)
        ls, le = start.tz_convert(tz), end.tz_convert(tz)
        when = f"{_span(ls, le)} {ls.strftime('%Z') or timezone} ({start:%H:%M}-{end:%H:%M} UTC)"
    unit = p["unit"].replace(" h-1", "/h")
    head = f"cluster {p['cluster']}, {when}:"
    if p["regime"] == "mixed":
        return f"{head} mixed: advection {p['advection']:+.2f}, in situ {p['residual']:+.2f} {unit}"
    return f"{head} {label} {word} {p['rate']:+.2f} +/- {p['rate_se']:.2f} {unit}"


def carried_in(advection: np.ndarray, advection_se: np.ndarray, min_rate: float) -> tuple[bool, float, float]:
    """(was the change carried in, mean advection, mean standard error) over one span of steps at one scale:
    the mean advection exceeds twice its mean standard error (the mean of the errors: conservative, since
    part of each error persists in time) and ``min_rate``."""
    a, se = np.asarray(advection, float), np.asarray(advection_se, float)
    ok = np.isfinite(a) & np.isfinite(se)
    if not ok.any():
        return False, float("nan"), float("nan")
    mean, err = float(a[ok].mean()), float(se[ok].mean())
    return bool(abs(mean) > 2.0 * err and abs(mean) >= min_rate), mean, err


#: the four answers to "at which scale was the change carried in?"
SCALE_VERDICTS = {(True, True): "carried in at both scales", (True, False): "carried in at the regional scale only",
                  (False, True): "carried in at the local scale only", (False, False): "carried in at neither scale"}


def two_scales(period: dict, local, regional, *, min_rate: float) -> dict:
    """For a main period: the advection at the network (regional) scale and at the cluster's own (local)
    scale over the same steps, and whether the change was carried in at either.  ``local`` and
    ``regional`` are the :class:`~stationflow.report.summary.BudgetSummary` of each scale."""
    times = pd.DatetimeIndex(local.times)
    sl = slice(times.get_loc(period["start"]), times.get_loc(period["end"]) + 1)
    c = int(np.flatnonzero(local.clusters["cluster"].astype(str).to_numpy() == period["cluster"])[0])
    here = carried_in(local.terms["advection"][sl, c], local.terms["advection_se"][sl, c], min_rate)
    wide = carried_in(regional.terms["advection"][sl, 0], regional.terms["advection_se"][sl, 0], min_rate)
    return {"cluster": period["cluster"], "start": period["start"], "end": period["end"],
            "regional_advection": wide[1], "regional_advection_se": wide[2], "local_advection": here[1],
            "local_advection_se": here[2], "verdict": SCALE_VERDICTS[(wide[0], here[0])]}


def describe_scales(s: dict, *, unit: str) -> str:
    """One line: 'regional advection -1.95 +/- 0.11 K/h, local -2.10 +/- 0.15 K/h: carried in at both scales'."""
    u = unit.replace(" h-1", "/h")
    return (f"at two scales: regional advection {s['regional_advection']:+.2f} +/- {s['regional_advection_se']:.2f} "
            f"{u}, local {s['local_advection']:+.2f} +/- {s['local_advection_se']:.2f} {u}: {s['verdict']}")
