"""The distributed engine: the budget's numeric stages on dask.distributed, partitioned in time.

The job is embarrassingly parallel in time once the network is fixed.  The
client reads and quality-controls the input and builds the plan (network,
clusters, settings: :func:`stationflow.pipeline.plan_budget`); the plan is
broadcast to the workers once; every time partition, with a halo of
``2h + 1`` analysis steps on each side (h = half the window), is aligned,
fitted and budgeted on a worker (:func:`stationflow.pipeline.run_partition`);
the client joins the partitions in time order.  Because each partition is
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


def budget_on_dask(plan, chk, *, scheduler: str | None = None, partition: str | None = None, n_workers: int = 2,
                   progress=lambda _m: None):
    """Run the partitions of ``plan`` on Dask and assemble the result (a :class:`~stationflow.pipeline.BudgetRun`)."""
    from .pipeline import assemble, partition_rows, partitions, run_partition

    steps = max(1, int(align.parse_duration(partition or DEFAULT_PARTITION) / plan.interval))
    parts = partitions(len(plan.times), steps)
    client, cluster = _client(scheduler, n_workers=n_workers)
    try:
        light = dataclasses.replace(plan, frame=plan.frame.iloc[:0])  # the rows travel per partition
        [plan_f] = client.scatter([light], broadcast=True)
        futures = []
        n = len(plan.times)
        for first, last in parts:
            a, b = max(0, first - plan.halo), min(n - 1, last + plan.halo)
            rows = partition_rows(plan, a, b)
            futures.append(client.submit(run_partition, plan_f, first, last, rows, pure=False))
        progress(f"computing {len(parts)} partitions on Dask")
        pieces = client.gather(futures)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return assemble(plan, pieces, chk)


def run_budget_dask(obs: str | Path, stations: str | Path | None, config: Config, *, variable: str | None = None,
                    scheduler: str | None = None, progress=lambda _m: None, n_workers: int = 2):
    """The main job with the numeric stages on Dask (``stationflow budget --engine dask``)."""
    from .pipeline import plan_budget, run_check

    chk = run_check(obs, stations, config, progress=progress)
    plan = plan_budget(chk, config, variable=variable, progress=progress)
    partition = config["budget"]["chunk"] or DEFAULT_PARTITION
    return budget_on_dask(plan, chk, scheduler=scheduler, partition=partition, n_workers=n_workers, progress=progress)


__all__ = ["budget_on_dask", "run_budget_dask"]
