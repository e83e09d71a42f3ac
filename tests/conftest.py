"""Shared fixtures: paths, the real-data folder, a CLI runner and small synthetic networks."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parent.parent
SHARED_DATA = ROOT.parent / "shared" / "data"
ARM = SHARED_DATA / "arm_sgp_front_20190508"


def require_arm() -> Path:
    """The ARM SGP front files, or skip the test with a reason."""
    if not (ARM / "sgp_met_1min_long.csv").exists():
        pytest.skip(f"real observations not available ({ARM} is absent)")
    return ARM


@pytest.fixture
def arm_dir() -> Path:
    return require_arm()


ARM_TOML = """
[observations.columns]
facility = "station_id"
time_utc = "time"
temp_mean = "air_temperature"
rh_mean = "relative_humidity"
atmos_pressure = "air_pressure"
wspd_vec_mean = "wind_speed"
wdir_vec_mean = "wind_from_direction"
lat = "latitude"
lon = "longitude"
alt = "elevation"
[observations.units]
air_temperature = "degC"
air_pressure = "kPa"
"""


@pytest.fixture
def arm_config(tmp_path: Path) -> Path:
    p = tmp_path / "arm.toml"
    p.write_text(ARM_TOML, encoding="utf-8")
    return p


@pytest.fixture
def runner():
    from typer.testing import CliRunner

    try:
        return CliRunner(mix_stderr=False)
    except TypeError:  # newer click: stderr is always separate
        return CliRunner()


@pytest.fixture
def sample_dir() -> Path:
    return ROOT / "sample_data"


def write_csv(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


STATIONS_CSV = """station_id,latitude,longitude,elevation
A,45.00,10.00,100
B,45.00,10.10,120
C,45.08,10.05,110
D,45.06,9.95,105
"""


@pytest.fixture
def stations_file(tmp_path: Path) -> Path:
    return write_csv(tmp_path / "stations.csv", STATIONS_CSV)


def equilateral(d: float = 30000.0, centre=(0.0, 0.0), angle: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Vertices of an equilateral triangle with side d [m] (counter-clockwise)."""
    r = d / np.sqrt(3)
    a = np.deg2rad(angle + np.array([90.0, 210.0, 330.0]))
    return centre[0] + r * np.cos(a), centre[1] + r * np.sin(a)


def utc(text: str) -> pd.Timestamp:
    return pd.Timestamp(text, tz="UTC")
