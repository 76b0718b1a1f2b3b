"""Process-wide settings that the command line and the app apply for themselves.

A library should not change its host process, so nothing here runs on ``import workbench``;
``cli.main`` (which also starts the app) and the benchmark scripts call it.
"""

from __future__ import annotations

import ctypes
import sys

_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # glibc's mallopt parameters
_KEEP = 1 << 30
_done = False


def tune_allocator() -> bool:
    """Let glibc keep large freed blocks for reuse instead of returning them to the system.

    Image-sized buffers (tens of MB) are allocated and freed for every image; by default
    glibc maps each one afresh, and touching new pages costs a fault per 4 KiB, which on
    some machines is a quarter of the decoding time. The price is that the process keeps
    its peak memory until it ends. Also turns off numpy's huge-page requests (see
    :func:`_no_huge_pages`). Returns whether the glibc setting took (glibc only).
    """
    global _done
    if _done or not sys.platform.startswith("linux"):
        return _done
    try:
        libc = ctypes.CDLL("libc.so.6")
        _done = bool(libc.mallopt(_M_MMAP_THRESHOLD, _KEEP)) and bool(libc.mallopt(_M_TRIM_THRESHOLD, 2 * _KEEP - 1))
    except (OSError, AttributeError):
        _done = False
    _no_huge_pages()
    return _done


def _no_huge_pages() -> None:
    """Stop numpy asking for transparent huge pages on its large arrays.

    Where the kernel compacts memory on demand for such requests (``defrag`` set to
    ``madvise``, the common default), a fresh 100 MB array took 16 ms or 190-220 ms by turns
    while the process grew, against 31-34 ms every time with plain pages (measured
    2026-12-04, 2 cores); the first 4-MP conv encode in a process went from 4.15 to 2.43 s.
    """
    try:
        from numpy._core import multiarray
    except ImportError:  # numpy < 2
        try:
            from numpy.core import multiarray
        except ImportError:
            return
    setter = getattr(multiarray, "_set_madvise_hugepage", None)
    if setter is not None:
        setter(False)
