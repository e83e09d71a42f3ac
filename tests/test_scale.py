"""Partitioned runs give the same numbers: chunked local runs and the Dask engine."""

import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from stationflow import config, pipeline, scale

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
    return pipeline.run_budget(FROST / "observations.csv", FROST / "stations.csv", cfg)


def _assert_same(a: pd.DataFrame, b: pd.DataFrame):
    assert len(a) == len(b)
    assert (a["time"].to_numpy() == b["time"].to_numpy()).all()
    assert (a["cluster"].to_numpy() == b["cluster"].to_numpy()).all()
    for c in NUMERIC:
        np.testing.assert_allclose(b[c].to_numpy(float), a[c].to_numpy(float), rtol=1e-12, atol=1e-12, equal_nan=True, err_msg=c)
    assert (a["regime"].to_numpy() == b["regime"].to_numpy()).all()


def test_chunked_equals_unchunked(reference):
    # 1 h chunks over a 15 h record with a 60 min window: many partition edges, and the HV09 gap
    run = pipeline.run_budget(FROST / "observations.csv", FROST / "stations.csv", _cfg(chunk="1h"))
    _assert_same(reference.table, run.table)


def test_partitions_on_threads_equal_one_at_a_time(monkeypatch):
    # the same bits whether partitions are computed one after another or two at once, and in order
    cfg = _cfg(chunk="1h")
    chk = pipeline.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    runs = {}
    for threads in (1, 2):
        monkeypatch.setattr(pipeline, "PARTITION_THREADS", threads)
        monkeypatch.setattr(pipeline.os, "cpu_count", lambda: 2)
        sink = pipeline.MemorySink()
        firsts = []
        plan = pipeline.plan_budget(chk, cfg)
        real_add = sink.add
        sink.add = lambda first, block, seen=firsts, add=real_add: (seen.append(first), add(first, block))
        pipeline.run_partitions(plan, sink, cfg)
        assert firsts == sorted(firsts) and len(firsts) > 4
        runs[threads] = sink.pieces
    assert len(runs[1]) == len(runs[2])
    for a, b in zip(runs[1], runs[2]):
        assert a.keys() == b.keys()
        for k in a:
            assert np.array_equal(a[k], b[k], equal_nan=a[k].dtype.kind == "f"), k


def test_row_mean_var_equals_numpy_nan_functions():
    from stationflow.budget import row_mean_var

    rng = np.random.default_rng(5)
    x = rng.normal(size=(200, 7))
    x[rng.random(x.shape) < 0.4] = np.nan
    x[3] = np.nan  # an empty row
    x[4, 1:] = np.nan  # one value: no variance
    mean, var = row_mean_var(x)
    with np.errstate(invalid="ignore", divide="ignore"), pytest.warns(RuntimeWarning):
        ref_mean, ref_var = np.nanmean(x, axis=1), np.nanvar(x, axis=1, ddof=1)
    np.testing.assert_allclose(mean, ref_mean, rtol=1e-13, equal_nan=True)
    np.testing.assert_allclose(var, ref_var, rtol=1e-12, equal_nan=True)


def test_dask_local_cluster_equals_local(reference):
    pytest.importorskip("dask.distributed")
    run = scale.run_budget_dask(FROST / "observations.csv", FROST / "stations.csv", _cfg(chunk="2h"), n_workers=2)
    _assert_same(reference.table, run.table)


def test_benchmark_harness_runs_smallest_size(tmp_path):
    import importlib.util

    spec = importlib.util.spec_from_file_location("bench", ROOT / "benchmarks" / "run.py")
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    rows = bench.run_suite(["tiny"], tmp_path, repeats=1)
    assert rows and rows[0]["stations"] > 0 and rows[0]["core_member_values_per_s"] > 0
    assert rows[0]["run_s"] > 0 and rows[0]["floor_s"] > 0


def test_benchmark_harness_names_an_unknown_size(capsys):
    import importlib.util

    spec = importlib.util.spec_from_file_location("bench", ROOT / "benchmarks" / "run.py")
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    assert bench.main(["3000"]) == 2
    assert "unknown benchmark size '3000'" in capsys.readouterr().err
    assert bench.main(["--help"]) == 0
    assert "300x30d" in capsys.readouterr().out


def test_dask_engine_writes_the_same_files(reference, tmp_path):
    # the CLI path: partitions computed on a local two-worker cluster, written as they arrive
    pytest.importorskip("dask.distributed")
    cfg = _cfg(chunk="2h")
    chk = pipeline.run_check(FROST / "observations.csv", FROST / "stations.csv", cfg)
    run = scale.budget_to_files_dask(chk, cfg, tmp_path, n_workers=2)
    assert run.table is None
    table = pd.read_parquet(tmp_path / "budget.parquet")
    ref = reference.table.assign(cluster=reference.table["cluster"].astype(str))
    _assert_same(ref, table.assign(cluster=table["cluster"].astype(str), regime=table["regime"].astype(str)))
    assert run.periods == reference.periods


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc settings apply on Linux only")
def test_allocator_settings_reach_pyarrow_unless_the_user_chose():
    code = ("from stationflow.memory import tune_allocator; ok = tune_allocator(); import pyarrow as pa; "
            "print(ok, pa.default_memory_pool().backend_name)")
    env = {k: v for k, v in os.environ.items() if k != "ARROW_DEFAULT_MEMORY_POOL"}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True).stdout.split()
    if out[0] == "True":  # glibc present: pyarrow follows onto the system allocator
        assert out[1] == "system"
    chosen = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                            env={**env, "ARROW_DEFAULT_MEMORY_POOL": "jemalloc" if out[1] != "jemalloc" else "mimalloc"})
    assert chosen.stdout.split()[1] != "system"  # a user's own choice is kept


_ARENAS = r"""
import ctypes, os, sys, tempfile, threading
if sys.argv[1] == "tuned":
    from stationflow.memory import tune_allocator
    tune_allocator()
import numpy as np

def work():
    np.ones(1 << 20).sum()  # an 8 MB block allocated in this thread

threads = [threading.Thread(target=work) for _ in range(2)]
for t in threads:
    t.start()
for t in threads:
    t.join()
libc = ctypes.CDLL("libc.so.6")
libc.fopen.restype = ctypes.c_void_p
libc.fopen.argtypes = [ctypes.c_char_p, ctypes.c_char_p]
libc.malloc_info.argtypes = [ctypes.c_int, ctypes.c_void_p]
libc.fclose.argtypes = [ctypes.c_void_p]
fd, path = tempfile.mkstemp()
os.close(fd)
fp = libc.fopen(path.encode(), b"w")
libc.malloc_info(0, fp)
libc.fclose(fp)
print(open(path).read().count("<heap nr="))
os.unlink(path)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc settings apply on Linux only")
def test_threads_share_one_heap_after_tuning():
    # glibc's malloc_info lists one <heap> per arena: threads get arenas of their own unless tuned
    def heaps(mode: str) -> int:
        res = subprocess.run([sys.executable, "-c", _ARENAS, mode], capture_output=True, text=True, check=False)
        if res.returncode != 0:
            pytest.skip(f"malloc_info not available here: {res.stderr.strip()[-200:]}")
        return int(res.stdout.split()[-1])

    assert heaps("plain") > 1
    assert heaps("tuned") == 1
