"""The settings of a followed night, pinned once and written out so that a batch run can repeat them.

A batch run learns some settings from its whole record: each station's
reading noise, the wind noise, the reporting interval (and from them the
window), the stations that make the network.  A run that follows a night
has only its first hour at 9 p.m.; if it went on re-learning them, rows it
had called final would change.  So once ``follow.learn`` of data has
arrived these are learned once, exactly as a batch run learns them, and
pinned for the rest of the night:

- ``budget.interval``, ``budget.window`` and ``budget.vertical`` (resolved);
- ``uncertainty.wind_component`` and ``uncertainty.noise_file`` (the
  per-station reading noise, written to ``reading_noise.csv``);
- ``network.exclude``: the stations without the variable when it was
  pinned (the network is built from the others all night);
- ``observations.time_format``: the time layout found in the first lines.

``settings.toml`` in the output folder is the user's configuration with
these keys added: ``stationflow budget --config settings.toml`` on the whole
file gives the same final rows.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import Config, to_toml
from ..errors import ConfigError
from ..network.grid import format_duration
from ..qc.thresholds import persistence_rule, thresholds
from ..report.atomic import atomic_write
from ..report.files import write_csv

NOISE_FILE = "reading_noise.csv"
SETTINGS_FILE = "settings.toml"


@dataclass
class Pinned:
    """What was learned when the settings were pinned (stored in the follow state)."""

    variable: str
    interval: str
    window: str
    vertical: str
    wind_component: float | None
    network_stations: list[str]
    exclude: list[str]
    noise: dict[str, float]
    time_format: str
    pinned_at: str  # the newest data time when pinned (UTC, ISO 8601)

    def to_json(self) -> dict:
        return asdict(self)

    @classmethod
    def from_json(cls, d: dict) -> "Pinned":
        return cls(**d)


def refuse_unsupported(cfg: Config) -> None:
    """Settings a followed night cannot honour, refused up front with the reason."""
    if cfg["sensors"]["apply"]:
        raise ConfigError("sensors.apply is not available with --follow: the offsets are learned from a whole record; "
                          "set sensors.apply = false, and run the batch budget on the night for corrected values")


def pin(plan, cfg: Config, *, time_format: str, newest: pd.Timestamp) -> Pinned:
    """The settings the plan of the learning data resolved to (``plan``: a :class:`~stationflow.run.plan.BudgetPlan`)."""
    net_ids = [str(s) for s in plan.network.stations["station_id"]]
    all_ids = [str(s) for s in plan.ids]
    sigma = np.broadcast_to(np.asarray(plan.settings.sigma, float), (len(all_ids),))
    in_net = set(net_ids)
    noise = {sid: float(sigma[i]) for i, sid in enumerate(all_ids) if sid in in_net}
    declared_wind = cfg["uncertainty"]["wind_component"]
    wind = float(declared_wind) if declared_wind is not None else (
        float(plan.settings.wind_sigma) if plan.choices.get("wind") != "none" else None)
    exclude = sorted(set(all_ids) - set(net_ids) | set(cfg["network"]["exclude"]))
    return Pinned(plan.variable, format_duration(plan.interval), format_duration(plan.window), plan.choices["vertical"],
                  wind, net_ids, exclude, noise, time_format,
                  newest.tz_convert("UTC").strftime("%Y-%m-%dT%H:%M:%SZ"))


def pinned_config(cfg: Config, p: Pinned, out: Path, *, for_steps: bool) -> Config:
    """The user's configuration with the pinned settings; ``for_steps``: the form each follow step runs with
    (no sensor-offset estimate: it needs a whole record)."""
    uncertainty = {"noise_file": str(Path(out) / NOISE_FILE)}
    if p.wind_component is not None:
        uncertainty["wind_component"] = p.wind_component
    return cfg.with_values(
        budget={"variable": p.variable, "interval": p.interval, "window": p.window, "vertical": p.vertical},
        uncertainty=uncertainty, network={"exclude": list(p.exclude)},
        observations={"time_format": p.time_format} if p.time_format else {},
        sensors={"estimate": False} if for_steps else {})


def write_pinned(cfg: Config, p: Pinned, out: Path) -> list[Path]:
    """reading_noise.csv and settings.toml (the configuration that repeats this night in a batch run)."""
    noise = pd.DataFrame({"station_id": list(p.noise), "variable": p.variable, "reading_noise": list(p.noise.values())})
    paths = [write_csv(noise, Path(out) / NOISE_FILE, time_columns=())]
    full = pinned_config(cfg, p, out, for_steps=False).to_dict()
    full["uncertainty"]["noise_file"] = NOISE_FILE  # relative to settings.toml: the folder can be moved

    text = ("# The configuration of a followed night with the settings learned at its start pinned "
            f"({p.pinned_at}).\n# stationflow budget --config settings.toml on the whole record gives the same final "
            "rows.\n" + to_toml(_plain(full)))
    target = Path(out) / SETTINGS_FILE
    with atomic_write(target) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return paths + [target]


def _plain(d):
    """Config values as TOML can hold them (tuples as lists, NaN left out)."""
    if isinstance(d, dict):
        return {k: _plain(v) for k, v in d.items() if not (isinstance(v, float) and math.isnan(v))}
    if isinstance(d, (list, tuple)):
        return [_plain(v) for v in d]
    return d


def qc_reach(cfg: Config, variables: list[str], interval: pd.Timedelta) -> int:
    """Analysis steps over which a value's QC flag can still change as later values arrive (the longest
    persistence window of the variables present, and the step test's next value)."""
    th = thresholds(cfg)
    rules = [persistence_rule(v, cfg, th) for v in variables] if cfg["qc"]["enabled"] else []
    minutes = max([float(r[1]) for r in rules if r is not None] + [0.0])
    return int(math.ceil(minutes * 60.0 / interval.total_seconds())) + 2
