"""The budget as CF-style NetCDF, written one time partition at a time: budget.nc.

:class:`NetCDFFile` is a sink (:mod:`stationflow.run.sinks`): dims
(``time``, ``cluster``), every variable with the units and long name of
:mod:`stationflow.schema`; floats stored as float32, booleans as int8 with
``dtype = "bool"``, ``regime`` as CF flags.  Each partition is one slab of
every variable, written on a background thread.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..schema import (
    CLUSTER_LABELS,
    COORD_ATTRS,
    TIME_ATTRS,
    global_attrs,
    variable_attrs,
)
from .tables import FileSink

#: above this many cells per variable the NetCDF file is not compressed (speed over size)
COMPRESS_LIMIT = 1_000_000


class NetCDFFile(FileSink):
    """budget.nc (see the module docstring)."""

    def __init__(self, out: str | Path, layout, *, background: bool = True) -> None:
        self.paths = [Path(out) / "budget.nc"]
        super().__init__(out, layout, background=background, name="netcdf-writer")

    def _open(self, block: dict[str, np.ndarray]) -> None:
        import netCDF4

        lay = self.layout
        n_t, n_c = len(lay.times), len(lay.clusters)
        nc = netCDF4.Dataset(self._tmp["budget.nc"], "w", format="NETCDF4")
        # every cell is written (the partitions cover all analysis steps, checked on closing): no pre-fill of
        # each variable with its _FillValue on its first write, which wrote the whole file once more
        nc.set_fill_off()
        self._stack.callback(nc.close)
        nc.setncatts(global_attrs(lay))
        nc.createDimension("time", n_t)
        nc.createDimension("cluster", n_c)
        tv = nc.createVariable("time", "f8", ("time",))
        tv.setncatts({**TIME_ATTRS, "units": "seconds since 1970-01-01 00:00:00", "calendar": "standard"})
        tv[:] = self._time_ns / 1e9
        for name in ("cluster", "stations") + tuple(c for c in CLUSTER_LABELS if c in lay.clusters):
            v = nc.createVariable(name, str, ("cluster",))
            v.setncatts(COORD_ATTRS[name])
            v[:] = lay.clusters[name].astype(str).to_numpy(object)
        for name in ("latitude", "longitude"):
            v = nc.createVariable(name, "f8", ("cluster",))
            v.setncatts(COORD_ATTRS[name])
            v[:] = lay.clusters[name].to_numpy(float)
        small = n_t * n_c <= COMPRESS_LIMIT
        self._vars = {name: self._variable(nc, name, np.asarray(a), small) for name, a in block.items()}

    def _variable(self, nc, name: str, a: np.ndarray, small: bool):
        """Create one (time, cluster) variable with its attributes and storage."""
        attrs = variable_attrs(name, self.layout)
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
        labels = " ".join(c for c in CLUSTER_LABELS if c in self.layout.clusters)
        var.setncatts({**attrs, "coordinates": f"latitude longitude stations {labels}".strip()})
        return var

    def _write(self, first: int, block: dict[str, np.ndarray]) -> None:
        k = block["regime"].shape[0]
        for name, var in self._vars.items():
            a = np.asarray(block[name])
            if a.dtype.kind == "f":
                a = a.astype(np.float32)
            elif a.dtype.kind == "b":
                a = a.astype(np.int8)
            var[first:first + k, :] = a
