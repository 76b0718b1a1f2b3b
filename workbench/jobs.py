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


def end_with_parent(pid: int) -> None:
    """Make this process exit as soon as process ``pid`` has ended, whatever it is doing.

    For children of ours (pool workers, helpers): when their parent is killed (``kill -9``,
    a logout's SIGTERM) nothing else tells them, and a pool worker blocked on its queue would
    live for ever. Runs a daemon thread; use as a pool ``initializer`` with the parent's pid.
    A pid file descriptor (Linux 5.3+) wakes the thread the moment the parent ends; elsewhere
    it looks once a second.
    """
    import os
    import threading

    def wait_pidfd(fd):
        import select

        select.select([fd], [], [])

    def wait_poll():
        import time

        while True:
            time.sleep(1.0)
            try:
                os.kill(pid, 0)
            except ProcessLookupError:
                return
            except PermissionError:
                pass

    try:
        fd = os.pidfd_open(pid)
        waiter = lambda: wait_pidfd(fd)  # noqa: E731
    except (AttributeError, OSError):
        waiter = wait_poll

    def watch():
        waiter()
        os._exit(1)

    threading.Thread(target=watch, name="end-with-parent", daemon=True).start()


def _pool_worker_start(parent: int, extra_codecs=None) -> None:
    import signal

    _register(extra_codecs)
    # Ctrl-C reaches the whole process group; the parent alone answers it (and closes the
    # pool), so workers print no tracebacks of their own.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    end_with_parent(parent)


def pool(workers: int, context: str = "spawn"):
    """A process pool whose workers end with this process (see :func:`end_with_parent`)
    and leave Ctrl-C to it."""
    import multiprocessing as mp
    import os
    from concurrent.futures import ProcessPoolExecutor

    from . import codecs

    return ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context(context),
                               initializer=_pool_worker_start, initargs=(os.getpid(), codecs.extras()))


def _register(extra_codecs) -> None:
    """In a child: know the methods the parent registered at run time."""
    if extra_codecs:
        from . import codecs

        for name, traits in extra_codecs.items():
            codecs.register(name, traits)


def call_with_codecs(extra_codecs, fn, *args):
    """``fn(*args)`` after registering ``extra_codecs``: how a task reaches a Dask worker,
    which no initializer of ours starts."""
    _register(extra_codecs)
    return fn(*args)


def run_in_child(conn, cancel, factory, args, extra_codecs=None) -> None:
    """Body of a child process that runs ``factory(*args)``, a job, for :func:`start_child`.

    Progress goes to the parent over ``conn`` as ``("progress", fraction, text)``; the end as
    ``("done", result)`` or ``("failed", kind, message)``; ``cancel`` (an Event) stops the job
    at its next yield.
    """
    import os

    from .errors import WorkbenchError

    parent = os.getppid()
    end_with_parent(parent)
    _register(extra_codecs)

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
    from . import codecs

    proc = ctx.Process(target=run_in_child, args=(child, cancel, factory, args, codecs.extras()))
    proc.start()
    child.close()
    return proc, parent, cancel
