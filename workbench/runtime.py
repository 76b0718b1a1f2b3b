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
    its peak memory until it ends. Returns whether the setting took (glibc only).
    """
    global _done
    if _done or not sys.platform.startswith("linux"):
        return _done
    try:
        libc = ctypes.CDLL("libc.so.6")
        _done = bool(libc.mallopt(_M_MMAP_THRESHOLD, _KEEP)) and bool(libc.mallopt(_M_TRIM_THRESHOLD, 2 * _KEEP - 1))
    except (OSError, AttributeError):
        _done = False
    return _done
