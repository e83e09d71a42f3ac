"""Atomic file writing: a temporary file in the target folder, renamed into place on success.

Kept free of pandas: the figure worker process imports it (see
:mod:`stationflow.report.painter`).
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import secrets
import sys
from pathlib import Path
from typing import Callable, Iterator


@contextlib.contextmanager
def atomic_write(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; rename it onto ``path`` on success.

    On any error the temporary file is removed and ``path`` is untouched.
    The temporary file does not exist yet: the writer creates it.  (Writers
    open with truncation; on ext4, truncating an existing file makes its
    ``close`` write all its data out at once, which cost 0.3-0.4 s per large
    output file.)
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    while True:
        tmp_path = target.parent / f".{target.name}.{os.getpid()}.{secrets.token_hex(4)}.part"
        if not tmp_path.exists():
            break
    try:
        yield tmp_path
        if not tmp_path.exists():  # the writer wrote nothing: an empty file
            tmp_path.touch()
        _replace(tmp_path, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
        raise


_RENAME_EXCHANGE = 2  # linux/fs.h


def _exchange(a: Path, b: Path) -> bool:
    """Swap two existing paths atomically (Linux ``renameat2(RENAME_EXCHANGE)``); False where not available."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    fn.restype = ctypes.c_int
    at_cwd = -100
    return fn(at_cwd, os.fsencode(a), at_cwd, os.fsencode(b), _RENAME_EXCHANGE) == 0


def _replace(tmp: Path, target: Path) -> None:
    """Put ``tmp`` in place of ``target`` atomically.

    Over an existing file the two are swapped and the old one removed:
    renaming onto an existing file makes ext4 write the new file's data
    out before it returns (its protection for programs that do not sync),
    0.3-0.6 s for each large output file; a swap does not.  Elsewhere, or
    where the swap is not supported, a plain atomic rename.
    """
    if target.is_file() and _exchange(tmp, target):
        _remove(tmp)  # now the previous version
        return
    os.replace(tmp, target)


def _remove(path: Path) -> None:
    """Delete a file; a large one on a thread of its own (freeing its blocks takes ext4 0.2-0.3 s per 600 MB).

    The thread is not a daemon: the interpreter waits for it before it exits.
    """
    if path.stat().st_size < (64 << 20):
        path.unlink()
        return
    from ..run.workers import in_background

    in_background(path.unlink, True, name="remove")  # missing_ok=True


def write_with(path: str | Path, writer: Callable[[Path], None]) -> Path:
    """Atomically write ``path`` with ``writer(tmp_path)``."""
    with atomic_write(path) as tmp:
        writer(tmp)
    return Path(path)
