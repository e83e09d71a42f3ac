"""Performance machinery, in one room: threads, worker processes, forks and allocator settings.

Everything here only makes a run faster; none of it changes a number.  The
rest of the package asks this module for what it needs and touches no pool,
fork or private attribute of the standard library itself:

- :func:`ordered_map`: partitions computed a few at a time on threads,
  results in order (numpy releases the interpreter lock in its array work);
- :class:`BackgroundWriter`: a file written on its own thread while the next
  partition is computed, at most one partition in flight;
- :class:`ProcessWorker`: jobs (the report figures) in a ``spawn`` worker
  process, several at once in forked copies of it (:func:`together`), drawn
  here instead when the worker dies;
- :func:`tune_allocator`: glibc allocator settings (below);
- :func:`import_ahead`: modules imported on a thread while the input is read;
- :func:`leave`: end the process without the interpreter's module teardown.

**In-process switch**: with ``STATIONFLOW_IN_PROCESS=1`` in the environment
(or :func:`set_in_process`), every job runs in this process on this thread,
one after the other, with no import-ahead and a normal interpreter exit: for
tests and for anyone debugging.  Results are identical either way.

Allocator settings.

numpy allocates its large temporaries with ``malloc``; glibc serves blocks
above a (dynamic) threshold with ``mmap`` and returns them to the kernel on
``free``.  A budget run creates and frees millions of such blocks, and every
fresh mapping costs a page fault per 4 KiB page: on the project's benchmark
machine that was about a third of the whole run's time, spent in the kernel.
:func:`tune_allocator` asks glibc (``mallopt``) to serve every block from
its heap (no per-block mappings) and to keep up to 1 GiB of freed memory for
reuse, which removes most of those faults; the measured peak resident size
did not change.
Threads share that one heap (``M_ARENA_MAX = 1``): a thread's own arena
gives freed memory back to the kernel as it goes, so the quality-control
threads and the file writer faulted the same pages in again and again
(measured: QC's kernel time 2-3.5 s -> 0.1-0.2 s on that benchmark, and
the same results).
It also asks pyarrow to use the same (system) allocator instead of its
bundled one, unless ``ARROW_DEFAULT_MEMORY_POOL`` is already set: the
Parquet writer's buffers then reuse the heap numpy has just freed instead
of fresh pages (measured: about 1-2 s less kernel time on the 300-station,
30-day benchmark).  This only takes effect when it runs before pyarrow is
first imported.  Elsewhere (macOS, Windows, musl) it does nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import logging
import os
import pickle
import sys
import threading
from concurrent.futures import Future, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import Any, Callable, Iterator

log = logging.getLogger(__name__)


M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
M_MMAP_MAX = -4
M_ARENA_MAX = -8
_done = False


def tune_allocator(*, mmap_threshold: int = 32 << 20, trim_threshold: int = 1 << 30, mmap_large: bool = False) -> bool:
    """Apply the glibc settings once per process; True when they were applied.

    ``mmap_large=False`` also stops glibc from giving blocks above the
    threshold (32 MiB is glibc's ceiling for it) their own mapping, so
    the (time x cluster) arrays of a long partition are reused from the heap
    as well.
    """
    global _done
    if _done:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    ok = bool(mallopt(M_MMAP_THRESHOLD, mmap_threshold)) and bool(mallopt(M_TRIM_THRESHOLD, trim_threshold))
    if ok and not mmap_large:
        ok = bool(mallopt(M_MMAP_MAX, 0))
    if ok:
        ok = bool(mallopt(M_ARENA_MAX, 1))  # for threads started from now on
    if ok and "pyarrow" not in sys.modules:
        os.environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", "system")
    _done = ok
    return ok


#: environment variable of the in-process switch
IN_PROCESS_ENV = "STATIONFLOW_IN_PROCESS"
_forced: bool | None = None


def in_process() -> bool:
    """True when everything is to run in this process on this thread (the switch above)."""
    if _forced is not None:
        return _forced
    return os.environ.get(IN_PROCESS_ENV, "").strip().lower() in ("1", "true", "yes", "on")


def set_in_process(on: bool | None) -> None:
    """Force the in-process switch on or off for this process (``None``: follow the environment again)."""
    global _forced
    _forced = on


# ---- threads ----------------------------------------------------------------------------------


def ordered_map(job: Callable[[Any], Any], items: list, threads: int) -> Iterator[tuple[Any, Any]]:
    """Yield ``(item, job(item))`` for ``items`` in order, computing up to ``threads`` ahead on threads."""
    if threads <= 1 or in_process():
        for item in items:
            yield item, job(item)
        return
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=threads, thread_name_prefix="stationflow-partition") as pool:
        queue: deque = deque()
        try:
            for item in items:
                queue.append((item, pool.submit(job, item)))
                if len(queue) >= threads:
                    done, fut = queue.popleft()
                    yield done, fut.result()
            while queue:
                done, fut = queue.popleft()
                yield done, fut.result()
        finally:
            for _, fut in queue:  # an error or an abandoned loop: start nothing more
                fut.cancel()


def in_background(fn: Callable[..., Any], *args: Any, name: str = "background") -> None:
    """Run ``fn(*args)`` on a thread of its own and do not wait for it (the thread is not a daemon: the
    interpreter waits for it before it exits).  In-process: run it here."""
    if in_process():
        fn(*args)
        return
    threading.Thread(target=fn, args=args, name=f"stationflow-{name}").start()


def side_task(fn: Callable[..., Any], *args: Any, name: str = "side") -> Future:
    """Start ``fn(*args)`` on a thread beside the caller's work; its result (or error) in the returned
    future.  In-process: run it here and return a finished future."""
    if in_process():
        return inline(fn, args, {})
    fut: Future = Future()

    def run() -> None:
        ok, value = outcome(fn, args, {})
        if ok:
            fut.set_result(value)
        else:
            fut.set_exception(value)

    threading.Thread(target=run, name=f"stationflow-{name}", daemon=True).start()
    return fut


class BackgroundWriter:
    """Calls made on one background thread, in order, with at most one waiting (memory stays bounded).

    :meth:`submit` waits for the previous call and raises its error; :meth:`close`
    waits for the last.  In-process (or ``background=False``) each call runs at once.
    Much of a file write is the kernel's (fresh page-cache pages for a new
    file) or a library's outside the interpreter lock (pyarrow, HDF5), so it
    overlaps the next partition's arithmetic.
    """

    def __init__(self, name: str, *, background: bool = True) -> None:
        from concurrent.futures import ThreadPoolExecutor

        self._pool = (ThreadPoolExecutor(max_workers=1, thread_name_prefix=f"stationflow-{name}")
                      if background and not in_process() else None)
        self._pending: Future | None = None

    def submit(self, fn: Callable[..., Any], *args: Any) -> None:
        """Run ``fn(*args)`` after the previous call (on the thread, or here)."""
        self.wait()
        if self._pool is None:
            fn(*args)
        else:
            self._pending = self._pool.submit(fn, *args)

    def wait(self) -> None:
        """Wait for the call in flight; raise its error."""
        pending, self._pending = self._pending, None
        if pending is not None:
            pending.result()

    def close(self) -> None:
        """Wait for the last call (its error is raised) and stop the thread."""
        try:
            self.wait()
        finally:
            self.shutdown()

    def shutdown(self) -> None:
        """Stop the thread after the call in flight, without raising its error (a run that failed elsewhere)."""
        pending, self._pending = self._pending, None
        if pending is not None:
            pending.exception()
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None


@dataclass
class Task:
    """One step of a :func:`run_graph`: ``run()`` after the earlier tasks ``needs`` (indices), on a pool
    thread or, with ``here``, on the calling thread at its place in the list."""

    run: Callable[[], None]
    needs: tuple[int, ...] = ()
    here: bool = False


def run_graph(tasks: list[Task], *, threads: int, then: list[tuple[int, Callable[[], None]]] = ()) -> None:
    """Run ``tasks`` in list order, each once the tasks it needs are done, up to ``threads`` at once.

    ``then``: (index, function) pairs run on the calling thread, in order, each as soon as its task is
    done (while later tasks still run).  A task's error is raised here once the tasks before it in
    ``then`` are handled; nothing more is started.  With one thread, or in-process, everything runs here
    in list order (the results are the same: tasks share no state but what their ``needs`` order).
    """
    if threads <= 1 or in_process():
        for task in tasks:
            task.run()
        for _, fn in then:
            fn()
        return
    from concurrent.futures import ThreadPoolExecutor

    futures: list[Future] = []
    pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="stationflow-task")
    try:
        for task in tasks:
            needs = [futures[j] for j in task.needs]  # earlier tasks only: a task never waits on a later one
            if task.here:
                fut: Future = Future()
                ok, value = outcome(_after, (needs, task.run), {})
                if ok:
                    fut.set_result(value)
                else:
                    fut.set_exception(value)
            else:
                fut = pool.submit(_after, needs, task.run)
            futures.append(fut)
        for index, fn in then:
            futures[index].result()
            fn()
        for fut in futures:
            fut.result()
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _after(needs: list[Future], run: Callable[[], None]) -> None:
    for fut in needs:
        fut.result()
    run()


#: modules the budget needs after the input is read; imported on a thread while it is read
LATER_MODULES = ("scipy.spatial", "scipy.sparse", "pyproj", "netCDF4", "pyarrow.parquet")


_ahead_lock = threading.Lock()
_ahead_running = False
_ahead_then: list[Callable[[], None]] = []


def import_ahead(modules: tuple[str, ...] = LATER_MODULES) -> None:
    """Import ``modules`` on a background thread (about 0.3-0.5 s, mostly while the CSV parser holds no
    interpreter lock).  Python's import locks make a concurrent import of the same module wait; a module
    that fails here is imported (and fails, with its message) where it is used.  In-process: nothing.

    While it runs, a signal must not interrupt an import in the main thread (a module lock left held
    would hang both threads): see :func:`after_imports`."""
    global _ahead_running
    if in_process():
        return
    import importlib

    def work() -> None:
        global _ahead_running
        try:
            for name in modules:
                try:
                    importlib.import_module(name)
                except Exception:  # noqa: BLE001 - reported where the module is really used
                    pass
        finally:
            with _ahead_lock:
                _ahead_running = False
                then = list(_ahead_then)
                _ahead_then.clear()
            for fn in then:
                fn()

    with _ahead_lock:
        _ahead_running = True
    threading.Thread(target=work, name="stationflow-imports", daemon=True).start()


def after_imports(fn: Callable[[], None]) -> bool:
    """Run ``fn`` once :func:`import_ahead`'s thread is done; False (and nothing run) when none is running.

    For a signal handler: rather than raise in the main thread while two threads import, it asks for
    the signal to be delivered again once the imports are done (``_thread.interrupt_main(signum)``)."""
    with _ahead_lock:
        if not _ahead_running:
            return False
        _ahead_then.append(fn)
        return True


def leave(code: int) -> None:
    """End the process with ``code`` after the interpreter's exit handlers, skipping its module-by-module
    teardown (0.15-0.2 s with pandas, pyarrow and scipy loaded, measured on the benchmark machine); the
    ``atexit`` handlers still run and the standard streams are flushed.  In-process: returns (a normal exit)."""
    import atexit

    if in_process():
        return
    try:
        atexit._run_exitfuncs()  # what a normal exit runs first (the only way to run them here)
        sys.stdout.flush()
        sys.stderr.flush()
    except Exception:  # noqa: BLE001 - a handler or stream failed: leave the normal way, which reports it
        return
    os._exit(code)


# ---- processes ----------------------------------------------------------------------------------

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


def outcome(fn: Callable[..., Any], args: tuple, kwargs: dict) -> tuple[bool, Any]:
    """(True, return value) or (False, the error) of one call."""
    try:
        return True, fn(*args, **kwargs)
    except Exception as exc:  # noqa: BLE001 - handed to the caller through the future
        return False, exc


def inline(fn: Callable[..., Any], args: tuple, kwargs: dict) -> Future:
    """Run ``fn`` here; its value or error in a finished future."""
    fut: Future = Future()
    ok, value = outcome(fn, args, kwargs)
    if ok:
        fut.set_result(value)
    else:
        fut.set_exception(value)
    return fut


def together(calls: list[tuple[Callable[..., Any], tuple, dict]], home: int | None) -> list[tuple[bool, Any]]:
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
        return [outcome(*call) for call in calls]
    children = []
    for call in calls[:-1]:
        read, write = os.pipe()
        pid = os.fork()
        if pid == 0:  # the child: draw, answer, end at once
            code = 0
            try:
                die_with_parent()
                os.close(read)
                ok, value = outcome(*call)
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
    last = outcome(*calls[-1])
    outcomes = []
    for (pid, read), call in zip(children, calls[:-1]):
        with os.fdopen(read, "rb") as pipe:
            data = pipe.read()
        os.waitpid(pid, 0)
        try:
            outcomes.append(pickle.loads(data))
        except Exception:  # noqa: BLE001 - no (whole) answer: the child died, killed for memory say
            log.info("figure child %s ended without an answer; drawing here", pid)
            outcomes.append(outcome(*call))
    return outcomes + [last]


class _Part:
    """One figure of a :meth:`ProcessWorker.submit_together` job, with the interface of a future."""

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
            self._here = inline(*self._call)
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


class ProcessWorker:
    """Run jobs in a worker process (or here, when ``background`` is False, everything runs in-process, or no
    process can start).  ``warm_up``: a module-level function run once in each worker as soon as it starts."""

    def __init__(self, background: bool | None = None, *, workers: int = 1,
                 warm_up: Callable[[], Any] | None = None) -> None:
        if background is None:
            background = (os.cpu_count() or 1) > 1 and not in_process()
        self._pool = None
        self._procs: list = []
        self._jobs: list[Future] = []
        if background:
            self._start(workers, warm_up)

    def _start(self, workers: int, warm_up: Callable[[], Any] | None) -> None:
        """Start the worker processes and hand each its first job (the warm-up)."""
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        before = set(multiprocessing.active_children())
        try:
            n = max(1, min(workers, (os.cpu_count() or 1)))
            self._pool = ProcessPoolExecutor(max_workers=n, mp_context=multiprocessing.get_context("spawn"),
                                             initializer=die_with_parent)
            for _ in range(n):  # one job per worker: each starts (and warms up) now
                self._jobs.append(self._pool.submit(warm_up or os.getpid))
            # the executor starts its processes on submit; they are this process's new children
            self._procs = [p for p in multiprocessing.active_children() if p not in before]
        except (OSError, ImportError, RuntimeError, ValueError) as exc:  # no processes here: run inline
            log.info("jobs run in this process (%s)", exc)
            self._abandon(before)
        except BaseException:  # stopped while starting (Ctrl-C, SIGTERM): no half-started worker may outlive us
            self._abandon(before)
            raise

    def _abandon(self, before: set) -> None:
        """Kill the processes started since ``before`` and drop the pool (a start that failed or was stopped):
        a child left starting would print a traceback once this process's semaphores are gone."""
        import multiprocessing

        for proc in set(multiprocessing.active_children()) - before:
            proc.kill()
        if self._pool is not None:
            self._pool.shutdown(wait=False, cancel_futures=True)
        self._pool, self._procs, self._jobs = None, [], []

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
        return inline(fn, args, kwargs)

    def submit_together(self, calls: list[tuple[Callable[..., Any], tuple, dict]]) -> list["_Part"]:
        """Draw several figures in one job, side by side where the worker can fork (Linux).

        ``calls``: (function, args, kwargs) per figure, as for :meth:`submit`.
        Returns one future-like object per call, in order.
        """
        fork = self._pool is not None and sys.platform.startswith("linux") and (os.cpu_count() or 1) > 1
        job = self.submit(together, list(calls), os.getpid() if fork else None)
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

    @property
    def processes(self) -> list:
        """The worker processes (``multiprocessing.Process``), for a test or a debugger to inspect."""
        return list(self._procs)

    def _stop_workers(self) -> None:
        # the executor has no public way to end its processes; they hold no state of ours
        for proc in self._procs:
            proc.kill()  # at once: a worker stopped while it starts would print a traceback on the way out

    def __enter__(self) -> "ProcessWorker":
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
