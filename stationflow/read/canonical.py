"""From a raw frame of any format to the canonical observations.

Takes the raw frame with its source lines (wide or long, any column names, any units) and the
configuration; gives canonical names and SI units, parsed times, collapsed duplicates, and the
rejected rows with their reasons.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .. import variables as V
from ..config import Config
from ..errors import ConfigError, IngestError
from .stations import looks_infinite, rename_columns, station_labels, stations_from_rows
from .text import as_text, clip, parse_numbers
from .times import TimeSettings, parse_times


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
    #: with ``canonicalise(..., keep_lines=True)``: each kept row's source file and line (a follow run names them
    #: when a later row conflicts)
    row_sources: tuple[np.ndarray, np.ndarray] | None = None

    @property
    def variables(self) -> list[str]:
        """Names of the variable columns."""
        return [c for c in self.observations.columns if c not in V.ID_COLUMNS]


@dataclass
class RawTable:
    """What a format reader gives: the rows as in the file, before names, units and times are made canonical.

    ``frame``: the columns as in the file (strings, or typed when the reader
    could); ``lines``: each row's 1-based source line (record number for
    Parquet and netCDF); ``files``: one file name for every row, or one per
    row; ``rejected``: rows that could not even be split, as (file, line,
    reason); ``n_rows``: data rows read; ``units``: units the file itself
    declares; ``wide_rows``: for a wide file melted to long rows, the wide
    line each long row came from (one bad cell rejects its whole line).
    """

    frame: pd.DataFrame
    lines: np.ndarray
    files: str | np.ndarray
    rejected: list
    n_rows: int
    sources: list[str]
    units: dict[str, str] = field(default_factory=dict)
    wide_rows: np.ndarray | None = None


def variable_columns(columns: list[str], oc) -> tuple[list[str], list[str]]:
    """(variable columns, ignored columns) among canonical column names."""
    time_cols = oc["time_columns"]
    mapped_targets = set(oc["columns"].values())
    coord_cols = {"latitude", "longitude", "elevation", "sensor_height"}
    var_cols = [c for c in columns
                if c not in V.ID_COLUMNS and c not in time_cols and c not in coord_cols
                and (c in V.CANONICAL or c in mapped_targets or c == oc["wide_variable"] and oc["layout"] == "wide")]
    ignored = [c for c in columns if c not in var_cols and c not in V.ID_COLUMNS
               and c not in time_cols and c not in coord_cols]
    return var_cols, ignored


def melt_wide(frame: pd.DataFrame, lines: np.ndarray, cfg: Config, path: str
              ) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    """A wide file (one column per station) as long rows: (rows, their source lines, their wide line index)."""
    oc = cfg["observations"]
    mapping = oc["columns"]
    renamed = frame.rename(columns=rename_columns(list(frame.columns), mapping))
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
    return long.astype({c: "string" for c in long.columns}), np.repeat(lines, k), np.repeat(np.arange(n), k)


def canonicalise(raw: RawTable, cfg: Config, stations: pd.DataFrame | None, *, keep_lines: bool = False) -> IngestResult:
    """Canonical names, SI units and UTC times of a :class:`RawTable`; rows that cannot be used are rejected
    with their reason, identical repeats collapsed and conflicting ones rejected.  ``keep_lines``: keep each
    row's file and line (``row_sources``)."""
    oc = cfg["observations"]
    src_name = raw.sources[0] if len(raw.sources) == 1 else str(Path(raw.sources[0]).parent)
    skipped = list(raw.frame.attrs.get("ignored_columns", []))
    frame = raw.frame.rename(columns=rename_columns(list(raw.frame.columns), oc["columns"]))
    _check_columns(frame, oc, src_name, empty_ok=bool(raw.rejected))
    var_cols, ignored = variable_columns(list(frame.columns), oc)
    ignored = ignored + [c for c in skipped if c not in ignored]
    if not var_cols:
        raise IngestError(
            f"{src_name}: no variable columns (columns are: {', '.join(map(str, frame.columns))}); "
            "name them by their canonical names (air_temperature, wind_speed, ...) or map them in [observations.columns]"
        )
    units_cfg = _units_in_force(raw.units, oc)
    reasons = _Reasons()
    station = station_labels(frame["station_id"])
    times, bad_t, t_reasons, layout = parse_times(frame, TimeSettings.of(oc), station, source=src_name)
    for i in np.flatnonzero(bad_t):
        reasons.add(i, t_reasons[i])
    empty_sid = (station == "").to_numpy(bool)
    for i in np.flatnonzero(empty_sid):
        reasons.add(i, "station_id is empty")
    # the columns of the result, made into a frame at the end without copying them (see read_typed_csv)
    out_cols: dict = {"station_id": station.array, "time": times.reset_index(drop=True).astype("datetime64[ns, UTC]")}
    _values(frame, var_cols, units_cfg, cfg, reasons, out_cols)
    out = pd.DataFrame(out_cols, copy=False)
    if stations is None:
        if not ("latitude" in frame and "longitude" in frame):
            raise IngestError(
                f"{src_name}: no station file was given and the observations have no latitude/longitude columns; "
                "pass --stations FILE"
            )
        stations = stations_from_rows(frame, out, raw.lines, raw.files, reasons)
    unknown = ~out["station_id"].isin(set(stations["station_id"])).to_numpy() & ~empty_sid
    if raw.wide_rows is not None and unknown.any():
        sid = out["station_id"][unknown].iloc[0]
        raise IngestError(f"{src_name}: column {sid!r} is not a station in the stations file; add it there or drop the column")
    for i in np.flatnonzero(unknown):
        reasons.add(i, f"station {clip(out['station_id'].iloc[i])!r} is not in the stations file (add it there or correct the id)")
    good, rej, accounting, kept = _accept(raw, out, reasons, var_cols, keep_lines)
    units = {name: V.si_unit(name, units_cfg.get(name)) for name in var_cols}
    sources = None
    if keep_lines:
        files = np.full(len(kept), raw.files, object) if isinstance(raw.files, str) else np.asarray(raw.files, object)[kept]
        sources = (files, np.asarray(raw.lines)[kept])
    return IngestResult(good, stations.reset_index(drop=True), rej, accounting, units, list(raw.sources), ignored,
                        reading={"time_layout": layout, "timezone": oc["timezone"]}, row_sources=sources)


def _check_columns(frame: pd.DataFrame, oc, src_name: str, *, empty_ok: bool) -> None:
    """Stop with one line when the time or station column is missing, or when there are no rows at all."""
    for c in oc["time_columns"] or ["time"]:
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
    if len(frame) == 0 and not empty_ok:
        raise IngestError(f"{src_name}: no data rows after the header")


def _units_in_force(source_units: dict[str, str], oc) -> dict[str, str]:
    """The units of the file's columns: declared by the file, overridden by ``observations.units``; checked."""
    units_cfg = dict(source_units)
    units_cfg.update(oc["units"])
    for name in units_cfg:
        if name in V.CANONICAL:
            try:
                V.unit_factors(name, units_cfg[name])
            except ConfigError as exc:
                raise ConfigError(f"observations.units.{name}: {exc}") from None
    return units_cfg


def _values(frame: pd.DataFrame, var_cols: list[str], units_cfg: dict, cfg: Config, reasons: "_Reasons",
            out_cols: dict) -> None:
    """Each variable column as SI numbers into ``out_cols``; a cell that cannot be read rejects its row."""
    missing = {str(m) for m in cfg["observations"]["missing_values"]}
    calm_codes = np.zeros(len(frame), bool)
    for name in var_cols:
        col = frame[name]
        if name == "wind_from_direction" and (units_cfg.get(name, "degree") == "compass"
                                              or not pd.api.types.is_numeric_dtype(col.dtype)):
            text = as_text(col)
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
                reasons.add(i, f"{name}: cannot read {clip(raw)!r} as a number" if not looks_infinite(raw) else
                            f"{name}: {clip(raw)!r} is not a finite number")
        out_cols[name] = x
    if "wind_from_direction" in out_cols:
        _calm_directions(out_cols, calm_codes, cfg["qc"]["calm_speed"])


def _calm_directions(out_cols: dict, calm_codes: np.ndarray, calm_speed: float) -> None:
    """A direction of exactly 0 is calm (with a speed below ``calm_speed``, or with no speed column) or
    north (360), and a calm code (compass text) is calm whatever its number: only those rows change."""
    d = out_cols["wind_from_direction"]
    zero = np.flatnonzero(d == 0)
    coded = bool(calm_codes.any())
    if "wind_speed" in out_cols:
        s = out_cols["wind_speed"]
        calm = np.isfinite(s[zero]) & (s[zero] < calm_speed)
        if coded:  # a calm code without a speed is a speed of 0 (a new array: ``s`` may be the input's own)
            out_cols["wind_speed"] = np.where(calm_codes & ~np.isfinite(s), 0.0, s)
    else:
        calm = np.ones(zero.size, bool)
    if zero.size or coded:
        d = d.copy()
        d[zero] = np.where(calm, np.nan, 360.0)
        d[calm_codes] = np.nan
    out_cols["wind_from_direction"] = d


def _accept(raw: RawTable, out: pd.DataFrame, reasons: "_Reasons", var_cols: list[str], keep_lines: bool = False
            ) -> tuple[pd.DataFrame, pd.DataFrame, dict[str, int], np.ndarray | None]:
    """(the rows kept, in (time, station) order with duplicates collapsed; every rejected row with its file,
    line and reason; the row accounting; each kept row's position in ``raw``)."""
    lines, files, wide_rows = raw.lines, raw.files, raw.wide_rows
    bad_row = reasons.mask(len(out))
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
    if keep.all():  # `out` is this module's own frame: no copy when all rows stay
        good, good_lines, good_files = out, np.asarray(lines), files
    else:
        good = out[keep].copy()
        good_lines = np.asarray(lines)[keep]
        good_files = files if isinstance(files, str) else np.asarray(files)[keep]
    ordered = _in_key_order(good)
    good, dup_rejects, collapsed = (good, [], 0) if ordered else _deduplicate(good, good_lines, good_files, var_cols)
    rej_rows.extend(dup_rejects)
    rej = pd.DataFrame(list(raw.rejected) + rej_rows, columns=["file", "line", "reason"])
    rej = rej.sort_values(["file", "line"], kind="stable").reset_index(drop=True)
    if wide_rows is not None:
        rej = rej.drop_duplicates(["file", "line"])
    n_rej = len(rej)
    accounting = {"rows_read": int(raw.n_rows), "rows_accepted": int(raw.n_rows - n_rej), "rows_rejected": int(n_rej),
                  "duplicates_collapsed": int(collapsed)}
    if not ordered:
        good = good.sort_values(["time", "station_id"], kind="stable")
    kept = good.index.to_numpy() if keep_lines else None
    if not ordered or good is not out:
        good = good.reset_index(drop=True)
    codes = good["station_id"].cat.codes.to_numpy()
    used = np.bincount(codes[codes >= 0], minlength=len(good["station_id"].cat.categories)) > 0
    if not used.all():  # by the codes (a set of the labels would hash every row)
        good["station_id"] = good["station_id"].cat.remove_categories(good["station_id"].cat.categories[~used])
    if pd.DatetimeIndex(good["time"]).unit != "ns":
        good["time"] = pd.DatetimeIndex(good["time"]).as_unit("ns")
    return good, rej, accounting, kept


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
