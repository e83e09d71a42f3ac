"""Read station metadata and observations into the canonical tidy form.

The result of :func:`read_observations` is an :class:`IngestResult`:

- ``observations``: one row per (``station_id``, ``time``), ``time`` a UTC
  timestamp, one float column per variable named by its canonical name, in
  SI units (K, m s-1, degree, %, Pa); user scalars keep their declared unit;
- ``stations``: ``station_id``, ``latitude`` and ``longitude`` [degree,
  WGS84], ``elevation`` [m above sea level], ``sensor_height`` [m above
  ground, NaN when not given];
- ``rejected``: ``file``, ``line`` (1-based; the header is line 1; for
  Parquet and netCDF the 1-based record number) and ``reason`` for every row
  that could not be used;
- ``accounting``: ``rows_read`` = ``rows_accepted`` + ``rows_rejected``
  (data rows; header, skipped and blank lines are not rows), and
  ``duplicates_collapsed`` (identical repeats, counted as accepted).

Row problems never stop the run; file problems raise :class:`IngestError`
with one line that names the file, what is wrong and how to fix it.
"""

from __future__ import annotations

import contextlib
import csv
import datetime as _dt
import io
import logging
import mmap
import re
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd

from . import variables as V
from .config import Config
from .errors import ConfigError, IngestError

log = logging.getLogger(__name__)

_NEEDS_OBS = ("station_id",)
_TZ_SUFFIX = r"(?:[zZ]|[+-]\d{2}(?::?\d{2})?)$"
_MAX_REASON_VALUE = 40


@dataclass
class TextTable:
    """Raw string cells of a delimited file and the source line of each row."""

    path: str
    header: list[str]
    cells: pd.DataFrame  # all columns as strings
    lines: np.ndarray  # 1-based source line of each row
    rejected: list[tuple[str, int, str]] = field(default_factory=list)


@dataclass
class IngestResult:
    """Canonical observations, the station table and the row accounting."""

    observations: pd.DataFrame
    stations: pd.DataFrame
    rejected: pd.DataFrame
    accounting: dict[str, int]
    units: dict[str, str]
    sources: list[str]
    ignored_columns: list[str] = field(default_factory=list)
    reading: dict[str, str] = field(default_factory=dict)  # how the file was read (time layout, zone): for run.json

    @property
    def variables(self) -> list[str]:
        """Names of the variable columns."""
        return [c for c in self.observations.columns if c not in V.ID_COLUMNS]


# --------------------------------------------------------------------------
# delimited text
# --------------------------------------------------------------------------

@contextlib.contextmanager
def _file_errors(p: Path):
    """Turn the operating system's errors on opening or reading ``p`` into one-line :class:`IngestError` s."""
    try:
        yield
    except FileNotFoundError:
        raise IngestError(f"{p}: file not found; check the path") from None
    except IsADirectoryError:
        raise IngestError(f"{p}: is a folder, expected a file") from None
    except OSError as exc:
        raise IngestError(f"{p}: cannot read the file ({exc.strerror})") from None


def _read_bytes(path: str | Path) -> bytes:
    p = Path(path)
    with _file_errors(p):
        return p.read_bytes()


def _map_bytes(path: str | Path):
    """The file's bytes as a read-only memory map (``b""`` for an empty file), errors as :func:`_read_bytes`.

    The map reads the page cache in place: no copy of a 100 MB file into fresh memory (measured 0.1-0.2 s
    on the benchmark machine).  It supports ``find``, slicing and the buffer protocol (for pyarrow).
    """
    p = Path(path)
    with _file_errors(p), open(p, "rb") as fh:
        try:
            return mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
        except (ValueError, OSError):  # empty, or a file that cannot be mapped (a pipe): read it
            return fh.read()


def read_text_table(
    path: str | Path,
    *,
    delimiter: str = ",",
    skip_lines: list[int] | tuple[int, ...] = (),
    encoding: str = "utf-8",
    section: str = "observations",
) -> TextTable:
    """Read a delimited text file into string cells, keeping source line numbers.

    Lines with the wrong number of fields or bytes that are not valid text
    are rejected with their line number; everything else is returned as
    strings for the caller to parse.  Blank lines and ``skip_lines`` are not
    rows.  Vectorised over lines with numpy; only rejected lines are looked
    at one by one.
    """
    name = str(path)
    data = _read_bytes(path)
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    rejected: list[tuple[str, int, str]] = []
    enc = encoding.lower().replace("_", "-")
    if enc not in ("utf-8", "utf8"):
        try:
            data = data.decode(encoding).encode("utf-8")
        except LookupError:
            raise ConfigError(f"{section}.encoding = {encoding!r} is not a known text encoding") from None
        except UnicodeDecodeError as exc:
            raise IngestError(f"{name}: not valid {encoding} text ({exc.reason}); set [{section}] encoding") from None
    if not data.strip():
        raise IngestError(f"{name}: the file is empty; expected a header line and data rows")
    arr = np.frombuffer(data, np.uint8)
    nl = np.flatnonzero(arr == 10)
    starts = np.concatenate([[0], nl + 1])
    ends = np.concatenate([nl, [arr.size]])
    if starts[-1] >= arr.size:
        starts, ends = starts[:-1], ends[:-1]
    cr = (ends > starts) & (arr[np.maximum(ends - 1, 0)] == 13)
    ends_c = ends - cr
    n_lines = starts.size
    lineno = np.arange(1, n_lines + 1)
    # blank lines: nothing but spaces/tabs (only lines that start with one need a closer look)
    length = ends_c - starts
    blank = length == 0
    first = np.where(length > 0, arr[np.minimum(starts, arr.size - 1)], 0)
    for i in np.flatnonzero((first == 32) | (first == 9)):
        blank[i] = not data[starts[i]:ends_c[i]].strip()
    skip = np.zeros(n_lines, bool)
    if skip_lines:
        idx = np.asarray([n - 1 for n in skip_lines if 0 < n <= n_lines], dtype=int)
        skip[idx] = True
    candidates = np.flatnonzero(~blank & ~skip)
    if candidates.size == 0:
        raise IngestError(f"{name}: no header line found (every line is blank or skipped)")
    h = candidates[0]
    header_text = data[starts[h]:ends_c[h]]
    try:
        header_str = header_text.decode("utf-8")
    except UnicodeDecodeError:
        raise IngestError(f"{name}: line {h + 1} (header) is not valid UTF-8 text; set [{section}] encoding") from None
    try:
        header = [c.strip() for c in next(csv.reader([header_str.rstrip("\r")], delimiter=delimiter))]
    except (csv.Error, StopIteration):
        raise IngestError(f"{name}: line {h + 1} (header) cannot be read as delimited text") from None
    if len(header) == 1:
        for other in (";", "\t", ",", "|"):
            if other != delimiter and other in header_str:
                shown = {"\t": "\\t"}.get(other, other)
                raise IngestError(
                    f"{name}: the header has one column but contains {shown!r}; "
                    f"set [{section}] delimiter = \"{shown}\" in the configuration"
                )
    if any(c == "" for c in header):
        raise IngestError(f"{name}: line {h + 1} (header) has an empty column name")
    dupes = sorted({c for c in header if header.count(c) > 1})
    if dupes:
        raise IngestError(f"{name}: the header repeats column(s) {', '.join(dupes)}; column names must be unique")
    is_row = ~blank & ~skip
    is_row[h] = False
    # bytes that are not valid UTF-8: find the lines (error path only)
    try:
        data.decode("utf-8")
    except UnicodeDecodeError:
        for i in np.flatnonzero(is_row):
            try:
                data[starts[i]:ends[i]].decode("utf-8")
            except UnicodeDecodeError:
                is_row[i] = False
                rejected.append((name, int(i + 1), f"not valid UTF-8 text (set [{section}] encoding)"))
    # count fields per line from the delimiter positions, honouring double quotes
    pos = np.flatnonzero(arr == ord(delimiter))
    line_of = np.searchsorted(starts, pos, side="right") - 1
    if data.find(b'"') >= 0:
        qpos = np.flatnonzero(arr == 34)
        # quotes before each delimiter within its line: odd means the delimiter is inside a quoted field
        before = np.searchsorted(qpos, pos) - np.searchsorted(qpos, starts[line_of])
        keep = before % 2 == 0
        pos, line_of = pos[keep], line_of[keep]
    n_fields = np.bincount(line_of, minlength=n_lines) + 1
    crpos = np.flatnonzero(arr == 13)
    cr_line = np.searchsorted(starts, crpos, side="right") - 1
    inner_cr = crpos < ends_c[cr_line]
    stray = np.zeros(n_lines, bool)
    stray[cr_line[inner_cr]] = True
    stray_cr = is_row & stray
    for i in np.flatnonzero(stray_cr):
        rejected.append((name, int(i + 1), "a carriage-return character inside the line (mixed line endings?)"))
    is_row &= ~stray_cr
    wrong = is_row & (n_fields != len(header))
    for i in np.flatnonzero(wrong):
        rejected.append((name, int(i + 1), f"expected {len(header)} fields, found {int(n_fields[i])} (check [{section}] delimiter)"))
    is_row &= ~wrong
    rows = np.flatnonzero(is_row)
    cells = _parse_rows(data, arr, starts, ends, rows, header, delimiter)
    if len(cells) != rows.size:  # quoting the fast path could not follow
        cells = _parse_rows_python(data, starts, ends, rows, header, delimiter)
    return TextTable(name, header, cells, lineno[rows], rejected)


def _parse_rows(data, arr, starts, ends, rows, header, delimiter) -> pd.DataFrame:
    import pyarrow as pa
    import pyarrow.csv as pacsv

    if rows.size == 0:
        return pd.DataFrame({c: pd.Series([], dtype="str") for c in header})
    # keep the bytes of the selected lines, each with its newline
    if rows[-1] - rows[0] + 1 == rows.size:  # one contiguous block of lines: no copy by mask
        body = data[starts[rows[0]]:min(ends[rows[-1]] + 1, arr.size)]
    else:
        keep_line = np.zeros(starts.size, bool)
        keep_line[rows] = True
        lengths = np.minimum(ends + 1, arr.size) - starts
        keep = np.repeat(keep_line, lengths)
        body = arr[: keep.size][keep].tobytes()
    if not body.endswith(b"\n"):
        body += b"\n"
    try:
        table = pacsv.read_csv(
            io.BytesIO(body),
            read_options=pacsv.ReadOptions(column_names=header, use_threads=True, block_size=1 << 24),
            parse_options=pacsv.ParseOptions(delimiter=delimiter, newlines_in_values=False, ignore_empty_lines=False),
            convert_options=pacsv.ConvertOptions(
                column_types={c: pa.string() for c in header},
                strings_can_be_null=False, quoted_strings_can_be_null=False, null_values=[],
            ),
        )
    except pa.ArrowInvalid:
        return pd.DataFrame({c: [] for c in header})
    return table.to_pandas(types_mapper={pa.string(): pd.StringDtype("pyarrow")}.get)


def _parse_rows_python(data, starts, ends, rows, header, delimiter) -> pd.DataFrame:
    """Slow path, one line at a time, used only when quoting defeats the fast parser."""
    parsed = []
    for i in rows:
        line = data[starts[i]:ends[i]].decode("utf-8").rstrip("\r")
        try:
            cells = next(csv.reader([line], delimiter=delimiter))
        except (csv.Error, StopIteration):
            cells = line.split(delimiter)
        parsed.append((cells + [""] * len(header))[: len(header)])
    return pd.DataFrame(parsed, columns=header, dtype="string")


# --------------------------------------------------------------------------
# shared parsing helpers
# --------------------------------------------------------------------------

def _clip(text: object) -> str:
    s = str(text)
    return s if len(s) <= _MAX_REASON_VALUE else s[: _MAX_REASON_VALUE - 3] + "..."


def _as_text(col: pd.Series) -> pd.Series:
    return col.astype("string").str.strip()


def parse_numbers(col: pd.Series, missing: set[str]) -> tuple[np.ndarray, np.ndarray]:
    """Parse a column to float. Returns (values, bad) with NaN for missing.

    ``bad`` marks cells that are present but not a finite number.
    """
    if pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        x = col.to_numpy(dtype=float, na_value=np.nan)
        return x, np.isinf(x)
    s = _as_text(col)
    absent = s.isna() | (s == "") | s.isin(missing)
    absent = absent.fillna(True).to_numpy(bool)
    x = pd.to_numeric(s.mask(absent), errors="coerce").to_numpy(float, na_value=np.nan)
    bad = ~absent & ~np.isfinite(x)
    x[bad] = np.nan
    return x, bad


def is_utc(name: str) -> bool:
    """True when the time-zone setting ``name`` means UTC ('UTC', 'Z', 'GMT', '+00:00', ...)."""
    tz = _timezone(name)
    return isinstance(tz, _dt.timezone) and tz.utcoffset(None) == _dt.timedelta(0)


def _timezone(name: str) -> _dt.tzinfo:
    m = re.fullmatch(r"(?:UTC)?\s*([+-])(\d{1,2})(?::?(\d{2}))?", name.strip())
    if m:
        sign = 1 if m.group(1) == "+" else -1
        off = _dt.timedelta(hours=int(m.group(2)), minutes=int(m.group(3) or 0))
        return _dt.timezone(sign * off)
    if name.strip().upper() in ("UTC", "Z", "GMT"):
        return _dt.timezone.utc
    try:
        return ZoneInfo(name.strip())
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError(
            f"observations.timezone = {name!r} is not an IANA time zone (like 'Europe/Vienna') "
            "or a fixed offset (like '+08:00')"
        ) from None


def parse_times(
    frame: pd.DataFrame,
    *,
    time_column: str | None,
    time_columns: list[str],
    time_format: str,
    timezone: str,
    station: pd.Series,
    source: str = "observations",
) -> tuple[pd.Series, np.ndarray, list[str | None], str]:
    """Parse times to UTC. Returns (times, bad_mask, reasons per bad row, layout used).

    Without ``time_format`` the layout is found from the data
    (:func:`stationflow.times.detect_layout`: ISO 8601 or a common
    spreadsheet/logger layout, day-first against month-first settled by the
    data).
    Naive times are local times in ``timezone``.  At a daylight-saving
    fall-back, an ambiguous local time is resolved from the station's order
    in the file (first occurrence summer time, second standard time); if
    that cannot be told the row is rejected, as are local times that do not
    exist (spring-forward gap).
    """
    n = len(frame)
    reasons: list[str | None] = [None] * n
    layout = time_format or "ISO8601"
    if time_columns:
        layout = "columns: " + ", ".join(time_columns)
        parts = {}
        for key, colname in zip(("year", "month", "day", "hour", "minute", "second"), time_columns):
            parts[key] = pd.to_numeric(_as_text(frame[colname]), errors="coerce")
        for key in ("hour", "minute", "second"):
            parts.setdefault(key, pd.Series(0, index=frame.index))
        comp = pd.DataFrame(parts).astype(float)
        whole = comp.notna().all(axis=1) & (comp.fillna(0) % 1 == 0).all(axis=1)
        naive = pd.to_datetime(comp.where(whole), errors="coerce")
        hour24 = whole & (comp["hour"] == 24)  # 24:00 means midnight of the next day
        if hour24.any():
            c2 = comp.copy()
            c2.loc[hour24, "hour"] = 0
            naive = naive.where(~hour24, pd.to_datetime(c2.where(hour24), errors="coerce") + pd.Timedelta(days=1))
        aware_mask = np.zeros(n, bool)
        aware = pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns, UTC]")
    else:
        col = frame[time_column]
        if isinstance(col.dtype, pd.DatetimeTZDtype):
            t = col.dt.tz_convert("UTC")
            missing_t = t.isna().to_numpy()
            reasons_t: list[str | None] = [None] * n
            for i in np.flatnonzero(missing_t):
                reasons_t[i] = "time is missing"
            return t, missing_t, reasons_t, "ISO8601"
        if pd.api.types.is_datetime64_dtype(col.dtype):
            naive = col
            aware_mask = np.zeros(n, bool)
            aware = pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns, UTC]")
        else:
            text = _as_text(col)
            aware_mask = text.str.contains(_TZ_SUFFIX, regex=True).fillna(False).to_numpy(bool)
            if not time_format and not aware_mask.all():
                from .times import detect_layout

                layout = detect_layout(text.where(~aware_mask), station)
            fmt = layout
            naive = pd.to_datetime(text.where(~aware_mask), errors="coerce", format=fmt)
            if aware_mask.any():
                aware = pd.to_datetime(text.where(aware_mask), errors="coerce", utc=True,
                                       format=time_format or "ISO8601")
            else:
                aware = pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns, UTC]")
    if getattr(naive.dt, "tz", None) is not None:
        naive = naive.dt.tz_localize(None)
    out_of_range = (naive.notna() & ((naive.dt.year < 1900) | (naive.dt.year > 2200))).to_numpy(bool)
    if aware_mask.any():
        aw = aware.notna() & ((aware.dt.year < 1900) | (aware.dt.year > 2200))
        out_of_range = out_of_range | aw.to_numpy(bool)
        aware = aware.where(~aw)
    for i in np.flatnonzero(out_of_range):
        reasons[i] = "time is outside the years 1900-2200"
    naive = naive.where(~pd.Series(out_of_range, index=naive.index)).astype("datetime64[ns]")
    tz = _timezone(timezone)
    out = pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns, UTC]")
    nav = naive.notna().to_numpy() & ~aware_mask
    if isinstance(tz, _dt.timezone):
        out[nav] = (naive[nav] - pd.Timedelta(tz.utcoffset(None))).dt.tz_localize("UTC")
    elif nav.any():
        loc_nat = naive.dt.tz_localize(tz, ambiguous="NaT", nonexistent="NaT")
        loc_dst = naive.dt.tz_localize(tz, ambiguous=np.ones(n, bool), nonexistent="NaT")
        nonexistent = nav & loc_dst.isna().to_numpy()
        ambiguous = nav & loc_nat.isna().to_numpy() & ~nonexistent
        resolved = loc_nat.copy()
        if ambiguous.any():
            _check_order_at_fall_back(naive, station, ambiguous, source)
            is_dst, unresolved = _resolve_ambiguous(naive, station, ambiguous)
            ok = ambiguous & ~unresolved
            flags = np.where(ok, is_dst, True)
            fixed = naive.dt.tz_localize(tz, ambiguous=flags, nonexistent="NaT")
            resolved[ok] = fixed[ok]
            for i in np.flatnonzero(unresolved):
                reasons[i] = (f"local time {naive.iloc[i]} occurs twice at the daylight-saving change "
                              "and the station's time order does not tell which is meant")
        for i in np.flatnonzero(nonexistent):
            reasons[i] = f"local time {naive.iloc[i]} does not exist in {timezone} (daylight-saving gap)"
        out[nav] = resolved[nav].dt.tz_convert("UTC")
    out[aware_mask] = aware[aware_mask]
    bad = out.isna().to_numpy()
    for i in np.flatnonzero(bad):
        if reasons[i] is None:
            if time_columns:
                vals = "/".join(_clip(frame[c].iloc[i]) for c in time_columns)
                reasons[i] = f"cannot build a time from {'/'.join(time_columns)} = {vals}"
            else:
                raw = frame[time_column].iloc[i]
                reasons[i] = ("time is missing" if (pd.isna(raw) or str(raw).strip() == "")
                              else f"cannot parse time {_clip(raw)!r}")
    return out, bad, reasons, layout


def _check_order_at_fall_back(naive: pd.Series, station: pd.Series, ambiguous: np.ndarray, source: str) -> None:
    """Stop when a station's local times are out of order around a fall-back hour (file order cannot resolve it).

    In time order a station's naive local times go back once per clock
    change, by at most the change, at the repeated hour.  Any other step back means the rows
    are not in time order, and reading the repeated hour from file order
    would give wrong times silently.
    """
    frame = pd.DataFrame({"s": station.to_numpy(), "t": naive.to_numpy()})
    amb = frame[ambiguous]
    changes = amb.assign(d=amb["t"].dt.date).groupby("s", sort=False)["d"].nunique()  # fall-backs per station
    frame = frame[frame["s"].isin(changes.index) & frame["t"].notna()]
    step = frame.groupby("s", sort=False)["t"].diff()
    back = step < pd.Timedelta(0)
    per_station = back.groupby(frame["s"], sort=False).sum()
    large = (back & (step < -pd.Timedelta(hours=2))).groupby(frame["s"], sort=False).sum()
    bad = per_station[(per_station > changes.reindex(per_station.index).fillna(0)) | (large > 0)]
    if len(bad):
        first = naive[ambiguous].min()
        raise IngestError(
            f"{source}: station {bad.index[0]!r} has local times out of time order around the daylight-saving change "
            f"({first:%Y-%m-%d %H:%M} and the hour after it occur twice), so the file order cannot tell which is which; "
            "give the times with their UTC offset (for example 2026-10-25T02:30+01:00) or sort each station's rows by time"
        )


def _resolve_ambiguous(naive: pd.Series, station: pd.Series, ambiguous: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Decide summer (True) or standard time for ambiguous local times.

    Within one station, in file order: the first occurrence of an ambiguous
    local time is summer time and the second standard time.  A single
    occurrence is summer time when the station's next report goes back in
    local time, standard time when its previous report was later; else
    unresolved.
    """
    n = len(naive)
    frame = pd.DataFrame({"s": station.to_numpy(), "t": naive.to_numpy(), "pos": np.arange(n)})
    occ = frame[ambiguous].groupby(["s", "t"], sort=False).cumcount().to_numpy()
    cnt = frame[ambiguous].groupby(["s", "t"], sort=False)["pos"].transform("size").to_numpy()
    is_dst = np.ones(n, bool)
    unresolved = np.zeros(n, bool)
    idx = np.flatnonzero(ambiguous)
    is_dst[idx] = occ == 0
    unresolved[idx[occ >= 2]] = True
    single = idx[cnt == 1]
    if single.size:
        g = frame.groupby("s", sort=False)["t"]
        nxt = g.shift(-1).to_numpy()
        prv = g.shift(1).to_numpy()
        t = frame["t"].to_numpy()
        back_after = pd.notna(nxt[single]) & (nxt[single] < t[single])
        back_before = pd.notna(prv[single]) & (prv[single] > t[single])
        is_dst[single] = back_after
        unresolved[single] = ~(back_after ^ back_before)
    return is_dst, unresolved


# --------------------------------------------------------------------------
# stations
# --------------------------------------------------------------------------

def _rename(columns: list[str], mapping: dict[str, str]) -> dict[str, str]:
    return {c: mapping.get(c, c) for c in columns}


def read_stations(path: str | Path, config: Config | None = None) -> pd.DataFrame:
    """Read the stations CSV into ``station_id, latitude, longitude, elevation, sensor_height``.

    Coordinates are degrees (WGS84), elevation metres above sea level,
    sensor height metres above ground.  Any problem in this small file is
    a file-level :class:`IngestError` naming the line.
    """
    cfg = config or Config()
    sc = cfg["stations"]
    table = read_text_table(path, delimiter=sc["delimiter"], skip_lines=sc["skip_lines"],
                            encoding=sc["encoding"], section="stations")
    if table.rejected:
        f, line, reason = table.rejected[0]
        raise IngestError(f"{f}: line {line}: {reason}")
    cells = table.cells.rename(columns=_rename(table.header, sc["columns"]))
    for req in ("station_id", "latitude", "longitude"):
        if req not in cells:
            raise IngestError(
                f"{table.path}: no column {req!r} (columns are: {', '.join(table.header)}); "
                f"map yours in [stations.columns], for example MyName = \"{req}\""
            )
    if len(cells) == 0:
        raise IngestError(f"{table.path}: no station rows after the header")
    out = pd.DataFrame({"station_id": _as_text(cells["station_id"]).astype(str)})
    for name in ("latitude", "longitude", "elevation", "sensor_height"):
        if name not in cells:
            out[name] = np.nan
            continue
        x, bad = parse_numbers(cells[name], set())
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise IngestError(f"{table.path}: line {table.lines[i]}: {name} {_clip(cells[name].iloc[i])!r} is not a number")
        out[name] = x
    return _validate_stations(out, table.path, table.lines)


def _validate_stations(out: pd.DataFrame, path: str, lines: np.ndarray) -> pd.DataFrame:
    empty = out["station_id"].isin(["", "nan", "<NA>"]).to_numpy()
    if empty.any():
        raise IngestError(f"{path}: line {lines[np.flatnonzero(empty)[0]]}: station_id is empty")
    for name, lo, hi in (("latitude", -90, 90), ("longitude", -180, 360)):
        x = out[name].to_numpy()
        bad = ~np.isfinite(x) | (x < lo) | (x > hi)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise IngestError(
                f"{path}: line {lines[i]}: {name} {x[i]:g} of station {out['station_id'].iloc[i]!r} "
                f"is outside [{lo}, {hi}] degrees (give decimal degrees, WGS84)"
            )
    out["longitude"] = ((out["longitude"] + 180.0) % 360.0) - 180.0
    el = out["elevation"].to_numpy()
    if np.any(np.isfinite(el) & ((el < -500) | (el > 9000))):
        i = int(np.flatnonzero(np.isfinite(el) & ((el < -500) | (el > 9000)))[0])
        raise IngestError(f"{path}: line {lines[i]}: elevation {el[i]} m is not plausible (expected metres above sea level)")
    dup = out.duplicated("station_id", keep=False)
    if dup.any():
        same = out[dup].drop_duplicates()
        if same["station_id"].duplicated().any():
            sid = same["station_id"][same["station_id"].duplicated()].iloc[0]
            raise IngestError(f"{path}: station {sid!r} is listed twice with different coordinates")
        out = out.drop_duplicates("station_id")
    return out.reset_index(drop=True)


# --------------------------------------------------------------------------
# observations
# --------------------------------------------------------------------------

def _detect_format(path: Path, configured: str) -> str:
    if configured != "auto":
        return configured
    if path.is_dir():
        if any(path.glob("*.parquet")) or any(path.glob("**/*.parquet")):
            return "parquet"
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
        frame, lines, rejected, source_units, n_rows, sources = _load_netcdf(p, cfg)
        files = np.asarray(frame.pop("__file__"))
    else:
        if fmt == "parquet":
            frame, lines, rejected, n_rows, sources = _load_parquet(p, cfg)
            source_units = {}
        else:
            sources = [str(p)]
            source_units = {}
            typed = _read_typed_csv(p, cfg, stations)
            if typed is not None:  # a clean file: typed columns straight from pyarrow
                frame, lines, rejected = typed, np.arange(2, len(typed) + 2), []
                n_rows = len(frame)
            else:
                table = read_text_table(p, delimiter=oc["delimiter"], skip_lines=oc["skip_lines"],
                                        encoding=oc["encoding"], section="observations")
                frame, lines, rejected = table.cells, table.lines, list(table.rejected)
                n_rows = len(lines) + len(rejected)
                if oc["layout"] == "long":
                    _check_mapped(table.header, oc["columns"], str(p))
                if oc["layout"] == "wide":
                    frame, lines = _melt_wide(frame, lines, cfg, str(p))
        files = str(sources[0]) if sources else str(p)  # one file: one name for every row
    return _canonicalise(frame, lines, files, rejected, n_rows, sources, source_units, cfg, stations)


def _check_mapped(header: list[str], mapping: dict[str, str], source: str) -> None:
    """Stop when a column named in ``observations.columns`` is not in the file (a misspelling would lose it silently)."""
    missing = [c for c in mapping if c not in header]
    if missing:
        c = missing[0]
        raise IngestError(
            f"{source}: column {c!r} named in observations.columns ({c} = \"{mapping[c]}\") is not in the file; "
            f"its columns are: {', '.join(map(str, header))}"
        )


def _read_typed_csv(p: Path, cfg: Config, stations: pd.DataFrame | None) -> pd.DataFrame | None:
    """Fast path for a clean long CSV: one pyarrow pass with typed columns, or None.

    Taken only when the general reader could not reject anything for the
    way the text is written: UTF-8, no quotes after the header, no carriage
    returns or blank lines (so row ``i`` is on line ``i + 2``), one time
    column with a zone suffix (or naive times in UTC / a fixed offset),
    plain numbers, a stations file.  Any parse failure falls back to the
    general reader, which then names the file, line and reason.  Values
    that the rules below would reject (infinite numbers, times outside
    1900-2200, empty or padded station ids) also send the file there.
    """
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.csv as pacsv

    oc = cfg["observations"]
    enc = oc["encoding"].lower().replace("_", "-")
    if (stations is None or oc["layout"] != "long" or oc["time_columns"] or oc["skip_lines"] or oc["time_format"]
            or enc not in ("utf-8", "utf8") or len(oc["delimiter"]) != 1):
        return None
    data = _map_bytes(p)
    start = 3 if data[:3] == b"\xef\xbb\xbf" else 0  # a byte-order mark
    head_end = data.find(b"\n", start)
    # blank lines need no search of their own (a two-byte search is slow where every line ends in one byte):
    # pyarrow reads one as a row of empty fields, and its empty station id and missing time send the file
    # to the general reader below
    if head_end <= start or data.find(b"\r") >= 0 or data.find(b'"', head_end) >= 0:
        return None
    try:
        header = [c.strip() for c in next(csv.reader([data[start:head_end].decode("utf-8")], delimiter=oc["delimiter"]))]
    except (UnicodeDecodeError, csv.Error, StopIteration):
        return None
    if len(header) < 3 or len(set(header)) != len(header) or any(c == "" for c in header):
        return None
    if any(c not in header for c in oc["columns"]):
        return None  # a mapped column is missing: the general reader says so
    names = _rename(header, oc["columns"])
    canon = list(names.values())
    if "station_id" not in canon or "time" not in canon or {"latitude", "longitude"} & set(canon):
        return None
    var_cols, ignored = _variable_columns(canon, oc)
    if not var_cols or ("wind_from_direction" in var_cols and oc["units"].get("wind_from_direction", "degree") == "compass"):
        return None
    src = {v: k for k, v in names.items()}
    tz = _timezone(oc["timezone"])
    missing = [""] + [str(m) for m in oc["missing_values"]]
    types = {src["station_id"]: pa.dictionary(pa.int32(), pa.string()), **{src[v]: pa.float64() for v in var_cols}}

    def parse(time_type):
        return pacsv.read_csv(
            pa.BufferReader(pa.py_buffer(data)[head_end + 1:]),  # the rows after the header, not copied
            read_options=pacsv.ReadOptions(column_names=header, block_size=1 << 24),
            parse_options=pacsv.ParseOptions(delimiter=oc["delimiter"], quote_char=False, ignore_empty_lines=False),
            convert_options=pacsv.ConvertOptions(column_types={**types, src["time"]: time_type}, null_values=missing,
                                                 strings_can_be_null=False, include_columns=[src[c] for c in
                                                                                            ["station_id", "time"] + var_cols]))
    try:
        table = parse(pa.timestamp("ns", tz="UTC"))
        naive = False
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        if not isinstance(tz, _dt.timezone):
            return None  # local times in a zone with daylight saving: the general reader resolves them
        try:
            table = parse(pa.timestamp("ns"))
            naive = True
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            return None
    if table.num_rows != _count_newlines(data, head_end + 1) + (0 if data[-1:] == b"\n" else 1):
        return None
    sid = table[src["station_id"]].combine_chunks()
    words = sid.dictionary.to_pylist() if isinstance(sid, pa.DictionaryArray) else None
    if words is None or sid.null_count or any(w != w.strip() or not w for w in words):
        return None
    t = table[src["time"]]
    if t.null_count:
        return None
    span = pc.min_max(t)  # the earliest and latest times tell whether any is outside 1900-2200
    if span["min"].as_py().year < 1900 or span["max"].as_py().year > 2200:
        return None
    ns = t.to_numpy()  # datetime64[ns] in UTC (or local when naive): one copy, joining the parser's blocks
    if naive:
        ns = ns - np.timedelta64(int(tz.utcoffset(None).total_seconds() * 1e9), "ns")
    cols = {"station_id": pd.Categorical.from_codes(sid.indices.to_numpy(zero_copy_only=False), categories=words),
            "time": pd.DatetimeIndex(ns, dtype="datetime64[ns, UTC]")}  # as UTC, without a localising pass
    for v in var_cols:
        col = table[src[v]]
        x = col.to_numpy()
        x = np.asarray(x, float)
        if np.count_nonzero(~np.isfinite(x)) != col.null_count:  # (the missing values are NaN here)
            return None  # 'nan' / 'inf' written as numbers: the general reader explains them row by row
        cols[v] = x
    # the columns as they are (copy=False): setting them one by one copied each (0.1-0.2 s for 2.5 M rows)
    frame = pd.DataFrame(cols, copy=False)
    frame.attrs["ignored_columns"] = ignored  # read past, not parsed
    return frame


def _count_newlines(data, start: int) -> int:
    """Number of ``\\n`` bytes in ``data[start:]`` (a memory map or bytes), in blocks of 16 MiB."""
    view = np.frombuffer(data, np.uint8)
    block = 1 << 24
    return sum(int(np.count_nonzero(view[a:a + block] == 10)) for a in range(start, view.size, block))


def _variable_columns(columns: list[str], oc) -> tuple[list[str], list[str]]:
    """(variable columns, ignored columns) among canonical column names."""
    time_cols = oc["time_columns"]
    mapped_targets = set(oc["columns"].values())
    coord_cols = {"latitude", "longitude", "elevation", "sensor_height"}
    var_cols = [c for c in columns
                if c not in V.ID_COLUMNS and c not in time_cols and c not in coord_cols and c != "__file__"
                and (c in V.CANONICAL or c in mapped_targets or c == oc["wide_variable"] and oc["layout"] == "wide")]
    ignored = [c for c in columns if c not in var_cols and c not in V.ID_COLUMNS
               and c not in time_cols and c not in coord_cols and c != "__file__"]
    return var_cols, ignored


def _melt_wide(frame: pd.DataFrame, lines: np.ndarray, cfg: Config, path: str):
    oc = cfg["observations"]
    mapping = oc["columns"]
    renamed = frame.rename(columns=_rename(list(frame.columns), mapping))
    time_cols = oc["time_columns"] or ["time"]
    missing = [c for c in time_cols if c not in renamed]
    if missing:
        raise IngestError(
            f"{path}: no column {missing[0]!r} for the time (columns are: {', '.join(frame.columns)}); "
            "map it in [observations.columns], for example Timestamp = \"time\""
        )
    station_cols = [c for c in renamed.columns if c not in time_cols]
    if not station_cols:
        raise IngestError(f"{path}: layout = 'wide' but there are no station columns besides the time")
    var = oc["wide_variable"]
    n = len(renamed)
    k = len(station_cols)
    long = pd.DataFrame({c: np.repeat(renamed[c].to_numpy(object), k) for c in time_cols})
    long["station_id"] = np.tile(np.asarray(station_cols, dtype=object), n)
    long[var] = renamed[station_cols].to_numpy(object).reshape(-1)
    long["__row__"] = np.repeat(np.arange(n), k)
    return long.astype({c: "string" for c in long.columns if c != "__row__"}), np.repeat(lines, k)


def _load_parquet(p: Path, cfg: Config):
    import pyarrow as pa
    import pyarrow.dataset as ds

    try:
        dataset = ds.dataset(str(p), format="parquet", partitioning="hive")
        table = dataset.to_table()
    except (pa.ArrowInvalid, OSError) as exc:
        raise IngestError(f"{p}: cannot read as Parquet ({_clip(exc)})") from None
    frame = table.to_pandas()
    for c in frame.columns:  # station ids may stay categorical (handled label by label); other labels as text
        if isinstance(frame[c].dtype, pd.CategoricalDtype) and cfg["observations"]["columns"].get(c, c) != "station_id":
            frame[c] = frame[c].astype("string")
    lines = np.arange(1, len(frame) + 1)
    return frame, lines, [], len(frame), [str(p)]


def _load_netcdf(p: Path, cfg: Config):
    import xarray as xr

    files = sorted(p.glob("*.nc")) + sorted(p.glob("*.cdf")) + sorted(p.glob("*.nc4")) if p.is_dir() else [p]
    if not files:
        raise IngestError(f"{p}: no netCDF files (*.nc, *.cdf) in this folder")
    mapping = cfg["observations"]["columns"]
    frames = []
    units: dict[str, str] = {}
    for f in files:
        try:
            dset = xr.open_dataset(f, decode_times=True)
        except Exception as exc:  # noqa: BLE001 - any backend failure is a file problem
            raise IngestError(f"{f}: cannot read as netCDF ({_clip(exc)})") from None
        with dset:
            if "time" not in dset.coords and "time" not in dset:
                raise IngestError(f"{f}: no 'time' coordinate; expected one station per file with a time axis")
            sid = None
            for attr in ("station_id", "facility_id", "site_id", "station_name", "platform_id"):
                if attr in dset.attrs and str(dset.attrs[attr]).strip():
                    sid = str(dset.attrs[attr]).strip()
                    break
            sid = sid or f.name.split(".")[0]
            data = {"time": pd.DatetimeIndex(dset["time"].values).tz_localize("UTC")}
            nt = len(data["time"])
            for name in ("lat", "latitude", "lon", "longitude", "alt", "altitude", "elevation"):
                if name in dset:
                    canon = {"lat": "latitude", "lon": "longitude", "alt": "elevation", "altitude": "elevation"}.get(name, name)
                    raw = np.asarray(dset[name].values, float).reshape(-1)
                    # a coordinate may be stored per record or once per file
                    data[canon] = raw if raw.size == nt else np.full(nt, raw[0])
            for src, canon in mapping.items():
                if src in dset and canon not in V.ID_COLUMNS:
                    data[canon] = np.asarray(dset[src].values, float).reshape(nt)
                    unit = dset[src].attrs.get("units")
                    if unit and canon in V.CANONICAL:
                        units.setdefault(canon, str(unit))
            for canon in V.CANONICAL:
                if canon in dset and canon not in data:
                    data[canon] = np.asarray(dset[canon].values, float).reshape(nt)
                    if "units" in dset[canon].attrs:
                        units.setdefault(canon, str(dset[canon].attrs["units"]))
            fr = pd.DataFrame(data)
            fr["station_id"] = sid
            fr["__file__"] = str(f)
            fr["__line__"] = np.arange(1, nt + 1)
            frames.append(fr)
    frame = pd.concat(frames, ignore_index=True)
    lines = frame.pop("__line__").to_numpy()
    return frame, lines, [], units, len(frame), [str(f) for f in files]


def _canonicalise(frame, lines, files, rejected, n_rows, sources, source_units, cfg, stations) -> IngestResult:
    oc = cfg["observations"]
    src_name = sources[0] if len(sources) == 1 else str(Path(sources[0]).parent)
    wide_rows = frame.pop("__row__").to_numpy() if "__row__" in frame else None
    skipped = list(frame.attrs.get("ignored_columns", []))
    frame = frame.rename(columns=_rename(list(frame.columns), oc["columns"]))
    time_cols = oc["time_columns"]
    for c in time_cols or ["time"]:
        if c not in frame:
            raise IngestError(
                f"{src_name}: no column {c!r} for the time (columns are: {', '.join(map(str, frame.columns))}); "
                "map it in [observations.columns], for example Timestamp = \"time\", or set observations.time_columns"
            )
    if "station_id" not in frame:
        raise IngestError(
            f"{src_name}: no column 'station_id' (columns are: {', '.join(map(str, frame.columns))}); "
            "map yours in [observations.columns], for example Site = \"station_id\""
        )
    if len(frame) == 0 and not rejected:
        raise IngestError(f"{src_name}: no data rows after the header")
    var_cols, ignored = _variable_columns(list(frame.columns), oc)
    ignored = ignored + [c for c in skipped if c not in ignored]
    if not var_cols:
        raise IngestError(
            f"{src_name}: no variable columns (columns are: {', '.join(map(str, frame.columns))}); "
            "name them by their canonical names (air_temperature, wind_speed, ...) or map them in [observations.columns]"
        )
    units_cfg = dict(source_units)
    units_cfg.update(oc["units"])
    for name in units_cfg:
        if name in V.CANONICAL:
            try:
                V.unit_factors(name, units_cfg[name])
            except ConfigError as exc:
                raise ConfigError(f"observations.units.{name}: {exc}") from None
    n = len(frame)
    reasons = _Reasons()
    station = _station_labels(frame["station_id"])
    times, bad_t, t_reasons, layout = parse_times(frame, time_column=None if time_cols else "time", time_columns=time_cols,
                                                  time_format=oc["time_format"], timezone=oc["timezone"], station=station,
                                                  source=src_name)
    for i in np.flatnonzero(bad_t):
        reasons.add(i, t_reasons[i])
    empty_sid = (station == "").to_numpy(bool)
    for i in np.flatnonzero(empty_sid):
        reasons.add(i, "station_id is empty")
    missing = {str(m) for m in oc["missing_values"]}
    # the columns of the result, made into a frame at the end without copying them (see _read_typed_csv)
    out_cols: dict = {"station_id": station.array, "time": times.reset_index(drop=True).astype("datetime64[ns, UTC]")}
    calm_codes = np.zeros(n, bool)
    for name in var_cols:
        col = frame[name]
        if name == "wind_from_direction" and (units_cfg.get(name, "degree") == "compass"
                                              or not pd.api.types.is_numeric_dtype(col.dtype)):
            text = _as_text(col)
            absent = (text.isna() | (text == "") | text.isin(missing)).fillna(True).to_numpy(bool)
            # compass names, numbers, and calm/variable codes are all understood here
            deg, calm, bad = V.compass_to_degrees(text.mask(absent).to_numpy(object))
            calm_codes |= calm
            x = deg
        else:
            x, bad = parse_numbers(col, missing)
            x = V.convert(x, name, units_cfg.get(name))
        for i in np.flatnonzero(bad):
            if i not in reasons:
                raw = col.iloc[i]
                reasons.add(i, f"{name}: cannot read {_clip(raw)!r} as a number" if not _looks_infinite(raw) else
                            f"{name}: {_clip(raw)!r} is not a finite number")
        out_cols[name] = x
    if "wind_from_direction" in out_cols:
        # a direction of exactly 0 is calm (with a speed below calm_speed, or with no speed column) or north
        # (360), and a calm code (compass text) is calm whatever its number: only those rows change
        d = out_cols["wind_from_direction"]
        zero = np.flatnonzero(d == 0)
        coded = bool(calm_codes.any())
        if "wind_speed" in out_cols:
            s = out_cols["wind_speed"]
            calm = np.isfinite(s[zero]) & (s[zero] < cfg["qc"]["calm_speed"])
            if coded:  # a calm code without a speed is a speed of 0 (a new array: ``s`` may be the input's own)
                out_cols["wind_speed"] = np.where(calm_codes & ~np.isfinite(s), 0.0, s)
        else:
            calm = np.ones(zero.size, bool)
        if zero.size or coded:
            d = d.copy()
            d[zero] = np.where(calm, np.nan, 360.0)
            d[calm_codes] = np.nan
        out_cols["wind_from_direction"] = d
    out = pd.DataFrame(out_cols, copy=False)
    # station table
    coords_in_obs = "latitude" in frame and "longitude" in frame
    if stations is None:
        if not coords_in_obs:
            raise IngestError(
                f"{src_name}: no station file was given and the observations have no latitude/longitude columns; "
                "pass --stations FILE"
            )
        stations = _stations_from_rows(frame, out, lines, files, reasons)
    known = set(stations["station_id"])
    unknown = ~out["station_id"].isin(known).to_numpy() & ~empty_sid
    if wide_rows is not None and unknown.any():
        sid = out["station_id"][unknown].iloc[0]
        raise IngestError(f"{src_name}: column {sid!r} is not a station in the stations file; add it there or drop the column")
    for i in np.flatnonzero(unknown):
        reasons.add(i, f"station {_clip(out['station_id'].iloc[i])!r} is not in the stations file (add it there or correct the id)")
    bad_row = reasons.mask(n)
    if wide_rows is not None:
        # one bad cell rejects its whole line: a wide line is one row
        bad_line = np.zeros(wide_rows.max() + 1 if len(wide_rows) else 0, bool)
        np.logical_or.at(bad_line, wide_rows, bad_row)
        reported = np.zeros(len(bad_row), bool)
        seen_rows = pd.Series(np.where(bad_row, wide_rows, -1)).drop_duplicates(keep="first")
        idx = seen_rows.index[seen_rows.to_numpy() >= 0].to_numpy()
        reported[idx] = True
        bad_row = bad_line[wide_rows]
        rej_rows = [(_file_of(files, i), int(lines[i]), reasons[i]) for i in np.flatnonzero(reported)]
    else:
        rej_rows = [(_file_of(files, i), int(lines[i]), reasons[i]) for i in np.flatnonzero(bad_row)]
    keep = ~bad_row
    if keep.all():  # `out` is this function's own frame: no copy when all rows stay
        good, good_lines, good_files = out, np.asarray(lines), files
    else:
        good = out[keep].copy()
        good_lines = np.asarray(lines)[keep]
        good_files = files if isinstance(files, str) else np.asarray(files)[keep]
    ordered = _in_key_order(good)
    good, dup_rejects, collapsed = (good, [], 0) if ordered else _deduplicate(good, good_lines, good_files, var_cols)
    rej_rows.extend(dup_rejects)
    rejected_all = list(rejected) + rej_rows
    rej = pd.DataFrame(rejected_all, columns=["file", "line", "reason"])
    rej = rej.sort_values(["file", "line"], kind="stable").reset_index(drop=True)
    if wide_rows is not None:
        rej = rej.drop_duplicates(["file", "line"])
    n_rej = len(rej)
    accounting = {"rows_read": int(n_rows), "rows_accepted": int(n_rows - n_rej), "rows_rejected": int(n_rej),
                  "duplicates_collapsed": int(collapsed)}
    if not ordered:
        good = good.sort_values(["time", "station_id"], kind="stable").reset_index(drop=True)
    elif good is not out:
        good = good.reset_index(drop=True)
    codes = good["station_id"].cat.codes.to_numpy()
    used = np.bincount(codes[codes >= 0], minlength=len(good["station_id"].cat.categories)) > 0
    if not used.all():  # by the codes (a set of the labels would hash every row)
        good["station_id"] = good["station_id"].cat.remove_categories(good["station_id"].cat.categories[~used])
    if pd.DatetimeIndex(good["time"]).unit != "ns":
        good["time"] = pd.DatetimeIndex(good["time"]).as_unit("ns")
    units = {name: V.si_unit(name, units_cfg.get(name)) for name in var_cols}
    return IngestResult(good, stations.reset_index(drop=True), rej, accounting, units, list(sources), ignored,
                        reading={"time_layout": layout, "timezone": oc["timezone"]})


class _Reasons(dict):
    """Why rows are rejected: row number -> the first reason found (most rows have none)."""

    def add(self, row: int, reason: str) -> None:
        """Record ``reason`` for ``row`` unless it already has one."""
        self.setdefault(int(row), reason)

    def __contains__(self, row) -> bool:
        return super().__contains__(int(row))

    def __getitem__(self, row):
        return super().__getitem__(int(row))

    def mask(self, n: int) -> np.ndarray:
        """Boolean mask of the rows with a reason."""
        m = np.zeros(n, bool)
        if self:
            m[np.fromiter(self.keys(), np.int64, len(self))] = True
        return m


def _file_of(files: str | np.ndarray, row: int) -> str:
    """The source file of ``row``: ``files`` is one name for every row, or one name per row."""
    return files if isinstance(files, str) else files[row]


def _in_key_order(frame: pd.DataFrame) -> bool:
    """True when the rows are in strictly increasing (time, station) order: sorted, and no (station, time) twice.

    Station order is the order of the (sorted) categories, as in the final sort.
    """
    if len(frame) < 2:
        return True
    t = pd.DatetimeIndex(frame["time"]).asi8
    s = frame["station_id"].cat.codes.to_numpy()
    if (s < 0).any():
        return False
    dt = t[1:] - t[:-1]
    return bool(((dt > 0) | ((dt == 0) & (s[1:] > s[:-1]))).all())


def _station_labels(col: pd.Series) -> pd.Series:
    """Station ids, stripped, as a categorical with sorted categories ("" for a missing id).

    Works on the distinct labels only, so it costs little for millions of rows.
    """
    coded = col.cat.codes.to_numpy() if isinstance(col.dtype, pd.CategoricalDtype) else None
    if coded is not None and np.bincount(coded[coded >= 0], minlength=len(col.cat.categories)).all():
        codes, uniques = coded, col.cat.categories  # every label used (the typed reader's): no factorising
    else:
        codes, uniques = pd.factorize(col)
    labels = pd.Series(uniques).astype("string").str.strip().fillna("").astype(str).to_numpy(object)
    labels = np.append(labels, "")  # code -1 (missing) -> ""
    cats = np.array(sorted(set(labels)), dtype=object)
    remap = np.searchsorted(cats, labels)
    return pd.Series(pd.Categorical.from_codes(remap[codes], categories=pd.Index(cats, dtype=object)), index=col.index)


def _looks_infinite(raw: object) -> bool:
    s = str(raw).strip().lower().lstrip("+-")
    return s in ("inf", "infinity", "nan") or bool(re.fullmatch(r"[0-9.]+e[+]?[0-9]{3,}", s))


def _stations_from_rows(frame, out, lines, files, reasons) -> pd.DataFrame:
    cols = {}
    for name in ("latitude", "longitude", "elevation", "sensor_height"):
        if name in frame:
            x, bad = parse_numbers(frame[name], set())
            for i in np.flatnonzero(bad):
                reasons.add(i, f"{name}: cannot read {_clip(frame[name].iloc[i])!r} as a number")
            cols[name] = x
        else:
            cols[name] = np.full(len(frame), np.nan)
    st = pd.DataFrame({"station_id": out["station_id"].to_numpy(), **cols})
    st["__line__"] = np.asarray(lines)
    st["__file__"] = files if isinstance(files, str) else np.asarray(files)
    ok = ~reasons.mask(len(st)) & (st["station_id"] != "").to_numpy()
    st = st[ok]
    uniq = st.drop_duplicates(["station_id", "latitude", "longitude", "elevation", "sensor_height"])
    moved = uniq["station_id"].duplicated(keep=False)
    if moved.any():
        sid = uniq.loc[moved, "station_id"].iloc[0]
        rows = uniq[uniq["station_id"] == sid]
        raise IngestError(
            f"{rows['__file__'].iloc[0]}: station {sid!r} changes coordinates between lines "
            f"{rows['__line__'].iloc[0]} and {rows['__line__'].iloc[1]}; give a stations file with --stations"
        )
    res = uniq.drop(columns=["__line__", "__file__"]).reset_index(drop=True)
    first = files if isinstance(files, str) else (str(files[0]) if len(files) else "observations")
    return _validate_stations(res, first, uniq["__line__"].to_numpy())


def _deduplicate(good: pd.DataFrame, lines: np.ndarray, files: np.ndarray, var_cols: list[str]):
    """Collapse identical (station, time) repeats; reject every row of a conflicting group.

    Vectorised over rows; only the rejected rows are turned into messages.
    """
    s_codes, s_ids = pd.factorize(good["station_id"])
    t_codes, _ = pd.factorize(pd.DatetimeIndex(good["time"]).asi8)
    key = t_codes.astype(np.int64) * max(1, len(s_ids)) + s_codes  # one integer per (station, time)
    dup = pd.Series(key).duplicated(keep=False).to_numpy()
    if not dup.any():
        return good, [], 0
    sub_idx = np.flatnonzero(dup)
    vals = good.iloc[sub_idx][var_cols].to_numpy(float)
    grp = good.iloc[sub_idx].groupby(["station_id", "time"], sort=False).ngroup().to_numpy()
    n_grp = grp.max() + 1
    first_of = np.full(n_grp, -1)
    first_of[grp[::-1]] = np.arange(len(grp))[::-1]  # first row of each group
    ref = vals[first_of[grp]]
    same = np.all((vals == ref) | (np.isnan(vals) & np.isnan(ref)), axis=1)
    conflict = np.zeros(n_grp, bool)
    np.logical_or.at(conflict, grp, ~same)
    in_conflict = conflict[grp]
    is_repeat = ~in_conflict & (first_of[grp] != np.arange(len(grp)))
    drop = np.zeros(len(good), bool)
    drop[sub_idx[in_conflict | is_repeat]] = True
    rejects = []
    c_rows = np.flatnonzero(in_conflict)
    if c_rows.size:
        sub_lines = np.asarray(lines)[sub_idx]
        sub_files = np.full(len(sub_idx), files, object) if isinstance(files, str) else np.asarray(files)[sub_idx]
        by_group = pd.Series(sub_lines[c_rows]).groupby(grp[c_rows]).apply(list).to_dict()
        for j in c_rows:  # one message per rejected row
            others = [ln for ln in by_group[grp[j]] if ln != sub_lines[j]]
            rejects.append((sub_files[j], int(sub_lines[j]),
                            f"conflicts with line {', '.join(map(str, others[:5]))} (same station and time, different values)"))
    return good[~drop], rejects, int(is_repeat.sum())


def read(
    obs_path: str | Path,
    stations_path: str | Path | None = None,
    config: Config | None = None,
) -> IngestResult:
    """Read the station table (optional) and the observations: the ingest stage."""
    cfg = config or Config()
    stations = read_stations(stations_path, cfg) if stations_path is not None else None
    return read_observations(obs_path, cfg, stations=stations)
