"""Any network, any common export: sizes without limits, the usual time layouts, unit slips with their fix."""

import json

import pandas as pd
import pytest

from stationflow.cli import app

from .netgen import linear_night, write_export


def _run(runner, paths, out, command="budget", config=True):
    args = [command, "--stations", str(paths["stations"]), "--obs", str(paths["obs"]), "--out", str(out), "--quiet"]
    if config:
        args += ["--config", str(paths["config"])]
    return runner.invoke(app, args)


@pytest.mark.parametrize("n", [70, 300])
def test_networks_with_elevations_of_any_size_run_with_the_default_config(runner, tmp_path, n):
    st, obs = linear_night(n, 12, seed=n)
    paths = write_export(tmp_path / "in", st, obs)
    res = _run(runner, paths, tmp_path / "out")
    assert res.exit_code == 0, res.stderr
    table = pd.read_parquet(tmp_path / "out" / "budget.parquet")
    assert table["cluster"].nunique() > n  # a Delaunay network has about two triangles per station
    acc = json.loads((tmp_path / "out" / "run.json").read_text())["accounting"]
    assert acc["rows_accepted"] == len(obs)
