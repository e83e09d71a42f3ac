"""Replay a finished export as if a logger were writing it, through the follow mode.

Used by ``stationflow demo --night`` (``make demo-night``) and the tests: the
export's header lines are written first, then its rows one analysis time
(or ``steps`` times) at a time, appended to ``OUT/live/observations.csv``;
after each append one follow call runs (as ``budget --once`` from a timer
would), at the speed the machine allows.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

from ..config import Config


def time_column(header: bytes, cfg: Config) -> int:
    """Position of the time column in the header line (after ``observations.columns`` renaming)."""
    names = [c.strip().strip('"') for c in header.decode("utf-8").rstrip("\r\n").split(cfg["observations"]["delimiter"])]
    mapping = cfg["observations"]["columns"]
    for i, n in enumerate(names):
        if mapping.get(n, n) == "time":
            return i
    raise ValueError("no time column in the header")


def split_export(path: Path, cfg: Config) -> tuple[bytes, list[bytes]]:
    """(the header lines, the rows grouped by time stamp, in file order): the export as a logger writes it."""
    lines = path.read_bytes().splitlines(keepends=True)
    n_head = max([1] + [n for n in cfg["observations"]["skip_lines"]])
    head, body = b"".join(lines[:n_head]), lines[n_head:]
    col = time_column(lines[0], cfg)
    sep = cfg["observations"]["delimiter"].encode()
    groups: list[bytes] = []
    last = None
    for line in body:
        if not line.strip():
            continue
        t = line.split(sep)[col]
        if t != last:
            groups.append(b"")
            last = t
        groups[-1] += line
    return head, groups


def replay(folder: Path, out: Path, *, steps: int = 1, progress: Callable | None = None,
           on_step: Callable | None = None) -> list:
    """Replay ``folder`` (observations.csv, stations.csv, config.toml) through the follow mode into ``out``;
    returns the result of every call."""
    from ..config import load
    from ..follow import Follow, follow_step

    cfg = load(folder / "config.toml")
    head, groups = split_export(folder / "observations.csv", cfg)
    live = out / "live" / "observations.csv"
    live.parent.mkdir(parents=True, exist_ok=True)
    live.write_bytes(head)
    ctx = Follow(live, folder / "stations.csv", cfg, out, every=60.0)
    results = []
    try:
        for i in range(0, len(groups), steps):
            with open(live, "ab") as fh:
                fh.write(b"".join(groups[i:i + steps]))
            res = follow_step(ctx)
            results.append(res)
            if on_step is not None:
                on_step(res)
            if progress is not None:
                progress(f"replaying the night: {min(i + steps, len(groups))} of {len(groups)} times")
    finally:
        ctx.close()
    return results
