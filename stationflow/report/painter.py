"""Figures drawn in a second process while the main one computes.

matplotlib's import and the drawing of the report figures are pure Python
and cost a few seconds; on a machine with two or more cores they can run
beside the budget computation instead of after it.  A :class:`Painter` is a
:class:`stationflow.run.workers.ProcessWorker` whose worker is warmed up for
drawing (matplotlib imported, a throw-away figure drawn); jobs take prepared
arrays (:mod:`.plots` ``*_image``, ``*_panels``, ``map_layers``), never the
observations.  ``Painter(background=False)``, or the in-process switch
(``STATIONFLOW_IN_PROCESS=1``), draws in this process; every job returns a
future-like object either way.  :meth:`~stationflow.run.workers.ProcessWorker.submit_together`
draws the two budget figures side by side (forked copies of the worker, Linux).
"""

from __future__ import annotations

from ..run.workers import ProcessWorker


def warm_up() -> None:
    """Import the plotting stack and draw a throw-away figure before the first real one is asked for.

    The first figure a process draws also loads the fonts and sets up the
    date axis and the PNG writer (0.2-0.4 s); done here, that happens while
    the data are read instead of at the end of the run.
    """
    import io

    import numpy as np

    from . import plots

    plt = plots.pyplot()
    fig, ax = plt.subplots(figsize=(2, 1))
    days = np.arange("2026-01-01", "2026-01-03", dtype="datetime64[h]")
    ax.plot(days, np.zeros(days.size), label="warm-up")
    ax.imshow(np.zeros((1, 4, 4)), aspect="auto", extent=(0, 1, 0, 1), transform=ax.get_xaxis_transform())
    ax.set_title("warm-up", fontsize=8, loc="left")
    ax.legend(fontsize=7)
    fig.savefig(io.BytesIO(), format="png", dpi=50, pil_kwargs={"compress_level": 3})
    plt.close(fig)


class Painter(ProcessWorker):
    """A worker process for the report's figures (see the module docstring)."""

    def __init__(self, background: bool | None = None, *, workers: int = 1) -> None:
        super().__init__(background, workers=workers, warm_up=warm_up)
