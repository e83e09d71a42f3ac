"""Figures drawn in a second process while the main one computes.

matplotlib's import and the drawing of the report figures are pure Python
and cost a few seconds; on a machine with two or more cores they can run
beside the budget computation instead of after it.  A :class:`Painter`
starts a worker process (``spawn``: safe with the writer threads, and no
copy of a large heap; one by default: a second drew the two budget figures
at once but its start-up, 1.3 s of CPU, cost more than it saved on two
cores), warms it up (imports matplotlib, draws a throw-away figure), and takes drawing
jobs whose arguments are small (the prepared images and series, not the
observations).  ``Painter(background=False)`` draws in this process; every
job returns a future-like object either way: a failure in the worker is
raised again by ``result()``, and a job whose worker process died (killed
for memory, say) is drawn in this process instead.

The worker is started only where it can help (``os.cpu_count() > 1``) and
falls back to drawing in this process when a process cannot be started.

:meth:`Painter.submit_together` hands the worker several figures at once
(the two budget figures at the end of a run): on Linux the worker draws
all but the last in forked copies of itself, which start in milliseconds
with matplotlib already imported and warm, so the figures are drawn side by
side on two cores instead of one after the other.
"""

from __future__ import annotations

import logging
import os
import pickle
import sys
import threading
from concurrent.futures import Future, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Any, Callable

log = logging.getLogger(__name__)


def die_with_parent() -> None:
    """Ask the kernel to end this process when its parent dies (Linux ``PR_SET_PDEATHSIG``; elsewhere nothing).

    Run first in every worker process, so that a run killed outright (SIGKILL,
    out of memory) leaves no figure worker behind holding the caller's pipes.
    """
    if not sys.platform.startswith("linux"):
        return
    import ctypes
    import signal

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGKILL), 0, 0, 0)  # PR_SET_PDEATHSIG = 1
    except (OSError, AttributeError):  # no prctl here: the worker ends when its queue closes instead
        return
    if os.getppid() == 1:  # the parent died before the request took effect
        os._exit(1)


def _warm_up() -> None:
    """Import the plotting stack and draw a throw-away figure before the first real one is asked for.

    The first figure a process draws also loads the fonts and sets up the
    date axis and the PNG writer (0.2-0.4 s); done here, that happens while
    the data are read instead of at the end of the run.
    """
    import io

    import numpy as np

    from . import plots

    plt = plots._plt()
    fig, ax = plt.subplots(figsize=(2, 1))
    days = np.arange("2026-01-01", "2026-01-03", dtype="datetime64[h]")
    ax.plot(days, np.zeros(days.size), label="warm-up")
    ax.imshow(np.zeros((1, 4, 4)), aspect="auto", extent=(0, 1, 0, 1), transform=ax.get_xaxis_transform())
    ax.set_title("warm-up", fontsize=8, loc="left")
    ax.legend(fontsize=7)
    fig.savefig(io.BytesIO(), format="png", dpi=50, pil_kwargs={"compress_level": 3})
    plt.close(fig)


def _outcome(fn: Callable[..., Any], args: tuple, kwargs: dict) -> tuple[bool, Any]:
    """(True, return value) or (False, the error) of one call."""
    try:
        return True, fn(*args, **kwargs)
    except Exception as exc:  # noqa: BLE001 - handed to the caller through the future
        return False, exc


def _inline(fn: Callable[..., Any], args: tuple, kwargs: dict) -> Future:
    """Run ``fn`` here; its value or error in a finished future."""
    fut: Future = Future()
    ok, value = _outcome(fn, args, kwargs)
    if ok:
        fut.set_result(value)
    else:
        fut.set_exception(value)
    return fut


def _together(calls: list[tuple[Callable[..., Any], tuple, dict]], home: int | None) -> list[tuple[bool, Any]]:
    """Run drawing ``calls``; in the figure worker, all but the last in forked copies of it at once.

    ``home``: the id of the process that submitted the job (None: never
    fork).  Calls are forked only in another process, the worker, which has
    no other threads, so a fork is safe there; when the job is drawn in
    ``home`` itself (the worker died, see :class:`Drawing`) they run one
    after the other.  Each child sends back its outcome through a pipe and
    ends without running this process's exit handlers; a child that dies
    without an answer has its figure drawn here after all.
    """
    # and never a process with other threads (a lock held by one of them would stay held in the child)
    if home in (None, os.getpid()) or len(calls) < 2 or not hasattr(os, "fork") or threading.active_count() > 1:
        return [_outcome(*call) for call in calls]
    children = []
    for call in calls[:-1]:
        read, write = os.pipe()
        pid = os.fork()
        if pid == 0:  # the child: draw, answer, end at once
            code = 0
            try:
                die_with_parent()
                os.close(read)
                ok, value = _outcome(*call)
                try:
                    data = pickle.dumps((ok, value))
                except Exception as exc:  # noqa: BLE001 - an error that cannot be pickled: send its text
                    data = pickle.dumps((False, RuntimeError(f"{type(value).__name__}: {value} ({exc})")))
                with os.fdopen(write, "wb") as pipe:
                    pipe.write(data)
            except BaseException:  # noqa: BLE001 - nothing may escape a forked child
                code = 1
            finally:
                os._exit(code)
        os.close(write)
        children.append((pid, read))
    last = _outcome(*calls[-1])
    outcomes = []
    for (pid, read), call in zip(children, calls[:-1]):
        with os.fdopen(read, "rb") as pipe:
            data = pipe.read()
        os.waitpid(pid, 0)
        try:
            outcomes.append(pickle.loads(data))
        except Exception:  # noqa: BLE001 - no (whole) answer: the child died, killed for memory say
            log.info("figure child %s ended without an answer; drawing here", pid)
            outcomes.append(_outcome(*call))
    return outcomes + [last]


class _Part:
    """One figure of a :meth:`Painter.submit_together` job, with the interface of a future."""

    def __init__(self, job: "Future | Drawing", index: int) -> None:
        self._job, self._index = job, index

    def _outcome(self, timeout: float | None) -> tuple[bool, Any]:
        return self._job.result(timeout)[self._index]

    def result(self, timeout: float | None = None) -> Any:
        """The figure job's return value (its error is raised here)."""
        ok, value = self._outcome(timeout)
        if not ok:
            raise value
        return value

    def exception(self, timeout: float | None = None) -> BaseException | None:
        """The figure job's error, or None."""
        error = self._job.exception(timeout)
        if error is not None:
            return error
        ok, value = self._outcome(timeout)
        return None if ok else value

    def done(self) -> bool:
        """True once the job has finished (successfully or not)."""
        return self._job.done()


class Drawing:
    """A figure job in the worker; drawn here instead if the worker process died before finishing it."""

    def __init__(self, job: Future, fn: Callable[..., Any], args: tuple, kwargs: dict) -> None:
        self._job, self._call = job, (fn, args, kwargs)
        self._here: Future | None = None

    def _settled(self, timeout: float | None) -> Future:
        if self._here is not None:
            return self._here
        try:
            self._job.result(timeout)
            return self._job
        except BrokenProcessPool as exc:
            log.info("figure worker stopped (%s); drawing in this process", exc)
            self._here = _inline(*self._call)
            return self._here
        except Exception:  # noqa: BLE001 - the job's own error, raised by result()
            return self._job

    def result(self, timeout: float | None = None) -> Any:
        """The job's return value (its error is raised here)."""
        return self._settled(timeout).result()

    def exception(self, timeout: float | None = None) -> BaseException | None:
        """The job's error, or None."""
        return self._settled(timeout).exception()

    def done(self) -> bool:
        """True once the job has finished (successfully or not)."""
        return self._here is not None or self._job.done()


class Painter:
    """Draw figures in a worker process (or here, when ``background`` is False or no process can start)."""

    def __init__(self, background: bool | None = None, *, workers: int = 1) -> None:
        if background is None:
            background = (os.cpu_count() or 1) > 1 and os.environ.get("STATIONFLOW_FIGURES", "") != "inline"
        self._pool = None
        self._jobs: list[Future] = []
        if background:
            try:
                import multiprocessing
                from concurrent.futures import ProcessPoolExecutor

                n = max(1, min(workers, (os.cpu_count() or 1)))
                self._pool = ProcessPoolExecutor(max_workers=n, mp_context=multiprocessing.get_context("spawn"),
                                                 initializer=die_with_parent)
                for _ in range(n):  # one warm-up per worker: each starts and imports matplotlib now
                    self._jobs.append(self._pool.submit(_warm_up))
            except (OSError, ImportError, RuntimeError, ValueError) as exc:  # no processes here: draw inline
                log.info("figures drawn in this process (%s)", exc)
                self._pool = None

    @property
    def background(self) -> bool:
        """True when figures are drawn in the worker process."""
        return self._pool is not None

    def submit(self, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> "Future | Drawing":
        """Run ``fn(*args, **kwargs)`` in the worker (a module-level function with picklable arguments).

        Returns a future-like object: ``result()`` gives the return value or
        raises the job's error.  If the worker dies (killed for memory, say),
        ``result()`` draws the figure in this process instead.
        """
        if self._pool is not None:
            try:
                job = self._pool.submit(fn, *args, **kwargs)
                self._jobs.append(job)
                return Drawing(job, fn, args, kwargs)
            except RuntimeError as exc:  # the pool broke (worker killed): draw here from now on
                log.info("figure worker unavailable (%s); drawing in this process", exc)
                self._pool.shutdown(wait=False, cancel_futures=True)
                self._pool = None
        return _inline(fn, args, kwargs)

    def submit_together(self, calls: list[tuple[Callable[..., Any], tuple, dict]]) -> list["_Part"]:
        """Draw several figures in one job, side by side where the worker can fork (Linux).

        ``calls``: (function, args, kwargs) per figure, as for :meth:`submit`.
        Returns one future-like object per call, in order.
        """
        fork = self._pool is not None and sys.platform.startswith("linux") and (os.cpu_count() or 1) > 1
        job = self.submit(_together, list(calls), os.getpid() if fork else None)
        return [_Part(job, i) for i in range(len(calls))]

    def close(self) -> None:
        """Wait for the jobs in flight and stop the workers.

        Once every job has finished (each figure is renamed into place before
        its job returns), the idle workers are stopped at once rather than
        asked to run their interpreter's whole shutdown (about 0.2 s).
        """
        if self._pool is not None:
            wait(self._jobs)
            self._stop_workers()
            self._pool.shutdown(wait=True)
            self._pool = None

    def _stop_workers(self) -> None:
        # the executor has no public way to end its processes; they hold no state of ours
        for proc in list(getattr(self._pool, "_processes", {}).values()):
            proc.kill()  # at once: a worker stopped while it starts would print a traceback on the way out

    def __enter__(self) -> "Painter":
        return self

    def __exit__(self, *exc) -> None:
        if exc[0] is not None and self._pool is not None:  # the run failed: do not wait for figures
            self._stop_workers()
            # waiting costs nothing once the workers are stopped, and lets the executor release its queue's
            # semaphores before the command ends its process: without it, Python's resource tracker warned on
            # stderr after the one error line (in 4 of about 100 failed runs; none in 140 with it)
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        self.close()
