"""Delimited text: a file's bytes to a table of string cells, each row with its source line.

Takes a path and the delimiter/header settings; gives a :class:`TextTable` and the rows that could not
be split (file, line, reason).  Also the number parser shared by every format.
"""

from __future__ import annotations

import contextlib
import csv
import io
import mmap
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import ConfigError, IngestError

_MAX_REASON_VALUE = 40


@dataclass
class TextTable:
    """Raw string cells of a delimited file and the source line of each row."""

    path: str
    header: list[str]
    cells: pd.DataFrame  # all columns as strings
    lines: np.ndarray  # 1-based source line of each row
    rejected: list[tuple[str, int, str]] = field(default_factory=list)


# --------------------------------------------------------------------------
# delimited text
# --------------------------------------------------------------------------

@contextlib.contextmanager
def file_errors(p: Path):
    """Turn the operating system's errors on opening or reading ``p`` into one-line :class:`IngestError` s."""
    try:
        yield
    except FileNotFoundError:
        raise IngestError(f"{p}: file not found; check the path") from None
    except IsADirectoryError:
        raise IngestError(f"{p}: is a folder, expected a file") from None
    except OSError as exc:
        raise IngestError(f"{p}: cannot read the file ({exc.strerror})") from None


def read_bytes(path: str | Path) -> bytes:
    p = Path(path)
    with file_errors(p):
        return p.read_bytes()


def map_bytes(path: str | Path):
    """The file's bytes as a read-only memory map (``b""`` for an empty file), errors as :func:`read_bytes`.

    The map reads the page cache in place: no copy of a 100 MB file into fresh memory (measured 0.1-0.2 s
    on the benchmark machine).  It supports ``find``, slicing and the buffer protocol (for pyarrow).
    """
    p = Path(path)
    with file_errors(p), open(p, "rb") as fh:
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
    src = _Lines.of(_utf8(path, encoding, section), name)
    data, n_lines = src.data, src.starts.size
    skip = np.zeros(n_lines, bool)
    if skip_lines:
        idx = np.asarray([n - 1 for n in skip_lines if 0 < n <= n_lines], dtype=int)
        skip[idx] = True
    candidates = np.flatnonzero(~src.blank & ~skip)
    if candidates.size == 0:
        raise IngestError(f"{name}: no header line found (every line is blank or skipped)")
    h = candidates[0]
    header = _header(data[src.starts[h]:src.ends_c[h]], h + 1, name, delimiter, section)
    is_row = ~src.blank & ~skip
    is_row[h] = False
    rejected: list[tuple[str, int, str]] = []
    # bytes that are not valid UTF-8: find the lines (error path only)
    try:
        data.decode("utf-8")
    except UnicodeDecodeError:
        for i in np.flatnonzero(is_row):
            try:
                data[src.starts[i]:src.ends[i]].decode("utf-8")
            except UnicodeDecodeError:
                is_row[i] = False
                rejected.append((name, int(i + 1), f"not valid UTF-8 text (set [{section}] encoding)"))
    is_row = _fields_checked(src, is_row, len(header), delimiter, section, rejected)
    rows = np.flatnonzero(is_row)
    cells = _parse_rows(src, rows, header, delimiter)
    if len(cells) != rows.size:  # quoting the fast path could not follow
        cells = _parse_rows_python(src, rows, header, delimiter)
    return TextTable(name, header, cells, np.arange(1, n_lines + 1)[rows], rejected)


def _utf8(path: str | Path, encoding: str, section: str) -> bytes:
    """The file's bytes as UTF-8 (a byte-order mark dropped; another encoding converted)."""
    name = str(path)
    data = read_bytes(path)
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
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
    return data


@dataclass
class _Lines:
    """A text's lines by byte offsets: ``starts``, ``ends`` (at the newline), ``ends_c`` (before a closing
    carriage return), and which lines are blank (nothing but spaces and tabs)."""

    data: bytes
    arr: np.ndarray
    starts: np.ndarray
    ends: np.ndarray
    ends_c: np.ndarray
    blank: np.ndarray
    name: str

    @classmethod
    def of(cls, data: bytes, name: str) -> "_Lines":
        arr = np.frombuffer(data, np.uint8)
        nl = np.flatnonzero(arr == 10)
        starts = np.concatenate([[0], nl + 1])
        ends = np.concatenate([nl, [arr.size]])
        if starts[-1] >= arr.size:
            starts, ends = starts[:-1], ends[:-1]
        cr = (ends > starts) & (arr[np.maximum(ends - 1, 0)] == 13)
        ends_c = ends - cr
        length = ends_c - starts
        blank = length == 0
        first = np.where(length > 0, arr[np.minimum(starts, arr.size - 1)], 0)
        for i in np.flatnonzero((first == 32) | (first == 9)):  # only lines that start with a space need a look
            blank[i] = not data[starts[i]:ends_c[i]].strip()
        return cls(data, arr, starts, ends, ends_c, blank, name)


def _header(text: bytes, line: int, name: str, delimiter: str, section: str) -> list[str]:
    """The column names of the header ``text`` (on ``line``), checked: readable, unique, not empty."""
    try:
        header_str = text.decode("utf-8")
    except UnicodeDecodeError:
        raise IngestError(f"{name}: line {line} (header) is not valid UTF-8 text; set [{section}] encoding") from None
    try:
        header = [c.strip() for c in next(csv.reader([header_str.rstrip("\r")], delimiter=delimiter))]
    except (csv.Error, StopIteration):
        raise IngestError(f"{name}: line {line} (header) cannot be read as delimited text") from None
    if len(header) == 1:
        for other in (";", "\t", ",", "|"):
            if other != delimiter and other in header_str:
                shown = {"\t": "\\t"}.get(other, other)
                raise IngestError(
                    f"{name}: the header has one column but contains {shown!r}; "
                    f"set [{section}] delimiter = \"{shown}\" in the configuration"
                )
    if any(c == "" for c in header):
        raise IngestError(f"{name}: line {line} (header) has an empty column name")
    dupes = sorted({c for c in header if header.count(c) > 1})
    if dupes:
        raise IngestError(f"{name}: the header repeats column(s) {', '.join(dupes)}; column names must be unique")
    return header


def _fields_checked(src: _Lines, is_row: np.ndarray, n_header: int, delimiter: str, section: str,
                    rejected: list) -> np.ndarray:
    """``is_row`` without the lines that have a stray carriage return or the wrong number of fields (counted
    from the delimiter positions, honouring double quotes); each rejected with its reason."""
    arr, starts, n_lines, name = src.arr, src.starts, src.starts.size, src.name
    pos = np.flatnonzero(arr == ord(delimiter))
    line_of = np.searchsorted(starts, pos, side="right") - 1
    if src.data.find(b'"') >= 0:
        qpos = np.flatnonzero(arr == 34)
        # quotes before each delimiter within its line: odd means the delimiter is inside a quoted field
        before = np.searchsorted(qpos, pos) - np.searchsorted(qpos, starts[line_of])
        keep = before % 2 == 0
        pos, line_of = pos[keep], line_of[keep]
    n_fields = np.bincount(line_of, minlength=n_lines) + 1
    crpos = np.flatnonzero(arr == 13)
    cr_line = np.searchsorted(starts, crpos, side="right") - 1
    inner_cr = crpos < src.ends_c[cr_line]
    stray = np.zeros(n_lines, bool)
    stray[cr_line[inner_cr]] = True
    stray_cr = is_row & stray
    for i in np.flatnonzero(stray_cr):
        rejected.append((name, int(i + 1), "a carriage-return character inside the line (mixed line endings?)"))
    is_row = is_row & ~stray_cr
    wrong = is_row & (n_fields != n_header)
    for i in np.flatnonzero(wrong):
        rejected.append((name, int(i + 1), f"expected {n_header} fields, found {int(n_fields[i])} (check [{section}] delimiter)"))
    return is_row & ~wrong


def _parse_rows(src: _Lines, rows: np.ndarray, header: list[str], delimiter: str) -> pd.DataFrame:
    """The cells of the lines ``rows`` as strings, parsed by pyarrow in one pass."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    data, arr, starts, ends = src.data, src.arr, src.starts, src.ends
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


def _parse_rows_python(src: _Lines, rows: np.ndarray, header: list[str], delimiter: str) -> pd.DataFrame:
    """Slow path, one line at a time, used only when quoting defeats the fast parser."""
    parsed = []
    for i in rows:
        line = src.data[src.starts[i]:src.ends[i]].decode("utf-8").rstrip("\r")
        try:
            cells = next(csv.reader([line], delimiter=delimiter))
        except (csv.Error, StopIteration):
            cells = line.split(delimiter)
        parsed.append((cells + [""] * len(header))[: len(header)])
    return pd.DataFrame(parsed, columns=header, dtype="string")


# --------------------------------------------------------------------------
# shared parsing helpers
# --------------------------------------------------------------------------

def clip(text: object) -> str:
    s = str(text)
    return s if len(s) <= _MAX_REASON_VALUE else s[: _MAX_REASON_VALUE - 3] + "..."


def as_text(col: pd.Series) -> pd.Series:
    return col.astype("string").str.strip()


def parse_numbers(col: pd.Series, missing: set[str]) -> tuple[np.ndarray, np.ndarray]:
    """Parse a column to float. Returns (values, bad) with NaN for missing.

    ``bad`` marks cells that are present but not a finite number.
    """
    if pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        x = col.to_numpy(dtype=float, na_value=np.nan)
        return x, np.isinf(x)
    s = as_text(col)
    absent = s.isna() | (s == "") | s.isin(missing)
    absent = absent.fillna(True).to_numpy(bool)
    x = pd.to_numeric(s.mask(absent), errors="coerce").to_numpy(float, na_value=np.nan)
    bad = ~absent & ~np.isfinite(x)
    x[bad] = np.nan
    return x, bad


def count_newlines(data, start: int) -> int:
    """Number of ``\\n`` bytes in ``data[start:]`` (a memory map or bytes), in blocks of 16 MiB."""
    view = np.frombuffer(data, np.uint8)
    block = 1 << 24
    return sum(int(np.count_nonzero(view[a:a + block] == 10)) for a in range(start, view.size, block))
