"""Streamed outputs: the files written partition by partition equal the in-memory budget.

Also: the typed CSV fast path gives exactly what the general reader gives,
and a failure part-way through leaves no half-written files.
"""

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from stationflow import config, ingest, pipeline
from stationflow.budget import REGIMES
from stationflow.report import stream

from .conftest import ROOT

FROST = ROOT / "sample_data" / "frost"
TOWN = ROOT / "sample_data" / "town"


def _cfg(folder, **budget):
    data = config.load(folder / "config.toml").to_dict()
    data["budget"].update(budget)
    return config.from_dict(data)


@pytest.fixture(scope="module")
def memory_run():
    return pipeline.run_budget(FROST / "observations.csv", FROST / "stations.csv", _cfg(FROST))


@pytest.mark.parametrize("chunk", [None, "1h"])
def test_streamed_files_equal_the_in_memory_table(memory_run, tmp_path, chunk):
    cfg = _cfg(FROST, chunk=chunk) if chunk else _cfg(FROST)
    chk = pipeline.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    run = pipeline.budget_to_files(chk, cfg, tmp_path)
    assert run.table is None and run.dataset is None
    ref = memory_run.table
    pq = pd.read_parquet(tmp_path / "budget.parquet")
    assert list(pq.columns) == list(ref.columns)
    assert (pq["time"].to_numpy() == ref["time"].to_numpy()).all()
    assert (pq["cluster"].astype(str).to_numpy() == ref["cluster"].astype(str).to_numpy()).all()
    assert (pq["regime"].astype(str).to_numpy() == ref["regime"].astype(str).to_numpy()).all()
    for c in ref.columns:
        if pd.api.types.is_float_dtype(ref[c]):
            np.testing.assert_allclose(pq[c].to_numpy(), ref[c].to_numpy(), rtol=1e-12, atol=1e-12, equal_nan=True, err_msg=c)
    import pyarrow.parquet as papq

    meta = papq.ParquetFile(tmp_path / "budget.parquet").metadata.row_group(0)
    codecs = {meta.column(i).path_in_schema: meta.column(i).compression for i in range(meta.num_columns)}
    assert codecs["advection"] == "UNCOMPRESSED" and codecs["value"] == "SNAPPY" and codecs["tendency_se"] == "SNAPPY"
    assert not any(f.nullable for f in papq.read_schema(tmp_path / "budget.parquet"))  # NaN, never null
    csv = pd.read_csv(tmp_path / "budget.csv")
    assert len(csv) == len(ref) and list(csv.columns) == list(ref.columns)
    np.testing.assert_allclose(csv["residual"].to_numpy(), ref["residual"].to_numpy(), rtol=1e-9, equal_nan=True)
    with xr.open_dataset(tmp_path / "budget.nc") as ds:
        mem = memory_run.dataset
        assert list(ds.data_vars) == list(mem.data_vars)
        assert (ds["time"].values == mem["time"].values).all()
        assert list(ds["cluster"].values) == list(mem["cluster"].values)
        for name in mem.data_vars:
            a, b = ds[name].values, mem[name].values
            if b.dtype.kind == "f":  # stored as float32
                fin = np.isfinite(b)
                scale = float(np.max(np.abs(b[fin]))) if fin.any() else 1.0
                assert (np.isfinite(a) == fin).all(), name
                np.testing.assert_allclose(a[fin], b[fin], rtol=1e-6, atol=1e-6 * scale, err_msg=name)
            else:
                assert a.dtype == b.dtype and (a == b).all(), name
        assert ds["regime"].attrs["flag_meanings"].split() == list(REGIMES)
    # the summary the report uses equals what the full table says
    counts = ref["regime"].astype(str).value_counts()
    assert run.summary.regime_counts() == {k: int(counts.get(k, 0)) for k in run.summary.regime_counts()}
    assert run.periods == memory_run.periods


def test_summary_arrows_and_medians_match_the_table(memory_run):
    t, s = memory_run.table, memory_run.summary
    det = t[t["regime"].astype(str) != "undetermined"]
    mean = det.groupby("cluster", observed=True)["u"].mean()
    arrows = s.arrows()
    got = dict(zip(arrows["cluster"], arrows["u"]))
    for c, v in mean.items():
        assert got[str(c)] == pytest.approx(v, rel=1e-12, abs=1e-12)
    assert s.median_se("advection_se") == pytest.approx(float(np.nanmedian(det["advection_se"])), rel=1e-6)


def test_running_regime_tally_matches_the_table(memory_run):
    # the per-cluster regime counts kept partition by partition equal a count over the whole table
    t, s = memory_run.table, memory_run.summary
    assert s.steps_added == len(s.times)
    want = pd.crosstab(t["cluster"].astype(str), t["regime"].astype(str)).reindex(columns=list(REGIMES), fill_value=0)
    got = s.cluster_counts()
    assert got.loc[want.index].to_numpy().tolist() == want.to_numpy().tolist()
    # and equal the count from the stored regime codes (the path without a tally)
    s.tally, kept = None, s.tally
    try:
        assert s.cluster_counts().equals(got) and s.busiest(4) == [int(i) for i in np.argsort(
            -(got["undetermined"].rsub(len(s.times))).to_numpy(), kind="stable")[:4]]
    finally:
        s.tally = kept


@pytest.mark.parametrize("n", [1, 2, 7, 10, 1001])
def test_median_se_equals_numpy_median_over_determined_finite_values(n):
    from stationflow.summary import UNDETERMINED, BudgetSummary

    rng = np.random.default_rng(n)
    clusters = pd.DataFrame({"cluster": ["a", "b"], "stations": ["x+y+z", "y+z+w"], "latitude": [0.0, 0.1],
                             "longitude": [0.0, 0.1]})
    s = BudgetSummary.allocate(pd.date_range("2026-01-01", periods=n, freq="5min", tz="UTC"), clusters)
    s.regime[:] = rng.integers(0, len(REGIMES), s.regime.shape)
    s.regime[0, 0] = 0 if UNDETERMINED else 1  # at least one determined step
    se = rng.lognormal(size=s.regime.shape).astype(np.float32)
    se[rng.random(se.shape) < 0.2] = np.nan
    se[0, 0] = 1.0
    s.terms["advection_se"][:] = se
    vals = se[(s.regime != UNDETERMINED) & np.isfinite(se)].astype(float)
    assert s.median_se("advection_se") == pytest.approx(float(np.median(vals)), rel=1e-12)
    assert s.terms["advection_se"][0, 0] == 1.0  # the kept terms are not reordered


def test_failure_part_way_leaves_no_files(tmp_path):
    cfg = _cfg(FROST, chunk="1h")
    chk = pipeline.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    plan = pipeline.plan_budget(chk, cfg)

    class Boom(RuntimeError):
        pass

    with pytest.raises(Boom):
        with stream.BudgetFiles(tmp_path, plan.layout) as sink:
            first, last = pipeline.partitions(len(plan.times), 6)[0]
            sink.add(first, pipeline.derive(pipeline.run_partition(plan, first, last), plan.layout.convergence))
            raise Boom("disk full")
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # neither results nor temporary files


@pytest.mark.parametrize("which", ["_write_tables", "_write_netcdf"])
def test_a_failing_writer_raises_its_error_and_leaves_no_files(tmp_path, monkeypatch, which):
    # the two writer threads: an error in either (the disk filling up, say) is raised from the stream, once
    # the other writer is done with the partition, and nothing is left behind
    cfg = _cfg(FROST, chunk="1h")
    chk = pipeline.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    plan = pipeline.plan_budget(chk, cfg)
    original = getattr(stream.BudgetFiles, which)

    def failing(self, first, block):
        if first > 0:
            raise OSError(28, "No space left on device")
        original(self, first, block)

    monkeypatch.setattr(stream.BudgetFiles, which, failing)
    with pytest.raises(OSError, match="No space left"):
        with stream.BudgetFiles(tmp_path, plan.layout) as sink:
            for first, last in pipeline.partitions(len(plan.times), 6)[:3]:
                sink.add(first, pipeline.derive(pipeline.run_partition(plan, first, last), plan.layout.convergence))
    assert list(tmp_path.iterdir()) == []


def test_incomplete_stream_is_an_error_and_leaves_no_files(tmp_path):
    cfg = _cfg(FROST)
    chk = pipeline.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    plan = pipeline.plan_budget(chk, cfg)
    with pytest.raises(RuntimeError, match="analysis steps written"):
        with stream.BudgetFiles(tmp_path, plan.layout) as sink:
            sink.add(0, pipeline.derive(pipeline.run_partition(plan, 0, 3), plan.layout.convergence))
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("folder", [FROST, TOWN])
def test_typed_csv_fast_path_equals_the_general_reader(folder, monkeypatch):
    cfg = config.load(folder / "config.toml")
    fast = ingest.read(folder / "observations.csv", folder / "stations.csv", cfg)
    with monkeypatch.context() as m:
        m.setattr(ingest, "_read_typed_csv", lambda *a, **k: None)
        slow = ingest.read(folder / "observations.csv", folder / "stations.csv", cfg)
    pd.testing.assert_frame_equal(fast.observations, slow.observations)
    pd.testing.assert_frame_equal(fast.rejected, slow.rejected)
    assert fast.accounting == slow.accounting
    assert fast.ignored_columns == slow.ignored_columns and fast.units == slow.units


def _write(path, text):
    path.write_text(text, encoding="utf-8")
    return path


STATIONS = "station_id,latitude,longitude,elevation\nA,47.0,11.0,500\nB,47.1,11.0,510\nC,47.0,11.1,505\n"


@pytest.mark.parametrize("body, fast", [
    # clean: taken by the fast path; duplicates collapse identically on both paths
    ("A,2026-01-01T00:00:00Z,1.5,x\nB,2026-01-01T00:00:00Z,2.5,y\nA,2026-01-01T00:00:00Z,1.5,x\n", True),
    # conflicting duplicates: rejected with their line numbers by both paths
    ("A,2026-01-01T00:00:00Z,1.5,x\nA,2026-01-01T00:00:00Z,1.7,x\nB,2026-01-01T00:10:00Z,2.5,y\n", True),
    # naive times in UTC, a missing value: fast path
    ("A,2026-01-01 00:00:00,,x\nB,2026-01-01 00:10:00,2.5,y\n", True),
    # a number that is not one, an unknown station, a blank line: general reader
    ("A,2026-01-01T00:00:00Z,warm,x\nZ,2026-01-01T00:00:00Z,1.0,x\n\nB,2026-01-01T00:10:00Z,2.5,y\n", False),
    # infinite value: general reader explains it
    ("A,2026-01-01T00:00:00Z,inf,x\nB,2026-01-01T00:10:00Z,2.5,y\n", False),
    # only a blank line (between rows, or at the end): general reader, which numbers the lines after it right
    ("A,2026-01-01T00:00:00Z,1.5,x\n\nZ,2026-01-01T00:10:00Z,2.5,y\n", False),
    ("A,2026-01-01T00:00:00Z,1.5,x\nZ,2026-01-01T00:10:00Z,2.5,y\n\n", False),
    # Windows line ends, a quoted station id: general reader
    ("A,2026-01-01T00:00:00Z,1.5,x\r\nZ,2026-01-01T00:10:00Z,2.5,y\r\n", False),
    ('"A",2026-01-01T00:00:00Z,1.5,x\nZ,2026-01-01T00:10:00Z,2.5,y\n', False),
    # no newline after the last row: fast path
    ("A,2026-01-01T00:00:00Z,1.5,x\nB,2026-01-01T00:10:00Z,2.5,y", True),
])
def test_fast_path_choice_and_equal_results(tmp_path, monkeypatch, body, fast):
    """Which files the fast path takes, and that both readers then give the same frames and rejections."""
    st = _write(tmp_path / "stations.csv", STATIONS)
    obs = tmp_path / "obs.csv"
    obs.write_bytes(("station_id,time,air_temperature,note\n" + body).encode("utf-8"))  # line ends as given
    cfg = config.Config()
    taken = ingest._read_typed_csv(obs, cfg, ingest.read_stations(st, cfg)) is not None
    assert taken == fast
    a = ingest.read(obs, st, cfg)
    with monkeypatch.context() as m:
        m.setattr(ingest, "_read_typed_csv", lambda *a, **k: None)
        b = ingest.read(obs, st, cfg)
    pd.testing.assert_frame_equal(a.observations, b.observations)
    pd.testing.assert_frame_equal(a.rejected, b.rejected)
    assert a.accounting == b.accounting and a.ignored_columns == b.ignored_columns == ["note"]


def test_fast_path_byte_order_mark_and_fixed_offset(tmp_path, monkeypatch):
    """A UTF-8 byte-order mark and naive times at a fixed offset: the fast path reads them as the general
    reader does (times 08:00 at +08:00 are 00:00 UTC)."""
    st = _write(tmp_path / "stations.csv", STATIONS)
    obs = tmp_path / "obs.csv"
    obs.write_bytes(b"\xef\xbb\xbfstation_id,time,air_temperature\n"
                    b"A,2026-01-01 08:00:00,1.5\nB,2026-01-01 08:10:00,2.5\n")
    cfg = config.Config()
    cfg["observations"]["timezone"] = "+08:00"
    assert ingest._read_typed_csv(obs, cfg, ingest.read_stations(st, cfg)) is not None
    a = ingest.read(obs, st, cfg)
    with monkeypatch.context() as m:
        m.setattr(ingest, "_read_typed_csv", lambda *a, **k: None)
        b = ingest.read(obs, st, cfg)
    pd.testing.assert_frame_equal(a.observations, b.observations)
    assert list(a.observations["time"]) == list(pd.to_datetime(["2026-01-01T00:00Z", "2026-01-01T00:10Z"]))


@pytest.mark.parametrize("fast", [True, False])
def test_direction_zero_is_calm_or_north(tmp_path, monkeypatch, fast):
    """A direction of exactly 0: calm (no direction) under qc.calm_speed, north (360) otherwise or when
    the speed is missing; without a speed column every 0 is calm. Same on both readers."""
    st = _write(tmp_path / "stations.csv", STATIONS)
    with_speed = _write(tmp_path / "a.csv", "station_id,time,wind_speed,wind_from_direction\n"
                        "A,2026-01-01T00:00:00Z,0.1,0\nB,2026-01-01T00:00:00Z,4.0,0\n"
                        "C,2026-01-01T00:00:00Z,,0\nA,2026-01-01T00:10:00Z,3.0,90\n")
    no_speed = _write(tmp_path / "b.csv", "station_id,time,wind_from_direction\n"
                      "A,2026-01-01T00:00:00Z,0\nB,2026-01-01T00:00:00Z,180\n")
    cfg = config.Config()
    if not fast:
        monkeypatch.setattr(ingest, "_read_typed_csv", lambda *a, **k: None)
    else:
        assert ingest._read_typed_csv(with_speed, cfg, ingest.read_stations(st, cfg)) is not None
    a = ingest.read(with_speed, st, cfg).observations["wind_from_direction"].to_numpy()
    b = ingest.read(no_speed, st, cfg).observations["wind_from_direction"].to_numpy()
    # rows come back in (time, station) order: A, B, C at 00:00, then A at 00:10
    assert np.isnan(a[0]) and a[1] == 360.0 and a[2] == 360.0 and a[3] == 90.0
    assert np.isnan(b[0]) and b[1] == 180.0
