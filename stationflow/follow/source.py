"""A growing observation source, read a little at a time.

A CSV file that a logger appends to, or a folder of CSV files into which new
exports arrive (each with its header).  For every file the reader remembers
(in the follow state) how many bytes and whole lines it has taken, the
file's identity (device and inode) and a fingerprint of its first bytes.
Each poll takes only the new *whole* lines (a line still being written is
left for the next poll).  A file that shrank, was replaced (another inode)
or whose first bytes changed was truncated or rotated: it is read again from
its start, and what it repeats is dropped downstream as duplicates (as a
batch run drops repeats).
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import asdict, dataclass
from pathlib import Path

from ..errors import IngestError

#: bytes of a file's start kept as its fingerprint
HEAD_BYTES = 256


@dataclass
class Mark:
    """How far one file has been read."""

    offset: int = 0  # bytes taken (always at a line end)
    lines: int = 0  # whole lines taken
    inode: int = -1
    device: int = -1
    head: str = ""  # sha256 of the first min(offset, HEAD_BYTES) bytes
    header: str = ""  # the header line (latin-1 round trip of its bytes)

    def to_json(self) -> dict:
        return asdict(self)


@dataclass
class Chunk:
    """New whole lines of one file: ``body`` starts at line ``first_line`` (1-based) of ``path``."""

    path: str
    header: bytes
    body: bytes
    first_line: int


def _fingerprint(data: bytes) -> str:
    return hashlib.sha256(data[:HEAD_BYTES]).hexdigest()


def files_of(source: Path) -> list[Path]:
    """The files that make up ``source``: itself, or the CSV files of a folder in name order."""
    if source.is_dir():
        from ..read.observations import csv_files

        return csv_files(source)
    return [source]


def check_source(source: Path) -> None:
    """Stop with a one-line reason when ``source`` cannot be followed (one that does not exist yet is waited
    for)."""
    if not source.exists():
        return
    if source.is_dir():
        if any(q.suffix.lower() in (".parquet", ".pq", ".nc", ".cdf", ".nc4", ".netcdf") for q in source.iterdir()):
            raise IngestError(f"{source}: --follow reads CSV exports (a file, or a folder of .csv files); "
                              "this folder holds Parquet or netCDF files")
        return
    if source.suffix.lower() in (".parquet", ".pq", ".nc", ".cdf", ".nc4"):
        raise IngestError(f"{source}: --follow reads CSV exports (a file, or a folder of .csv files)")


def poll(source: Path, marks: dict[str, dict]) -> tuple[list[Chunk], dict[str, dict], int]:
    """The new whole lines of every file of ``source`` since ``marks``; returns (chunks, new marks, restarts).

    ``marks`` is not changed: the caller stores the new marks only once the
    lines are safely processed (so a crash reads them again).
    """
    new_marks = {k: dict(v) for k, v in marks.items()}
    chunks: list[Chunk] = []
    restarts = 0
    if not source.exists():
        return [], new_marks, 0
    for path in files_of(source):
        key = str(path)
        mark = Mark(**marks[key]) if key in marks else Mark()
        try:
            st = os.stat(path)
            with open(path, "rb") as fh:
                head = fh.read(HEAD_BYTES)
                restarted = mark.offset > 0 and (
                    st.st_size < mark.offset or (st.st_ino, st.st_dev) != (mark.inode, mark.device)
                    or _fingerprint(head[:min(mark.offset, HEAD_BYTES)]) != mark.head)
                if restarted:
                    mark = Mark()
                    restarts += 1
                if st.st_size == mark.offset:
                    continue
                fh.seek(mark.offset)
                data = fh.read(st.st_size - mark.offset)
        except FileNotFoundError:  # rotated away between the listing and the read: the next poll sees the new one
            continue
        except OSError as exc:
            raise IngestError(f"{path}: cannot read ({exc.strerror or exc})") from None
        end = data.rfind(b"\n")
        if end < 0:
            continue  # not one whole line yet
        data = data[:end + 1]
        header = mark.header.encode("latin-1")
        first_line = mark.lines + 1
        mark.offset += len(data)
        if mark.lines == 0:  # the file's start: its first line is the header
            cut = data.index(b"\n") + 1
            header, data = data[:cut], data[cut:]
            first_line = 2
            mark.lines = 1
            mark.header = header.decode("latin-1")
        mark.lines += data.count(b"\n")
        mark.inode, mark.device = st.st_ino, st.st_dev
        mark.head = _fingerprint(head[:min(mark.offset, HEAD_BYTES)])
        new_marks[key] = mark.to_json()
        if data:
            chunks.append(Chunk(key, header, data, first_line))
    return chunks, new_marks, restarts
