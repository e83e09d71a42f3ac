"""Observations from any supported source, end to end: find the format, read it, make it canonical.

Takes a path (CSV long or wide, Parquet, netCDF) and the configuration; gives an :class:`IngestResult`.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import IngestError
from .canonical import IngestResult, RawTable, canonicalise, melt_wide
from .fastcsv import read_typed_csv
from .netcdf import load_netcdf
from .parquet import load_parquet
from .stations import read_stations
from .text import read_text_table

log = logging.getLogger(__name__)

_NEEDS_OBS = ("station_id",)


# --------------------------------------------------------------------------
# observations
# --------------------------------------------------------------------------

def _detect_format(path: Path, configured: str) -> str:
    if configured != "auto":
        return configured
    if path.is_dir():
        if any(path.glob("*.parquet")) or any(path.glob("**/*.parquet")):
            return "parquet"
        netcdf = any(q.suffix.lower() in (".nc", ".cdf", ".nc4", ".netcdf") for q in path.iterdir())
        if not netcdf and any(path.glob("*.csv")):
            return "csv"
        return "netcdf"
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return "parquet"
    if suffix in (".nc", ".cdf", ".nc4", ".netcdf"):
        return "netcdf"
    return "csv"


def read_observations(
    path: str | Path,
    config: Config | None = None,
    *,
    stations: pd.DataFrame | None = None,
) -> IngestResult:
    """Read observations (CSV long or wide, Parquet, or netCDF station files).

    ``stations`` is the station table from :func:`read_stations`; when it is
    ``None`` the table is derived from ``latitude``/``longitude`` (and
    ``elevation``) columns of the observations, or from netCDF coordinates.
    """
    cfg = config or Config()
    oc = cfg["observations"]
    p = Path(path)
    if not p.exists():
        raise IngestError(f"{p}: file not found; check the path")
    fmt = _detect_format(p, oc["format"])
    if fmt == "netcdf":
        raw = load_netcdf(p, cfg)
    elif fmt == "parquet":
        raw = load_parquet(p, cfg)
    elif p.is_dir():
        raw = _read_csv_folder(p, cfg, stations)
    else:
        raw = _read_csv(p, cfg, stations)
    return canonicalise(raw, cfg, stations)


def csv_files(folder: Path) -> list[Path]:
    """The CSV files of a folder of exports, in name order (loggers name them by time)."""
    return sorted(q for q in folder.glob("*.csv") if q.is_file())


def _read_csv_folder(folder: Path, cfg: Config, stations: pd.DataFrame | None) -> RawTable:
    """Every CSV file of ``folder`` (in name order, each with its header), as one table."""
    paths = csv_files(folder)
    if not paths:
        raise IngestError(f"{folder}: no .csv files in this folder")
    return join_raw([_read_csv(q, cfg, stations) for q in paths])


def join_raw(parts: list[RawTable]) -> RawTable:
    """Raw tables of several files as one (each row keeps its file and line)."""
    if len(parts) == 1:
        return parts[0]
    first = list(parts[0].frame.columns)
    for part in parts[1:]:
        if list(part.frame.columns) != first:
            raise IngestError(f"{part.sources[0]}: its columns ({', '.join(map(str, part.frame.columns))}) differ from "
                              f"those of {parts[0].sources[0]} ({', '.join(map(str, first))})")
    frame = pd.concat([q.frame for q in parts], ignore_index=True)
    files = np.concatenate([np.full(len(q.frame), q.files, object) if isinstance(q.files, str) else np.asarray(q.files, object)
                            for q in parts])
    wide = None
    if any(q.wide_rows is not None for q in parts):
        wide = np.concatenate([q.wide_rows if q.wide_rows is not None else q.lines for q in parts])
    units = {}
    for q in parts:
        units.update(q.units)
    return RawTable(frame, np.concatenate([np.asarray(q.lines) for q in parts]), files,
                    [r for q in parts for r in q.rejected], sum(q.n_rows for q in parts),
                    [s for q in parts for s in q.sources], units, wide)


def read_csv_lines(source: str, header: bytes, body: bytes, first_line: int, cfg: Config,
                   stations: pd.DataFrame | None, scratch: Path) -> RawTable:
    """New lines of a growing CSV file: ``body`` (whole lines) that start at line ``first_line`` of ``source``,
    read like the whole file would be (``header``: its first line).  Lines and messages name ``source``.

    The lines are copied with the header to a scratch file in ``scratch``, read by the same readers as a
    file, and renumbered.
    """
    import tempfile

    n_body = body.count(b"\n") + (0 if body.endswith(b"\n") or not body else 1)
    oc = cfg["observations"]
    # skip_lines count in the source file; in the scratch file the body starts at line 2
    skip = [n - first_line + 2 for n in oc["skip_lines"] if first_line <= n < first_line + n_body]
    local = cfg.with_values(observations={"skip_lines": skip})
    scratch.mkdir(parents=True, exist_ok=True)
    with tempfile.NamedTemporaryFile("wb", dir=scratch, suffix=".csv", delete=False) as fh:
        fh.write(header if header.endswith(b"\n") else header + b"\n")
        fh.write(body)
        tmp = Path(fh.name)
    try:
        raw = _read_csv(tmp, local, stations)
    finally:
        tmp.unlink(missing_ok=True)
    shift = first_line - 2

    def moved(line):
        return line + shift if line and line > 1 else line

    raw.lines = np.asarray(raw.lines) + shift
    if raw.wide_rows is not None:
        raw.wide_rows = np.asarray(raw.wide_rows) + shift
    raw.rejected = [(source, moved(int(line)) if line is not None else line, reason) for _, line, reason in raw.rejected]
    raw.files = source
    raw.sources = [source]
    return raw


def _read_csv(p: Path, cfg: Config, stations: pd.DataFrame | None) -> RawTable:
    """A CSV file: the typed fast path when the file is clean, else the general text reader."""
    oc = cfg["observations"]
    typed = read_typed_csv(p, cfg, stations)
    if typed is not None:  # a clean file: typed columns straight from pyarrow
        return RawTable(typed, np.arange(2, len(typed) + 2), str(p), [], len(typed), [str(p)])
    table = read_text_table(p, delimiter=oc["delimiter"], skip_lines=oc["skip_lines"], encoding=oc["encoding"],
                            section="observations")
    raw = RawTable(table.cells, table.lines, str(p), list(table.rejected), len(table.lines) + len(table.rejected),
                   [str(p)])
    if oc["layout"] == "long":
        _check_mapped(table.header, oc["columns"], str(p))
    if oc["layout"] == "wide":
        raw.frame, raw.lines, raw.wide_rows = melt_wide(raw.frame, raw.lines, cfg, str(p))
    return raw


def _check_mapped(header: list[str], mapping: dict[str, str], source: str) -> None:
    """Stop when a column named in ``observations.columns`` is not in the file (a misspelling would lose it silently)."""
    missing = [c for c in mapping if c not in header]
    if missing:
        c = missing[0]
        raise IngestError(
            f"{source}: column {c!r} named in observations.columns ({c} = \"{mapping[c]}\") is not in the file; "
            f"its columns are: {', '.join(map(str, header))}"
        )


def read(
    obs_path: str | Path,
    stations_path: str | Path | None = None,
    config: Config | None = None,
) -> IngestResult:
    """Read the station table (optional) and the observations: the ingest stage."""
    cfg = config or Config()
    stations = read_stations(stations_path, cfg) if stations_path is not None else None
    return read_observations(obs_path, cfg, stations=stations)
