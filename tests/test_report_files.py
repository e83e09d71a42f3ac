"""Budget file sinks: the files written partition by partition equal the in-memory budget, and a
failure part-way through leaves no half-written files."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from stationflow import api, config
from stationflow.estimate.budget import REGIMES
from stationflow.report import netcdf, tables
from stationflow.run.partitions import derive, partitions, run_partition
from stationflow.run.plan import plan_budget
from stationflow.run.sinks import Partition

from .conftest import ROOT

FROST = ROOT / "sample_data" / "frost"
TOWN = ROOT / "sample_data" / "town"


def _cfg(folder, **budget):
    data = config.load(folder / "config.toml").to_dict()
    data["budget"].update(budget)
    return config.from_dict(data)


@pytest.fixture(scope="module")
def memory_run():
    return api.run_budget(FROST / "observations.csv", FROST / "stations.csv", _cfg(FROST))


@pytest.mark.parametrize("chunk", [None, "1h"])
def test_streamed_files_equal_the_in_memory_table(memory_run, tmp_path, chunk):
    cfg = _cfg(FROST, chunk=chunk) if chunk else _cfg(FROST)
    chk = api.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    run = api.budget_to_files(chk, cfg, tmp_path)
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
    counts = ref.loc[ref["scale"] == "local", "regime"].astype(str).value_counts()
    assert run.summary.regime_counts() == {k: int(counts.get(k, 0)) for k in run.summary.regime_counts()}
    assert run.periods == memory_run.periods


def test_summary_arrows_and_medians_match_the_table(memory_run):
    t, s = memory_run.table, memory_run.summary
    t = t[t["scale"] == "local"]  # the summary of the local clusters (the regional row has its own)
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
    reg = t[t["scale"] == "regional"]["regime"].astype(str).value_counts()
    assert {k: v for k, v in memory_run.regional.regime_counts().items() if v} == reg.to_dict()
    t = t[t["scale"] == "local"]
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
    from stationflow.report.summary import UNDETERMINED, BudgetSummary

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
    chk = api.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    plan = plan_budget(chk, cfg)

    class Boom(RuntimeError):
        pass

    with pytest.raises(Boom):
        with tables.budget_files(tmp_path, plan.layout) as sinks:
            first, last = partitions(len(plan.times), 6)[0]
            part = Partition(first, derive(run_partition(plan, first, last), plan.layout.convergence))
            for sink in sinks:
                sink.write(part)
            raise Boom("disk full")
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # neither results nor temporary files


@pytest.mark.parametrize("which", ["TableFiles", "NetCDFFile"])
def test_a_failing_writer_raises_its_error_and_leaves_no_files(tmp_path, monkeypatch, which):
    # the two writer threads: an error in either (the disk filling up, say) is raised from its sink, and
    # nothing is left behind by either
    cfg = _cfg(FROST, chunk="1h")
    chk = api.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    plan = plan_budget(chk, cfg)
    cls = getattr(tables if which == "TableFiles" else netcdf, which)
    original = cls._write

    def failing(self, first, block):
        if first > 0:
            raise OSError(28, "No space left on device")
        original(self, first, block)

    monkeypatch.setattr(cls, "_write", failing)
    with pytest.raises(OSError, match="No space left"):
        with tables.budget_files(tmp_path, plan.layout) as sinks:
            for first, last in partitions(len(plan.times), 6)[:3]:
                part = Partition(first, derive(run_partition(plan, first, last), plan.layout.convergence))
                for sink in sinks:
                    sink.write(part)
    assert list(tmp_path.iterdir()) == []


def test_incomplete_stream_is_an_error_and_leaves_no_files(tmp_path):
    cfg = _cfg(FROST)
    chk = api.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    plan = plan_budget(chk, cfg)
    with pytest.raises(RuntimeError, match="analysis steps written"):
        with tables.budget_files(tmp_path, plan.layout) as sinks:
            part = Partition(0, derive(run_partition(plan, 0, 3), plan.layout.convergence))
            for sink in sinks:
                sink.write(part)
    assert list(tmp_path.iterdir()) == []
