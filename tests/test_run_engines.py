"""Partitioned runs give the same numbers: chunked, threaded or in-process local runs and the Dask engine."""


import numpy as np
import pandas as pd
import pytest

from stationflow import api, config
from stationflow.run import partitions, sinks
from stationflow.run.plan import plan_budget

from .conftest import ROOT

FROST = ROOT / "sample_data" / "frost"
NUMERIC = ["value", "tendency", "advection", "residual", "tendency_se", "advection_se", "residual_se",
           "grad_x", "grad_y", "u", "v", "n_used"]


def _cfg(**budget):
    cfg = config.load(FROST / "config.toml")
    data = cfg.to_dict()
    data["budget"].update(budget)
    out = config.from_dict(data)
    return out


@pytest.fixture(scope="module")
def reference():
    cfg = _cfg()
    return api.run_budget(FROST / "observations.csv", FROST / "stations.csv", cfg)


def _assert_same(a: pd.DataFrame, b: pd.DataFrame):
    assert len(a) == len(b)
    assert (a["time"].to_numpy() == b["time"].to_numpy()).all()
    assert (a["cluster"].to_numpy() == b["cluster"].to_numpy()).all()
    for c in NUMERIC:
        np.testing.assert_allclose(b[c].to_numpy(float), a[c].to_numpy(float), rtol=1e-12, atol=1e-12, equal_nan=True, err_msg=c)
    assert (a["regime"].to_numpy() == b["regime"].to_numpy()).all()


def test_chunked_equals_unchunked(reference):
    # 1 h chunks over a 15 h record with a 60 min window: many partition edges, and the HV09 gap
    run = api.run_budget(FROST / "observations.csv", FROST / "stations.csv", _cfg(chunk="1h"))
    _assert_same(reference.table, run.table)


@pytest.mark.parametrize("in_process", [False, True])
def test_partitions_on_threads_equal_one_at_a_time(monkeypatch, in_process):
    # the same bits whether partitions are computed one after another, two at once, or with everything
    # in-process (the debugging switch), and they reach the sinks in order
    from stationflow.run import workers

    cfg = _cfg(chunk="1h")
    chk = api.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    plan = plan_budget(chk, cfg)
    runs = {}
    for threads in (1, 2):
        monkeypatch.setattr(partitions, "PARTITION_THREADS", threads)
        monkeypatch.setattr(workers, "_forced", in_process)
        sink = sinks.MemorySink()
        partitions.run_partitions(plan, [sink], cfg)
        firsts = [p.first for p in sink.parts]
        assert firsts == sorted(firsts) and len(firsts) > 4
        runs[threads] = [p.terms for p in sink.parts]
    assert len(runs[1]) == len(runs[2])
    for a, b in zip(runs[1], runs[2]):
        assert a.keys() == b.keys()
        for k in a:
            assert np.array_equal(a[k], b[k], equal_nan=a[k].dtype.kind == "f"), k




def test_dask_local_cluster_equals_local(reference):
    pytest.importorskip("dask.distributed")
    run = api.run_budget(FROST / "observations.csv", FROST / "stations.csv", _cfg(chunk="2h"), engine="dask")
    _assert_same(reference.table, run.table)






def test_dask_engine_writes_the_same_files(reference, tmp_path):
    # the CLI path: partitions computed on a local two-worker cluster, written as they arrive
    pytest.importorskip("dask.distributed")
    cfg = _cfg(chunk="2h")
    chk = api.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    run = api.budget_to_files(chk, cfg, tmp_path, engine="dask")
    assert run.table is None
    table = pd.read_parquet(tmp_path / "budget.parquet")
    ref = reference.table.assign(cluster=reference.table["cluster"].astype(str))
    _assert_same(ref, table.assign(cluster=table["cluster"].astype(str), regime=table["regime"].astype(str)))
    assert run.periods == reference.periods






