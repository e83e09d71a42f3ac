"""Real networks: every folder in tests/real_networks runs end to end with the facts its expect.toml lists.

Skipped per network when its data are absent (see tests/real_networks/README.md).
"""

import json
import tomllib
from pathlib import Path

import pandas as pd
import pytest

from stationflow.cli import app

from .conftest import SHARED_DATA

HERE = Path(__file__).parent / "real_networks"
NETWORKS = sorted(p for p in HERE.iterdir() if (p / "expect.toml").exists())


@pytest.mark.parametrize("folder", NETWORKS, ids=[p.name for p in NETWORKS])
def test_real_network_runs_with_its_facts(runner, tmp_path, folder):
    expect = tomllib.loads((folder / "expect.toml").read_text(encoding="utf-8"))
    base = Path(expect["data"]) if Path(expect["data"]).is_absolute() else SHARED_DATA / expect["data"]
    obs = base / expect["observations"]
    if not obs.exists():
        pytest.skip(f"real observations not available ({obs} is absent)")
    common = ["--config", str(folder / "config.toml"), "--quiet"]
    if expect.get("stations"):
        common += ["--stations", str(base / expect["stations"])]
    for command in ("check", "network", "budget"):
        out = tmp_path / command
        res = runner.invoke(app, [command, "--obs", str(obs), "--out", str(out), *common])
        assert res.exit_code == 0, (command, res.exit_code, res.stderr)
    run = json.loads((tmp_path / "budget" / "run.json").read_text())
    acc = run["accounting"]
    assert acc["rows_read"] == expect["rows_read"]
    assert acc["rows_accepted"] == expect["rows_accepted"]
    assert acc["rows_accepted"] + acc["rows_rejected"] == acc["rows_read"]
    check = json.loads((tmp_path / "check" / "run.json").read_text())
    assert check["stations"] == expect["stations_read"]
    assert run["clusters"]["usable"] >= expect["clusters_usable_min"]
    table = pd.read_parquet(tmp_path / "budget" / "budget.parquet")
    regional = table[table["scale"] == "regional"]
    assert len(regional) == table["time"].nunique()  # one network-scale row per analysis time
    if "regional_bearing" in expect:
        lo, hi = expect["regional_bearing"]
        bearing = regional["gradient_bearing"].dropna()
        assert len(bearing) and ((bearing > lo) & (bearing < hi)).all(), bearing.tolist()
    if "sensor_rows" in expect:
        sensors = pd.read_csv(tmp_path / "budget" / "sensor_offsets.csv")
        assert len(sensors) == expect["sensor_rows"] and sensors["offset_se"].notna().all()
