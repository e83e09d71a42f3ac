"""The budget in memory: partitions joined into an ``xarray.Dataset`` and a tidy table.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..estimate.budget import REGIMES
from ..run.plan import Layout
from ..schema import (
    CLUSTER_LABELS,
    COORD_ATTRS,
    COORDINATES,
    TIME_ATTRS,
    global_attrs,
    table_columns,
    variable_attrs,
)


def to_dataset(terms: dict, layout: Layout):
    """The budget as a CF-style ``xarray.Dataset`` with dims (time, cluster); ``terms`` from :func:`derive`."""
    import xarray as xr

    clusters = layout.clusters
    data_vars = {}
    for name, arr in terms.items():
        arr = np.asarray(arr, dtype=np.int8) if name == "regime" else np.asarray(arr)
        data_vars[name] = (("time", "cluster"), arr, variable_attrs(name, layout))
    coords = {"time": ("time", pd.DatetimeIndex(layout.times).tz_convert("UTC").tz_localize(None).to_numpy("datetime64[ns]"),
                       TIME_ATTRS)}
    for name in ("cluster", "stations") + tuple(c for c in CLUSTER_LABELS if c in clusters):
        coords[name] = ("cluster", clusters[name].astype(str).to_numpy(), COORD_ATTRS[name])
    for name in ("latitude", "longitude"):
        coords[name] = ("cluster", clusters[name].to_numpy(float), COORD_ATTRS[name])
    return xr.Dataset(data_vars, coords=coords, attrs=global_attrs(layout))


def to_table(ds) -> pd.DataFrame:
    """Tidy table, one row per cluster and time: the contract columns first, then the extras."""
    n_t, n_c = ds.sizes["time"], ds.sizes["cluster"]
    code = np.tile(np.arange(n_c, dtype=np.int32), n_t)
    cols: dict[str, object] = {
        "time": pd.DatetimeIndex(ds["time"].values).tz_localize("UTC").repeat(n_c),
        "cluster": pd.Categorical.from_codes(code, categories=pd.Index(ds["cluster"].values.astype(str))),
        "stations": pd.Categorical.from_codes(code, categories=pd.Index(ds["stations"].values.astype(str))),
        "latitude": np.tile(ds["latitude"].values, n_t),
        "longitude": np.tile(ds["longitude"].values, n_t),
    }
    for name in CLUSTER_LABELS:
        if name in ds.coords:
            labels = ds[name].values.astype(str)
            cats = sorted(set(labels))
            cols[name] = pd.Categorical.from_codes(np.tile(pd.Index(cats).get_indexer(labels), n_t), categories=cats)
    for name in ds.data_vars:
        if name == "regime":
            cols[name] = pd.Categorical.from_codes(ds[name].values.reshape(-1), categories=list(REGIMES))
        else:
            cols[name] = ds[name].values.reshape(-1)
    t = pd.DataFrame(cols, copy=False)
    return t[table_columns([c for c in t.columns if c not in COORDINATES])]
