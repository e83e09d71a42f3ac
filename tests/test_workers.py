"""Performance machinery (stationflow.run.workers): the figure worker process, forks, threads and allocator settings."""

import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from stationflow.report import plots
from stationflow.report.painter import Painter
from stationflow.run.workers import together
from stationflow.scenarios import synthetic


def _image():
    st = synthetic.network(6, seed=1)
    times = pd.date_range("2026-01-01", periods=40, freq="10min", tz="UTC")
    obs = pd.DataFrame({"station_id": np.repeat(st["station_id"].to_numpy(), len(times)),
                        "time": np.tile(times, len(st))})
    flags = {"air_temperature": np.random.default_rng(0).integers(0, 4, len(obs)).astype(np.int8)}
    return obs, flags


def test_background_figure_matches_inline(tmp_path):
    obs, flags = _image()
    image = plots.qc_overview_image(obs, flags)
    inline = plots.draw_qc_overview(image, tmp_path / "inline.png")
    with Painter(background=True) as painter:
        fut = painter.submit(plots.draw_qc_overview, image, tmp_path / "worker.png")
        path = fut.result(timeout=120)
    assert painter.background is False  # closed
    assert path == tmp_path / "worker.png"
    assert path.read_bytes() == inline.read_bytes()


def test_image_is_the_worst_flag_per_station_and_bin():
    obs, flags = _image()
    image = plots.qc_overview_image(obs, flags, max_bins=40)  # one bin per time step here
    assert image["stations"] == sorted(obs["station_id"].unique())
    f = flags["air_temperature"].reshape(6, 40)  # rows are station-major in _image()
    order = np.argsort(obs["station_id"].unique())
    assert np.array_equal(image["img"], f[order])


def _fails(path):
    raise ValueError(f"cannot draw {path}")


def test_worker_errors_reach_the_caller(tmp_path):
    with Painter(background=True) as painter:
        fut = painter.submit(_fails, tmp_path / "x.png")
        with pytest.raises(ValueError, match="cannot draw"):
            fut.result(timeout=120)


def test_inline_painter_runs_at_once(tmp_path):
    painter = Painter(background=False)
    assert not painter.background
    fut = painter.submit(_fails, tmp_path / "x.png")
    assert fut.done() and isinstance(fut.exception(), ValueError)


def test_close_waits_for_every_job_then_stops_the_workers(tmp_path):
    obs, flags = _image()
    image = plots.qc_overview_image(obs, flags)
    painter = Painter(background=True)
    procs = painter.processes
    futures = [painter.submit(plots.draw_qc_overview, image, tmp_path / f"f{i}.png") for i in range(3)]
    painter.close()  # without waiting on the futures first
    assert all(f.done() and f.exception() is None for f in futures)
    assert all((tmp_path / f"f{i}.png").stat().st_size > 0 for i in range(3))
    assert not list(tmp_path.glob(".*.part"))  # every file renamed into place
    assert procs and all(not p.is_alive() for p in procs)


def test_a_failed_run_stops_the_worker_and_its_executor_before_going_on():
    # the executor's own thread is done when the with-block has been left: left running, it released the
    # queue's semaphores too late for a process that ends at once (Python's resource tracker then warned on
    # stderr, after the command's one error line)
    import threading

    before = set(threading.enumerate())
    with pytest.raises(KeyError):
        with Painter(background=True) as painter:
            procs = painter.processes
            raise KeyError("a bad input, say")
    assert procs and all(not p.is_alive() for p in procs)
    assert set(threading.enumerate()) <= before  # the executor's own thread is gone too


def test_a_killed_worker_means_the_figure_is_drawn_here(tmp_path):
    obs, flags = _image()
    image = plots.qc_overview_image(obs, flags)
    with Painter(background=True) as painter:
        painter.submit(plots.draw_qc_overview, image, tmp_path / "warm.png").result(timeout=120)
        for proc in painter.processes:
            proc.kill()  # as the kernel's out-of-memory killer would
            proc.join(timeout=30)
        fut = painter.submit(plots.draw_qc_overview, image, tmp_path / "after.png")
        path = fut.result(timeout=120)
    assert path == tmp_path / "after.png" and path.stat().st_size > 0
    assert fut.done() and fut.exception() is None


def _slow_draw(image, path):
    import time

    time.sleep(2.0)
    return plots.draw_qc_overview(image, path)


def test_a_worker_killed_mid_figure_means_it_is_drawn_here(tmp_path):
    obs, flags = _image()
    image = plots.qc_overview_image(obs, flags)
    with Painter(background=True) as painter:
        painter.submit(plots.draw_qc_overview, image, tmp_path / "warm.png").result(timeout=120)
        fut = painter.submit(_slow_draw, image, tmp_path / "slow.png")
        for proc in painter.processes:
            proc.kill()
        assert fut.result(timeout=120) == tmp_path / "slow.png"
    assert (tmp_path / "slow.png").stat().st_size > 0


def _killed_once(flag):
    """Die (as if killed for memory) the first time, while ``flag`` exists; then answer where it runs."""
    import os
    import signal

    if flag.exists():
        flag.unlink()
        os.kill(os.getpid(), signal.SIGKILL)
    return os.getpid()


def test_figures_drawn_together_match_inline_and_keep_their_own_errors(tmp_path):
    obs, flags = _image()
    image = plots.qc_overview_image(obs, flags)
    inline = plots.draw_qc_overview(image, tmp_path / "inline.png")
    with Painter(background=True) as painter:
        a, b, c = painter.submit_together([(plots.draw_qc_overview, (image, tmp_path / "a.png"), {}),
                                           (_fails, (tmp_path / "x.png",), {}),
                                           (plots.draw_qc_overview, (image, tmp_path / "c.png"), {})])
        assert a.result(timeout=120) == tmp_path / "a.png" and c.result(timeout=120) == tmp_path / "c.png"
        with pytest.raises(ValueError, match="cannot draw"):
            b.result(timeout=120)
        assert a.exception() is None and isinstance(b.exception(), ValueError) and a.done() and b.done()
    assert (tmp_path / "a.png").read_bytes() == (tmp_path / "c.png").read_bytes() == inline.read_bytes()
    assert not list(tmp_path.glob(".*.part"))


@pytest.mark.skipif(not sys.platform.startswith("linux") or (os.cpu_count() or 1) < 2, reason="forks on Linux only")
def test_figures_drawn_together_run_in_separate_processes(tmp_path):
    with Painter(background=True) as painter:
        first, last = painter.submit_together([(os.getpid, (), {}), (os.getpid, (), {})])
        pids = {first.result(timeout=120), last.result(timeout=120)}
    assert len(pids) == 2 and os.getpid() not in pids


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_a_figure_whose_child_dies_is_drawn_by_the_worker(tmp_path):
    flag = tmp_path / "die"
    flag.touch()
    with Painter(background=True) as painter:  # in the worker: a child killed here would be the test run
        child, worker = painter.submit(together, [(_killed_once, (flag,), {}), (os.getpid, (), {})], os.getpid()).result(120)
    assert child[0] and worker[0] and child == worker  # drawn again by the worker, after its child died
    assert not flag.exists() and worker[1] != os.getpid()


def test_together_does_not_fork_a_process_with_threads():
    import threading

    stop = threading.Event()
    other = threading.Thread(target=stop.wait)
    other.start()
    try:
        outcomes = together([(os.getpid, (), {}), (os.getpid, (), {})], home=-1)  # "another process"
    finally:
        stop.set()
        other.join()
    assert outcomes == [(True, os.getpid())] * 2


def test_together_never_forks_the_submitting_process():
    assert together([(os.getpid, (), {}), (os.getpid, (), {})], home=os.getpid()) == [(True, os.getpid())] * 2


def test_the_figure_worker_draws_the_run_figures_without_pandas(tmp_path):
    # the worker takes small prepared arrays, not pandas objects: importing pandas would cost it 0.3 s of
    # start-up while the main process reads and checks the data
    from stationflow import api, config
    from stationflow.report import outputs

    from .conftest import ROOT

    frost = ROOT / "sample_data" / "frost"
    run = api.run_budget(frost / "observations.csv", frost / "stations.csv", config.load(frost / "config.toml"))
    with Painter(background=True) as painter:
        outputs.submit_qc_figure(painter, tmp_path, run.check).result(timeout=120)
        figs = outputs.submit_budget_figures(painter, tmp_path, run)
        assert {k: f.result(timeout=120) for k, f in figs.items()} == {
            "timeseries": tmp_path / "budget_timeseries.png", "map": tmp_path / "budget_map.png"}
        # (asked with a builtin: a function of this module would import pandas there, as this module does)
        loaded = painter.submit(eval, "{n: n in __import__('sys').modules for n in ('pandas', 'matplotlib')}"
                                ).result(timeout=120)
    assert loaded == {"pandas": False, "matplotlib": True}
    # and the same figures as drawn here, from the pandas objects
    here = tmp_path / "here"
    plots.network_map(run.network, here / "map.png", colour_by=run.summary.dominant(), arrows=run.summary.arrows(),
                      title="Clusters by their commonest regime; mean wind and gradient",
                      bad_stations=outputs.mostly_bad(run))
    assert (here / "map.png").read_bytes() == (tmp_path / "budget_map.png").read_bytes()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc settings apply on Linux only")
def test_allocator_settings_reach_pyarrow_unless_the_user_chose():
    code = ("from stationflow.run.workers import tune_allocator; ok = tune_allocator(); import pyarrow as pa; "
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
    from stationflow.run.workers import tune_allocator
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
