"""Generated networks written as users export them: sizes, elevations, gaps, delimiters, time layouts.

Analytic truth only (a linear field advected by a uniform wind); used by the
any-network tests and the whole-pipeline property test.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from stationflow.scenarios import synthetic


def linear_night(n_stations: int, n_times: int, *, seed: int = 0, elevation: bool = True, missing: float = 0.05,
                 interval: str = "10min", start: str = "2026-04-10 20:00", tz: str = "UTC") -> tuple[pd.DataFrame, pd.DataFrame]:
    """Stations (with x, y) and tidy SI observations of a linear field: cooling 0.5 K/h in place, 0.1 K/km gradient."""
    radius = 3.0 * np.sqrt(n_stations)  # about 5 km between neighbours at any size
    relief = (lambda x, y: 300 + 200 * np.sin(x / 9000) + 150 * np.cos(y / 7000)) if elevation else None
    st = synthetic.network(n_stations, radius_km=radius, seed=seed, elevation=relief)
    f = synthetic.LinearField(base=283.0, gx=synthetic.constant(1e-4), gy=synthetic.constant(-0.5e-4),
                              u=synthetic.constant(3.0), v=synthetic.constant(1.0), source=synthetic.constant(-0.5 / 3600))
    times = pd.date_range(pd.Timestamp(start, tz=tz).tz_convert("UTC"), periods=n_times, freq=interval)
    obs = synthetic.sample(f, st, times, noise=0.05, wind_noise=0.3, seed=seed + 1, missing=missing)
    return st, obs


def write_export(folder: Path, st: pd.DataFrame, obs: pd.DataFrame, *, delimiter: str = ",", time_format: str | None = None,
                 tz: str = "UTC", units_row: bool = False, degc: bool = True) -> dict[str, Path]:
    """Write stations.csv, obs.csv and config.toml in an export style; returns their paths."""
    folder.mkdir(parents=True, exist_ok=True)
    o = obs.copy()
    if degc:
        o["air_temperature"] = np.round(o["air_temperature"] - 273.15, 2)
    local = o["time"].dt.tz_convert(tz)
    o["time"] = local.dt.strftime(time_format) if time_format else local.dt.strftime("%Y-%m-%dT%H:%M:%S%z")
    text = o.to_csv(index=False, sep=delimiter, float_format="%.3f")
    if units_row:
        head, rest = text.split("\n", 1)
        units = delimiter.join({"air_temperature": "degC", "wind_speed": "m/s", "wind_from_direction": "deg"}.get(c, "-")
                               for c in o.columns)
        text = f"{head}\n{units}\n{rest}"
    (folder / "obs.csv").write_text(text, encoding="utf-8")
    st.drop(columns=[c for c in ("x", "y") if c in st]).to_csv(folder / "stations.csv", index=False)
    lines = ["[observations]", f'delimiter = "{delimiter}"']
    if units_row:
        lines.append("skip_lines = [2]")
    if time_format:
        lines.append(f'timezone = "{tz}"')
    lines += ["[observations.units]", f'air_temperature = "{"degC" if degc else "K"}"']
    (folder / "config.toml").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return {"stations": folder / "stations.csv", "obs": folder / "obs.csv", "config": folder / "config.toml"}
