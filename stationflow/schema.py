"""The output schema: every budget column's name, type, unit and long name, in one table.

:data:`COLUMNS` is read by the Parquet/CSV writer (column order and
compression), the NetCDF writer and the in-memory dataset (CF attributes),
the report, and the generator of docs/outputs.md (``python -m
stationflow.docgen docs``; a test fails when that page is stale).  Add an
output column: one line here, plus its computation (a new key in the terms
of :func:`stationflow.estimate.budget.compute_budget` or of
:func:`stationflow.run.partitions.derive`).

Units are templates: ``{u}`` is the budgeted variable's unit (``K``,
``ug m-3``...).  Columns with ``contract=True`` are the fixed first columns
of budget.csv / budget.parquet, in this order; the others follow in the
order the computation produces them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .estimate.budget import REGIMES
from .variables import CANONICAL


@dataclass(frozen=True)
class Column:
    """One output column."""

    name: str
    dtype: str  # as stored in budget.parquet: float64, int32, bool, timestamp, label
    unit: str  # template: {u} is the variable's unit; "" for labels
    long_name: str
    contract: bool = False  # one of the fixed first columns
    compress: bool = True  # Parquet compression (False: continuous terms whose low bits are sensor noise)


RATE, GRAD, VERT = "{u} h-1", "{u} km-1", "{u} (100 m)-1"
SE = "standard error of "

#: every column of the budget table, the contract columns first (in their order)
COLUMNS: tuple[Column, ...] = (
    Column("time", "timestamp", "", "end of the analysis interval (UTC)", contract=True),
    Column("cluster", "label", "", "cluster id", contract=True),
    Column("stations", "label", "", "member station ids joined by +", contract=True),
    Column("n_used", "int32", "1", "stations used in the plane fit", contract=True),
    Column("latitude", "float64", "degrees_north", "cluster centroid latitude", contract=True),
    Column("longitude", "float64", "degrees_east", "cluster centroid longitude", contract=True),
    Column("value", "float64", "{u}", "fitted value at the cluster centre", contract=True),
    Column("tendency", "float64", RATE, "local rate of change (centred difference over the window)", contract=True),
    Column("advection", "float64", RATE, "horizontal advection -V.grad, mean over the window", contract=True,
           compress=False),
    Column("residual", "float64", RATE, "in-situ part: tendency minus advection", contract=True, compress=False),
    Column("tendency_se", "float64", RATE, SE + "tendency", contract=True),
    Column("advection_se", "float64", RATE, SE + "advection", contract=True, compress=False),
    Column("residual_se", "float64", RATE, SE + "residual", contract=True, compress=False),
    Column("grad_x", "float64", GRAD, "eastward (grid) component of the horizontal gradient", contract=True,
           compress=False),
    Column("grad_y", "float64", GRAD, "northward (grid) component of the horizontal gradient", contract=True,
           compress=False),
    Column("u", "float64", "m s-1", "eastward (grid) wind, cluster mean", contract=True, compress=False),
    Column("v", "float64", "m s-1", "northward (grid) wind, cluster mean", contract=True, compress=False),
    Column("regime", "label", "1", "advective, in_situ, mixed, steady or undetermined", contract=True),
    Column("scale", "label", "", "local: the plane of a cluster of neighbouring stations; regional: one plane through "
                                 "the whole network (cluster 'network')"),
    Column("value_se", "float64", "{u}", SE + "value"),
    Column("advection_instant", "float64", RATE, "horizontal advection at the analysis time", compress=False),
    Column("advection_instant_se", "float64", RATE, SE + "advection_instant", compress=False),
    Column("grad_x_se", "float64", GRAD, SE + "grad_x"),
    Column("grad_y_se", "float64", GRAD, SE + "grad_y"),
    Column("model_error", "float64", GRAD,
           "standard error of each gradient component from the departure of the field from a plane"),
    Column("u_se", "float64", "m s-1", SE + "u"),
    Column("v_se", "float64", "m s-1", SE + "v"),
    Column("n_wind", "int32", "1", "member stations with wind (0: network-mean wind used)"),
    Column("dof", "int32", "1", "residual degrees of freedom of the plane fit"),
    Column("rms", "float64", "{u}", "residual RMS of the plane fit"),
    Column("cond", "float64", "1", "condition number of the scaled design"),
    Column("gap_filled", "bool", "1", "value interpolated across a short gap (no fit at this time)"),
    Column("vertical_gradient", "float64", VERT, "fitted vertical gradient (positive: inversion)", compress=False),
    Column("vertical_gradient_se", "float64", VERT, SE + "vertical_gradient"),
    Column("wind_speed", "float64", "m s-1", "cluster mean of station wind speeds (scalar mean)"),
    Column("divergence", "float64", "s-1", "horizontal divergence of the wind (plane fits of u and v)", compress=False),
    Column("divergence_se", "float64", "s-1", SE + "divergence"),
    Column("vorticity", "float64", "s-1", "vertical vorticity of the wind (plane fits of u and v)", compress=False),
    Column("vorticity_se", "float64", "s-1", SE + "vorticity"),
    Column("implausible", "bool", "1",
           "advected and in-situ parts each far larger than the change and cancelling (labelled undetermined)"),
    Column("inversion", "float64", "K", "mast temperature difference, upper minus surface sensor (network mean)"),
    Column("wind_from_direction", "float64", "degree", "direction the cluster-mean wind blows from (true north)",
           compress=False),
    Column("gradient_bearing", "float64", "degree", "bearing toward higher values (true north)", compress=False),
    Column("provisional", "bool", "1", "budget --follow only: the row may still change as data arrive (final rows equal a "
                                       "batch run with settings.toml)"),
    Column("one_sided", "bool", "1", "budget --follow only: tendency, advection and in-situ part are those of the last "
                                     "complete window, ending at this time, with its drift added to their errors"),
)
BY_NAME = {c.name: c for c in COLUMNS}
#: the fixed first columns of the budget table, in order
TABLE_COLUMNS = [c.name for c in COLUMNS if c.contract]
#: the columns that label a row (time and cluster coordinates) rather than carry a computed term
COORDINATES = ("time", "cluster", "stations", "latitude", "longitude")
#: per-cluster labels that become table columns when the layout has them (after the contract columns)
CLUSTER_LABELS = ("scale",)
#: Parquet columns written without compression: continuous terms whose low bits carry the sensor noise, on
#: which snappy saved under 5 % of the bytes (measured on the 300-station benchmark) at a third of the writer's time
UNCOMPRESSED = frozenset(c.name for c in COLUMNS if not c.compress)


def table_columns(names: list[str]) -> list[str]:
    """Column order of the budget table for computed ``names``: the contract columns, then the rest in order."""
    have = set(names) | set(COORDINATES)
    return [c for c in TABLE_COLUMNS if c in have] + [c for c in names if c not in TABLE_COLUMNS]


def unit_of(name: str, unit: str) -> str | None:
    """The unit of column ``name`` for a budget of a variable in ``unit`` (None for an unknown column)."""
    col = BY_NAME.get(name)
    return col.unit.replace("{u}", unit) if col is not None and col.unit else None


def variable_attrs(name: str, layout) -> dict:
    """CF attributes of one output variable (``long_name``, ``units``, flags, ``standard_name``)."""
    col = BY_NAME.get(name)
    attrs: dict = {"long_name": col.long_name if col else name}
    units = unit_of(name, layout.unit)
    if units is not None:
        attrs["units"] = units
    if name == "regime":  # CF flags: small integer codes with flag_values / flag_meanings
        attrs["flag_values"] = np.arange(len(REGIMES), dtype=np.int8)
        attrs["flag_meanings"] = " ".join(REGIMES)
    if name == "value":
        if layout.quantity == "potential_temperature":
            attrs["long_name"] = "potential temperature at the cluster centre"
            attrs["standard_name"] = "air_potential_temperature"
        elif layout.variable in CANONICAL:
            attrs["standard_name"] = layout.variable
    return attrs


TIME_ATTRS = {"long_name": BY_NAME["time"].long_name, "standard_name": "time"}
COORD_ATTRS = {
    "cluster": {"long_name": BY_NAME["cluster"].long_name},
    "stations": {"long_name": BY_NAME["stations"].long_name},
    "latitude": {"units": "degrees_north", "standard_name": "latitude", "long_name": BY_NAME["latitude"].long_name},
    "longitude": {"units": "degrees_east", "standard_name": "longitude", "long_name": BY_NAME["longitude"].long_name},
    "scale": {"long_name": BY_NAME["scale"].long_name},
}


def global_attrs(layout) -> dict:
    """Global attributes of the NetCDF output."""
    return {"Conventions": "CF-1.8", "title": f"stationflow budget of {layout.variable}", "variable": layout.variable,
            "quantity": layout.quantity, "source": "stationflow"}


def markdown_table() -> str:
    """The column table of docs/outputs.md (generated from :data:`COLUMNS`)."""
    rows = ["| column | type | unit | meaning |", "|---|---|---|---|"]
    for c in COLUMNS:
        unit = c.unit.replace("{u}", "unit") if c.unit else ""
        first = " (fixed)" if c.contract else ""
        rows.append(f"| `{c.name}`{first} | {c.dtype} | {unit} | {c.long_name} |")
    return "\n".join(rows) + "\n"
