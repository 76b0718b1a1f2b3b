"""Entropy coding in a helper process, for interactive read-outs.

The adaptive coder's context modelling is numpy driven from Python and holds the GIL most
of the time (only its compiled token pass releases it); in the app's process it would slow
the synthesis, SSIM and the GUI thread running beside it. A :class:`CoderProcess` runs it in a child process instead. The coefficient arrays
travel through one shared-memory block (a copy, no pickling); only their layout and the
resulting size go through the pipe.
"""

from __future__ import annotations

from concurrent.futures import Future
from multiprocessing import shared_memory

import numpy as np

from .. import jobs

_attached: dict[str, shared_memory.SharedMemory] = {}  # in the child: blocks by name


def _run(fn, scalars, block: str, specs) -> int:
    """Child side: views into the shared block, then ``fn(*scalars, arrays)``."""
    shm = _attached.get(block)
    if shm is None:
        from ..runtime import tune_allocator

        tune_allocator()
        for old in _attached.values():
            old.close()
        _attached.clear()
        shm = _attached[block] = shared_memory.SharedMemory(name=block)
    arrays = [np.ndarray(shape, dtype, buffer=shm.buf, offset=offset) for offset, shape, dtype in specs]
    return fn(*scalars, arrays)


class CoderProcess:
    """One helper process with a shared block that grows as needed; one task at a time."""

    def __init__(self):
        self._pool = jobs.pool(1)
        self._shm: shared_memory.SharedMemory | None = None

    def submit(self, fn, scalars, arrays) -> Future:
        """Run ``fn(*scalars, arrays)`` in the child (``fn`` importable, arrays copied in).
        The caller waits for one result before submitting the next."""
        specs, offset = [], 0
        for a in arrays:
            specs.append((offset, a.shape, a.dtype.str))
            offset += -(-a.nbytes // 64) * 64
        if self._shm is None or self._shm.size < offset:
            self._release()
            self._shm = shared_memory.SharedMemory(create=True, size=max(offset, 1 << 20) * 2)
        for (off, shape, dtype), a in zip(specs, arrays):
            np.copyto(np.ndarray(shape, dtype, buffer=self._shm.buf, offset=off), a)
        return self._pool.submit(_run, fn, scalars, self._shm.name, specs)

    def _release(self):
        if self._shm is not None:
            self._shm.close()
            self._shm.unlink()
            self._shm = None

    def close(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)
        self._release()
