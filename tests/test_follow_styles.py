"""The follow mode on networks and exports of many kinds: appended piece by piece, its final rows equal the
batch run with the settings it pinned (analytic linear nights from tests/netgen.py: sizes, elevations,
gaps, delimiters, local time layouts, units rows, reporting intervals)."""

from __future__ import annotations

import numpy as np
import pytest

from stationflow import api
from stationflow.config import load
from stationflow.follow import Follow, follow_step
from stationflow.scenarios.replay import split_export

from .netgen import linear_night, write_export
from .test_follow import _final, assert_rows_equal

CASES = {
    # name: (stations, times, interval, export style)
    "8 stations, ISO times with offsets": (8, 60, "10min", dict()),
    "40 stations, day-first local times, semicolons, a units row": (
        40, 60, "10min", dict(delimiter=";", time_format="%d/%m/%Y %H:%M", tz="Europe/Vienna", units_row=True)),
    "90 stations with elevations, 12-hour clock": (
        90, 60, "10min", dict(time_format="%m/%d/%Y %I:%M %p", tz="America/Chicago")),
    "25 stations every 5 minutes, kelvin": (25, 100, "5min", dict(degc=False)),
}


@pytest.mark.parametrize("case", list(CASES))
def test_follow_equals_batch_on_any_export(tmp_path, case):
    n, n_times, interval, style = CASES[case]
    st, obs = linear_night(n, n_times, seed=n, interval=interval, start="2026-04-14 20:00")
    obs = obs.sort_values(["time", "station_id"], kind="stable")  # as a logger writes: time by time
    paths = write_export(tmp_path / "export", st, obs, **style)
    cfg = load(paths["config"])
    head, groups = split_export(paths["obs"], cfg)
    live, out = tmp_path / "live.csv", tmp_path / "out"
    live.write_bytes(head)
    ctx = Follow(live, paths["stations"], cfg, out, every=60.0)
    rng = np.random.default_rng(n)
    i = 0
    while i < len(groups):
        k = int(rng.integers(2, 7))
        with open(live, "ab") as fh:
            fh.write(b"".join(groups[i:i + k]))
        i += k
        follow_step(ctx)
    ctx.close()
    final = _final(out)
    assert len(final) > 0, "nothing final: the night is longer than the final lag"
    batch = api.run_budget(paths["obs"], paths["stations"], load(out / "settings.toml"))
    assert assert_rows_equal(final, batch.table) == len(final)


def _night_export(tmp_path):
    st, obs = linear_night(10, 48, seed=4, interval="10min", start="2026-04-14 20:00", missing=0.1)
    obs = obs.sort_values(["time", "station_id"], kind="stable")
    return write_export(tmp_path / "export", st, obs, units_row=True)


from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as hst  # noqa: E402


@settings(max_examples=3, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
          derandomize=True)
@given(cuts=hst.lists(hst.floats(0.0, 1.0), min_size=3, max_size=12))
def test_bytes_arriving_at_any_boundary_give_the_batch_rows(tmp_path_factory, cuts):
    """Appended at arbitrary byte boundaries (lines cut anywhere, the header and the units row included), the
    final rows equal the batch run with the settings the follow run pinned."""
    tmp = tmp_path_factory.mktemp("cuts")
    paths = _night_export(tmp)
    cfg = load(paths["config"])
    data = paths["obs"].read_bytes()
    live, out = tmp / "live.csv", tmp / "out"
    live.write_bytes(b"")
    ctx = Follow(live, paths["stations"], cfg, out, every=60.0)
    start = 0
    for end in sorted({int(c * len(data)) for c in cuts} | {5, len(data)}):  # 5: inside the header line
        with open(live, "ab") as fh:
            fh.write(data[start:end])
        start = end
        follow_step(ctx)
    ctx.close()
    final = _final(out)
    batch = api.run_budget(paths["obs"], paths["stations"], load(out / "settings.toml"))
    assert assert_rows_equal(final, batch.table) == len(final) > 0
