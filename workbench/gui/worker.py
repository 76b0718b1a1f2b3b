"""Running core work off the GUI thread.

:class:`Lane` runs one task at a time on the global thread pool and keeps only the most
recent request waiting: when a slider moves on, older requests are dropped before they run,
and a result that arrives after a newer request was made is discarded as stale.
:class:`JobRunner` drives a core generator job (yielding ``Progress``) with progress
signals and a cancel flag checked at every yield.
"""

from __future__ import annotations

import queue
import traceback

from PySide6.QtCore import QObject, QRunnable, QThreadPool, QTimer, Signal

from ..errors import Cancelled, WorkbenchError
from ..jobs import Progress, error_text, run, start_child

POLL_MS = 5


class _Mailbox(QObject):
    """Where worker threads leave results for the GUI thread, which collects them every
    POLL_MS. Worker threads never emit Qt signals: emitting from pool threads through
    PySide6 has been fragile (with 6.12.0 a long session aborted on a reference-count
    error); a queue read by a GUI-thread timer is plain Python and needs no such care."""

    def __init__(self):
        super().__init__()
        self._queue = queue.SimpleQueue()
        self._timer = QTimer(self)
        self._timer.setInterval(POLL_MS)
        self._timer.timeout.connect(self._drain)
        self._timer.start()

    def post(self, fn, args) -> None:  # any thread
        self._queue.put((fn, args))

    def _drain(self):
        while True:
            try:
                fn, args = self._queue.get_nowait()
            except queue.Empty:
                return
            try:
                fn(*args)
            except RuntimeError:
                pass  # its receiver was closed while the work ran: nobody is left to tell
            except Exception:  # a bug in a receiver: report it, keep delivering
                traceback.print_exc()


_MAILBOX: _Mailbox | None = None


def _mailbox() -> _Mailbox:
    global _MAILBOX
    if _MAILBOX is None:  # made by the first Lane or JobRunner, on the GUI thread
        _MAILBOX = _Mailbox()
    return _MAILBOX


class _Channel:
    """A signal-like hand-over: ``emit`` from any thread, receivers called on the GUI thread."""

    def __init__(self):
        self._receivers = []
        self._box = _mailbox()

    def connect(self, fn) -> None:
        self._receivers.append(fn)

    def emit(self, *args) -> None:
        self._box.post(self._deliver, args)

    def _deliver(self, *args):
        for fn in self._receivers:
            fn(*args)


class _Signals:
    def __init__(self):
        self.done, self.failed, self.progress = _Channel(), _Channel(), _Channel()


class _Task(QRunnable):
    def __init__(self, gen_id, fn, signals, should_stop=None, on_progress=None):
        super().__init__()
        self.gen_id, self.fn, self.signals = gen_id, fn, signals
        self.should_stop, self.on_progress = should_stop, on_progress
        self.setAutoDelete(True)

    def run(self):
        try:
            out = self.fn()
            if hasattr(out, "send") and hasattr(out, "throw"):  # a generator job
                out = run(out, self.on_progress, self.should_stop)
            self._emit(self.signals.done, out)
        except Cancelled:
            self._emit(self.signals.failed, "cancelled")
        except (WorkbenchError, OSError, MemoryError) as exc:
            self._emit(self.signals.failed, error_text(exc))
        except Exception as exc:  # a bug: report in the window, never crash the app
            traceback.print_exc()
            self._emit(self.signals.failed, f"internal error: {type(exc).__name__}: {exc}")

    def _emit(self, channel, value):
        channel.emit(self.gen_id, value)


def _wait_for_child(factory, args, should_stop, on_progress):
    """Run ``factory(*args)`` in a child process (:func:`workbench.jobs.start_child`) and
    wait for it, relaying progress and Cancel; returns its result or raises as a job would.
    The waiting releases the GIL, so the GUI keeps it."""
    try:
        proc, conn, cancel = start_child(factory, args)
    except OSError as exc:
        raise WorkbenchError(f"could not start the job: {exc}") from None
    died = "the job's process ended unexpectedly (exit code {})"
    try:
        while True:
            if should_stop():
                cancel.set()
            if not conn.poll(0.1):
                if not proc.is_alive() and not conn.poll():
                    raise WorkbenchError(died.format(proc.exitcode))
                continue
            msg = conn.recv()
            if msg[0] == "progress":
                on_progress(Progress(msg[1], 1.0, msg[2]))
            elif msg[0] == "done":
                return msg[1]
            elif msg[1] == "cancelled":
                raise Cancelled("stopped by request")
            else:
                raise WorkbenchError(msg[2])
    except (EOFError, OSError):
        raise WorkbenchError(died.format(proc.exitcode)) from None
    finally:
        proc.join(30)
        if proc.is_alive():  # a job that ignores Cancel must not outlive the app
            proc.terminate()
            proc.join(5)


def _attach(owner, pool) -> None:
    """Give ``owner`` a pool and the signals its tasks report through."""
    owner.pool = pool or QThreadPool.globalInstance()
    owner._signals = _Signals()
    owner._signals.done.connect(owner._on_done)
    owner._signals.failed.connect(owner._on_failed)


class Lane(QObject):
    """Single-flight execution with latest-wins coalescing."""

    result = Signal(object, object)  # (tag, value)
    error = Signal(object, str)
    busy = Signal(bool)

    def __init__(self, pool: QThreadPool | None = None, parent=None):
        super().__init__(parent)
        _attach(self, pool)
        self._latest = 0
        self._running = False
        self._pending = None
        self._tags = {}

    def submit(self, fn, tag=None, *, cancellable: bool = False) -> int:
        """Queue ``fn()``; replaces any request still waiting. Returns the request id.

        With ``cancellable``, ``fn`` is called as ``fn(stale)``: ``stale()`` becomes true once
        a newer request is made, and ``fn`` may then raise :class:`Cancelled` to stop early.
        """
        self._latest += 1
        self._tags[self._latest] = tag
        if cancellable:
            gen_id, inner = self._latest, fn
            fn = (lambda: inner(lambda: self._latest != gen_id))
        self._pending = (self._latest, fn)
        if not self._running:
            self._start_pending()
        return self._latest

    def invalidate(self) -> None:
        """Forget waiting work and mark what is running as stale."""
        self._latest += 1
        self._pending = None

    @property
    def running(self) -> bool:
        return self._running

    def _start_pending(self):
        gen_id, fn = self._pending
        self._pending = None
        self._running = True
        self.busy.emit(True)
        self.pool.start(_Task(gen_id, fn, self._signals))

    def _finish(self):
        self._running = False
        if self._pending is not None:
            self._start_pending()
        else:
            self.busy.emit(False)

    def _on_done(self, gen_id, value):
        self._end(gen_id, self.result, value)

    def _on_failed(self, gen_id, msg):
        self._end(gen_id, self.error, msg)

    def _end(self, gen_id, signal, payload):
        """A job ended: pass its outcome on only if no newer job was submitted since."""
        tag = self._tags.pop(gen_id, None)
        fresh = gen_id == self._latest
        self._finish()
        if fresh:
            signal.emit(tag, payload)


class JobRunner(QObject):
    """One long job at a time (save, sheet, training) with progress and Cancel."""

    progress = Signal(float, str)
    finished = Signal(object, object)  # (tag, result)
    failed = Signal(object, str)

    def __init__(self, pool: QThreadPool | None = None, parent=None):
        super().__init__(parent)
        _attach(self, pool)
        self._signals.progress.connect(self.progress.emit)
        self._cancel = False
        self._tag = None
        self._id = 0
        self.active = False

    def start(self, job_factory, tag=None) -> None:
        """Run ``job_factory()`` (a generator job) unless another job is active."""
        if self.active:
            raise RuntimeError("a job is already running")
        self._cancel = False
        self._tag = tag
        self._id += 1
        self.active = True
        self.pool.start(_Task(self._id, job_factory, self._signals, should_stop=lambda: self._cancel,
                              on_progress=self._report))

    def start_child(self, factory, args, tag=None) -> None:
        """Like :meth:`start` for ``factory(*args)`` (picklable), run in a child process."""
        self.start(lambda: self.in_child(factory, args), tag)

    def in_child(self, factory, args):
        """From inside the running job: ``factory(*args)`` in a child process, with this
        runner's progress and Cancel; returns its result."""
        return _wait_for_child(factory, args, lambda: self._cancel, self._report)

    def _report(self, p) -> None:  # any thread
        self._signals.progress.emit(p.fraction, p.text)

    def cancel(self) -> None:
        self._cancel = True

    def _on_done(self, _id, value):
        self.active = False
        self.finished.emit(self._tag, value)

    def _on_failed(self, _id, msg):
        self.active = False
        self.failed.emit(self._tag, msg)
