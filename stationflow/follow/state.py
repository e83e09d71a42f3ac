"""The state of a followed night, on disk in ``OUT/.follow/``, safe against a kill at any moment.

``state.json`` is the one commit point.  Everything else in the folder is
written first under a new name (``obs-000012.parquet``, ``final-000012.npz``
...) and only becomes part of the state when a new ``state.json`` that names
it is renamed into place.  A run killed before that rename (SIGKILL
included) leaves the previous state whole: the next call reads the same new
lines again and nothing is counted twice; files no state names are removed
when the next call starts.  The outputs (the budget files, now.html,
alerts.jsonl) are rendered from the committed state, each written to a
temporary name and renamed, so none is ever half-written.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, fields
from pathlib import Path

from ..report.atomic import atomic_write

STATE_DIR = ".follow"
STATE_FILE = "state.json"
LOCK_FILE = "lock"
ALERT_LOG = "alerts.jsonl"
FINAL_CSV = "final.csv"
QC_LOG = "qc_flags.csv"
_HELD: dict = {}  # the state folders this process holds, with their open lock files
VERSION = 1

COUNTS = ("rows_read", "rows_accepted", "rows_rejected", "duplicates", "conflicts", "late_after_final", "restarts",
          "polls")


@dataclass
class FollowState:
    """Everything a follow call needs from the calls before it."""

    version: int = VERSION
    source: str = ""
    marks: dict = field(default_factory=dict)  # file -> source.Mark as a dict
    time_format: str = ""  # the time layout found in the first lines ("" = none yet)
    pinned: dict | None = None  # settings.Pinned as a dict, once pinned
    final_through: str | None = None  # the newest final analysis time (UTC ISO 8601)
    first_time: str | None = None  # the first analysis time of the stored final rows (UTC ISO 8601)
    final_rows: int = 0  # analysis steps stored as final (rows of the "final" columns)
    final_layout: dict = field(default_factory=dict)  # column -> [dtype, clusters] of the final rows
    revision_rows: int = 0  # rows of the "revisions" columns (one-sided estimates as issued)
    revision_layout: dict = field(default_factory=dict)
    obs: str | None = None  # the retained observations
    rejected: str | None = None  # every rejected row so far
    counts: dict = field(default_factory=lambda: {k: 0 for k in COUNTS})
    final_csv_bytes: int = 0  # committed length of the final rows' budget.csv text (FINAL_CSV)
    qc_through: str | None = None  # QC flags up to this time are final and logged (QC_LOG)
    qc_bytes: int = 0  # committed length of the QC flag log
    alert_bytes: int = 0  # committed length of the alert log (ALERT_LOG)
    alert_count: int = 0  # alerts in it
    firing: dict = field(default_factory=dict)  # rule -> {subject: calls in a row its clearing condition held}
    delivered: int = 0  # alerts handed to alerts.command
    last_seen: dict = field(default_factory=dict)  # station -> its newest report time (UTC ISO 8601)
    minimum: dict = field(default_factory=dict)  # cluster -> [lowest value, its time]
    newest: str | None = None  # the newest analysis time computed
    units: dict = field(default_factory=dict)  # the variables' units (as ingest gives them)
    generation: int = 0
    rendered: int = 0  # the generation the outputs were last rendered from

    def files(self) -> set[str]:
        """The data files this state names."""
        names = {f"final.{c}.bin" for c in self.final_layout} | {f"revisions.{c}.bin" for c in self.revision_layout}
        if self.alert_bytes:
            names.add(ALERT_LOG)
        if self.final_csv_bytes:
            names.add(FINAL_CSV)
        if self.qc_bytes:
            names.add(QC_LOG)
        names |= {n for n in (self.obs, self.rejected) if n}
        return names


class Store:
    """The state folder: load, commit, and the removal of files no state names."""

    def __init__(self, out: str | Path) -> None:
        self.dir = Path(out) / STATE_DIR
        self.path = self.dir / STATE_FILE

    def load(self) -> FollowState:
        if not self.path.exists():
            return FollowState()
        raw = json.loads(self.path.read_text(encoding="utf-8"))
        if raw.get("version") != VERSION:
            from ..errors import ConfigError

            raise ConfigError(f"{self.path}: follow state of another version; use a new --out folder")
        st = FollowState(**{k: v for k, v in raw.items() if k in FollowState.__dataclass_fields__})
        for k in COUNTS:
            st.counts.setdefault(k, 0)
        return st

    def name(self, kind: str, generation: int, ext: str) -> str:
        return f"{kind}-{generation:06d}.{ext}"

    def file(self, name: str) -> Path:
        return self.dir / name

    def commit(self, state: FollowState) -> None:
        """Make ``state`` the state (one atomic rename)."""
        self.dir.mkdir(parents=True, exist_ok=True)
        data = {f.name: getattr(state, f.name) for f in fields(state)}  # no deep copy: written at once
        with atomic_write(self.path) as tmp:
            tmp.write_text(json.dumps(data, separators=(",", ":")) + "\n", encoding="utf-8")

    def append_bytes(self, name: str, committed: int, data: bytes) -> int:
        """Append ``data`` to the log ``name`` after its ``committed`` bytes (what a killed call appended
        after them is cut off first); returns the new length, to be committed with the state."""
        self.dir.mkdir(parents=True, exist_ok=True)
        with open(self.dir / name, "ab") as fh:
            if fh.tell() != committed:
                fh.truncate(committed)
                fh.seek(committed)
            fh.write(data)
        return committed + len(data)

    def read_bytes(self, name: str, committed: int) -> bytes:
        """The committed part of the log ``name``."""
        if not committed:
            return b""
        with open(self.dir / name, "rb") as fh:
            return fh.read(committed)

    def append_alerts(self, state: FollowState, alerts: list[dict]) -> None:
        """Append ``alerts`` to the alert log (``state`` is updated, to be committed)."""
        if not alerts:
            return
        text = "".join(json.dumps(a) + "\n" for a in alerts).encode("utf-8")
        state.alert_bytes = self.append_bytes(ALERT_LOG, state.alert_bytes, text)
        state.alert_count += len(alerts)

    def alert_log(self, state: FollowState) -> bytes:
        """The committed alert log (JSON lines)."""
        return self.read_bytes(ALERT_LOG, state.alert_bytes)

    def alerts(self, state: FollowState, first: int = 0) -> list[dict]:
        """The committed alerts from number ``first`` on."""
        lines = self.alert_log(state).splitlines()
        return [json.loads(x) for x in lines[first:]]

    def lock(self) -> None:
        """Hold the folder for this process (released when it exits, however it ends): two runs following
        into one folder would undo each other's commits."""
        import fcntl

        key = str(self.dir.resolve()) if self.dir.exists() else str(self.dir)
        if key in _HELD:
            return  # this process holds it already (another call of the same run)
        self.dir.mkdir(parents=True, exist_ok=True)
        key = str(self.dir.resolve())
        fh = open(self.dir / LOCK_FILE, "a+")  # noqa: SIM115 - held open for the life of the process
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            fh.close()
            from ..errors import ConfigError

            raise ConfigError(f"{self.dir.parent}: another follow run is using this output folder") from None
        _HELD[key] = fh

    def unlock(self) -> None:
        """Let the folder go (another process may follow into it now)."""
        if not self.dir.exists():
            return
        fh = _HELD.pop(str(self.dir.resolve()), None)
        if fh is not None:
            fh.close()

    def tidy(self, state: FollowState) -> None:
        """Remove the files of calls that never committed, those the state no longer names, and the temporary
        files of outputs a killed call was writing."""
        if not self.dir.exists():
            return
        keep = state.files() | {STATE_FILE, LOCK_FILE}
        for p in self.dir.iterdir():
            if p.is_file() and p.name not in keep:
                p.unlink(missing_ok=True)
        for p in self.dir.parent.glob(".*.part"):
            p.unlink(missing_ok=True)


class Columns:
    """Rows stored column by column in append-only binary files (``<prefix>.<column>.bin``).

    Appending costs only the new rows, and reading a column is one read.
    The committed row count lives in the state: bytes beyond it (from a call
    that never committed) are cut off before the next append, so a kill
    between an append and the commit loses nothing and doubles nothing.
    """

    def __init__(self, store: Store, prefix: str, layout: dict) -> None:
        self.store = store
        self.prefix = prefix
        self.layout = layout  # column -> [dtype, width] (width: values per row; 0: one value, read as 1-D)

    def path(self, name: str) -> Path:
        return self.store.dir / f"{self.prefix}.{name}.bin"

    def names(self) -> set[str]:
        return {self.path(n).name for n in self.layout}

    def append(self, rows: int, arrays: dict) -> None:
        """Append ``arrays`` (each (k, width) or (k,)) after the first ``rows`` committed rows."""
        import numpy as np

        self.store.dir.mkdir(parents=True, exist_ok=True)
        for name, (dtype, width) in self.layout.items():
            p = self.path(name)
            size = rows * max(1, width) * np.dtype(dtype).itemsize
            with open(p, "ab") as fh:
                if fh.tell() != size:
                    fh.truncate(size)
                    fh.seek(size)
                fh.write(np.ascontiguousarray(arrays[name], dtype=dtype).tobytes())

    def read(self, rows: int, start: int = 0, names: list[str] | None = None) -> dict:
        """Rows ``start .. rows - 1`` (committed) of every column (or of ``names``)."""
        import numpy as np

        out = {}
        for name in names or list(self.layout):
            dtype, width = self.layout[name]
            per_row = max(1, width)
            count = (rows - start) * per_row
            a = np.fromfile(self.path(name), dtype=dtype, count=count, offset=start * per_row * np.dtype(dtype).itemsize)
            if a.size != count:
                raise ValueError(f"{self.path(name)}: {a.size} values where the state has {count}")
            out[name] = a.reshape(rows - start, width) if width else a
        return out
