"""An interrupted run leaves nothing misleading: the folder is one whole run or untouched; no process outlives it.

Runs the real ``stationflow`` command in its own process group and stops it with SIGTERM or SIGKILL at
several moments, into an empty folder and into a folder that holds an earlier run (Linux: processes are
found through /proc).
"""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from .netgen import linear_night, write_export

pytestmark = [pytest.mark.slow, pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc (Linux)")]


def _group_alive(pgid: int) -> list[int]:
    alive = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                fields = (d / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[2]) == pgid and fields[0] != "Z":
                alive.append(int(d.name))
    return alive


def _start(paths, out: Path) -> subprocess.Popen:
    cmd = [sys.executable, "-c", "from stationflow.cli import main; main()", "budget", "--stations",
           str(paths["stations"]), "--obs", str(paths["obs"]), "--config", str(paths["config"]), "--out", str(out), "--quiet"]
    return subprocess.Popen(cmd, start_new_session=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env={**os.environ, "STATIONFLOW_IN_PROCESS": ""})


def _whole_run(out: Path) -> dict:
    run = json.loads((out / "run.json").read_text())
    assert run["status"] == "complete"
    for name in run["outputs"]:
        assert (out / name).exists(), name
    assert not list(out.glob(".*.part"))
    return run


@pytest.fixture(scope="module")
def export(tmp_path_factory):
    st, obs = linear_night(120, 200, seed=4, elevation=True)
    return write_export(tmp_path_factory.mktemp("in"), st, obs)


@pytest.fixture(scope="module")
def duration(export, tmp_path_factory):
    out = tmp_path_factory.mktemp("first") / "out"
    t0 = time.monotonic()
    proc = _start(export, out)
    proc.communicate(timeout=300)
    assert proc.returncode == 0
    return time.monotonic() - t0


@pytest.mark.parametrize("share", [0.2, 0.5, 0.85])
@pytest.mark.parametrize("earlier", [False, True])
def test_sigterm_leaves_the_folder_whole_and_no_process(export, duration, tmp_path, share, earlier):
    out = tmp_path / "out"
    before = None
    if earlier:
        proc = _start(export, out)
        proc.communicate(timeout=300)
        before = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    proc = _start(export, out)
    time.sleep(duration * share)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode in (0, 143), err
    if proc.returncode == 143:
        assert err.decode().strip().splitlines()[-1].startswith("error: terminated")
        if before is None:
            assert not out.exists()
        else:
            assert {p.name: p.stat().st_mtime_ns for p in out.iterdir()} == before  # untouched
    if out.exists():
        _whole_run(out)
    assert not list(tmp_path.glob(".out.stationflow-*"))  # no staging folder left
    deadline = time.monotonic() + 5
    while _group_alive(proc.pid) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not _group_alive(proc.pid)


@pytest.mark.parametrize("share", [0.3, 0.7])
def test_sigkill_leaves_no_worker_and_the_next_run_tidies_up(export, duration, tmp_path, share):
    out = tmp_path / "out"
    proc = _start(export, out)
    proc.communicate(timeout=300)
    earlier = _whole_run(out)
    proc = _start(export, out)
    time.sleep(duration * share)
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=60)
    deadline = time.monotonic() + 5
    while _group_alive(proc.pid) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not _group_alive(proc.pid), "a worker outlived the killed run"
    now = _whole_run(out)
    if proc.returncode == -signal.SIGKILL:
        assert now["created_utc"] == earlier["created_utc"]  # the earlier run, untouched
    else:  # the run had finished before the signal came: its own whole result
        assert proc.returncode == 0
    # the next run removes what the killed one left and publishes a whole run
    proc = _start(export, out)
    proc.communicate(timeout=300)
    assert proc.returncode == 0
    _whole_run(out)
    assert not list(tmp_path.glob(".out.stationflow-*"))


@pytest.mark.parametrize("signum, code, word", [(15, 143, "terminated"), (2, 130, "interrupted")])
def test_a_signal_that_stops_a_pyarrow_read_ends_like_the_signal(tmp_path, monkeypatch, runner, signum, code, word):
    # pyarrow stops a long CSV read on SIGINT/SIGTERM itself and raises ArrowCancelled (seen in CI: "received
    # signal 15"): the run must end as the signal does, not as an unexpected fault
    import pyarrow as pa

    from stationflow import cli

    def cancelled(*args, **kwargs):
        raise pa.lib.ArrowCancelled(f"Operation cancelled. Detail: received signal {signum}")

    monkeypatch.setattr(cli, "_budget_job", cancelled)
    frost = Path(__file__).resolve().parent.parent / "sample_data" / "frost"
    res = runner.invoke(cli.app, ["budget", "--stations", str(frost / "stations.csv"), "--obs",
                                  str(frost / "observations.csv"), "--out", str(tmp_path / "out")])
    assert res.exit_code == code and res.stderr.strip().startswith(f"error: {word}")
    assert not (tmp_path / "out").exists()
