"""Allocator settings for long numeric runs.

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
import os
import sys

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
