"""Write the budget table one time partition at a time: budget.parquet, budget.nc, budget.csv.

:class:`BudgetFiles` is a sink for :func:`stationflow.pipeline.run_partitions` (used by
:func:`stationflow.pipeline.budget_to_files` and the Dask engine):
every partition is turned into Arrow arrays and written as Parquet row
groups, as a slab of the (time, cluster) NetCDF variables and, when the
table is small enough (or asked for), as CSV rows.  Nothing but the current
partition is held, so memory does not grow with the length of the record.

Writing runs on two background threads while the next partition is
computed, one for the NetCDF slab and one for the Parquet (and CSV) rows
(pyarrow and HDF5 do their work outside the Python lock; each file is
written by one task at a time, in time order); at most one partition
waits to be written.  All files are written to temporary
names and renamed into place only when every partition has been written;
after an error nothing half-written is left behind.
"""

from __future__ import annotations

import contextlib
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path

import numpy as np

from ..budget import REGIMES
from . import files

CSV_ROW_LIMIT = 1_000_000
ROWS_PER_GROUP = 1_000_000
#: above this many cells per variable the NetCDF file is not compressed (speed over size)
COMPRESS_LIMIT = 1_000_000
#: Parquet columns written without compression: continuous terms whose low bits carry the sensor noise, on
#: which snappy saved under 5 % of the bytes (measured on the 300-station benchmark) at a third of the writer's time
UNCOMPRESSED = frozenset({"advection", "advection_se", "residual", "residual_se", "advection_instant",
                          "advection_instant_se", "grad_x", "grad_y", "u", "v", "divergence", "vorticity",
                          "wind_from_direction", "gradient_bearing", "vertical_gradient"})


def table_columns(names: list[str]) -> list[str]:
    """Column order of the tidy table: the contract columns, then the extras in computation order."""
    from ..pipeline import TABLE_COLUMNS

    have = set(names) | {"time", "cluster", "stations", "latitude", "longitude"}
    return [c for c in TABLE_COLUMNS if c in have] + [c for c in names if c not in TABLE_COLUMNS]


def csv_wanted(rows: int, csv: bool = False) -> bool:
    """Whether budget.csv is written: asked for, or at most :data:`CSV_ROW_LIMIT` rows."""
    return csv or rows <= CSV_ROW_LIMIT


def csv_skipped(rows: int) -> str:
    """The note printed when budget.csv is not written."""
    return f"budget.csv not written: {rows:,} rows > {CSV_ROW_LIMIT:,}; use budget.parquet or pass --csv"


class BudgetFiles:
    """A sink that writes the budget files partition by partition (use as a context manager).

    ``csv``: write budget.csv regardless of size; otherwise it is written
    when the table has at most :data:`CSV_ROW_LIMIT` rows.
    """

    def __init__(self, out: str | Path, layout, *, csv: bool = False, background: bool = True) -> None:
        self.out = Path(out)
        self.layout = layout
        n_t, n_c = len(layout.times), len(layout.clusters)
        self.rows = n_t * n_c
        self.write_csv = csv_wanted(self.rows, csv)
        self.notes: list[str] = []
        if not self.write_csv:
            self.notes.append(csv_skipped(self.rows))
        self.paths = [self.out / "budget.parquet", self.out / "budget.nc"] + ([self.out / "budget.csv"] if self.write_csv else [])
        self._stack = contextlib.ExitStack()
        # two writers: much of a write is the kernel's (fresh page-cache pages for the new files), and when the
        # machine is slow at that, one writer thread held up the partitions while a core stood idle
        self._pool = ThreadPoolExecutor(max_workers=2, thread_name_prefix="stationflow-writer") if background else None
        self._pending: list[Future] = []
        self._opened = False
        self._time_ns = layout.times.tz_convert("UTC").tz_localize(None).as_unit("ns").asi8
        self._written = 0

    # ---- context -------------------------------------------------------------------------

    def __enter__(self) -> "BudgetFiles":
        self.out.mkdir(parents=True, exist_ok=True)
        self._tmp = {p.name: self._stack.enter_context(files.atomic_write(p)) for p in self.paths}
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        try:
            if exc_type is None:
                self._wait()
                if self._written != len(self.layout.times):
                    raise RuntimeError(f"budget files: {self._written} of {len(self.layout.times)} analysis steps written")
        except BaseException as err:  # a failed write: remove the temporary files, raise
            self._shutdown()
            self._stack.__exit__(type(err), err, err.__traceback__)
            raise
        self._shutdown()
        done = bool(self._stack.__exit__(exc_type, exc, tb))
        stale = self.out / "budget.csv"
        if exc_type is None and not self.write_csv and stale.exists():
            stale.unlink()  # from an earlier run of a smaller table: it would not match these files
        return done

    def _shutdown(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True)

    def _wait(self) -> None:
        """Wait for the partition being written; raise the first error once both writers are done."""
        pending, self._pending = self._pending, []
        errors = [f.exception() for f in pending]  # waits for each: no writer is left running on an error
        for err in errors:
            if err is not None:
                raise err

    # ---- the sink --------------------------------------------------------------------------

    def add(self, first: int, block: dict[str, np.ndarray]) -> None:
        """Write the derived arrays of analysis steps ``first ..`` (in time order)."""
        self._wait()  # at most one partition in flight: memory stays bounded
        if not self._opened:
            self._open(block)
        k = block["regime"].shape[0]
        if first != self._written:
            raise RuntimeError(f"budget files: partition starting at step {first} after {self._written} steps")
        if self._pool is None:
            self._write_netcdf(first, block)
            self._write_tables(first, block)
        else:
            self._pending = [self._pool.submit(self._write_netcdf, first, block),
                             self._pool.submit(self._write_tables, first, block)]
        self._written += k

    def _write_tables(self, first: int, block: dict[str, np.ndarray]) -> None:
        """The Parquet row groups (and CSV rows) of a partition."""
        k = block["regime"].shape[0]
        n_c = len(self.layout.clusters)
        step = max(1, ROWS_PER_GROUP // max(1, n_c))
        for a in range(0, k, step):
            table = self._arrow(first, {n: v[a:a + step] for n, v in block.items()})
            self._parquet.write_table(table, row_group_size=ROWS_PER_GROUP)
            if self.write_csv:
                self._csv.write_table(self._csv_table(table))

    # ---- Arrow / Parquet / CSV --------------------------------------------------------------

    def _open(self, block: dict[str, np.ndarray]) -> None:
        import pyarrow as pa
        import pyarrow.csv as pacsv
        import pyarrow.parquet as pq

        clusters = self.layout.clusters
        n_c = len(clusters)
        self._index_type = pa.int16() if n_c < 2 ** 15 else pa.int32()
        self._cluster_names = pa.array(clusters["cluster"].astype(str).to_numpy(), pa.string())
        self._station_names = pa.array(clusters["stations"].astype(str).to_numpy(), pa.string())
        self._lat = clusters["latitude"].to_numpy(float)
        self._lon = clusters["longitude"].to_numpy(float)
        self._regimes = pa.array(list(REGIMES), pa.string())
        self._names = list(block)
        self._columns = table_columns(self._names)
        self._schema = None
        sample = self._arrow(0, {n: v[:0] for n, v in block.items()})
        # every column is REQUIRED (no nulls: a missing number is NaN): the Parquet writer then writes
        # no definition levels (measured: 0.3 s less writer time on the 300-station benchmark)
        self.schema = self._schema = pa.schema([f.with_nullable(False) for f in sample.schema])
        self._parquet = self._stack.enter_context(
            # dictionary encoding only for the label columns, and min/max statistics only for the columns one
            # filters on (time range, cluster): for the float columns both cost time and gain nothing
            pq.ParquetWriter(self._tmp["budget.parquet"], self.schema,
                             compression={c: "none" if c in UNCOMPRESSED else "snappy" for c in self.schema.names},
                             use_dictionary=["cluster", "stations", "regime"], write_statistics=["time", "cluster"]))
        if self.write_csv:
            self._csv = self._stack.enter_context(
                pacsv.CSVWriter(self._tmp["budget.csv"], self._csv_table(sample).schema,
                                write_options=pacsv.WriteOptions(quoting_style="needed")))
        self._open_netcdf(block)
        self._opened = True

    def _arrow(self, first: int, block: dict[str, np.ndarray]):
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
        for name in self._names:
            a = np.asarray(block[name]).reshape(-1)
            if name == "regime":
                cols[name] = pa.DictionaryArray.from_arrays(pa.array(a, pa.int8()), self._regimes)
            else:
                cols[name] = pa.array(a)
        return pa.Table.from_arrays([cols[c] for c in self._columns], schema=self._schema) \
            if self._schema is not None else pa.table({c: cols[c] for c in self._columns})

    @staticmethod
    def _csv_table(table):
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

    # ---- NetCDF -------------------------------------------------------------------------------

    def _open_netcdf(self, block: dict[str, np.ndarray]) -> None:
        import netCDF4

        from ..pipeline import COORD_ATTRS, TIME_ATTRS, global_attrs, variable_attrs

        lay = self.layout
        n_t, n_c = len(lay.times), len(lay.clusters)
        nc = netCDF4.Dataset(self._tmp["budget.nc"], "w", format="NETCDF4")
        # every cell is written (the partitions cover all analysis steps, checked on closing): no pre-fill of
        # each variable with its _FillValue on its first write, which wrote the whole file once more
        nc.set_fill_off()
        self._stack.callback(nc.close)
        self._nc = nc
        nc.setncatts(global_attrs(lay))
        nc.createDimension("time", n_t)
        nc.createDimension("cluster", n_c)
        tv = nc.createVariable("time", "f8", ("time",))
        tv.setncatts({**TIME_ATTRS, "units": "seconds since 1970-01-01 00:00:00", "calendar": "standard"})
        tv[:] = self._time_ns / 1e9
        for name in ("cluster", "stations"):
            v = nc.createVariable(name, str, ("cluster",))
            v.setncatts(COORD_ATTRS[name])
            v[:] = lay.clusters[name].astype(str).to_numpy(object)
        for name in ("latitude", "longitude"):
            v = nc.createVariable(name, "f8", ("cluster",))
            v.setncatts(COORD_ATTRS[name])
            v[:] = lay.clusters[name].to_numpy(float)
        small = n_t * n_c <= COMPRESS_LIMIT
        self._nc_vars = {}
        for name in self._names:
            a = np.asarray(block[name])
            attrs = variable_attrs(name, lay)
            kw: dict = {}
            if a.dtype.kind == "f":
                dtype, kw["fill_value"] = "f4", np.float32(np.nan)  # 7 significant digits, plenty for budget terms
                if small:
                    kw.update(zlib=True, complevel=1, shuffle=True)
            elif a.dtype.kind == "b":
                dtype = "i1"
                attrs["dtype"] = "bool"  # read back as booleans (xarray convention)
            elif name == "regime":
                dtype = "i1"
            else:
                dtype = a.dtype.str.lstrip("<>|=")
            if not small:
                kw["contiguous"] = True  # each partition is one contiguous slab (time-major)
            var = nc.createVariable(name, dtype, ("time", "cluster"), **kw)
            var.set_auto_maskandscale(False)
            var.setncatts({**attrs, "coordinates": "latitude longitude stations"})
            self._nc_vars[name] = var

    def _write_netcdf(self, first: int, block: dict[str, np.ndarray]) -> None:
        k = block["regime"].shape[0]
        for name, var in self._nc_vars.items():
            a = np.asarray(block[name])
            if a.dtype.kind == "f":
                a = a.astype(np.float32)
            elif a.dtype.kind == "b":
                a = a.astype(np.int8)
            var[first:first + k, :] = a
