"""Critical values and alert rules of a followed night.

``follow.critical`` gives each cluster its critical value: one value for
all, or a table with ``default`` and cluster or station ids (a cluster takes
the most demanding value of its own id and its stations': the highest
critical temperature, the lowest concentration limit).  Values are numbers
in the variable's unit or strings with a unit (``"-2.2 degC"``,
``"28 degF"``, ``"35 ug/m3"``).

The rules (``[alerts]``), checked on the newest row of every cluster after
each call; an alert is written when a condition *starts* to hold.  It is not
repeated while it holds, and may fire again only once its clearing condition
has held for :data:`CLEAR_CALLS` calls in a row (a station's silence clears
as soon as it reports):

- ``below_critical``: the value is past the critical value (below it for a
  temperature, above for a concentration); it clears once the value is back
  by more than twice its standard error;
- ``crossing_within``: the projected crossing (the present in-situ rate
  continued, :mod:`stationflow.estimate.projection`) is nearer than this;
- ``advective_rate``: the regime is advective and the change is faster than
  this (cooling for temperatures, rising for concentrations);
- ``silent_after``: a station has sent nothing for this long (measured
  against the newest report of any station, so a replay behaves as live).

Each alert is one JSON object: ``time`` (UTC) and ``local_time``, ``rule``,
``cluster`` or ``station``, a sentence, and the ``evidence`` (the numbers
the rule looked at, with their unit).
"""

from __future__ import annotations

import json
import logging
import re
import shlex
import subprocess
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import ConfigError
from ..network.grid import parse_duration
from ..variables import convert, kind_of

log = logging.getLogger(__name__)


#: the critical temperature when none is set: the freezing point (set the crop's own; common practice)
DEFAULT_CRITICAL_K = 273.15


def parse_value(text, variable: str) -> float:
    """A critical value in the variable's (SI) unit from a number or a string with a unit."""
    if isinstance(text, bool):
        raise ConfigError(f"follow.critical: {text!r} is not a value")
    if isinstance(text, (int, float)):
        value = float(text)
        if kind_of(variable) == "temperature" and value < 150.0:
            raise ConfigError(f"follow.critical = {text}: give temperatures with their unit, e.g. '{text} degC' "
                              f"or '{text} degF' (a bare number is read as kelvin)")
        return value
    m = re.fullmatch(r"\s*([-+]?\d+(?:\.\d*)?(?:[eE][-+]?\d+)?)\s*(.*?)\s*", str(text))
    if not m:
        raise ConfigError(f"follow.critical = {text!r} is not a number with a unit, like '-2.2 degC'")
    number, unit = float(m.group(1)), m.group(2)
    if not unit:
        return parse_value(number, variable)
    try:
        return float(convert(np.array([number]), variable, unit)[0])
    except (ValueError, KeyError, ConfigError) as exc:
        raise ConfigError(f"follow.critical = {text!r}: unknown unit {unit!r} for {variable} ({exc})") from None


def downward(variable: str, cfg: Config) -> bool:
    """True when the critical value is crossed going down (temperatures), False going up (concentrations)."""
    return kind_of(variable, cfg["observations"]["kinds"]) != "concentration"


def critical_values(cfg: Config, variable: str, clusters: pd.DataFrame) -> np.ndarray:
    """Each cluster's critical value (NaN where none is set)."""
    setting = cfg["follow"]["critical"]
    n = len(clusters)
    if setting in ({}, "", None):
        if kind_of(variable, cfg["observations"]["kinds"]) == "temperature":
            return np.full(n, DEFAULT_CRITICAL_K)
        return np.full(n, np.nan)
    if not isinstance(setting, dict):
        return np.full(n, parse_value(setting, variable))
    table = {str(k): parse_value(v, variable) for k, v in setting.items()}
    pick = max if downward(variable, cfg) else min
    out = np.full(n, np.nan)
    for i, row in enumerate(clusters.itertuples()):
        ids = [str(row.cluster)] + str(row.stations).split("+")
        own = [table[k] for k in ids if k in table]
        if own:
            out[i] = pick(own)
        elif "default" in table:
            out[i] = table["default"]
    unknown = set(table) - {"default"} - set(clusters["cluster"].astype(str)) - {
        s for st in clusters["stations"].astype(str) for s in st.split("+")}
    if unknown:
        log.warning("follow.critical names %s, which is neither a cluster nor a station of the network",
                    ", ".join(sorted(unknown)))
    return out


@dataclass
class Latest:
    """The newest row of every cluster, with the projection (arrays by cluster)."""

    time: pd.Timestamp
    clusters: list[str]
    value: np.ndarray
    value_se: np.ndarray
    tendency: np.ndarray
    advection: np.ndarray
    residual: np.ndarray
    residual_se: np.ndarray
    regime: list[str]
    critical: np.ndarray
    hours: np.ndarray
    hours_se: np.ndarray


def _fmt(x: float) -> float | None:
    return None if not np.isfinite(x) else float(round(x, 4))


#: calls in a row a rule's clearing condition must hold before the rule may fire again for the same cluster
#: (a value hovering at its critical value alerts once, not at every call)
CLEAR_CALLS = 3


def _transition(held: dict[str, int], subjects: np.ndarray, holds: np.ndarray, clears: np.ndarray,
                calls_to_clear: int = CLEAR_CALLS) -> np.ndarray:
    """Update one rule's firing subjects ``held`` (subject -> calls in a row its clearing condition held) and
    return the positions in ``subjects`` where the rule starts to fire now.  Only the subjects that fire or
    start to are visited one by one."""
    active = np.isin(subjects, np.array(list(held), dtype=object)) if held else np.zeros(len(subjects), bool)
    start = np.flatnonzero(holds & ~active)
    for i in np.flatnonzero(active):
        streak = held[subjects[i]] + 1 if clears[i] else 0
        if streak >= calls_to_clear:
            del held[subjects[i]]
        else:
            held[subjects[i]] = streak
    held.update((subjects[i], 0) for i in start)
    return start


def evaluate(latest: Latest, last_seen: dict[str, str], firing: dict[str, dict], cfg: Config, *, variable: str,
             unit: str, zone, display) -> list[dict]:
    """The alerts that start now; ``firing`` (rule -> subject -> calls in a row its clearing condition held) is
    updated in place; ``display``: how messages show values and rates
    (:class:`stationflow.report.now.Display`); the evidence is in ``unit``."""
    ac = cfg["alerts"]
    down = downward(variable, cfg)
    rate_unit = f"{unit} h-1"
    stamp = {"time": latest.time.tz_convert("UTC").strftime("%Y-%m-%dT%H:%M:%SZ"),
             "local_time": latest.time.tz_convert(zone).isoformat()}
    names = np.array(latest.clusters, dtype=object)
    v, vse, crit, hrs = latest.value, latest.value_se, latest.critical, latest.hours
    out: list[dict] = []

    def alert(rule: str, i: int, message: str, **evidence) -> None:
        out.append({**stamp, "rule": rule, "cluster": names[i], "message": message,
                    "evidence": {"value": _fmt(v[i]), "value_se": _fmt(vse[i]), "unit": unit,
                                 **{k: (_fmt(x) if isinstance(x, float) else x) for k, x in evidence.items()}}})

    with np.errstate(invalid="ignore"):
        if ac["below_critical"]:
            past = (v < crit) if down else (v > crit)
            back = (v > crit + 2 * vse) if down else (v < crit - 2 * vse)
            for i in _transition(firing.setdefault("below_critical", {}), names, past, back):
                alert("below_critical", i, f"{names[i]}: {display.value(v[i])} {display.unit}, "
                      f"{'below' if down else 'above'} the critical value {display.value(crit[i])} {display.unit}",
                      critical=float(crit[i]))
        if ac["crossing_within"]:
            within = parse_duration(ac["crossing_within"]).total_seconds() / 3600.0
            soon = (hrs > 0) & (hrs <= within)
            off = ~(hrs <= 2 * within)  # cleared once clearly off (twice as far, or no approach), not on a flicker
            for i in _transition(firing.setdefault("crossing_within", {}), names, soon, off):
                alert("crossing_within", i,
                      f"{names[i]}: {display.value(v[i])} {display.unit}, projected to reach {display.value(crit[i])} "
                      f"{display.unit} in {hrs[i] * 60:.0f} ± {latest.hours_se[i] * 60:.0f} min if the present in-situ "
                      f"rate ({display.rate(latest.residual[i])} {display.rate_unit}) goes on",
                      critical=float(crit[i]), minutes=float(hrs[i] * 60), minutes_se=float(latest.hours_se[i] * 60),
                      in_situ_rate=float(latest.residual[i]), in_situ_rate_se=float(latest.residual_se[i]),
                      advection=float(latest.advection[i]), rate_unit=rate_unit,
                      assumption="the present in-situ rate continues; advection is left out")
        rate = float(ac["advective_rate"])
        if rate > 0:
            t = latest.tendency
            regime = np.array(latest.regime, dtype=object)
            fast = (t < -rate) if down else (t > rate)
            # cleared once the change has slowed to half the rate or the air changes in place (not on a
            # flicker between advective and mixed)
            slowed = ~((t <= -rate / 2) if down else (t >= rate / 2)) | np.isin(regime, ["in_situ", "steady"])
            for i in _transition(firing.setdefault("advective_rate", {}), names, (regime == "advective") & fast, slowed):
                alert("advective_rate", i, f"{names[i]}: {'cold air carried in' if down else 'a plume carried in'}, "
                      f"{'cooling' if down else 'rising'} {display.rate(t[i])} {display.rate_unit} "
                      f"(carried in {display.rate(latest.advection[i])})",
                      tendency=float(t[i]), advection=float(latest.advection[i]), residual=float(latest.residual[i]),
                      rate_unit=rate_unit, regime=str(regime[i]))
    if ac["silent_after"] and last_seen:
        stations = np.array(sorted(last_seen), dtype=object)
        seen = pd.DatetimeIndex([last_seen[s] for s in stations])
        gap = seen.max() - seen
        silent = np.asarray(gap > parse_duration(ac["silent_after"]))
        for i in _transition(firing.setdefault("silent_after", {}), stations, silent, ~silent, calls_to_clear=1):
            minutes = gap[i].total_seconds() / 60.0
            out.append({**stamp, "rule": "silent_after", "station": stations[i],
                        "message": f"station {stations[i]} has sent nothing for {minutes:.0f} min",
                        "evidence": {"last_report": last_seen[stations[i]],
                                     "newest_report": seen.max().strftime("%Y-%m-%dT%H:%M:%SZ"),
                                     "silent_minutes": minutes}})
    return out


def run_command(command: str, alerts: list[dict]) -> int:
    """Run ``alerts.command`` once per alert with the alert on its standard input; returns how many were
    handed over (a failing command is logged and counted as handed over: alerts are not retried forever)."""
    if not command or not alerts:
        return len(alerts)
    args = shlex.split(command)
    for a in alerts:
        try:
            res = subprocess.run(args, input=json.dumps(a) + "\n", text=True, capture_output=True, timeout=60,
                                 check=False)
            if res.returncode != 0:
                log.warning("alerts.command exited with %d for a %s alert: %s", res.returncode, a["rule"],
                            (res.stderr or "").strip()[:200])
        except (OSError, subprocess.TimeoutExpired) as exc:
            log.warning("alerts.command could not be run: %s", exc)
    return len(alerts)
