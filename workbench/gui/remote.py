"""The app's work with the learned codec, run in child processes.

Importing torch takes over a second, and the initialisation of its extension holds the
GIL for 150–250 ms: in the app's own interpreter that would freeze the window. So the
conv encoder's previews live in a helper process (:class:`PreviewProcess`, one model and a
few fitted images kept there), and saving a bundle or writing a quality sheet with it
runs as a child job (:func:`save_job`, :func:`sheet_job`, started by
:func:`workbench.jobs.start_child`; the app decodes its bundles the same way). The app's
process never imports torch.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from concurrent.futures import CancelledError, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

from .. import codecs, jobs, pipeline, preview
from ..errors import Cancelled, InputError
from ..formats.imagefiles import SourceImage, write_atomic
from ..settings import Settings

KEEP = 4  # fitted images the helper keeps (each holds its latents)
def handles(method: str) -> bool:
    """Whether the app runs ``method``'s work here, in child processes (its traits say so)."""
    return codecs.traits(method).isolated

# --------------------------------------------------------------- child side
_previews: OrderedDict = OrderedDict()
_models: dict = {}


def _shared(model_file):
    """``(model, sha256)`` of ``model_file`` (None: the shipped model), loaded once."""
    key = None if model_file is None else str(model_file)
    if key not in _models:
        if not _models:
            from ..runtime import tune_allocator

            tune_allocator()
        _models.clear()  # one model at a time: the app uses one
        _models[key] = codecs.get("conv").load_model(model_file)
    return _models[key]


def _warm(model_file) -> None:
    _shared(model_file)  # returns nothing: a model sent back would bring torch into the app


def _open(key, img: SourceImage, settings: Settings, model_file) -> int | None:
    shared, ref = _shared(model_file)
    _previews[key] = preview.ImagePreview(img, settings, shared=shared, shared_ref=ref)
    while len(_previews) > KEEP:
        _previews.popitem(last=False)
    return _previews[key].channels


def _call(key, what: str, settings: Settings):
    """``("missing",)`` when the helper has let the fit go, else ``("ok", result)``."""
    prev = _previews.get(key)
    if prev is None:
        return ("missing",)
    _previews.move_to_end(key)
    if what == "evaluate":
        _, px, n = prev.evaluate(settings)
        return "ok", (px, n)
    return "ok", prev.reconstruct(settings)[1]


def _encode_one(img: SourceImage, settings: Settings, model_file):
    shared, ref = _shared(model_file)
    r = pipeline.encode([img], settings, shared=shared, shared_ref=ref).images[0]
    return preview.Numbers.of(r), r.reconstruction


# --------------------------------------------------------------- parent side
class PreviewProcess:
    """A helper process for previews with the conv encoder; calls block the calling
    (worker) thread, never the GIL, while the child computes."""

    def __init__(self):
        self._pool = self._start()
        self._lock = threading.Lock()
        self._closed = False

    @staticmethod
    def _start() -> ProcessPoolExecutor:
        return jobs.pool(1)

    def call(self, fn, *args):
        """``fn(*args)`` in the helper. If the helper has died (killed, out of memory), the
        call fails with a clear message and the next one starts a fresh helper."""
        pool = self._pool
        try:
            return pool.submit(fn, *args).result()
        except (BrokenProcessPool, CancelledError, RuntimeError) as exc:
            with self._lock:
                if self._closed:  # shut down, or cancelled by the shutdown
                    raise Cancelled("the app is closing") from None
                if not isinstance(exc, BrokenProcessPool):
                    raise  # the child's own error
                if self._pool is pool:
                    self._pool = self._start()
            raise InputError("the conv encoder's helper process stopped; it restarts on the next try") from None

    def open(self, key, img: SourceImage, settings: Settings, model_file=None) -> "RemotePreview":
        """Fit ``img`` (the encoder's forward pass) in the helper."""
        key = (key, None if model_file is None else str(model_file))
        channels = self.call(_open, key, img, settings, model_file)
        return RemotePreview(self, key, img, settings, model_file, channels)

    def warm(self, model_file=None) -> None:
        """Start the helper and load the model now, so that the first preview is quicker.
        Quietly does nothing on failure: the first real call reports it."""
        try:
            self.call(_warm, model_file)
        except Exception:  # noqa: BLE001  (the call that needs the model will say what is wrong)
            pass

    def encode_one(self, img: SourceImage, settings: Settings, model_file=None):
        """``(Numbers, reconstruction)`` of a one-image bundle (rate control included)."""
        return self.call(_encode_one, img, settings, model_file)

    def close(self) -> None:
        """Stop the helper now, even in the middle of a computation (whoever waits for
        it gets :class:`workbench.errors.Cancelled`)."""
        with self._lock:
            self._closed = True
            pool = self._pool
        processes = list((getattr(pool, "_processes", None) or {}).values())
        pool.shutdown(wait=False, cancel_futures=True)
        for proc in processes:
            proc.terminate()


class RemotePreview:
    """What the app needs of :class:`workbench.preview.ImagePreview`, computed in a
    :class:`PreviewProcess`. Pixels come back as arrays; nothing is sketched."""

    def __init__(self, proc: PreviewProcess, key, img, settings, model_file, channels):
        self._proc, self._key, self._model_file = proc, key, model_file
        self.img, self.settings, self.channels = img, settings, channels
        self.codec = codecs.get(settings.method)

    def compatible(self, settings: Settings) -> bool:
        return preview.same_transform(self.settings, settings)

    def energy_kept(self):
        return None

    def sketch(self, settings, factor, region=None):
        return None

    def _call(self, what, settings):
        out = self._proc.call(_call, self._key, what, settings)
        if out[0] == "missing":  # the helper kept newer fits (or restarted): fit this one again
            self._proc.call(_open, self._key, self.img, self.settings, self._model_file)
            out = self._proc.call(_call, self._key, what, settings)
        return out[1]

    def reconstruct(self, settings: Settings):
        """``(None, pixels)``: the coded form stays in the helper."""
        return None, self._call("reconstruct", settings)

    def evaluate(self, settings: Settings, coder=None):
        """``(None, pixels, Numbers)``."""
        px, n = self._call("evaluate", settings)
        return None, px, n


# --------------------------------------------------------------- child jobs
def save_job(images, settings: Settings, path: Path, protect, model_file=None):
    """Encode ``images`` into the bundle ``path`` (a job, for a child process)."""
    shared, ref = _shared(model_file) if handles(settings.method) else (None, None)
    result = yield from pipeline.encode_job(images, settings, shared=shared, shared_ref=ref, measure=False)
    write_atomic(path, result.data, protect=protect)
    for r in result.images:  # the parent needs the numbers, not the pixels
        r.reconstruction = None
    return result


def sheet_job(images, settings: Settings, outdir: Path, protect, model_file=None, reuse=()):
    """The quality sheet of ``images`` into ``outdir`` (a job, for a child process)."""
    from .. import sheet

    shared, ref = _shared(model_file) if handles(settings.method) else (None, None)
    return (yield from sheet.sheet_job(images, settings, outdir, shared=shared, shared_ref=ref, protect=protect,
                                       reuse=reuse))
