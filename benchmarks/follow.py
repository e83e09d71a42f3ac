"""Benchmark of the follow mode: the CPU one new 5-minute step costs, end to end.

Run with ``make bench-follow`` (part of ``make bench``) or ``python benchmarks/follow.py [stations] [hours]
[minutes]`` (default 300 stations, a 14-hour night, 5-minute steps).  It generates a synthetic night (a linear field carried by a
turning wind, evening cooling, 0.1 K noise, 5 % of values missing at random) as a logger export under
``benchmarks/output/follow/``, then appends it to a growing file one 5-minute step at a time and runs
one follow call (``stationflow.follow.follow_step``, what ``budget --follow`` runs each poll) after
each append, in this process.  For each call it records the process's CPU time (all threads, from
``time.process_time``) and the wall time: parse, QC, plane fits, budget, the budget files, now.html
and alerts.jsonl.  Reported: the median, 90th percentile and largest CPU per step after the
settings are pinned, in the first and the last hour of the night (the files grow through it), and,
separately, one ``budget --once`` call in a fresh process (imports included), as a timer would run it.

Nothing here is asserted; ``tests/test_benchmarks.py`` only checks that the harness runs on a tiny
night.
"""

from __future__ import annotations

import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def generate(n: int, hours: float, folder: Path, *, seed: int = 0, minutes: int = 5) -> tuple[Path, Path, Path]:
    """stations.csv, observations.csv (the whole night, time-ordered) and config.toml."""
    from stationflow.scenarios import synthetic

    folder.mkdir(parents=True, exist_ok=True)
    st_path, obs_path, cfg_path = folder / "stations.csv", folder / "observations.csv", folder / "config.toml"
    radius = 10.0 * np.sqrt(n)
    st = synthetic.network(n, radius_km=radius, seed=seed, prefix="N")
    st[["station_id", "latitude", "longitude", "elevation", "sensor_height"]].to_csv(st_path, index=False)
    f = synthetic.LinearField(base=283.0, gx=synthetic.constant(2e-5), gy=synthetic.constant(-1e-5),
                              u=synthetic.ramp([(0, 3.0), (hours, 0.5)]), v=synthetic.ramp([(0, 1.0), (hours, 0.2)]),
                              source=synthetic.ramp([(0, -1.0 / 3600), (hours, -0.3 / 3600)]),
                              horizon_s=hours * 3600 + 7200)
    times = pd.date_range("2026-04-14T01:00Z", periods=int(hours * 60 / minutes) + 1, freq=f"{minutes}min")
    obs = synthetic.sample(f, st, times, noise=0.1, wind_noise=0.3, seed=seed, start=times[0])
    obs = obs[np.random.default_rng(seed).random(len(obs)) >= 0.05]
    out = pd.DataFrame({"station_id": obs["station_id"], "time": pd.DatetimeIndex(obs["time"]).strftime("%Y-%m-%dT%H:%M:%SZ"),
                        "air_temperature": np.round(obs["air_temperature"], 2), "wind_speed": np.round(obs["wind_speed"], 2),
                        "wind_from_direction": np.round(obs["wind_from_direction"], 1)})
    out.to_csv(obs_path, index=False, lineterminator="\n")
    cfg_path.write_text("[budget]\nvariable = \"air_temperature\"\n", encoding="utf-8")
    return st_path, obs_path, cfg_path


def run(n: int = 300, hours: float = 14.0, folder: Path | None = None, *, once: bool = True, minutes: int = 5) -> dict:
    """Replay the night one step per call; returns the timings."""
    from stationflow.config import load
    from stationflow.follow import Follow, follow_step
    from stationflow.scenarios.replay import split_export

    folder = folder or ROOT / "benchmarks" / "output" / "follow"
    st_path, obs_path, cfg_path = generate(n, hours, folder / f"{n}x{hours:g}h_{minutes}min", minutes=minutes)
    cfg = load(cfg_path)
    head, groups = split_export(obs_path, cfg)
    work = folder / f"run_{n}"
    if work.exists():
        import shutil

        shutil.rmtree(work)
    live, out = work / "live.csv", work / "out"
    work.mkdir(parents=True)
    live.write_bytes(head)
    ctx = Follow(live, st_path, cfg, out, every=60.0)
    calls = []
    for g in groups:
        with open(live, "ab") as fh:
            fh.write(g)
        w0, c0 = time.perf_counter(), time.process_time()
        res = follow_step(ctx)
        calls.append({"cpu_s": time.process_time() - c0, "wall_s": time.perf_counter() - w0,
                      "pinned": not res.waiting, "time": str(res.newest)})
    ctx.close()
    done = [c for c in calls if c["pinned"]][1:]  # after the call that pinned the settings
    cpu = np.array([c["cpu_s"] for c in done])
    wall = np.array([c["wall_s"] for c in done])
    hour = 60 // minutes
    result = {"stations": n, "hours": hours, "minutes": minutes, "steps": len(groups), "calls_timed": len(done),
              "cpu_median_s": float(np.median(cpu)), "cpu_p90_s": float(np.percentile(cpu, 90)),
              "cpu_max_s": float(cpu.max()), "wall_median_s": float(np.median(wall)),
              "cpu_first_hour_median_s": float(np.median(cpu[:hour])), "cpu_last_hour_median_s": float(np.median(cpu[-hour:])),
              "budget_rows": int(pd.read_parquet(out / "budget.parquet", columns=["time"]).shape[0])}
    if once:
        result.update(_once(st_path, live, cfg_path, out))
    return result


def _once(st_path: Path, live: Path, cfg_path: Path, out: Path) -> dict:
    """One ``budget --once`` call in a fresh process (with nothing new, then with one step more)."""
    cmd = [sys.executable, "-m", "stationflow", "budget", "--stations", str(st_path), "--obs", str(live),
           "--config", str(cfg_path), "--out", str(out), "--once", "--quiet"]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    w0 = time.perf_counter()
    subprocess.run(cmd, check=True)
    wall = time.perf_counter() - w0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return {"once_nothing_new_wall_s": wall,
            "once_nothing_new_cpu_s": (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime)}


def main(argv: list[str]) -> int:
    n = int(argv[0]) if argv else 300
    hours = float(argv[1]) if len(argv) > 1 else 14.0
    minutes = int(argv[2]) if len(argv) > 2 else 5
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
          f"{time.strftime('%Y-%m-%d')}")
    r = run(n, hours, minutes=minutes)
    print(json.dumps(r, indent=2))
    print(f"one new {minutes}-minute step, {n} stations: CPU median {r['cpu_median_s']:.2f} s, 90th percentile "
          f"{r['cpu_p90_s']:.2f} s, largest {r['cpu_max_s']:.2f} s (first hour {r['cpu_first_hour_median_s']:.2f} s, "
          f"last hour {r['cpu_last_hour_median_s']:.2f} s); budget --once in a fresh process with nothing new: "
          f"{r['once_nothing_new_wall_s']:.2f} s")
    store = ROOT / "benchmarks" / "output" / "follow_results.json"
    store.parent.mkdir(parents=True, exist_ok=True)
    store.write_text(json.dumps(r, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
