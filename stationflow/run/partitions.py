"""Time partitions: the budget of a run of analysis steps, computed with a halo so that it equals an
unpartitioned run.
"""

from __future__ import annotations

import dataclasses
import logging
import os
from typing import Iterator

import numpy as np
import pandas as pd

from ..config import Config
from ..estimate.budget import compute_budget, row_mean_var
from ..estimate.planes import fit_planes
from ..network import geometry, grid
from .check import Progress, no_progress
from .plan import AUTO_CHUNK, BudgetPlan
from .sinks import Partition, deliver
from .workers import ordered_map

log = logging.getLogger(__name__)


def partition_rows(plan: BudgetPlan, first: int, last: int) -> pd.DataFrame:
    """Rows of ``plan.frame`` that fall in the analysis bins ``first .. last`` (inclusive)."""
    t = plan.frame["time"].to_numpy("datetime64[ns]").astype(np.int64)
    lo = plan.times[first].value - plan.interval.value
    hi = plan.times[last].value
    a = np.searchsorted(t, lo, side="right")
    b = np.searchsorted(t, hi, side="right")
    return plan.frame.iloc[a:b]


def compute_partition(plan: BudgetPlan, rows: pd.DataFrame, first: int, last: int) -> dict[str, np.ndarray]:
    """Budget terms for the analysis bins ``first .. last`` from the rows in them.

    Pure: the same inputs give the same numbers whether run here, in a
    chunked run or on a Dask worker.
    """
    times = plan.times[first:last + 1]
    names = [c for c in ("q", "u", "v", "wind_speed", "t_air") if c in rows]
    cells = grid.to_grid(rows, plan.ids, names, interval=plan.interval, start=times[0], end=times[-1])
    values = cells.values["q"]
    if "u" in cells.values:
        ug, vg = geometry.rotate_to_grid(cells.values["u"], cells.values["v"], plan.convergence[None, :])
        speed = cells.values.get("wind_speed")
    else:
        ug = vg = np.full(values.shape, np.nan)
        speed = None
    lapse = None
    if plan.lapse_stations is not None:
        values, lapse = remove_lapse(values, plan)
    terms = compute_budget(values, ug, vg, plan.x, plan.y, plan.members, plan.settings, z=plan.z, wind_speed=speed,
                           lapse=lapse)
    if plan.regional is not None:  # the network-scale plane: one more column, last
        # no neighbouring clusters to learn a model error from: the fit's own misfit (chi-square) stands for it
        regional = compute_budget(values, ug, vg, plan.x, plan.y, [plan.regional],
                                  dataclasses.replace(plan.settings, model_error=False, model_network=None), z=plan.z,
                                  wind_speed=speed, lapse=lapse)
        terms = {k: np.concatenate([v, regional[k]], axis=1) for k, v in terms.items()}
    if plan.masts is not None and "t_air" in cells.values:
        upper, partner = plan.masts
        t = cells.values["t_air"]
        inv, _ = row_mean_var(t[:, upper] - t[:, partner])  # no warnings machinery: this may run on a thread
        terms["inversion"] = np.broadcast_to(inv[:, None], terms["value"].shape).copy()
    return terms


def remove_lapse(values: np.ndarray, plan: BudgetPlan
                 ) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray, float]]:
    """Take the measured vertical gradient out of ``values`` (n_times, n_stations) before the horizontal fits.

    One plane with height as a regressor is fitted per time through every
    station with a height (:func:`stationflow.estimate.planes.fit_planes`, the same estimator;
    networks of any size), its vertical coefficient gamma(t) [unit m-1]
    with the larger of its prior and posterior variance (the whole network
    is rarely a plane) and the variance from reading noise alone (what a
    tendency sees: the misfit of the network plane persists in time), and
    ``values - gamma (z - z_ref)`` returned with ``(gamma, variance,
    noise variance, z_ref)``; z_ref is the mean height of those stations.
    Times with no vertical fit keep gamma = 0 with variance 0 (their
    horizontal fits lack stations too).
    """
    idx = plan.lapse_stations
    s = plan.settings
    noise = np.broadcast_to(np.asarray(s.sigma, float), (len(plan.ids),))[idx]
    net = fit_planes(values[:, idx], plan.x[idx], plan.y[idx], [np.arange(idx.size)], z=plan.z[idx],
                     sigma=np.sqrt(noise ** 2 + s.offset ** 2), noise=noise, min_stations=6, residuals=True)
    gamma = net.grad_z[:, 0]
    var = net.var_z[:, 0] * net.error_scale("larger")[:, 0]
    var_noise = net.noise_part("var_z")[:, 0]
    fine = np.isfinite(gamma) & np.isfinite(var) & np.isfinite(var_noise)
    gamma, var, var_noise = (np.where(fine, a, 0.0) for a in (gamma, var, var_noise))
    z_ref = float(np.mean(plan.z[idx]))
    dz = np.where(np.isfinite(plan.z), plan.z - z_ref, np.nan)
    return values - gamma[:, None] * dz[None, :], (gamma, var, var_noise, z_ref)


def partitions(n_times: int, steps: int) -> list[tuple[int, int]]:
    """(first, last) bin index of consecutive partitions of ``steps`` bins."""
    steps = max(1, steps)
    return [(a, min(n_times, a + steps) - 1) for a in range(0, n_times, steps)]


def run_partition(plan: BudgetPlan, first: int, last: int, rows: pd.DataFrame | None = None) -> dict[str, np.ndarray]:
    """Terms for bins ``first .. last``, computed with a halo so edges match an unpartitioned run."""
    n = len(plan.times)
    a = max(0, first - plan.halo)
    b = min(n - 1, last + plan.halo)
    if rows is None:
        rows = partition_rows(plan, a, b)
    terms = compute_partition(plan, rows, a, b)
    core = slice(first - a, last - a + 1)
    return {k: v[core] for k, v in terms.items()}


def derive(terms: dict[str, np.ndarray], convergence: np.ndarray) -> dict[str, np.ndarray]:
    """The output variables of a partition: the terms (regime as int8 codes) plus true-north directions.

    ``convergence`` is the meridian convergence at each cluster centroid; grid
    bearings minus it are true bearings.
    """
    from ..variables import wind_direction, wrap_degrees

    out = dict(terms)
    conv = np.asarray(convergence)[None, :]  # |convergence| < 180 degrees: the differences stay in (-360, 540)
    out["wind_from_direction"] = wrap_degrees(wind_direction(terms["u"], terms["v"]) - conv)
    with np.errstate(invalid="ignore"):
        bearing = np.rad2deg(np.arctan2(terms["grad_x"], terms["grad_y"]))
    out["gradient_bearing"] = wrap_degrees(bearing - conv)
    return out


def partition_bounds(plan: BudgetPlan, chunk: str | None) -> list[tuple[int, int]]:
    """(first, last) analysis steps of the time partitions of ``plan``.

    ``budget.chunk`` long, or about :data:`AUTO_CHUNK` cluster-steps when it
    is not set (results do not depend on the choice); the last partition is
    cut into small ones, so that little writing is left once the last
    computation ends.
    """
    n = len(plan.times)
    if chunk:
        steps = int(grid.parse_duration(chunk) / plan.interval)
    else:  # automatic: partitions of about AUTO_CHUNK cluster-steps bound the intermediates (same results)
        steps = max(4 * plan.halo, AUTO_CHUNK // max(1, len(plan.members)))
    parts = partitions(n, steps)
    if len(parts) > 1:  # the last write cannot overlap a computation: end with small partitions
        a, b = parts.pop()
        parts += [(a + f, a + length) for f, length in partitions(b - a + 1, max(plan.halo, (b - a + 1) // 4))]
    return parts


#: partitions computed at once on threads (numpy releases the interpreter lock in its array operations)
PARTITION_THREADS = 2


def local_partitions(plan: BudgetPlan, bounds: list[tuple[int, int]]) -> Iterator[Partition]:
    """The local engine: each partition of ``bounds`` computed here (up to :data:`PARTITION_THREADS` at
    once, :func:`stationflow.run.workers.ordered_map`), yielded in time order."""
    convergence = plan.layout.convergence

    def job(bound: tuple[int, int]) -> dict[str, np.ndarray]:
        return derive(run_partition(plan, *bound), convergence)

    threads = min(PARTITION_THREADS, os.cpu_count() or 1, len(bounds))
    for (first, _), terms in ordered_map(job, bounds, threads):
        yield Partition(first, terms)


def run_partitions(plan: BudgetPlan, sinks: list, config: Config, *, progress: Progress = no_progress) -> None:
    """Compute every time partition of ``plan`` here and hand each, in order, to every sink (not closed here)."""
    bounds = partition_bounds(plan, config["budget"]["chunk"])
    deliver(local_partitions(plan, bounds), sinks, total=len(bounds), progress=progress)
