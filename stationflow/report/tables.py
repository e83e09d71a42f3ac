"""The budget table written one time partition at a time: budget.parquet (and budget.csv).

:class:`TableFiles` is a sink (:mod:`stationflow.run.sinks`): every
partition is turned into Arrow arrays and written as Parquet row groups
and, when the table is small enough (or asked for), as CSV rows.  Nothing but
the current partition is held, so memory does not grow with the length of
the record.  The column order, types and compression come from
:mod:`stationflow.schema`.  The writing runs on a background thread
(:class:`stationflow.run.workers.BackgroundWriter`) while the next partition
is computed.  The files are written to temporary names and renamed into
place by :meth:`TableFiles.close`; after an error nothing half-written is
left behind.  :func:`budget_files` opens every budget file sink at once.
"""

from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Iterator

import numpy as np
import pandas as pd

from ..estimate.budget import REGIMES
from ..run.workers import BackgroundWriter
from ..schema import CLUSTER_LABELS, UNCOMPRESSED, table_columns
from . import files

CSV_ROW_LIMIT = 1_000_000
ROWS_PER_GROUP = 1_000_000


def csv_wanted(rows: int, csv: bool = False) -> bool:
    """Whether budget.csv is written: asked for, or at most :data:`CSV_ROW_LIMIT` rows."""
    return csv or rows <= CSV_ROW_LIMIT


def csv_skipped(rows: int) -> str:
    """The note printed when budget.csv is not written."""
    return f"budget.csv not written: {rows:,} rows > {CSV_ROW_LIMIT:,}; use budget.parquet or pass --csv"


class FileSink:
    """What the budget file sinks share: atomic temporary files, a background writer, a step count.

    Use as a context manager: on success :meth:`close` renames the files into
    place; on an error they are removed.  Subclasses define ``paths``,
    ``_open(terms)`` and ``_write(first, terms)``.
    """

    paths: list[Path]

    def __init__(self, out: str | Path, layout, *, background: bool = True, name: str = "writer") -> None:
        self.out = Path(out)
        self.layout = layout
        self._stack = contextlib.ExitStack()
        self._writer = BackgroundWriter(name, background=background)
        self._opened = False
        self._written = 0
        self._time_ns = layout.times.tz_convert("UTC").tz_localize(None).as_unit("ns").asi8

    def __enter__(self):
        self.out.mkdir(parents=True, exist_ok=True)
        self._tmp = {p.name: self._stack.enter_context(files.atomic_write(p)) for p in self.paths}
        return self

    def write(self, part) -> None:
        """Write a :class:`~stationflow.run.sinks.Partition` (they come in time order)."""
        if part.first != self._written:
            raise RuntimeError(f"{self.paths[0].name}: partition starting at step {part.first} after {self._written} steps")
        if not self._opened:
            self._writer.wait()
            self._open(part.terms)
            self._opened = True
        self._writer.submit(self._write, part.first, part.terms)
        self._written += part.steps

    def close(self) -> None:
        """Finish: wait for the last write, check every step was written, rename the files into place."""
        try:
            self._writer.close()
            if self._written != len(self.layout.times):
                raise RuntimeError(f"{self.paths[0].name}: {self._written} of {len(self.layout.times)} analysis steps written")
        except BaseException as err:
            self._stack.__exit__(type(err), err, err.__traceback__)
            raise
        self._stack.__exit__(None, None, None)

    def abort(self, exc: BaseException | None = None) -> None:
        """Stop writing and remove the temporary files."""
        self._writer.shutdown()
        err = exc or RuntimeError("aborted")
        self._stack.__exit__(type(err), err, err.__traceback__)

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is None:
            self.close()
        else:
            self.abort(exc)
        return False


class TableFiles(FileSink):
    """budget.parquet, and budget.csv when ``csv`` or the table has at most :data:`CSV_ROW_LIMIT` rows."""

    def __init__(self, out: str | Path, layout, *, csv: bool = False, background: bool = True,
                 with_csv: bool | None = None) -> None:
        self.rows = len(layout.times) * len(layout.clusters)
        self.write_csv = csv_wanted(self.rows, csv) if with_csv is None else with_csv
        self.notes: list[str] = [] if self.write_csv or with_csv is not None else [csv_skipped(self.rows)]
        self.paths = [Path(out) / "budget.parquet"] + ([Path(out) / "budget.csv"] if self.write_csv else [])
        self._remove_stale = with_csv is None  # with_csv=False: the caller writes budget.csv itself
        super().__init__(out, layout, background=background, name="table-writer")

    def close(self) -> None:
        super().close()
        stale = self.out / "budget.csv"
        if not self.write_csv and self._remove_stale and stale.exists():
            stale.unlink()  # from an earlier run of a smaller table: it would not match these files

    def _write(self, first: int, block: dict[str, np.ndarray]) -> None:
        """The Parquet row groups (and CSV rows) of a partition."""
        k = block["regime"].shape[0]
        n_c = len(self.layout.clusters)
        step = max(1, ROWS_PER_GROUP // max(1, n_c))
        for a in range(0, k, step):
            table = self._rows.arrow(first, {n: v[a:a + step] for n, v in block.items()})
            self._parquet.write_table(table, row_group_size=ROWS_PER_GROUP)
            if self.write_csv:
                self._csv.write_table(Rows.csv_table(table))

    def _open(self, block: dict[str, np.ndarray]) -> None:
        import pyarrow.csv as pacsv
        import pyarrow.parquet as pq

        self._rows = Rows(self.layout, block)
        self.schema = self._rows.schema
        labels = self._rows.labels
        # dictionary encoding only for the label columns, and min/max statistics only for the columns one
        # filters on (time range, cluster): for the float columns both cost time and gain nothing
        self._parquet = self._stack.enter_context(
            pq.ParquetWriter(self._tmp["budget.parquet"], self.schema,
                             compression={c: "none" if c in UNCOMPRESSED else "snappy" for c in self.schema.names},
                             use_dictionary=["cluster", "stations", "regime", *labels],
                             write_statistics=["time", "cluster"]))
        if self.write_csv:
            sample = self._rows.arrow(0, {n: v[:0] for n, v in block.items()})
            self._csv = self._stack.enter_context(
                pacsv.CSVWriter(self._tmp["budget.csv"], Rows.csv_table(sample).schema,
                                write_options=pacsv.WriteOptions(quoting_style="needed")))

class Rows:
    """How partitions become rows of the budget table: Arrow tables with the labels, codes and schema of
    ``layout`` (taken from the first partition's columns ``block``)."""

    def __init__(self, layout, block: dict[str, np.ndarray]) -> None:
        import pyarrow as pa

        self.layout = layout
        self._time_ns = layout.times.tz_convert("UTC").tz_localize(None).as_unit("ns").asi8
        clusters = self.layout.clusters
        n_c = len(clusters)
        self._index_type = pa.int16() if n_c < 2 ** 15 else pa.int32()
        self._cluster_names = pa.array(clusters["cluster"].astype(str).to_numpy(), pa.string())
        self._station_names = pa.array(clusters["stations"].astype(str).to_numpy(), pa.string())
        self._lat = clusters["latitude"].to_numpy(float)
        self._lon = clusters["longitude"].to_numpy(float)
        self._regimes = pa.array(list(REGIMES), pa.string())
        self._names = list(block)
        self.labels = [c for c in CLUSTER_LABELS if c in clusters]  # per-cluster labels (scale)
        self._label_values = {c: pa.array(sorted(set(clusters[c].astype(str))), pa.string()) for c in self.labels}
        self._label_codes = {c: pd.Index(self._label_values[c].to_pylist()).get_indexer(clusters[c].astype(str))
                             for c in self.labels}
        self._columns = table_columns(self.labels + self._names)
        self._schema = None
        sample = self.arrow(0, {n: v[:0] for n, v in block.items()})
        # every column is REQUIRED (no nulls: a missing number is NaN): the Parquet writer then writes
        # no definition levels (measured: 0.3 s less writer time on the 300-station benchmark)
        self.schema = self._schema = pa.schema([f.with_nullable(False) for f in sample.schema])

    def arrow(self, first: int, block: dict[str, np.ndarray]):
        """The Arrow table of the analysis steps ``first ..`` of ``block``."""
        import pyarrow as pa

        k = block["regime"].shape[0]
        n_c = len(self.layout.clusters)
        codes = np.tile(np.arange(n_c), k)
        cols = {
            "time": pa.array(np.repeat(self._time_ns[first:first + k], n_c), pa.timestamp("ns", tz="UTC")),
            "cluster": pa.DictionaryArray.from_arrays(pa.array(codes, self._index_type), self._cluster_names),
            "stations": pa.DictionaryArray.from_arrays(pa.array(codes, self._index_type), self._station_names),
            "latitude": pa.array(np.tile(self._lat, k)),
            "longitude": pa.array(np.tile(self._lon, k)),
        }
        for name in self.labels:
            cols[name] = pa.DictionaryArray.from_arrays(pa.array(np.tile(self._label_codes[name], k), pa.int8()),
                                                        self._label_values[name])
        for name in self._names:
            a = np.asarray(block[name]).reshape(-1)
            if name == "regime":
                cols[name] = pa.DictionaryArray.from_arrays(pa.array(a, pa.int8()), self._regimes)
            else:
                cols[name] = pa.array(a)
        return pa.Table.from_arrays([cols[c] for c in self._columns], schema=self._schema) \
            if self._schema is not None else pa.table({c: cols[c] for c in self._columns})

    @staticmethod
    def csv_table(table):
        """The CSV form: ISO 8601 UTC times with Z, labels as plain strings."""
        import pyarrow as pa
        import pyarrow.compute as pc

        cols, names = [], []
        for name, col in zip(table.column_names, table.columns):
            if name == "time":
                col = pc.strftime(pc.cast(col, pa.timestamp("s", tz="UTC")), "%Y-%m-%dT%H:%M:%SZ")
            elif pa.types.is_dictionary(col.type):
                col = pc.cast(col, pa.string())
            cols.append(col)
            names.append(name)
        return pa.table(cols, names=names)


def csv_rows(layout, first: int, block: dict[str, np.ndarray], *, header: bool) -> bytes:
    """The budget.csv text of the analysis steps ``first ..`` of ``block`` (with the header line when
    ``header``), exactly as :class:`TableFiles` writes them: a table can be written in pieces."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    table = Rows.csv_table(Rows(layout, block).arrow(first, block))
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink, write_options=pacsv.WriteOptions(quoting_style="needed", include_header=header))
    return sink.getvalue().to_pybytes()


@contextlib.contextmanager
def budget_files(out: str | Path, layout, *, csv: bool = False, background: bool = True,
                 with_csv: bool | None = None) -> Iterator[list]:
    """The budget file sinks (budget.parquet [+ budget.csv], budget.nc), opened together; on leaving the
    block they are closed (renamed into place) on success, removed on an error.  ``with_csv``: write
    budget.csv (True) or leave it to the caller (False) instead of the automatic choice."""
    from .netcdf import NetCDFFile

    with contextlib.ExitStack() as stack:
        sinks = [stack.enter_context(NetCDFFile(out, layout, background=background)),
                 stack.enter_context(TableFiles(out, layout, csv=csv, background=background, with_csv=with_csv))]
        yield sinks
