"""Allocator settings for long numeric runs.

numpy allocates its large temporaries with ``malloc``; glibc serves blocks
above a (dynamic) threshold with ``mmap`` and returns them to the kernel on
``free``.  A budget run creates and frees millions of such blocks, and every
fresh mapping costs a page fault per 4 KiB page: on the project's benchmark
machine that was about a third of the whole run's time, spent in the kernel.
:func:`tune_allocator` asks glibc (``mallopt``) to serve blocks up to 32 MiB
from its heap and to keep up to 1 GiB of freed memory for reuse, which
removes most of those faults at the cost of a slightly higher resident size.
Elsewhere (macOS, Windows, musl) it does nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
_done = False


def tune_allocator(*, mmap_threshold: int = 32 << 20, trim_threshold: int = 1 << 30) -> bool:
    """Apply the glibc settings once per process; True when they were applied."""
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
    _done = ok
    return ok
