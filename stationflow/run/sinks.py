"""Sinks: where the finished time partitions of a budget go.

A run computes the budget one time partition at a time and hands each one,
in time order, to every sink it was given; it never imports a writer.  A
sink has two methods: ``write(part)`` takes a :class:`Partition` and
``close()`` finishes (for a file: everything written and renamed into
place).  The report's summary, the budget files (Parquet and CSV, NetCDF),
the in-memory result of the Python API and, later, a live page are sinks.
Add a sink: a class with these two methods, created where the job is wired
(:mod:`stationflow.api`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Protocol

import numpy as np


@dataclass(frozen=True)
class Partition:
    """The budget of the analysis steps ``first .. first + steps - 1``: (steps, clusters) arrays by column name."""

    first: int
    terms: dict[str, np.ndarray]

    @property
    def steps(self) -> int:
        """Analysis steps in this partition."""
        return int(self.terms["regime"].shape[0])


class Sink(Protocol):
    """What a run hands its partitions to."""

    def write(self, part: Partition) -> None:
        """Take the next partition (they come in time order, each exactly once)."""

    def close(self) -> None:
        """Every partition has been written: finish."""


class MemorySink:
    """Keeps every partition in memory and joins them on :meth:`close` (the Python API's in-memory result)."""

    def __init__(self) -> None:
        self.parts: list[Partition] = []
        self.terms: dict[str, np.ndarray] | None = None

    def write(self, part: Partition) -> None:
        self.parts.append(part)

    def close(self) -> None:
        """Join the partitions along time, one column at a time, freeing them as it goes."""
        if not self.parts:
            self.terms = {}
            return
        pieces = [dict(p.terms) for p in self.parts]
        self.parts = []
        self.terms = {k: np.concatenate([p.pop(k) for p in pieces], axis=0) if len(pieces) > 1 else pieces[0].pop(k)
                      for k in list(pieces[0])}


def deliver(parts: Iterable[Partition], sinks: list, *, total: int, progress=lambda _m: None) -> None:
    """Hand every partition of ``parts`` to each sink in turn (the one loop of the local and distributed
    engines); ``total`` partitions are expected (for the progress line).  The sinks are not closed here."""
    for i, part in enumerate(parts):
        for sink in sinks:
            sink.write(part)
        if total > 1:
            progress(f"partition {i + 1} of {total}")
