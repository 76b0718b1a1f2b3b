"""How a slider move becomes pixels and numbers on screen: the sketch first (its own thread),
then the exact reconstruction and read-outs, then the rendered views; stale work is dropped
(see :class:`workbench.gui.worker.Lane`). Conv work goes to the helper process (remote.py)."""

from __future__ import annotations

import threading

import numpy as np

from .. import pipeline, preview
from ..quality import metrics
from . import remote
from ..errors import Cancelled
from ..settings import Settings
from . import imaging

SKETCH_MIN_PIXELS = 1_000_000  # below this the exact preview follows a slider quickly enough


class PreviewFlow:
    """Mixed into :class:`workbench.gui.window.MainWindow`; drives its lanes and views."""

    # ------------------------------------------------------------------ preview pipeline
    def _shared_for(self, s: Settings):
        return self.session.shared_for(s)

    def _on_settings_changed(self):
        self.refresh()

    def refresh(self) -> None:
        img = self.current
        if img is None:
            return
        try:
            s = self.panel.settings()
        except ValueError as exc:
            self.status_text.setText(str(exc))
            return
        self.panel.show_numbers(None)
        cached = self._numbers.get((img.name, s.cache_key()))
        if s.target is not None:
            self._submit_target(img, s)
            return
        self.target_lane.invalidate()
        key = (img.name, s.method, s.block, s.chroma, s.basis_scope)
        prev = self._previews.get(key)
        if prev is not None:
            self._previews.move_to_end(key)
        if prev is None:
            # what is still on its way was asked for under the old transform: drop it
            for lane in (self.sketch_lane, self.preview_lane, self.render_lane):
                lane.invalidate()
            self._after_sketch = None
            self.status_text.setText(f"fitting the transform for {img.name}…")
            self.fit_lane.submit(lambda: self._make_preview(img, s, key), tag=key)
            return
        self.panel.show_energy(prev.energy_kept(), s.kept)
        look = self._diff_look()
        exact = (lambda: self._reconstruct(prev, s, look)), (img.name, s)
        view = self._sketch_view(prev)
        self.render_lane.invalidate()
        if view is not None:
            # First a reduced view of what is on screen (tens of ms), then the exact image
            # and its read-outs (run side by side they would slow the sketch down).
            self._after_sketch = exact
            self.sketch_lane.submit(lambda: self._sketch(prev, s, *view, look), tag=(img.name, s))
        else:
            self._after_sketch = None
            self.preview_lane.submit(*exact)
        if cached is not None:
            self._show_numbers(img, cached)

    def _sketch_view(self, prev):
        """``(factor, region)`` for a sketch of what the views show, or None where the exact
        path is quick anyway (small images) or the method has no sketch."""
        img = prev.img
        if not prev.settings.traits.has_sketch or img.width * img.height < SKETCH_MIN_PIXELS:
            return None
        factor = 1
        while factor < 8 and 2 * factor * self.views.scale <= 1.0:
            factor *= 2
        r = self.views.views[0].visible_rect()
        if r.isEmpty():
            return factor, None
        return factor, (int(r.top()), int(r.bottom()) + 1, int(r.left()), int(r.right()) + 1)

    def _sketch(self, prev, s, factor, region, look):
        signed, gain, _ = look
        sk = prev.sketch(s, factor, region)
        diff = imaging.difference(sk.original, sk.pixels, prev.img.peak, gain, signed)
        return prev, s, sk, imaging.to_qimage(imaging.display_rgb(sk.pixels)), imaging.to_qimage(diff)

    def _on_sketch(self, tag, value):
        prev, s, sk, rec, diff = value
        if prev.img is self.current and tag != self._exact_tag:  # not once the exact view is up
            self.views.views[1].set_sketch(rec, sk.x0, sk.y0, sk.factor)
            self.views.views[2].set_sketch(diff, sk.x0, sk.y0, sk.factor)
            if self._shown is not None and self._shown[0] is prev.img.pixels:
                self._shown = (self._shown[0], None, self._shown[2])
        self._run_exact()

    def _on_sketch_error(self, _tag, msg):
        self._on_lane_error(_tag, msg)
        self._run_exact()

    def _run_exact(self):
        if self._after_sketch is not None:
            fn, tag = self._after_sketch
            self._after_sketch = None
            self.preview_lane.submit(fn, tag=tag)

    def _make_preview(self, img, s, key):
        if s.traits.folder_scope and s.basis_scope == "folder":
            skey = (s.method, s.block, s.chroma, s.kept)
            if skey not in self._shared:
                from ..formats.basisfile import basis_hash
                from ..codecs import get

                shared, raw, _ = get(s.method).prepare_shared(
                    [pipeline.image_planes(i, s.chroma) for i in self.images], s)
                self._shared[skey] = (shared, basis_hash(raw))
        if remote.handles(s.method):
            return key, self._helper().open(key, img, s, self.conv_model_file)
        shared, ref = self._shared_for(s)
        return key, preview.ImagePreview(img, s, shared=shared, shared_ref=ref)

    def _helper(self):
        with self._remote_lock:  # worker threads ask for it
            if self._remote is None:
                self._remote = remote.PreviewProcess()
            return self._remote

    def _on_method_highlighted(self, index: int) -> None:
        # The conv encoder's helper needs seconds to start (it imports torch): begin while
        # the user is still choosing.
        if remote.handles(self.panel.method.itemData(index)) and self._remote is None:
            threading.Thread(target=self._helper().warm, args=(self.conv_model_file,), daemon=True).start()

    def _on_fitted(self, _tag, value):
        key, prev = value
        self.session.remember_preview(key, prev)
        if prev.channels is not None and self.panel.count.maximum() != prev.channels:
            self.panel.set_count_range(prev.channels)
        self.status_text.setText("")
        self.refresh()

    def _diff_look(self):
        return (self.panel.diff_mode.currentData(), float(self.panel.gain.value()), self.panel.worst.isChecked())

    @staticmethod
    def _render(img, rec, look, stale=lambda: False):
        """Everything the views need, computed off the GUI thread (QImage is thread-safe);
        gives up between steps once ``stale()`` (the slider has moved on)."""
        signed, gain, worst = look

        def check():
            if stale():
                raise Cancelled("a newer view was asked for")

        out = {"rec": imaging.to_qimage(imaging.display_rgb(rec)), "look": look, "marks": []}
        check()
        out["diff"] = imaging.to_qimage(imaging.difference(img.pixels, rec, img.peak, gain, signed))
        if worst and min(img.pixels.shape[:2]) >= 32:
            check()
            tiles = metrics.tile_psnr(img.pixels, rec, tile=32, data_range=img.peak)
            out["marks"] = [(x, y, 32, 32) for x, y, p in tiles.worst(5) if np.isfinite(p)]
        return out

    def _reconstruct(self, prev, s, look):
        """The exact reconstruction, with its read-outs unless they are cached already."""
        key = (prev.img.name, s.cache_key())
        if key in self._numbers:
            coded, px = prev.reconstruct(s)
            return prev, s, px, look, None
        coded, px, n = prev.evaluate(s, self._coder_process())
        return prev, s, px, look, n

    def _coder_process(self):
        if self._coder is None:
            from .coderproc import CoderProcess

            self._coder = CoderProcess()
        return self._coder

    def _on_preview(self, tag, value):
        # The sketch already shows the reconstruction, so its read-outs (entropy coding and
        # SSIM, which need both cores) came first; the exact full-resolution view follows.
        prev, s, px, look, n = value
        img = prev.img
        if n is not None:
            self._on_numbers((img.name, s.cache_key()), (img, s, n))
        if img is not self.current:
            return
        key = (img.name, s.cache_key())
        if key in self._numbers and n is None:
            self._show_numbers(img, self._numbers[key])
        self.render_lane.submit(lambda stale: (img, px, self._render(img, px, look, stale)), tag=tag, cancellable=True)

    def _on_rendered(self, tag, value):
        img, px, rendered = value
        if img is self.current:
            self._exact_tag = tag
            self._display(img, px, rendered)

    def _submit_target(self, img, s):
        if s.traits.folder_scope and s.basis_scope == "folder" and (s.method, s.block, s.chroma, s.kept) \
                not in self._shared:
            key = (img.name, s.method, s.block, s.chroma, s.basis_scope)
            self.fit_lane.submit(lambda: self._make_preview(img, s.replace(target=None), key), tag=key)
            return

        def work():
            if remote.handles(s.method):
                n, rec = self._helper().encode_one(img, s, self.conv_model_file)
                return img, s, n, rec, None
            shared, ref = self._shared_for(s)
            kind = s.target[0]
            unit = {"psnr": " dB", "bpp": " bpp"}.get(kind, "")

            def told(_name, trial, step, value):
                self.waits.detail(self.target_lane, f"trial {trial}: step {step:.3g} "
                                                    f"gives {value:.4g}{unit}")

            r = pipeline.encode([img], s, shared=shared, shared_ref=ref, on_trial=told).images[0]
            n = preview.Numbers.of(r)
            return img, s, n, r.reconstruction, r.advice

        self.preview_lane.invalidate()
        self.target_lane.submit(work, tag=(img.name, s))

    def _on_target(self, tag, value):
        img, s, n, rec, advice = value
        if img is not self.current:
            return
        if advice:
            self.notice.show_text(f"{img.name}: {advice}")
        if rec.ndim == 3 and rec.shape[2] in (2, 4):
            rec = rec[..., :-1] if rec.shape[2] == 4 else rec[..., 0]
        self._display(img, rec, self._render(img, rec, self._diff_look()))
        self._numbers[(img.name, s.cache_key())] = n
        self._show_numbers(img, n)

    def _on_numbers(self, key, value):
        img, s, n = value
        self._numbers[key] = n
        if img is self.current and key == (img.name, self.panel.settings().cache_key()):
            self._show_numbers(img, n)

    def _show_numbers(self, img, n):
        self.last_numbers = n
        self.panel.show_numbers(n)
        row = self.images.index(img) if img in self.images else -1
        if row >= 0:
            self.thumbs.item(row).setText(self._caption(img, n))

    def _on_lane_error(self, _tag, msg):
        self.last_error = msg
        self.notice.show_text(f"Could not compute the preview: {msg}")

