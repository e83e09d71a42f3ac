"""The distributed engine: the budget's numeric stages on dask.distributed, partitioned in time.

The job is embarrassingly parallel in time once the network is fixed.  The
client reads and quality-controls the input and builds the plan (network,
clusters, settings: :func:`stationflow.run.plan.plan_budget`); the plan is
broadcast to the workers once; every time partition, with a halo of
``2h + 1`` analysis steps on each side (h = half the window), is aligned,
fitted and budgeted on a worker (:func:`stationflow.run.partitions.run_partition`);
the client takes the results in time order as they finish and hands each
partition to the sinks (the output files) (a few partitions in flight at a
time, so neither the client nor the workers hold the whole record).  Because each partition is
computed with the same pure function and the same grid alignment as a local
run, the results are identical to the local engine.

Without a scheduler address a ``LocalCluster`` is started on loopback
(127.0.0.1) and closed afterwards.  See ``docs/scaling.md``.
"""

from __future__ import annotations

import dataclasses
import logging
from typing import Iterator

from ..config import Config
from ..errors import ConfigError
from ..network import grid
from .check import Progress, no_progress
from .partitions import derive, partition_rows, partitions, run_partition
from .plan import BudgetPlan
from .sinks import Partition, deliver

log = logging.getLogger(__name__)

DEFAULT_PARTITION = "1D"


def _client(scheduler: str | None, *, n_workers: int = 2):
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - the dask extra is part of the test extra
        raise ConfigError("--engine dask needs the dask extra: pip install 'stationflow[dask]'") from None
    if scheduler:
        try:
            return Client(scheduler, timeout="20s"), None
        except (OSError, TimeoutError) as exc:
            raise ConfigError(f"cannot reach the Dask scheduler at {scheduler!r} ({exc})") from None
    cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address=None, silence_logs=logging.WARNING)
    return Client(cluster), cluster


def dask_partitions(plan: BudgetPlan, bounds: list[tuple[int, int]], client, *, ahead: int) -> Iterator[Partition]:
    """The distributed engine: each partition of ``bounds`` computed on a Dask worker, yielded in time order,
    with at most ``ahead`` partitions in flight."""
    from collections import deque

    light = dataclasses.replace(plan, frame=plan.frame.iloc[:0])  # the rows travel per partition
    [plan_f] = client.scatter([light], broadcast=True)
    n = len(plan.times)
    convergence = plan.layout.convergence
    queue: deque = deque()
    todo = iter(bounds)

    def submit() -> bool:
        part = next(todo, None)
        if part is None:
            return False
        first, last = part
        a, b = max(0, first - plan.halo), min(n - 1, last + plan.halo)
        rows = partition_rows(plan, a, b)  # the partition's rows with their halo
        queue.append((first, client.submit(run_partition, plan_f, first, last, rows, pure=False)))
        return True

    for _ in range(ahead):
        if not submit():
            break
    while queue:
        first, fut = queue.popleft()
        terms = fut.result()
        fut.release()
        submit()
        yield Partition(first, derive(terms, convergence))


def run_on_dask(plan: BudgetPlan, sinks: list, config: Config, *, scheduler: str | None = None, n_workers: int = 2,
                progress: Progress = no_progress) -> None:
    """Compute every time partition of ``plan`` on Dask and hand each, in time order, to every sink.

    Partitions are ``budget.chunk`` long, else :data:`DEFAULT_PARTITION`.
    Without ``scheduler`` a local cluster of ``n_workers`` processes is
    started on loopback and closed afterwards.
    """
    partition = config["budget"]["chunk"] or DEFAULT_PARTITION
    steps = max(1, int(grid.parse_duration(partition) / plan.interval))
    bounds = partitions(len(plan.times), steps)
    client, cluster = _client(scheduler, n_workers=n_workers)
    try:
        workers = max(1, len(client.scheduler_info().get("workers", {})) or n_workers)
        progress(f"computing {len(bounds)} partitions on Dask ({workers} workers)")
        deliver(dask_partitions(plan, bounds, client, ahead=2 * workers), sinks, total=len(bounds))
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


__all__ = ["dask_partitions", "run_on_dask"]
