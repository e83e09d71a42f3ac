"""A run's outputs appear together or not at all.

Every command writes into a fresh staging folder beside ``--out``
(``.<name>.stationflow-stage-<pid>``) and, when it has finished, swaps it into
place: the previous folder is renamed aside (``.<name>.stationflow-old-<pid>``),
the staging folder renamed to ``--out``, and the old one removed.  A folder
that holds anything stationflow did not write (your own files, or the
working directory itself) is never swapped: there the finished outputs are
moved in one by one, each file atomically, and the previous run's outputs
that the new run did not make are removed.  A run that is interrupted or fails removes its
staging folder and leaves ``--out`` as it was.  A run killed outright
(SIGKILL) leaves a staging folder that the next run in the same place
removes; killed between the two renames, the next run puts the previous
result back.  ``run.json`` says ``"status": "complete"`` in a finished run.
"""

from __future__ import annotations

import contextlib
import os
import re
import shutil
from pathlib import Path
from typing import Iterator

#: the names stationflow writes into an output folder (anything else there is the user's and is kept)
OUTPUT_NAMES = frozenset({
    "run.json", "rejected_rows.csv", "qc_flags.csv", "qc_periods.csv", "qc_overview.png", "clusters.csv",
    "network_map.png", "budget.parquet", "budget.csv", "budget.nc", "report.html", "budget_timeseries.png",
    "budget_map.png", "sensor_offsets.csv", "input",
})


def _siblings(out: Path) -> Iterator[tuple[Path, str, int]]:
    pattern = re.compile(rf"^\.{re.escape(out.name)}\.stationflow-(stage|old)-(\d+)$")
    if not out.parent.is_dir():
        return
    for p in out.parent.iterdir():
        m = pattern.match(p.name)
        if m:
            yield p, m.group(1), int(m.group(2))


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def recover(out: Path) -> None:
    """Tidy what a run killed outright left beside ``out``: put a previous result back, remove partial ones."""
    for path, kind, pid in list(_siblings(out)):
        if _alive(pid):
            continue  # another run is writing there now
        if kind == "old" and not out.exists():
            os.rename(path, out)  # killed between the two renames: the previous result goes back
        else:
            shutil.rmtree(path, ignore_errors=True)


def _ours_only(out: Path) -> bool:
    """True when ``out`` holds nothing but stationflow's outputs and is not (above) the working directory."""
    cwd = Path.cwd().resolve()
    if out.resolve() == cwd or out.resolve() in cwd.parents:
        return False
    return all(p.name in OUTPUT_NAMES for p in out.iterdir())


def publish(stage: Path, out: Path) -> None:
    """Put the finished ``stage`` folder's outputs in place as ``out``."""
    if not out.exists():
        os.rename(stage, out)  # (a file in the way is an OSError the command line reports)
        return
    if out.is_dir() and _ours_only(out):
        old = out.parent / f".{out.name}.stationflow-old-{os.getpid()}"
        os.rename(out, old)
        os.rename(stage, out)
        shutil.rmtree(old, ignore_errors=True)
        return
    if not out.is_dir():
        raise NotADirectoryError(20, "Not a directory", str(out))
    # a folder that is also the user's: replace our outputs file by file, keep everything else; the old
    # run.json goes first and the new one comes last, so a complete run.json always describes the files
    with contextlib.suppress(FileNotFoundError):
        (out / "run.json").unlink()
    new = {p.name for p in stage.iterdir()}
    for name in OUTPUT_NAMES - new:
        stale = out / name
        if stale.is_dir():
            shutil.rmtree(stale, ignore_errors=True)
        elif stale.exists():
            stale.unlink()
    for p in sorted(stage.iterdir(), key=lambda q: q.name == "run.json"):
        target = out / p.name
        if target.is_dir() and p.is_dir():
            shutil.rmtree(target)
        os.replace(p, target)
    shutil.rmtree(stage, ignore_errors=True)


@contextlib.contextmanager
def staged(out: str | Path, *, publish_on: tuple[type[BaseException], ...] = ()) -> Iterator[Path]:
    """Yield a fresh staging folder for the outputs; publish it as ``out`` when the block ends normally.

    ``publish_on``: exceptions after which the folder is still published (a
    run that stops with an error whose message names files written for it).
    Any other exception, including an interrupt, removes the staging folder
    and leaves ``out`` untouched.
    """
    out = Path(out).absolute()
    out.parent.mkdir(parents=True, exist_ok=True)
    recover(out)
    stage = out.parent / f".{out.name}.stationflow-stage-{os.getpid()}"
    shutil.rmtree(stage, ignore_errors=True)
    stage.mkdir()
    try:
        yield stage
    except publish_on:
        _publish_or_clean(stage, out)
        raise
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    else:
        _publish_or_clean(stage, out)


def _publish_or_clean(stage: Path, out: Path) -> None:
    try:
        publish(stage, out)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
