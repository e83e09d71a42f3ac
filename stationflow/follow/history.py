"""The last hours of a followed night, kept for the sparklines of now.html (a sink of the budget rows)."""

from __future__ import annotations

import numpy as np
import pandas as pd

#: the columns the page draws or reads
COLUMNS = ("value", "value_se", "tendency", "advection", "residual", "regime", "provisional")


class History:
    """A sink that keeps the rows of the last ``hours`` of ``times`` (the whole night's analysis times)."""

    def __init__(self, times: pd.DatetimeIndex, hours: float) -> None:
        self.all_times = times
        if len(times) > 1:
            step = (times[1] - times[0]).total_seconds()
            k = int(np.ceil(hours * 3600.0 / step)) + 1
        else:
            k = 1
        self.start = max(0, len(times) - k)
        self.times = times[self.start:]
        self.columns: dict[str, np.ndarray] = {}

    def write(self, part) -> None:
        steps = part.steps
        a, b = part.first, part.first + steps
        if b <= self.start:
            return
        lo = max(a, self.start)
        for name in COLUMNS:
            if name not in part.terms:
                continue
            src = np.asarray(part.terms[name])
            if name not in self.columns:
                fill = np.nan if src.dtype.kind == "f" else 0
                self.columns[name] = np.full((len(self.times), src.shape[1]), fill, dtype=src.dtype)
            self.columns[name][lo - self.start:b - self.start] = src[lo - a:]

    def close(self) -> None:
        pass
