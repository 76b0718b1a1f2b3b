"""Long work as generators: they ``yield`` :class:`Progress` and ``return`` their result.

The CLI drives them with :func:`run`; the GUI runs the same generators on a worker thread
and stops one by closing it (cancellation is checked at every yield).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Generator

from .errors import Cancelled


@dataclass(frozen=True)
class Progress:
    done: float
    total: float
    text: str = ""

    @property
    def fraction(self) -> float:
        return 0.0 if self.total <= 0 else min(1.0, self.done / self.total)


Job = Generator[Progress, None, object]


def run(job: Job, on_progress: Callable[[Progress], None] | None = None,
        should_stop: Callable[[], bool] | None = None):
    """Drive ``job`` to completion and return its result.

    Raises
    ------
    Cancelled
        When ``should_stop()`` becomes true; the generator is closed first.
    """
    try:
        while True:
            p = next(job)
            if on_progress is not None:
                on_progress(p)
            if should_stop is not None and should_stop():
                job.close()
                raise Cancelled("stopped by request")
    except StopIteration as stop:
        return stop.value
    except KeyboardInterrupt:
        job.close()  # lets the job save what it must (training checkpoints) before we leave
        raise
