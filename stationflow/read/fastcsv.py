"""The fast path for plain long CSV files: typed columns parsed by pyarrow in one pass.

Takes a CSV path, the configuration and the station table; gives the raw frame the general reader
would have produced, or None when the file needs the general reader (:mod:`.text`).  Checked equal to
the general reader in the tests.
"""

from __future__ import annotations

import csv
import datetime as _dt
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import Config
from .canonical import variable_columns
from .stations import rename_columns
from .text import count_newlines, map_bytes
from .times import tzinfo_for


def read_typed_csv(p: Path, cfg: Config, stations: pd.DataFrame | None) -> pd.DataFrame | None:
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
    oc = cfg["observations"]
    enc = oc["encoding"].lower().replace("_", "-")
    if (stations is None or oc["layout"] != "long" or oc["time_columns"] or oc["skip_lines"] or oc["time_format"]
            or enc not in ("utf-8", "utf8") or len(oc["delimiter"]) != 1):
        return None
    data = map_bytes(p)
    plan = _plain_columns(data, oc)
    if plan is None:
        return None
    head_end, header, src, var_cols, ignored = plan
    tz = tzinfo_for(oc["timezone"])
    parsed = _parse(data, head_end, header, src, var_cols, oc, tz)
    if parsed is None:
        return None
    table, naive = parsed
    if table.num_rows != count_newlines(data, head_end + 1) + (0 if data[-1:] == b"\n" else 1):
        return None
    cols = _columns(table, src, var_cols, naive, tz)
    if cols is None:
        return None
    # the columns as they are (copy=False): setting them one by one copied each (0.1-0.2 s for 2.5 M rows)
    frame = pd.DataFrame(cols, copy=False)
    frame.attrs["ignored_columns"] = ignored  # read past, not parsed
    return frame


def _plain_columns(data, oc) -> tuple[int, list[str], dict[str, str], list[str], list[str]] | None:
    """(end of the header, its column names, canonical name -> file column, variable columns, ignored columns)
    when the file is plain enough for the fast path, else None."""
    start = 3 if data[:3] == b"\xef\xbb\xbf" else 0  # a byte-order mark
    head_end = data.find(b"\n", start)
    # blank lines need no search of their own (a two-byte search is slow where every line ends in one byte):
    # pyarrow reads one as a row of empty fields, and its empty station id and missing time send the file
    # to the general reader
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
    names = rename_columns(header, oc["columns"])
    canon = list(names.values())
    if "station_id" not in canon or "time" not in canon or {"latitude", "longitude"} & set(canon):
        return None
    var_cols, ignored = variable_columns(canon, oc)
    if not var_cols or ("wind_from_direction" in var_cols and oc["units"].get("wind_from_direction", "degree") == "compass"):
        return None
    return head_end, header, {v: k for k, v in names.items()}, var_cols, ignored


def _parse(data, head_end: int, header: list[str], src: dict[str, str], var_cols: list[str], oc, tz):
    """(the pyarrow table of the rows, whether its times are naive), or None when pyarrow cannot type them."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

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
        return parse(pa.timestamp("ns", tz="UTC")), False
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        if not isinstance(tz, _dt.timezone):
            return None  # local times in a zone with daylight saving: the general reader resolves them
        try:
            return parse(pa.timestamp("ns")), True
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            return None


def _columns(table, src: dict[str, str], var_cols: list[str], naive: bool, tz) -> dict | None:
    """The canonical columns of ``table``, or None when a value needs the general reader's row-by-row rules
    (empty or padded station ids, missing times, times outside 1900-2200, 'nan' / 'inf' written as numbers)."""
    import pyarrow as pa
    import pyarrow.compute as pc

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
        x = np.asarray(col.to_numpy(), float)
        if np.count_nonzero(~np.isfinite(x)) != col.null_count:  # (the missing values are NaN here)
            return None
        cols[v] = x
    return cols
