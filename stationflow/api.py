"""The jobs, end to end: what the command line runs and what the Python API offers.

Wires the stages: :mod:`stationflow.run` (check, plan, partitions, engines)
hands each finished time partition to the sinks made here from
:mod:`stationflow.report` (the report summary, the budget files, or the
in-memory dataset).  This is the one module that knows both sides.

- :func:`run_check`: read and quality-control (:mod:`stationflow.run.check`);
- :func:`run_network`: the clusters of a station table;
- :func:`run_budget`, :func:`budget_from_check`: the budget in memory
  (``run.dataset``, ``run.table``);
- :func:`budget_to_files`: the budget written partition by partition to
  budget.parquet, budget.nc (and budget.csv), memory bounded by a partition.

Each budget job runs on the local engine or, with ``engine="dask"``, on
dask.distributed (:mod:`stationflow.run.distributed`); the results are the same.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import pandas as pd

from .config import Config
from .errors import ConfigError
from .estimate.budget import BudgetSettings
from .network import geometry
from .report.summary import BudgetSummary
from .run.check import CheckResult, Progress, no_progress, run_check
from .run.plan import BudgetPlan, Layout, plan_budget
from .run.sinks import MemorySink

ENGINES = ("local", "dask")


@dataclass
class BudgetRun:
    """The budget of one variable: its summary and main periods (and, in memory, the dataset and table)."""

    check: CheckResult
    network: geometry.Network
    dataset: object  # xarray.Dataset; None when the budget was written to files
    table: pd.DataFrame | None  # None when the budget was written to files
    periods: list[dict]
    variable: str
    quantity: str
    unit: str
    interval: pd.Timedelta
    window: pd.Timedelta
    settings: BudgetSettings
    extras: dict = field(default_factory=dict)
    summary: BudgetSummary | None = None
    layout: Layout | None = None
    choices: dict = field(default_factory=dict)  # what the defaults resolved to (see BudgetPlan.choices)
    regional: BudgetSummary | None = None  # the network-scale rows (budget.regional), summarised
    sensors: pd.DataFrame | None = None  # sensor offsets and gains against the neighbours (sensor_offsets.csv)


def run_network(stations: pd.DataFrame, config: Config) -> geometry.Network:
    """Project the stations and form and screen the clusters."""
    return geometry.build_network(stations, config)


def run_budget(obs: str | Path, stations: str | Path | None, config: Config, *, variable: str | None = None,
               progress: Progress = no_progress, check: CheckResult | None = None, engine: str = "local",
               scheduler: str | None = None) -> BudgetRun:
    """The main job in memory: read, QC, network, fits and budget for one variable."""
    chk = check or run_check(obs, stations, config, progress=progress)
    return budget_from_check(chk, config, variable=variable, progress=progress, engine=engine, scheduler=scheduler)


def budget_from_check(chk: CheckResult, config: Config, *, variable: str | None = None,
                      progress: Progress = no_progress, engine: str = "local", scheduler: str | None = None
                      ) -> BudgetRun:
    """The budget stages on an already checked data set, in memory (``run.dataset``, ``run.table``).

    Computed one time partition at a time and joined at the end; for long
    records use :func:`budget_to_files`, which keeps memory bounded.
    """
    from .report.dataset import to_dataset, to_table

    plan = plan_budget(chk, config, variable=variable, progress=progress)
    summaries, memory = _summaries(plan), MemorySink()
    _compute(plan, [*summaries, memory], config, engine=engine, scheduler=scheduler, progress=progress)
    memory.close()
    run = _result(plan, chk, *summaries)
    run.dataset = to_dataset(memory.terms, plan.layout)
    run.table = to_table(run.dataset)
    return run


def budget_to_files(chk: CheckResult, config: Config, out: str | Path, *, variable: str | None = None,
                    csv: bool = False, progress: Progress = no_progress, engine: str = "local",
                    scheduler: str | None = None, on_summary: Callable[[BudgetRun], None] | None = None) -> BudgetRun:
    """The budget written partition by partition to ``out``/budget.parquet, budget.nc (and budget.csv).

    Memory is bounded by one partition (plus the one being written); the
    returned run has ``summary`` but no ``dataset`` or ``table``.  Use
    :func:`stationflow.report.outputs.write_budget` with
    ``tables_written=True`` for the report and figures.  ``on_summary(run)``
    is called as soon as the last partition is computed, while the files are
    still being finished (to start the figures).
    """
    from .report.tables import budget_files

    plan = plan_budget(chk, config, variable=variable, progress=progress)
    summaries = _summaries(plan)
    with budget_files(out, plan.layout, csv=csv) as writers:
        _compute(plan, [*summaries, *writers], config, engine=engine, scheduler=scheduler, progress=progress)
        run = _result(plan, chk, *summaries)
        if on_summary is not None:
            on_summary(run)
    return run


def _compute(plan: BudgetPlan, sinks: list, config: Config, *, engine: str, scheduler: str | None,
             progress: Progress) -> None:
    """Every partition of ``plan`` to ``sinks``, on the chosen engine."""
    if engine not in ENGINES:
        raise ConfigError(f"engine {engine!r} is not one of {', '.join(ENGINES)}")
    if scheduler and engine != "dask":
        raise ConfigError("--scheduler goes with --engine dask")
    progress("fitting planes and computing the budget")
    if engine == "dask":
        from .run.distributed import run_on_dask

        run_on_dask(plan, sinks, config, scheduler=scheduler, progress=progress)
    else:
        from .run.partitions import run_partitions

        run_partitions(plan, sinks, config, progress=progress)


def _summaries(plan: BudgetPlan) -> list[BudgetSummary]:
    """The report's summary sinks: the local clusters, and the regional row when there is one."""
    local = BudgetSummary.allocate(plan.times, plan.clusters, columns=slice(0, plan.n_local))
    if plan.regional is None:
        return [local]
    row = plan.layout.clusters.iloc[plan.n_local:]
    return [local, BudgetSummary.allocate(plan.times, row, columns=slice(plan.n_local, plan.n_local + 1))]


def _result(plan: BudgetPlan, chk: CheckResult, summary: BudgetSummary, regional: BudgetSummary | None = None
            ) -> BudgetRun:
    """The :class:`BudgetRun` of a finished computation (without the in-memory dataset)."""
    extras = {"inversion": summary.inversion.copy()} if summary.inversion is not None else {}
    periods = summary.periods(f"{plan.unit} h-1")
    return BudgetRun(chk, plan.network, None, None, periods, plan.variable, plan.quantity, plan.unit, plan.interval,
                     plan.window, plan.settings, extras, summary, plan.layout, plan.choices, regional, plan.sensors)


__all__ = ["BudgetRun", "budget_from_check", "budget_to_files", "run_budget", "run_check", "run_network"]
