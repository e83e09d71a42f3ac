"""The regional scale: one plane through the whole network per time, as rows with scale = regional.

Analytic truth: a linear field (0.1 K/km east, -0.05 K/km north) carried by a steady 3, 1 m/s wind and
cooling 0.5 K/h in place (tests/netgen.py), so the regional gradient, advection and residual are known.
"""

import numpy as np
import pandas as pd
import pytest

from stationflow import api, config

from .netgen import linear_night, write_export

TRUE_GX, TRUE_GY = 0.1, -0.05  # K/km
TRUE_ADV = -(3.0 * TRUE_GX + 1.0 * TRUE_GY) * 3.6  # K/h: -(u dT/dx + v dT/dy), 1 K/km at 1 m/s is 3.6 K/h


@pytest.fixture(scope="module")
def linear_run(tmp_path_factory):
    st, obs = linear_night(90, 48, seed=3, elevation=False)
    paths = write_export(tmp_path_factory.mktemp("linear"), st, obs)
    cfg = config.load(paths["config"])
    return api.run_budget(paths["obs"], paths["stations"], cfg)


def test_the_regional_fit_of_a_linear_field_equals_the_truth_and_its_errors_cover_it(linear_run):
    t = linear_run.table
    reg = t[t["scale"] == "regional"]
    assert len(reg) == len(linear_run.summary.times) and (reg["cluster"].astype(str) == "network").all()
    ok = reg["regime"].astype(str) != "undetermined"
    assert ok.mean() > 0.8
    r = reg[ok]
    # gradient: the plane is exact for a linear field, so only the reading noise (0.05 K) moves it
    zx = (r["grad_x"] - TRUE_GX) / r["grad_x_se"]
    zy = (r["grad_y"] - TRUE_GY) / r["grad_y_se"]
    assert np.median(np.abs(r["grad_x"] - TRUE_GX)) < 0.01 and np.median(np.abs(r["grad_y"] - TRUE_GY)) < 0.01
    assert (np.abs(zx) < 2).mean() >= 0.9 and (np.abs(zy) < 2).mean() >= 0.9
    za = (r["advection"] - TRUE_ADV) / r["advection_se"]
    assert (np.abs(za) < 2).mean() >= 0.9
    zr = (r["residual"] - (-0.5)) / r["residual_se"]
    assert (np.abs(zr) < 2).mean() >= 0.9
    assert (r["n_used"] > 60).all()  # every good station of the network, not a triangle


def test_regional_rows_come_after_the_local_ones_and_leave_them_unchanged(linear_run, tmp_path):
    t = linear_run.table
    assert list(t.columns[:18]) == ["time", "cluster", "stations", "n_used", "latitude", "longitude", "value",
                                    "tendency", "advection", "residual", "tendency_se", "advection_se",
                                    "residual_se", "grad_x", "grad_y", "u", "v", "regime"]
    assert t.columns[18] == "scale"
    assert set(t["scale"].astype(str)) == {"local", "regional"}
    cfg = linear_run.check.config.to_dict()
    cfg["budget"]["regional"] = False
    off = api.budget_from_check(linear_run.check, config.from_dict(cfg))
    assert "scale" not in off.table.columns
    local = t[t["scale"] == "local"].drop(columns="scale").reset_index(drop=True)
    for c in ("value", "advection", "residual", "advection_se", "grad_x"):
        assert np.array_equal(local[c].to_numpy(), off.table[c].to_numpy(), equal_nan=True), c
    assert off.regional is None and linear_run.regional is not None


def test_a_main_period_says_at_which_scale_the_change_was_carried_in():
    from stationflow.report.summary import BudgetSummary
    from stationflow.report.text import two_scales

    times = pd.date_range("2026-01-01", periods=10, freq="10min", tz="UTC")
    local = BudgetSummary.allocate(times, pd.DataFrame({"cluster": ["T01"], "stations": ["a+b+c"], "latitude": [0.0],
                                                         "longitude": [0.0]}))
    regional = BudgetSummary.allocate(times, pd.DataFrame({"cluster": ["network"], "stations": ["all 3 stations"],
                                                            "latitude": [0.0], "longitude": [0.0]}))
    local.terms["advection"][:] = -1.0
    local.terms["advection_se"][:] = 0.2
    regional.terms["advection"][:] = -0.05
    regional.terms["advection_se"][:] = 0.05
    period = {"cluster": "T01", "start": times[2], "end": times[6]}
    assert two_scales(period, local, regional, min_rate=0.25)["verdict"] == "carried in at the local scale only"
    regional.terms["advection"][:] = -0.9
    assert two_scales(period, local, regional, min_rate=0.25)["verdict"] == "carried in at both scales"
    local.terms["advection"][:] = 0.1
    assert two_scales(period, local, regional, min_rate=0.25)["verdict"] == "carried in at the regional scale only"
    regional.terms["advection"][:] = 0.3  # above twice its error but below the smallest rate that counts
    regional.terms["advection_se"][:] = 0.1
    assert two_scales(period, local, regional, min_rate=0.5)["verdict"] == "carried in at neither scale"
