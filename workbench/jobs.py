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


def error_text(exc: BaseException) -> str:
    """The one line a failed job reports: the error's first line, or its kind."""
    text = str(exc)
    return text.splitlines()[0] if text else type(exc).__name__


def run_in_child(conn, cancel, factory, args) -> None:
    """Body of a child process that runs ``factory(*args)``, a job, for :func:`start_child`.

    Progress goes to the parent over ``conn`` as ``("progress", fraction, text)``; the end as
    ``("done", result)`` or ``("failed", kind, message)``; ``cancel`` (an Event) stops the job
    at its next yield.
    """
    import os

    from .errors import WorkbenchError

    parent = os.getppid()

    def should_stop() -> bool:  # asked to, or the parent has gone (then nobody waits for the result)
        return cancel.is_set() or os.getppid() != parent

    try:
        result = run(factory(*args), lambda p: conn.send(("progress", p.fraction, p.text)), should_stop)
        conn.send(("done", result))
    except Cancelled:
        conn.send(("failed", "cancelled", "cancelled"))
    except (WorkbenchError, OSError, MemoryError) as exc:
        conn.send(("failed", "error", error_text(exc)))
    except Exception as exc:  # a bug: report it to the parent rather than die silently
        conn.send(("failed", "error", f"internal error: {type(exc).__name__}: {exc}"))
    finally:
        conn.close()


def start_child(factory, args):
    """Start ``factory(*args)`` (picklable, a job) in a fresh process.

    For heavy jobs next to an interactive process: the child has its own interpreter, so
    its imports and Python-level work never hold the parent's GIL. Returns
    ``(process, connection, cancel_event)``; see :func:`run_in_child` for the messages.
    """
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    parent, child = ctx.Pipe(duplex=False)
    cancel = ctx.Event()
    # Not a daemon: a job may start processes of its own (the quality sheet's worker pool).
    # It stops at its next yield once cancelled or orphaned (see run_in_child).
    proc = ctx.Process(target=run_in_child, args=(child, cancel, factory, args))
    proc.start()
    child.close()
    return proc, parent, cancel
