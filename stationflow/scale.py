"""The distributed engine: the budget's numeric stages on dask.distributed, partitioned in time.

The job is embarrassingly parallel in time once the network is fixed.  The
client reads and quality-controls the input and builds the plan (network,
clusters, settings: :func:`stationflow.pipeline.plan_budget`); the plan is
broadcast to the workers once; every time partition, with a halo of
``2h + 1`` analysis steps on each side (h = half the window), is aligned,
fitted and budgeted on a worker (:func:`stationflow.pipeline.run_partition`);
the client takes the results in time order as they finish and writes each
partition straight to the output files (a few partitions in flight at a
time, so neither the client nor the workers hold the whole record).  Because each partition is
computed with the same pure function and the same grid alignment as a local
run, the results are identical to the local engine.

Without a scheduler address a ``LocalCluster`` is started on loopback
(127.0.0.1) and closed afterwards.  See ``docs/scaling.md``.
"""

from __future__ import annotations

import dataclasses
import logging
from pathlib import Path


from . import align
from .config import Config
from .errors import ConfigError

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


def _results_in_order(plan, client, parts, *, ahead: int):
    """Yield (first, terms) per partition in time order, keeping at most ``ahead`` partitions in flight."""
    from collections import deque

    from .pipeline import partition_rows, run_partition

    light = dataclasses.replace(plan, frame=plan.frame.iloc[:0])  # the rows travel per partition
    [plan_f] = client.scatter([light], broadcast=True)
    n = len(plan.times)
    queue: deque = deque()
    todo = iter(parts)

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
        yield first, terms


def budget_on_dask(plan, chk, *, scheduler: str | None = None, partition: str | None = None, n_workers: int = 2,
                   progress=lambda _m: None, sink=None):
    """Run the partitions of ``plan`` on Dask; a :class:`~stationflow.pipeline.BudgetRun`.

    Each partition's result goes, in time order and as soon as it is
    ready, to ``sink.add(first, derived)`` (for example the file writer), so
    results are written partition by partition; without a sink they are
    joined in memory into ``run.dataset`` and ``run.table``.
    """
    from .pipeline import MemorySink, derive, finish, partitions
    from .summary import BudgetSummary

    steps = max(1, int(align.parse_duration(partition or DEFAULT_PARTITION) / plan.interval))
    parts = partitions(len(plan.times), steps)
    layout = plan.layout
    summary = BudgetSummary.allocate(plan.times, plan.clusters)
    target = MemorySink() if sink is None else sink
    client, cluster = _client(scheduler, n_workers=n_workers)
    try:
        workers = max(1, len(client.scheduler_info().get("workers", {})) or n_workers)
        progress(f"computing {len(parts)} partitions on Dask ({workers} workers)")
        for first, terms in _results_in_order(plan, client, parts, ahead=2 * workers):
            block = derive(terms, layout.convergence)
            summary.add(first, block)
            target.add(first, block)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return finish(plan, chk, summary, target.pieces if sink is None else None)


def run_budget_dask(obs: str | Path, stations: str | Path | None, config: Config, *, variable: str | None = None,
                    scheduler: str | None = None, progress=lambda _m: None, n_workers: int = 2):
    """The main job with the numeric stages on Dask, results in memory (``run.dataset``, ``run.table``)."""
    from .pipeline import plan_budget, run_check

    chk = run_check(obs, stations, config, progress=progress)
    plan = plan_budget(chk, config, variable=variable, progress=progress)
    partition = config["budget"]["chunk"] or DEFAULT_PARTITION
    return budget_on_dask(plan, chk, scheduler=scheduler, partition=partition, n_workers=n_workers, progress=progress)


def budget_to_files_dask(chk, config: Config, out: str | Path, *, variable: str | None = None, csv: bool = False,
                         scheduler: str | None = None, progress=lambda _m: None, n_workers: int = 2):
    """``stationflow budget --engine dask``: partitions on Dask, written to ``out`` as they arrive."""
    from .pipeline import plan_budget
    from .report.stream import BudgetFiles

    plan = plan_budget(chk, config, variable=variable, progress=progress)
    partition = config["budget"]["chunk"] or DEFAULT_PARTITION
    with BudgetFiles(out, plan.layout, csv=csv) as sink:
        return budget_on_dask(plan, chk, scheduler=scheduler, partition=partition, n_workers=n_workers,
                              progress=progress, sink=sink)


__all__ = ["budget_on_dask", "budget_to_files_dask", "run_budget_dask"]
