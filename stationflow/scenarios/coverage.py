"""The coverage suite: do the stated errors mean what they say?

Generated networks with exact truth, run through the whole pipeline with the
default configuration (no tuning key), and for each case the bias and the
share of rows whose nominal 95 % interval (estimate +- 1.96 se) covers the
truth, for tendency, advection and residual.  ``make test`` runs it small
(tests/test_coverage.py); ``make coverage`` runs it at full size and prints
the table that docs/method.md quotes.

The cases (all invented, analytic truth): a linear field; a curved field (a
cold pool of about 7 km radius carried over stations 2-5 km apart); a front
narrower than the station spacing; a calm night whose cooling rate differs
from place to place; stations on a slope under an inversion with the air
horizontally uniform; one station reading 1 K warm; and the linear case at
1-minute and hourly reporting.  Every station also has a calibration offset
drawn with the default offset uncertainty and reading noise, as real sensors
do.
"""

from __future__ import annotations

import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from . import synthetic
from .synthetic import Array, Field, LinearField, Scenario, constant

#: the terms checked and the nominal coverage of +-1.96 se
TERMS = ("tendency", "advection", "residual")
Z95 = 1.959964


@dataclass
class PatternField(Field):
    """``base + integral(source) + pattern(x - X(t), y - Y(t)) + gamma (z - z_ref) + t * rate(x, y)``.

    ``pattern`` is carried by the uniform wind (displacement X, Y), so its
    advection is exact; ``rate(x, y)`` [unit s-1] is an in-situ change that
    differs from place to place.
    """

    pattern: Callable[[Array, Array], Array] = field(default=lambda x, y: 0.0 * x)
    base: float = 280.0
    u: Callable = field(default_factory=lambda: constant(0.0))
    v: Callable = field(default_factory=lambda: constant(0.0))
    source: Callable = field(default_factory=lambda: constant(0.0))
    gamma: float = 0.0
    z_ref: float = 0.0
    rate: Callable[[Array, Array], Array] | None = None

    def __post_init__(self) -> None:
        self._lin = LinearField(u=self.u, v=self.v, source=self.source)

    def value(self, x, y, z, t, height=2.0):
        t = np.asarray(t, float)
        x0, y0 = self._lin.displacement(t)
        tg, _, _, si = self._lin._integrals()
        out = self.base + np.interp(t, tg, si) + self.pattern(x - x0, y - y0) + self.gamma * (np.asarray(z, float) - self.z_ref)
        if self.rate is not None:
            out = out + t * self.rate(x, y)
        return out

    def wind(self, t):
        return self.u(t), self.v(t)


@dataclass
class Case:
    """One coverage case: a field over a network, sampled at an interval, with what the sensors add."""

    name: str
    field: Field
    n_stations: int = 30
    radius_km: float = 12.0
    interval: str = "5min"
    hours: float = 6.0
    noise: float = 0.05
    offset: float = 0.1
    wind_noise: float = 0.3
    elevation: Callable[[Array, Array], Array] | None = None
    bias_station: float = 0.0  # one station reads this much too high all the time [K]


def cases(*, hours: float = 6.0) -> list[Case]:
    """The coverage cases (see the module docstring); ``hours`` sets their length."""
    wind = dict(u=constant(3.0), v=constant(1.0))

    def lin(**kw) -> LinearField:
        return LinearField(base=283.0, gx=constant(1.5e-4), gy=constant(-0.8e-4), source=constant(-0.6 / 3600), **kw)

    pool = PatternField(pattern=lambda x, y: -3.0 * np.exp(-((x + 6000.0) ** 2 + y ** 2) / (7000.0 ** 2)),
                        base=281.0, source=constant(-0.8 / 3600), u=constant(1.5), v=constant(0.5))
    front = PatternField(pattern=lambda x, y: -2.0 * np.tanh((x + 8000.0) / 1500.0), base=283.0,
                         source=constant(-0.3 / 3600), u=constant(2.0), v=constant(0.0))
    patchy = PatternField(pattern=lambda x, y: 0.0 * x, base=279.0, u=constant(0.3), v=constant(-0.2),
                          source=constant(-1.2 / 3600),
                          rate=lambda x, y: (0.4 * np.sin(x / 3000.0) * np.cos(y / 4000.0)) / 3600.0)
    inversion = LinearField(base=278.0, gamma=constant(0.010), z_ref=300.0, source=constant(-1.0 / 3600),
                            u=constant(2.0), v=constant(0.0))
    return [
        Case("linear", lin(**wind), hours=hours),
        Case("cold pool 7 km", pool, hours=hours),
        Case("narrow front", front, hours=hours),
        Case("calm, patchy cooling", patchy, hours=hours),
        Case("slope under inversion", inversion, hours=hours, elevation=lambda x, y: 300.0 + 0.02 * x + 40.0 * np.sin(y / 2500.0) * np.cos(x / 3100.0)),
        Case("one station 1 K warm", lin(**wind), hours=hours, bias_station=1.0),
        Case("linear, 1-minute", lin(**wind), interval="1min", hours=min(hours, 2.0)),
        Case("linear, hourly", lin(**wind), interval="1h", hours=max(hours, 24.0), noise=0.1),
    ]


def sample_case(case: Case, seed: int) -> Scenario:
    """The observations of one case and seed, with noise, offsets and the optional warm station."""
    st = synthetic.network(case.n_stations, radius_km=case.radius_km, seed=seed, elevation=case.elevation)
    start = pd.Timestamp("2026-04-10 20:00", tz="UTC")
    n = int(round(pd.Timedelta(hours=case.hours) / pd.Timedelta(case.interval))) + 1
    times = pd.date_range(start, periods=n, freq=case.interval)
    obs = synthetic.sample(case.field, st, times, noise=case.noise, wind_noise=case.wind_noise, seed=seed + 1,
                           offset=case.offset)
    if case.bias_station:
        obs.loc[obs["station_id"] == st["station_id"].iloc[0], "air_temperature"] += case.bias_station
    return Scenario(case.name, st, obs, case.field, start, 45.0, 10.0, "air_temperature", pd.DataFrame(), [], {})


def run_case(case: Case, seed: int, *, config_text: str = "") -> pd.DataFrame:
    """Budget table of one case and seed joined with its truth (default configuration unless given)."""
    from stationflow import config as config_mod

    from ..api import run_budget

    sc = sample_case(case, seed)
    with tempfile.TemporaryDirectory() as d:
        folder = Path(d)
        sc.stations.drop(columns=["x", "y"]).to_csv(folder / "stations.csv", index=False)
        o = sc.observations.copy()
        o["time"] = o["time"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
        o.to_csv(folder / "obs.csv", index=False)
        cfg_path = None
        if config_text:
            cfg_path = folder / "c.toml"
            cfg_path.write_text(config_text, encoding="utf-8")
        run = run_budget(folder / "obs.csv", folder / "stations.csv", config_mod.load(cfg_path))
    truth = sc.cluster_truth(run.table, half_window=run.settings.half_window)
    out = run.table.merge(truth, on=["time", "cluster"])
    out["seed"] = seed
    return out


def summarise(joined: pd.DataFrame) -> dict[str, float]:
    """Median error (bias), median stated se and coverage of nominal 95 % intervals for each term."""
    row: dict[str, float] = {}
    for term in TERMS:
        d = joined.dropna(subset=[term, f"{term}_true", f"{term}_se"])
        err = d[term] - d[f"{term}_true"]
        row[f"{term}_bias"] = float(err.median()) if len(d) else np.nan
        row[f"{term}_se"] = float(d[f"{term}_se"].median()) if len(d) else np.nan
        row[f"{term}_coverage"] = float(np.mean(np.abs(err) <= Z95 * d[f"{term}_se"])) if len(d) else np.nan
    row["rows"] = float(len(joined.dropna(subset=["advection", "advection_true"])))
    return row


def coverage_table(*, seeds: int = 4, hours: float = 6.0, only: list[str] | None = None) -> pd.DataFrame:
    """One row per case: bias, median se and coverage for tendency, advection and residual over ``seeds`` seeds."""
    rows = []
    for case in cases(hours=hours):
        if only and case.name not in only:
            continue
        joined = pd.concat([run_case(case, seed) for seed in range(seeds)], ignore_index=True)
        rows.append({"case": case.name, **summarise(joined)})
    return pd.DataFrame(rows)
