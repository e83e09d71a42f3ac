"""Benchmarks: the fitting core and the whole `stationflow budget` run against the physical floor.

Run with ``make bench`` (or ``python benchmarks/run.py [size ...]``).  For each size it generates a
synthetic network (a linear field carried by a turning wind, with a day-night in-situ heating and
cooling cycle, 0.1 K noise, 5 % of values missing at random) as a long CSV and as Parquet under ``benchmarks/output/``, then reports:

- the fitting core (`stationflow.estimate.planes.fit_planes` on Delaunay triangles) with complete data and with 5 %
  missing: station-values per second (input values) and member-values per second (values entering
  the fits: each station is in about six triangles);
- the physical floor: a bare pyarrow parse of the input CSV plus a bare pyarrow write of the output
  table to Parquet;
- the whole run, ``stationflow budget --quiet`` in a fresh process (imports included): wall time,
  peak memory (max RSS) and the ratio to the floor.

Sizes up to :data:`REPEAT_ROWS` input rows time the run and the floor three times, in turn, and
report the best of each (as ``timeit`` does: the least disturbed run) with the medians beside it;
the ratio is best over best.  Larger sizes run once.  Before each timing the previous run's outputs
are removed and the page cache is written out (``os.sync``; neither timed), so that the run, like the
floor, writes new files and no measurement pays for the previous one's output.

Nothing here is asserted; ``tests/test_benchmarks.py`` only checks that the harness runs on ``tiny``.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parent.parent
SIZES = {
    # name: (stations, days, minutes)
    "tiny": (20, 1, 10),
    "100": (100, 7, 5),
    "300x30d": (300, 30, 5),
    "1000": (1000, 7, 10),
    "10000": (10000, 7, 10),
}
DEFAULT = ["100", "300x30d", "1000", "10000"]


def generate(name: str, folder: Path, *, seed: int = 0) -> tuple[Path, Path, Path]:
    """Write stations.csv, observations.csv and observations.parquet for a size (cached)."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    from stationflow.scenarios import synthetic

    n, days, minutes = SIZES[name]
    folder.mkdir(parents=True, exist_ok=True)
    st_path, csv_path, pq_path = folder / "stations.csv", folder / "observations.csv", folder / "observations.parquet"
    if csv_path.exists() and pq_path.exists() and st_path.exists():
        return st_path, csv_path, pq_path
    radius = 10.0 * np.sqrt(n)  # about 17 km between neighbours
    st = synthetic.network(n, radius_km=radius, seed=seed, prefix="B")
    st[["station_id", "latitude", "longitude", "elevation", "sensor_height"]].to_csv(st_path, index=False)
    f = synthetic.LinearField(base=285.0, gx=synthetic.constant(2e-5), gy=synthetic.constant(-1e-5),
                              u=synthetic.ramp([(0, 3.0), (24 * days, -2.0)]), v=synthetic.ramp([(0, 1.0), (24 * days, 4.0)]),
                              source=synthetic.ramp([(12 * k, (0.5 if k % 2 else -0.5) / 3600) for k in range(2 * days + 2)]), horizon_s=days * 86400 + 7200)
    times = pd.date_range("2026-01-01", periods=days * 24 * 60 // minutes, freq=f"{minutes}min", tz="UTC")
    rng = np.random.default_rng(seed)
    parts = []
    for k in range(0, len(times), 288):  # bounded memory while generating
        block = synthetic.sample(f, st, times[k:k + 288], noise=0.1, wind_noise=0.3, seed=seed + k, start=times[0])
        keep = rng.random(len(block)) >= 0.05
        block = block[keep]
        parts.append(pa.table({
            "station_id": pa.array(block["station_id"].to_numpy(), pa.string()),
            "time": pa.array(pd.DatetimeIndex(block["time"]).strftime("%Y-%m-%dT%H:%M:%SZ"), pa.string()),
            "air_temperature": pa.array(np.round(block["air_temperature"].to_numpy(), 2)),
            "wind_speed": pa.array(np.round(block["wind_speed"].to_numpy(), 2)),
            "wind_from_direction": pa.array(np.round(block["wind_from_direction"].to_numpy(), 1)),
        }))
    table = pa.concat_tables(parts)
    pacsv.write_csv(table, csv_path, pacsv.WriteOptions(quoting_style="none"))
    typed = table.set_column(1, "time", pa.compute.cast(pa.compute.strptime(table["time"], "%Y-%m-%dT%H:%M:%SZ", "s", error_is_null=True),
                                                         pa.timestamp("ns", tz="UTC")))
    pq.write_table(typed, pq_path)
    return st_path, csv_path, pq_path


def bench_core(name: str, *, repeats: int = 3) -> dict:
    """fit_planes throughput on triangles: complete data and 5 % missing."""
    from stationflow.estimate.planes import fit_planes
    from stationflow.network.geometry import delaunay_clusters
    from stationflow.scenarios import synthetic

    n, days, minutes = SIZES[name]
    n_t = days * 24 * 60 // minutes
    st = synthetic.network(n, radius_km=10.0 * np.sqrt(n), seed=1)
    x, y = st["x"].to_numpy(), st["y"].to_numpy()
    tri = delaunay_clusters(x, y)
    rng = np.random.default_rng(2)
    vals = 280 + 2e-5 * x[None, :] + rng.normal(0, 0.1, (n_t, n))
    fit_planes(vals[:50], x, y, tri, residuals=False)  # warm-up (first-call set-up costs)
    out = {"clusters": len(tri), "times": n_t}
    for label, miss in (("complete", 0.0), ("missing5", 0.05)):
        v = vals.copy()
        if miss:
            v[rng.random(v.shape) < miss] = np.nan
        best = np.inf
        for _ in range(repeats):
            t0 = time.perf_counter()
            fit_planes(v, x, y, tri, residuals=False)
            best = min(best, time.perf_counter() - t0)
        out[f"core_{label}_s"] = best
        out[f"core_{label}_station_values_per_s"] = n * n_t / best
        out[f"core_{label}_member_values_per_s"] = 3 * len(tri) * n_t / best
    out["core_member_values_per_s"] = out["core_complete_member_values_per_s"]
    return out


def bench_floor(csv_path: Path, out_table: Path) -> float:
    """Bare pyarrow CSV parse of the input plus bare pyarrow Parquet write of the output table."""
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    table = pq.read_table(out_table)
    t0 = time.perf_counter()
    pacsv.read_csv(csv_path)
    pq.write_table(table, out_table.with_suffix(".floor.parquet"))
    t2 = time.perf_counter()
    out_table.with_suffix(".floor.parquet").unlink()
    return t2 - t0


_RUNNER = r"""
import atexit, resource, sys, time
t0 = time.perf_counter()


def report():
    # peak memory of this process: VmHWM belongs to the process image (ru_maxrss can carry over the
    # parent's peak across fork and exec on Linux, which would overstate small runs)
    try:
        peak = int(next(ln.split()[1] for ln in open("/proc/self/status") if ln.startswith("VmHWM:")))
    except (OSError, StopIteration):
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print("__bench__", time.perf_counter() - t0, peak, file=sys.stderr, flush=True)


# at exit, as the command ends the process itself once it is done (see stationflow.cli.main)
atexit.register(report)
from stationflow.cli import main
sys.argv = ["stationflow"] + sys.argv[1:]
main()
"""


def bench_run(st_path: Path, obs_path: Path, out: Path, extra: list[str] | None = None) -> dict:
    """The whole CLI run in a fresh process: wall time (process start included) and peak RSS."""
    cmd = [sys.executable, "-c", _RUNNER, "budget", "--stations", str(st_path), "--obs", str(obs_path),
           "--out", str(out), "--quiet"] + (extra or [])
    t0 = time.perf_counter()
    res = subprocess.run(cmd, capture_output=True, text=True, env={**os.environ, "PYTHONWARNINGS": "ignore"})
    wall = time.perf_counter() - t0
    line = [ln for ln in res.stderr.splitlines() if ln.startswith("__bench__")]
    if res.returncode != 0 or not line:
        raise RuntimeError(f"benchmark run failed ({res.returncode}): {res.stderr[-2000:]}")
    _, _, rss_kb = line[-1].split()
    return {"run_s": wall, "peak_mb": int(rss_kb) / 1024}


def run_suite(names: list[str], folder: Path, *, repeats: int = 3, parquet_large: bool = True) -> list[dict]:
    """Generate, benchmark and return one row per size."""
    rows = []
    for name in names:
        n, days, minutes = SIZES[name]
        st_path, csv_path, pq_path = generate(name, folder / name)
        row = {"size": name, "stations": n, "days": days, "minutes": minutes,
               "input_rows": sum(1 for _ in open(csv_path, "rb")) - 1, "csv_mb": csv_path.stat().st_size / 1e6}
        row.update(bench_core(name, repeats=repeats))
        extra = ["--config", str(_config(folder / name, n))]
        out = folder / name / "out"
        try:
            # run and floor in turn, several times up to REPEAT_ROWS input rows: this machine's timings vary by
            # 15-25 % from one minute to the next, so the best of each (as timeit reports) and the medians are kept
            times = repeats if row["input_rows"] <= REPEAT_ROWS else 1
            runs, floors = [], []
            for _ in range(times):
                _empty(out)
                _settle()
                runs.append(bench_run(st_path, csv_path, out, extra))
                _settle()
                floors.append(bench_floor(csv_path, out / "budget.parquet"))
            row["run_s"] = min(r["run_s"] for r in runs)
            row["peak_mb"] = max(r["peak_mb"] for r in runs)
            row["run_median_s"] = float(np.median([r["run_s"] for r in runs]))
            row["floor_s"] = min(floors)
            row["floor_median_s"] = float(np.median(floors))
            row["repeats"] = times
            row["ratio"] = row["run_s"] / row["floor_s"]
            row["ratio_median"] = row["run_median_s"] / row["floor_median_s"]
            row["output_rows"] = _rows(out / "budget.parquet")
            row["run_station_values_per_s"] = row["input_rows"] / row["run_s"]
        except RuntimeError as exc:  # record the failure (for example out of memory) and go on
            row.update({"run_s": float("nan"), "floor_s": float("nan"), "ratio": float("nan"), "peak_mb": float("nan"),
                        "output_rows": 0, "error": str(exc)[:200]})
        if n < 5000 or parquet_large:
            try:
                _empty(folder / name / "out_pq")
                _settle()
                pq_run = bench_run(st_path, pq_path, folder / name / "out_pq", extra)
                row["run_parquet_s"], row["peak_parquet_mb"] = pq_run["run_s"], pq_run["peak_mb"]
            except RuntimeError as exc:
                row.update({"run_parquet_s": float("nan"), "peak_parquet_mb": float("nan"), "error_parquet": str(exc)[:200]})
        else:
            row["run_parquet_s"] = row["peak_parquet_mb"] = float("nan")
        rows.append(row)
        print(_line(row), flush=True)
    return rows


def _empty(out: Path) -> None:
    """Remove a previous run's outputs (not timed): the floor writes a new file, so the run writes into an
    empty folder too, as a first run does.  Replacing a gigabyte of old outputs costs this machine 2-3 s
    more (freeing their cached pages, then touching reclaimed memory); docs/performance.md describes it."""
    shutil.rmtree(out, ignore_errors=True)


def _settle() -> None:
    """Write out the page cache before a timing, so that neither measurement pays for the other's
    gigabyte of output being flushed in the background (not timed)."""
    if hasattr(os, "sync"):
        os.sync()


#: sizes up to this many input rows are timed ``repeats`` times (best and median reported)
REPEAT_ROWS = 3_000_000


def _config(folder: Path, n: int) -> Path:
    p = folder / "bench.toml"
    chunk = 'chunk = "1D"\n' if n >= 5000 else ""
    p.write_text(f'[budget]\nvertical = "none"\nwindow = "30min"\n{chunk}[qc]\nspatial = {"false" if n >= 5000 else "true"}\n')
    return p


def _rows(path: Path) -> int:
    import pyarrow.parquet as pq

    return pq.ParquetFile(path).metadata.num_rows


HEADER = ("| size | stations x days @ step | input rows | output rows | core M member-values/s (complete / 5 % missing) "
          "| core M station-values/s | run s (CSV): best (median) | floor s: best (median) | run/floor: best (median) "
          "| peak MB | run s (Parquet) | peak MB (Parquet) |")


def _line(r: dict) -> str:
    return (f"| {r['size']} | {r['stations']} x {r['days']} d @ {r['minutes']} min | {r['input_rows']:,} | {r['output_rows']:,} | "
            f"{r['core_complete_member_values_per_s'] / 1e6:.0f} / {r['core_missing5_member_values_per_s'] / 1e6:.0f} | "
            f"{r['core_complete_station_values_per_s'] / 1e6:.1f} | {_best(r, 'run_s', 'run_median_s', 1)} | "
            f"{_best(r, 'floor_s', 'floor_median_s', 2)} | {_best(r, 'ratio', 'ratio_median', 1)} | "
            f"{r['peak_mb']:.0f} | {r['run_parquet_s']:.1f} | {r.get('peak_parquet_mb', float('nan')):.0f} |")


def _best(r: dict, best: str, median: str, digits: int) -> str:
    """'best (median)' when the size was timed more than once, else the one time."""
    if r.get("repeats", 1) > 1 and median in r:
        return f"{r[best]:.{digits}f} ({r[median]:.{digits}f})"
    return f"{r[best]:.{digits}f}"


def plot(rows: list[dict], path: Path) -> Path:
    """Scaling plot: wall time against stations x times (log-log), whole run and fitting core."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    rows = sorted((r for r in rows if np.isfinite(r.get("run_s", np.nan))), key=lambda r: r["input_rows"])
    size = np.array([r["stations"] * r["times"] for r in rows], float)
    fig, ax = plt.subplots(figsize=(6, 4))
    ax.loglog(size, [r["run_s"] for r in rows], "o-", label="whole budget run (CSV input)")
    ax.loglog(size, [r["floor_s"] for r in rows], "s--", label="floor: pyarrow parse + Parquet write")
    ax.loglog(size, [r["core_missing5_s"] for r in rows], "^-", label="fitting core, 5 % missing")
    ref = size / size[0] * rows[0]["run_s"]
    ax.loglog(size, ref, ":", color="grey", label="linear in stations x times")
    ax.set_xlabel("stations x times")
    ax.set_ylabel("seconds")
    ax.legend(fontsize=7)
    ax.set_title("stationflow scaling (2-core machine)", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def main(argv: list[str]) -> int:
    if any(a in ("-h", "--help") for a in argv):
        print(f"usage: python benchmarks/run.py [size ...]  (sizes: {', '.join(SIZES)}; default: {' '.join(DEFAULT)})")
        return 0
    unknown = [a for a in argv if a not in SIZES]
    if unknown:
        print(f"error: unknown benchmark size {unknown[0]!r}; choose from {', '.join(SIZES)}", file=sys.stderr)
        return 2
    names = argv or DEFAULT
    folder = ROOT / "benchmarks" / "output"
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
          f"{time.strftime('%Y-%m-%d')}")
    print(HEADER)
    print("|" + "---|" * 12)
    rows = run_suite(names, folder)
    store = folder / "results.json"
    old = {r["size"]: r for r in json.loads(store.read_text())} if store.exists() else {}
    old.update({r["size"]: r for r in rows})
    store.write_text(json.dumps(list(old.values()), indent=2))
    print(f"scaling plot: {plot(list(old.values()), folder / 'scaling.png')}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
