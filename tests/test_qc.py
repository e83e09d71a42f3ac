"""Quality control: each test at its threshold edges, defaults against their sources, and fault recall."""

import warnings

import numpy as np
import pandas as pd
import pytest

from stationflow import qc
from stationflow.config import from_dict
from stationflow.scenarios import synthetic

MIN = 60_000_000_000  # one minute in ns


def test_default_thresholds_match_their_sources():
    # WMO AWS guidelines (Zahumensky 2004), from memory: air temperature -80 .. +60 degC
    lo, hi, src = qc.DEFAULT_RANGE["air_temperature"]
    assert (lo, hi) == pytest.approx((193.15, 333.15)) and "Zahumensky" in src
    # WMO-No. 305 GDPS Guide (1993): 4/7/9/15/25 K over 1/2/3/6/12 h for air temperature
    table, src = qc.DEFAULT_STEP["air_temperature"]
    assert dict(table)[60] == 4.0 and dict(table)[720] == 25.0 and "WMO-No. 305" in src
    assert [b for a, b in qc.DEFAULT_STEP["air_pressure"][0] if a >= 60] == [300.0, 600.0, 900.0, 1800.0, 3600.0]
    # EPA-454/R-99-005: wind speed < 0.1 m/s for 3 h is suspect
    assert qc.DEFAULT_PERSISTENCE["wind_speed"][:2] == (0.1, 180.0)
    assert qc.DEFAULT_RANGE["wind_from_direction"][:2] == (0.0, 360.0)


def test_within_range_edges():
    ok = qc.within_range(np.array([193.15, 193.14, 333.15, 333.16, np.nan]), 193.15, 333.15)
    assert ok.tolist() == [True, False, True, False, True]


def test_step_limit_interpolates_log_log():
    table = qc.DEFAULT_STEP["air_temperature"][0]
    assert qc.step_limit(table, np.array([60.0]))[0] == pytest.approx(4.0)
    ten = qc.step_limit(table, np.array([10.0]))[0]
    assert ten == pytest.approx(np.exp(np.interp(np.log(10), [0, np.log(60)], [np.log(3), np.log(4)])))
    assert qc.step_limit(table, np.array([0.5]))[0] == pytest.approx(3.0)  # never below the shortest-interval value


@pytest.mark.parametrize("name", sorted(qc.DEFAULT_STEP))
def test_step_test_skips_only_changes_that_cannot_exceed(name):
    # _exceeds evaluates the limit only where the change exceeds the table's smallest entry: same answer
    table = qc.DEFAULT_STEP[name][0]
    rng = np.random.default_rng(7)
    minutes = rng.choice([0.5, 1, 5, 10, 30, 60, 61, 180, 600], 5000)
    change = rng.normal(0, 2, 5000) * _largest_limit(table)
    change[:50] = qc.step_limit(table, minutes[:50])  # exactly at the limit: not exceeding
    change[50:60] = np.nan
    assert (qc.steps.exceeds_step(change, minutes, table) == (np.abs(change) > qc.step_limit(table, minutes))).all()


def _largest_limit(table):
    return max(float(b) for _, b in table)


def _series(values, minutes=10):
    v = np.asarray(values, float)
    t = np.arange(v.size, dtype=np.int64) * minutes * MIN
    return v, t, np.zeros(v.size, np.int64)


def test_spike_and_step():
    lim = qc.step_limit(qc.DEFAULT_STEP["air_temperature"][0], np.array([10.0]))[0]
    v, t, c = _series([280, 280.1, 280 + 1.2 * lim, 280.2, 280.1, 280.1 - 1.2 * lim, 276.0, 275.9])
    step_ok, spike_ok = qc.plausible_steps(v, t, c, qc.DEFAULT_STEP["air_temperature"][0])
    assert (~spike_ok).tolist() == [False, False, True, False, False, False, False, False]
    # the return from the spike is not a step; the drop at index 5 is a step (it does not come back)
    assert (~step_ok).tolist() == [False, False, False, False, False, True, False, False]
    # exactly at the limit passes
    v, t, c = _series([280.0, 280.0 + lim * 0.999, 280.0])
    step_ok, spike_ok = qc.plausible_steps(v, t, c, qc.DEFAULT_STEP["air_temperature"][0])
    assert step_ok.all() and spike_ok.all()


def test_steps_do_not_cross_stations():
    v = np.array([280.0, 280.1, 300.0, 300.1])
    t = np.array([0, 10, 0, 10], dtype=np.int64) * MIN
    c = np.array([0, 0, 1, 1])
    step_ok, spike_ok = qc.plausible_steps(v, t, c, qc.DEFAULT_STEP["air_temperature"][0])
    assert step_ok.all() and spike_ok.all()


def test_persistence():
    flat = [280.0] * 8 + [280.5, 280.2, 281.0]
    v, t, c = _series(flat)
    ok = qc.not_persistent(v, t, c, 0.1, 60.0)
    assert (~ok[:8]).all() and ok[8:].all()
    varying = 280 + 0.3 * np.sin(np.arange(12))
    v, t, c = _series(varying)
    assert qc.not_persistent(v, t, c, 0.1, 60.0).all()
    # calm is exempt from the wind speed test
    v, t, c = _series([0.0] * 30)
    assert qc.not_persistent(v, t, c, 0.1, 180.0, exempt=v < 0.5).all()


def test_consistency_checks():
    assert qc.dew_point_not_above_temperature(np.array([280.0, 280.6, 280.4]), np.array([280.0, 280.0, 280.0]), 0.5).tolist() == [True, False, True]
    assert qc.gust_not_below_mean(np.array([5.0, 3.0]), np.array([4.0, 4.0])).tolist() == [True, False]
    assert qc.direction_defined_when_moving(np.array([90.0, np.nan]), np.array([0.0, 0.0]), 0.5).tolist() == [False, True]


def test_buddy_flags_an_isolated_bias_not_a_cold_pool():
    rng = np.random.default_rng(3)
    n = 16
    x, y = rng.uniform(0, 2e4, n), rng.uniform(0, 2e4, n)
    z = rng.uniform(200, 400, n)
    field = 280 + 5e-5 * x - 0.0065 * z + rng.normal(0, 0.1, (40, n))
    inner = int(np.argmin(np.hypot(x - x.mean(), y - y.mean())))  # inside its neighbours: an interpolation
    biased = field.copy()
    biased[:, inner] += 3.0
    passed, bad, _ = qc.agrees_with_neighbours(biased, x, y, z, qc.BuddyRules(floor=1.5, sigma=0.1))
    assert (~passed[:, inner]).mean() > 0.9
    others = np.delete(~passed, inner, axis=1)
    assert others.mean() < 0.02
    # a calm clear night: the lowest station is 2.5 K colder than any plane predicts; relaxed, never bad
    pool = field.copy()
    low = int(np.argmin(z))
    pool[:, low] -= 2.5
    passed, bad, _ = qc.agrees_with_neighbours(pool, x, y, z, qc.BuddyRules(floor=1.5, sigma=0.1, relax=2.0), relaxed=np.ones(40, bool))
    assert not bad[:, low].any()


def _fault_network():
    st = synthetic.network(20, radius_km=12, seed=21, elevation=lambda x, y: 300 + 0.004 * x + 0.002 * y)
    hours = np.arange(0, 49)
    diurnal = lambda t: 6 * np.sin(2 * np.pi * (t / 3600 - 9) / 24) / 3600 * (2 * np.pi / 24)  # noqa: E731
    f = synthetic.LinearField(base=283.0, gx=synthetic.constant(3e-5), gy=synthetic.constant(-2e-5),
                              u=synthetic.ramp([(0, 3.0), (48, 3.0)]), v=synthetic.ramp([(0, 1.0), (48, 1.0)]),
                              source=diurnal, gamma=synthetic.constant(-0.0065), z_ref=300.0)
    times = pd.date_range("2026-06-01", periods=48 * 6, freq="10min", tz="UTC")
    del hours
    obs = synthetic.sample(f, st, times, noise=0.1, wind_noise=0.3, seed=5)
    t0 = times[0]
    faults = [
        {"station_id": "S03", "variable": "air_temperature", "kind": "spike", "size": 8.0, "count": 6,
         "start": t0 + pd.Timedelta("2h"), "end": t0 + pd.Timedelta("40h")},
        {"station_id": "S07", "variable": "air_temperature", "kind": "range", "size": 150.0, "count": 4,
         "start": t0, "end": t0 + pd.Timedelta("47h")},
        {"station_id": "S11", "variable": "air_temperature", "kind": "stuck",
         "start": t0 + pd.Timedelta("10h"), "end": t0 + pd.Timedelta("16h")},
        {"station_id": "S15", "variable": "air_temperature", "kind": "bias", "size": 3.0,
         "start": t0 + pd.Timedelta("20h"), "end": t0 + pd.Timedelta("30h")},
        {"station_id": "S18", "variable": "wind_speed", "kind": "wind_impossible", "size": -4.0, "count": 3,
         "start": t0, "end": t0 + pd.Timedelta("47h")},
        {"station_id": "S19", "variable": "wind_from_direction", "kind": "wind_impossible", "size": 400.0, "count": 3,
         "start": t0, "end": t0 + pd.Timedelta("47h")},
    ]
    obs, table = synthetic.inject_faults(obs, faults, seed=9)
    st = st.drop(columns=["x", "y"])
    return obs, st, table


def test_injected_faults_recall_and_false_flags():
    obs, st, faults = _fault_network()
    res = qc.run_qc(obs, st, from_dict({}))
    key = obs.set_index(["station_id", "time"]).index
    flagged_any = np.zeros(len(obs), bool)
    for kind, min_recall in (("spike", 0.9), ("range", 0.9), ("stuck", 0.9), ("bias", 0.9), ("wind_impossible", 0.9)):
        rows = faults[faults["kind"] == kind]
        for var in rows["variable"].unique():
            r = rows[rows["variable"] == var]
            idx = key.get_indexer(pd.MultiIndex.from_frame(r[["station_id", "time"]]))
            recall = np.mean(res.flags[var][idx] >= qc.SUSPECT)
            assert recall >= min_recall, (kind, var, recall)
    # clean values: not in any fault, for the variables faults were put in
    for var in ("air_temperature", "wind_speed", "wind_from_direction"):
        r = faults[faults["variable"] == var]
        fault_idx = key.get_indexer(pd.MultiIndex.from_frame(r[["station_id", "time"]]))
        clean = np.ones(len(obs), bool)
        clean[fault_idx] = False
        if var == "air_temperature":  # neighbours of a spike/stuck period may be legitimately questioned: count all
            pass
        false_rate = np.mean(res.flags[var][clean] >= qc.SUSPECT)
        assert false_rate <= 0.005, (var, false_rate)
        flagged_any |= res.flags[var] >= qc.SUSPECT
    # range faults and impossible winds are bad, not just suspect
    rows = faults[faults["kind"].isin(["range", "wind_impossible"])]
    for var in rows["variable"].unique():
        r = rows[rows["variable"] == var]
        idx = key.get_indexer(pd.MultiIndex.from_frame(r[["station_id", "time"]]))
        assert (res.flags[var][idx] == qc.BAD).all()


def test_qc_never_changes_or_drops_values():
    obs, st, _ = _fault_network()
    before = obs.copy()
    res = qc.run_qc(obs, st, from_dict({}))
    pd.testing.assert_frame_equal(obs, before)
    assert all(len(f) == len(obs) for f in res.flags.values())
    table = qc.flag_table(obs, res)
    assert set(table["flag"]) <= {"suspect", "bad"}
    assert list(table.columns) == ["station_id", "time", "variable", "flag", "tests"]


def test_frost_cold_pool_station_not_flagged_bad():
    sc = synthetic.frost_valley()
    st = sc.stations.drop(columns=["x", "y"])
    res = qc.run_qc(sc.observations, st, from_dict({}))
    lowest = st.loc[st["elevation"].idxmin(), "station_id"]
    sel = (sc.observations["station_id"] == lowest).to_numpy()
    assert not (res.flags["air_temperature"][sel] == qc.BAD).any()
    assert np.mean(res.flags["air_temperature"][sel] >= qc.SUSPECT) < 0.02


def test_real_front_not_flagged_for_disagreeing(arm_dir, arm_config):
    # ARM SGP 2019-05-08 04 UTC (doi:10.5439/1786358): a real front splits the network into a
    # 16 degC west and a 20-23 degC east; neither side is flagged merely for disagreeing
    from stationflow import config
    from stationflow import read

    cfg = config.load(arm_config)
    data = read.read(arm_dir / "sgp_met_1min_long.csv", None, cfg)
    res = qc.run_qc(data.observations, data.stations, cfg)
    spatial = (res.tests["air_temperature"] & qc.TEST_BITS["spatial"]) > 0
    assert not spatial.any(), data.observations.loc[spatial, "station_id"].unique()
    assert not (res.flags["air_temperature"] == qc.BAD).any()


def test_persistence_on_the_regular_grid_equals_the_row_rule():
    # the grid form (regular records) must flag exactly the rows the row-wise rule flags:
    # random gaps, missing values, exempt values, windows that are not a whole number of steps
    rng = np.random.default_rng(7)
    checked = 0
    for _ in range(150):
        n_st, n_slots = int(rng.integers(1, 6)), int(rng.integers(2, 80))
        step = int(rng.choice([1, 5, 10])) * MIN
        st, sl = np.nonzero(rng.random((n_st, n_slots)) < rng.uniform(0.3, 1.0))
        if st.size < 2:
            continue
        t = 1_700_000_000 * 10**9 + sl.astype(np.int64) * step
        c = np.unique(st, return_inverse=True)[1]
        v = np.round(rng.normal(280.0, 0.05, st.size), 2)
        v[rng.random(v.size) < 0.3] = 280.0  # flat stretches
        v[rng.random(v.size) < 0.1] = np.nan
        exempt = rng.random(v.size) < 0.1 if rng.random() < 0.5 else None
        window = float(rng.choice([7.0, 30.0, 45.0, 60.0, 120.0]))
        slots = qc.regular_slots(t, c, max_fill=1e9)
        if slots is None:  # all rows at one time: no step to build a grid on
            continue
        rows = qc.not_persistent(v, t, c, 0.1, window, exempt=exempt)
        grid = qc.not_persistent(v, t, c, 0.1, window, exempt=exempt, slots=slots)
        assert np.array_equal(rows, grid)
        checked += 1
    assert checked > 100


def test_regular_slots_declines_irregular_or_sparse_records():
    t = np.arange(200, dtype=np.int64) * 5 * MIN
    c = np.zeros(200, np.int64)
    s = qc.regular_slots(t, c)
    assert s is not None and s.step_ns == 5 * MIN and s.n_slots == 200
    jitter = t.copy()
    jitter[17] += 7 * 10**9  # one report 7 s late: the common step would be 1 s
    assert qc.regular_slots(jitter, c) is None
    repeat = t.copy()
    repeat[18] = repeat[17]  # a repeated time
    assert qc.regular_slots(repeat, c) is None
    sparse = t.copy()
    sparse[-1] = 10**6 * MIN  # one far-off report: the grid would be mostly empty
    assert qc.regular_slots(sparse, c) is None


def test_row_nanmedian_equals_numpy():
    rng = np.random.default_rng(3)
    for _ in range(100):
        a = rng.normal(size=(int(rng.integers(1, 20)), int(rng.integers(1, 15))))
        a[rng.random(a.shape) < rng.uniform(0, 1)] = np.nan
        a[rng.random(a.shape) < 0.05] = np.inf
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows
            ref = np.nanmedian(a, axis=1)
        assert np.array_equal(qc.row_nanmedian(a), ref, equal_nan=True)


@pytest.mark.parametrize("parts", [1, 2, 3])
def test_threaded_qc_equals_serial(monkeypatch, parts):
    # the buddy test runs in parts of the times on the threads: it is independent per time, so the parts
    # give the flags of one whole-period test, whatever their number
    obs, st, _ = _fault_network()
    cfg = from_dict({})
    monkeypatch.setattr(qc.runner, "THREADED_ROWS", 10**12)
    monkeypatch.setattr(qc.runner, "SPATIAL_PARTS", 1)
    serial = qc.run_qc(obs, st, cfg)
    monkeypatch.setattr(qc.runner, "THREADED_ROWS", 0)
    monkeypatch.setattr(qc.runner, "SPATIAL_PARTS", parts)
    threaded = qc.run_qc(obs, st, cfg)
    assert any((f > 0).any() & (f < 3).any() for f in serial.flags.values())  # tests fired
    assert ((serial.tests["air_temperature"] & qc.TEST_BITS["spatial"]) > 0).any()  # the buddy test too
    for v in serial.flags:
        assert np.array_equal(serial.flags[v], threaded.flags[v])
        assert np.array_equal(serial.tests[v], threaded.tests[v])


def test_buddy_test_leaves_out_dew_points_already_failed_for_consistency():
    # a dew point above the air temperature fails the consistency test; the buddy test, like every later
    # test, skips values already failed (they would spoil the neighbours' predictions)
    obs, st, _ = _fault_network()
    rng = np.random.default_rng(8)
    obs = obs.assign(dew_point_temperature=obs["air_temperature"] - 3.0 + rng.normal(0, 0.1, len(obs)))
    bad_rows = np.flatnonzero((obs["station_id"] == "S05").to_numpy())[::7]
    obs.loc[obs.index[bad_rows], "dew_point_temperature"] = obs["air_temperature"].to_numpy()[bad_rows] + 6.0
    res = qc.run_qc(obs, st, from_dict({}))
    bits = res.tests["dew_point_temperature"][bad_rows]
    assert ((bits & qc.TEST_BITS["consistency"]) > 0).all()
    assert not ((bits & qc.TEST_BITS["spatial"]) > 0).any()


def test_summary_counts_equal_a_plain_count():
    """Per-test and per-station counts from the packed counting equal a row-by-row tally."""
    obs, st, _ = _fault_network()
    res = qc.run_qc(obs, st, from_dict({}))
    s = qc.summary(obs, res)
    expected = {(v, name): int(((bits & b) != 0).sum())
                for v, bits in res.tests.items() for name, b in qc.TEST_BITS.items()}
    got = {(r.variable, r.test): r.values for r in s["per_test"].itertuples()}
    assert got == {k: c for k, c in expected.items() if c} and len(got) >= 3
    sid = obs["station_id"].astype(str).to_numpy()
    for row in s["per_station"].itertuples():
        at = sid == row.station_id
        assert row.suspect == sum(int((f[at] == qc.SUSPECT).sum()) for f in res.flags.values())
        assert row.bad == sum(int((f[at] == qc.BAD).sum()) for f in res.flags.values())
    assert s["per_station"]["bad"].sum() > 0 and s["per_station"]["suspect"].sum() > 0


def _steps_row_by_row(x, t, codes, table):
    """The step and spike rules of qc.plausible_steps, one row at a time (the reference)."""
    n = len(x)
    fin = np.isfinite(x)
    prev, nxt = np.full(n, -1), np.full(n, -1)
    for i in range(n):
        for j in range(i - 1, -1, -1):
            if codes[j] != codes[i]:
                break
            if fin[j]:
                prev[i] = j
                break
        for j in range(i + 1, n):
            if codes[j] != codes[i]:
                break
            if fin[j]:
                nxt[i] = j
                break
    max_gap = max(a for a, _ in table) * 1.5

    def exceeds(i, j, a, b):  # the change from row a to row b, seen from row i
        minutes = (t[b] - t[a]) / 6e10
        return j >= 0 and fin[i] and minutes <= max_gap and abs(x[b] - x[a]) > qc.step_limit(table, np.array([minutes]))[0]

    ex_in = [exceeds(i, prev[i], prev[i], i) for i in range(n)]
    ex_out = [exceeds(i, nxt[i], i, nxt[i]) for i in range(n)]
    spike = [ex_in[i] and ex_out[i] and np.sign(x[i] - x[prev[i]]) != np.sign(x[nxt[i]] - x[i]) for i in range(n)]
    step = [ex_in[i] and not spike[i] and not (prev[i] >= 0 and spike[prev[i]]) for i in range(n)]
    return ~np.array(step, bool), ~np.array(spike, bool)


def test_step_and_spike_tests_equal_the_row_by_row_rules():
    rng = np.random.default_rng(3)
    table = [(5.0, 2.0), (60.0, 6.0)]
    for _ in range(60):
        n = int(rng.integers(1, 50))
        codes = np.sort(rng.integers(0, 4, n))
        t = np.zeros(n, np.int64)
        for c in np.unique(codes):
            m = codes == c
            t[m] = np.cumsum(rng.integers(1, 30, m.sum())) * 60 * 10**9
        x = np.cumsum(rng.normal(0, 2, n)) + rng.choice([0, 0, 0, 9, -9], n)
        x[rng.random(n) < 0.3] = np.nan
        got, want = qc.plausible_steps(x, t, codes, table), _steps_row_by_row(x, t, codes, table)
        assert np.array_equal(got[0], want[0]) and np.array_equal(got[1], want[1])
