"""The main window: wiring between the core, the panel, the views and the workers."""

from __future__ import annotations

import importlib.metadata as md
import threading
from collections import OrderedDict
from pathlib import Path

import numpy as np
from PySide6.QtCore import QSettings, QSize, Qt, QThreadPool, QTimer
from PySide6.QtGui import QAction, QIcon, QKeySequence, QPixmap
from PySide6.QtWidgets import (QFileDialog, QHBoxLayout, QLabel, QListWidget, QListWidgetItem, QMainWindow,
                               QMessageBox, QProgressBar, QPushButton, QSplitter, QToolBar, QVBoxLayout, QWidget)

from .. import bundle, measures, metrics, pipeline, preview, remote
from ..version import __version__
from ..errors import Cancelled
from ..imagefiles import SourceImage, list_inputs, read_many, write_atomic
from ..notices import CAUTION
from ..settings import Settings
from . import imaging
from .panel import SidePanel
from .views import Triptych
from .worker import JobRunner, Lane

ICONS = Path(__file__).resolve().parents[2] / "icons"
SAMPLES = Path(__file__).resolve().parents[2] / "sample_images"
THUMB = 96
SKETCH_MIN_PIXELS = 1_000_000  # below this the exact preview follows a slider quickly enough
PREVIEW_CACHE = 3  # fitted transforms kept (each holds the image's patches: ~100 MB at 4 Mpixel)


def icon(name: str) -> QIcon:
    p = ICONS / f"{name}.svg"
    return QIcon(str(p)) if p.exists() else QIcon()


def _thumbnail_image(img: SourceImage):
    """A small QImage of ``img`` (QImage, unlike QPixmap, may be made off the GUI thread)."""
    step = max(1, max(img.pixels.shape[:2]) // THUMB)
    return imaging.to_qimage(imaging.display_rgb(np.ascontiguousarray(img.pixels[::step, ::step])))


class Notice(QWidget):
    """A dismissable line of text above the views (skipped files, failed jobs)."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self.setObjectName("notice")
        row = QHBoxLayout(self)
        row.setContentsMargins(8, 4, 8, 4)
        self.label = QLabel()
        self.label.setWordWrap(True)
        close = QPushButton("Dismiss")
        close.clicked.connect(self.hide)
        row.addWidget(self.label, 1)
        row.addWidget(close)
        self.hide()

    def show_text(self, text: str) -> None:
        self.label.setText(text)
        self.show()


class MainWindow(QMainWindow):
    def __init__(self, store: QSettings | None = None):
        super().__init__()
        self.store = store or QSettings("workbench", "workbench")
        self.setWindowTitle("workbench")
        self.setWindowIcon(icon("app"))
        self.folder: Path | None = None
        self.bundle_path: Path | None = None
        self.images: list[SourceImage] = []
        self.index = -1
        self._previews: OrderedDict = OrderedDict()  # a few fitted images, least recently used dropped
        self._shared: dict = {}
        self._numbers: dict = {}
        self._shown = None  # (orig, rec) arrays on screen
        self.last_numbers = None
        self.last_measured = None
        self.last_batch = None
        self.last_error = ""
        self.conv_model_file = None  # a model trained here; None for the shipped one
        self._remote = None  # the helper process of the conv encoder (remote.py), on first use
        self._remote_lock = threading.Lock()
        self.last_training = None

        self.fit_lane, self.preview_lane, self.target_lane = Lane(), Lane(), Lane()
        # Sketches get a thread of their own so that they never queue behind slower work.
        self._sketch_pool = QThreadPool(self)
        self._sketch_pool.setMaxThreadCount(1)
        self.sketch_lane = Lane(self._sketch_pool)
        self.sketch_lane.result.connect(self._on_sketch)
        self.sketch_lane.error.connect(self._on_sketch_error)
        self.fit_lane.result.connect(self._on_fitted)
        self.preview_lane.result.connect(self._on_preview)
        self.render_lane = Lane()
        self.render_lane.result.connect(self._on_rendered)
        self.render_lane.error.connect(self._on_lane_error)
        self.target_lane.result.connect(self._on_target)
        for lane in (self.fit_lane, self.preview_lane, self.target_lane):
            lane.error.connect(self._on_lane_error)
        # Reading a folder and loading a model run off the GUI thread too.
        self.loading = False
        self._exact_tag = None  # (image name, settings) of the exact view on screen
        self._coder = None  # helper process for the read-outs' entropy coding, started on first use
        self._after_sketch = None  # the exact preview waiting for the sketch to be shown
        self.measure_lane = Lane()
        self.measure_lane.result.connect(self._on_measured)
        self.measure_lane.error.connect(lambda _tag, msg: self.panel.show_measured(None, msg))
        self._measure_refs: OrderedDict = OrderedDict()  # (image, spec) -> measures.Reference, lane thread only
        self.folder_lane, self.model_lane = Lane(), Lane()
        self.folder_lane.result.connect(self._on_folder)
        self.folder_lane.error.connect(self._on_folder_error)
        self.model_lane.result.connect(lambda _tag, value: self._on_model_loaded(*value))
        self.model_lane.error.connect(self._on_lane_error)
        self.jobs = JobRunner()
        self.jobs.progress.connect(self._on_job_progress)
        self.jobs.finished.connect(self._on_job_done)
        self.jobs.failed.connect(self._on_job_failed)

        self._build()
        self._restore()
        self.setAcceptDrops(True)

    # ------------------------------------------------------------------ layout
    def _build(self):
        self.thumbs = QListWidget()
        self.thumbs.setViewMode(QListWidget.ViewMode.IconMode)
        self.thumbs.setFlow(QListWidget.Flow.LeftToRight)
        self.thumbs.setWrapping(False)
        self.thumbs.setIconSize(QSize(THUMB, THUMB))
        self.thumbs.setFixedHeight(THUMB + 70)
        self.thumbs.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.thumbs.setSpacing(4)
        self.thumbs.setMovement(QListWidget.Movement.Static)
        self.thumbs.currentRowChanged.connect(self.select)

        self.notice = Notice()
        self.views = Triptych()
        self.views.hovered.connect(self._on_hover)
        self.panel = SidePanel()
        self.panel.changed.connect(self._on_settings_changed)
        self.panel.diff_changed.connect(self._redraw_difference)
        self.panel.measures_changed.connect(self._measure_shown)
        self.panel.method.highlighted.connect(self._on_method_highlighted)

        centre = QWidget()
        col = QVBoxLayout(centre)
        col.setContentsMargins(6, 6, 6, 6)
        col.addWidget(self.thumbs)
        col.addWidget(self.notice)
        col.addWidget(self.views, 1)
        split = QSplitter()
        split.addWidget(centre)
        split.addWidget(self.panel)
        split.setStretchFactor(0, 1)
        self.setCentralWidget(split)

        self.status_text = QLabel("Open a folder of images to begin.")
        self.progress = QProgressBar()
        self.progress.setMaximumWidth(220)
        self.progress.setRange(0, 1000)
        self.progress.hide()
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.hide()
        self.cancel_button.clicked.connect(self.jobs.cancel)
        sb = self.statusBar()
        sb.addWidget(self.status_text, 1)
        sb.addPermanentWidget(self.progress)
        sb.addPermanentWidget(self.cancel_button)

        def act(text, name, slot, shortcut=None):
            a = QAction(icon(name), text, self)
            a.triggered.connect(slot)
            if shortcut:
                a.setShortcut(QKeySequence(shortcut))
            return a

        self.act_open = act("Open folder…", "open-folder", self._ask_folder, "Ctrl+O")
        self.act_open_bundle = act("Open bundle…", "open-bundle", self._ask_bundle, "Ctrl+Shift+O")
        self.act_save = act("Save bundle…", "save-bundle", self._ask_save_bundle, "Ctrl+S")
        self.act_sheet = act("Save quality sheet…", "save-sheet", self._ask_save_sheet, "Ctrl+Shift+S")
        # One toggle between the whole image and one screen pixel per image pixel.
        self.act_zoom = act("Whole image ⇄ pixel for pixel", "zoom-toggle", self.views.toggle_zoom, "Z")
        self.act_train = act("Train encoder on this folder…", "train", self._ask_train)
        act_quit = act("Quit", "", self.close, "Ctrl+Q")
        act_about = act("About workbench", "app", self.show_about)

        m = self.menuBar().addMenu("&File")
        for a in (self.act_open, self.act_open_bundle, None, self.act_save, self.act_sheet, None, act_quit):
            m.addSeparator() if a is None else m.addAction(a)
        v = self.menuBar().addMenu("&View")
        v.addAction(self.act_zoom)
        t = self.menuBar().addMenu("&Tools")
        t.addAction(self.act_train)
        self.act_archive = act("Apply to an archive…", "save-bundle", self._ask_archive)
        t.addAction(self.act_archive)
        h = self.menuBar().addMenu("&Help")
        h.addAction(act_about)
        tb = QToolBar("Main")
        tb.setObjectName("mainToolbar")
        tb.setIconSize(QSize(22, 22))
        for a in (self.act_open, self.act_open_bundle, self.act_save, self.act_sheet, None, self.act_zoom):
            tb.addSeparator() if a is None else tb.addAction(a)
        self.addToolBar(tb)

    # ------------------------------------------------------------------ settings persistence
    def _restore(self):
        geo = self.store.value("geometry")
        if geo is not None:
            self.restoreGeometry(geo)
        else:
            self.resize(1500, 860)
        raw = self.store.value("settings")
        if raw:
            try:
                import json

                self.panel.apply(Settings.from_dict(json.loads(raw)))
            except (ValueError, TypeError):
                pass

    def closeEvent(self, event):
        import json

        self.store.setValue("geometry", self.saveGeometry())
        try:
            self.store.setValue("settings", json.dumps(self.panel.settings().to_dict()))
        except ValueError:
            pass
        if self.folder is not None:
            self.store.setValue("last_folder", str(Path(self.folder).resolve()))
        self.store.sync()
        self.jobs.cancel()
        for lane in (self.fit_lane, self.preview_lane, self.target_lane, self.sketch_lane,
                     self.folder_lane, self.model_lane, self.render_lane, self.measure_lane):
            lane.invalidate()
        if self._remote is not None:  # stops a conv computation at once; its waiter gives up
            self._remote.close()
        self._sketch_pool.waitForDone(30000)
        QThreadPool.globalInstance().waitForDone(30000)  # let running work end before its receivers go
        if self._coder is not None:
            self._coder.close()
        super().closeEvent(event)

    # ------------------------------------------------------------------ opening
    def open_folder(self, folder) -> None:
        """Read a folder's images off the GUI thread (unreadable ones are listed and
        skipped); ``loading`` is true until they are shown."""
        folder = Path(folder)
        self.loading = True
        self.status_text.setText(f"reading {folder}…")

        def work():
            images, skipped = read_many([folder])
            return folder, images, skipped, [_thumbnail_image(i) for i in images]

        self.folder_lane.submit(work, tag=folder)

    def _on_folder_error(self, _tag, msg):
        self.loading = False
        self.status_text.setText("")
        self.notice.show_text(msg)

    def _on_folder(self, _tag, value):
        folder, images, skipped, thumbs = value
        self.loading = False
        self.folder, self.bundle_path = folder, None
        self.panel.compare_with("the source")
        self.store.setValue("last_folder", str(Path(folder).resolve()))
        self._set_images(images, thumbs)
        if skipped:
            names = ", ".join(n for n, _ in skipped)
            self.notice.show_text(f"Skipped {len(skipped)} unreadable file(s): {names}")
        else:
            self.notice.hide()
        self.status_text.setText(f"{folder}: {len(images)} image(s)")

    def _set_images(self, images, thumbs=None):
        self.images = images
        self._previews.clear()
        self._shared.clear()
        self._numbers.clear()
        self.thumbs.blockSignals(True)
        self.thumbs.clear()
        for img, thumb in zip(images, thumbs or [_thumbnail_image(i) for i in images]):
            item = QListWidgetItem(QIcon(QPixmap.fromImage(thumb)), self._caption(img))
            item.setSizeHint(QSize(THUMB + 70, THUMB + 48))
            self.thumbs.addItem(item)
        self.thumbs.blockSignals(False)
        self.index = -1
        if images:
            self.thumbs.setCurrentRow(0)
            self.thumbs.setFocus()
        else:
            for v in self.views.views:
                v.clear()

    def _caption(self, img, n=None) -> str:
        name = img.name if len(img.name) <= 18 else img.name[:16] + "…"
        if n is None:
            return f"{name}\n– bpp · – dB"
        p = "inf" if n.psnr == float("inf") else f"{n.psnr:.1f}"
        return f"{name}\n{n.bpp:.2f} bpp · {p} dB"

    def select(self, row: int) -> None:
        if not (0 <= row < len(self.images)) or row == self.index:
            return
        self.index = row
        if self.thumbs.currentRow() != row:
            self.thumbs.setCurrentRow(row)
        self._shown = None
        self.refresh()
        QTimer.singleShot(0, self.views.fit)

    def keyPressEvent(self, event):
        if event.key() in (Qt.Key.Key_Left, Qt.Key.Key_Right) and self.images:
            step = -1 if event.key() == Qt.Key.Key_Left else 1
            self.select(min(len(self.images) - 1, max(0, self.index + step)))
            return
        super().keyPressEvent(event)

    # ------------------------------------------------------------------ preview pipeline
    @property
    def current(self) -> SourceImage | None:
        return self.images[self.index] if 0 <= self.index < len(self.images) else None

    def _shared_for(self, s: Settings):
        """The folder-fitted shared side for the current settings, or a marker that it must be
        fitted first (an isolated method's model lives in the helper process)."""
        if s.basis_scope != "folder" or not s.traits.folder_scope:
            return None, None
        return self._shared.get((s.method, s.block, s.chroma, s.kept), (None, "missing"))

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
                from ..basisfile import basis_hash
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
        self._previews[key] = prev
        while len(self._previews) > PREVIEW_CACHE:
            self._previews.popitem(last=False)
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
            from ..coderproc import CoderProcess

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
            r = pipeline.encode([img], s, shared=shared, shared_ref=ref).images[0]
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

    # ------------------------------------------------------------------ display
    def _display(self, img, rec, rendered):
        first = self._shown is None or self._shown[0] is not img.pixels
        self._shown = (img.pixels, rec, img.peak)
        if first:
            self.views.views[0].set_array(imaging.display_rgb(img.pixels))
            self.views.fit()
        self.views.views[1].set_qimage(rendered["rec"])
        self._measure_shown()
        if rendered["look"] == self._diff_look():
            self.views.views[2].set_qimage(rendered["diff"])
            self.views.views[2].set_marks(rendered["marks"])
            self._update_legend()
        else:
            self._redraw_difference()

    # ------------------------------------------------------------------ measurements
    def _measure_shown(self):
        """Run the chosen measurements on the shown original and reconstruction (off the GUI thread)."""
        spec = self.panel.measure_spec()
        if spec is None or self._shown is None or self._shown[1] is None or self.current is None:
            self.panel.show_measured(None)
            for v in self.views.views:
                v.set_items([])
            return
        img, rec = self.current, self._shown[1]
        self.panel.show_measured(None)

        def work():
            key = (img.name, id(img.pixels), repr(spec))
            ref = self._measure_refs.get(key)
            if ref is None:
                ref = measures.Reference(measures.parse(*spec), img.pixels, img.peak)
                self._measure_refs[key] = ref
                while len(self._measure_refs) > 4:
                    self._measure_refs.popitem(last=False)
            return img, ref.judge(rec), ref.marks(rec)

        self.measure_lane.submit(work, tag=img.name)

    def _on_measured(self, _tag, value):
        img, outcome, marks = value
        if img is not self.current:
            return
        self.last_measured = outcome
        self.panel.show_measured(outcome)
        for v in self.views.views:
            v.set_items(marks)

    def _redraw_difference(self):
        if self._shown is None or self._shown[1] is None:
            return  # the exact image is on its way and will be drawn with the current look
        orig, rec, peak = self._shown
        signed = self.panel.diff_mode.currentData()
        gain = float(self.panel.gain.value())
        self.views.views[2].set_array(imaging.difference(orig, rec, peak, gain, signed))
        self._update_legend()
        marks = []
        if self.panel.worst.isChecked() and min(orig.shape[:2]) >= 32:
            tiles = metrics.tile_psnr(orig, rec, tile=32, data_range=peak)
            marks = [(x, y, 32, 32) for x, y, p in tiles.worst(5) if np.isfinite(p)]
        self.views.views[2].set_marks(marks)

    def _update_legend(self):
        signed = self.panel.diff_mode.currentData()
        gain = float(self.panel.gain.value())
        lim = (128 if signed else 255) / gain
        label = f"−{lim:.3g} … 0 … +{lim:.3g} levels" if signed else f"0 … {lim:.3g} levels"
        self.views.set_legend(imaging.legend(signed), f"error in 8-bit levels: {label}")

    def _on_hover(self, x, y):
        if self._shown is None:
            return
        orig, rec, peak = self._shown
        if not (0 <= y < orig.shape[0] and 0 <= x < orig.shape[1]):
            return
        fmt = (lambda v: " ".join(str(int(c)) for c in np.atleast_1d(v)))
        o = orig[y, x]
        if rec is None:  # the exact image for the new settings is still on its way
            self.views.readout.setText(f"x {x}, y {y}   original {fmt(o)}   reconstruction updating…")
            return
        r = rec[y, x]
        d = np.asarray(r, dtype=np.int64) - np.asarray(o, dtype=np.int64)
        self.views.readout.setText(f"x {x}, y {y}   original {fmt(o)}   reconstruction {fmt(r)}   difference {fmt(d)}")

    # ------------------------------------------------------------------ long jobs
    def _start_job(self, factory, tag, text, child_args=None):
        """Run a core job with progress and Cancel; with ``child_args`` it runs as
        ``factory(*child_args)`` in a child process (heavy jobs such as training)."""
        if self.jobs.active:
            self.status_text.setText("another job is running; cancel it first")
            return False
        self.progress.setValue(0)
        self.progress.show()
        self.cancel_button.show()
        self.status_text.setText(text)
        if child_args is None:
            self.jobs.start(factory, tag)
        else:
            self.jobs.start_child(factory, child_args, tag)
        return True

    def _on_job_progress(self, frac, text):
        self.progress.setValue(int(1000 * frac))
        if text:
            self.status_text.setText(text)

    def _end_job(self):
        self.progress.hide()
        self.cancel_button.hide()

    def _on_job_done(self, tag, result):
        self._end_job()
        kind = tag[0]
        if kind == "save":
            self.status_text.setText(f"Saved {tag[1]} ({result.size:,} bytes, {len(result.images)} image(s))")
        elif kind == "open":
            contents, decoded = result
            self._show_bundle(tag[1], contents, decoded)
        elif kind == "sheet":
            self.status_text.setText(f"Quality sheet written to {tag[1]}")
        elif kind == "train":
            self._on_trained(tag[1], result)
        elif kind == "batch":
            self.last_batch = result
            self.status_text.setText(
                f"Archive {tag[1]}: {result['done']} of {result['items']} done, {result['failed']} failed, "
                f"{result['bundle_bytes']:,} bytes" + (f", PSNR mean {result['mean_psnr']:.2f} dB"
                                                       if result["mean_psnr"] is not None else ""))

    def _on_job_failed(self, tag, msg):
        self._end_job()
        self.last_error = msg
        if msg == "cancelled":
            self.status_text.setText(self.cancelled_text(tag))
        else:
            self.notice.show_text(f"{tag[0].capitalize()} failed: {msg}")

    @staticmethod
    def cancelled_text(tag) -> str:
        """What a cancelled job left behind: a training keeps its last checkpoint (resumable)."""
        if tag[0] == "train":
            path = Path(tag[1])
            if path.exists():
                return (f"Training cancelled; its last checkpoint is kept as {path} "
                        f"(with {path.name}.state to resume from).")
        return "Cancelled; nothing was written."

    def _protected(self):
        return set(list_inputs([self.folder])) if self.folder else set()

    def save_bundle(self, path) -> bool:
        """Encode the folder with the current settings into ``path`` (a background job)."""
        if not self.images:
            self.notice.show_text("Nothing to save: open a folder first.")
            return False
        s = self.panel.settings()
        images, protect, path = list(self.images), self._protected(), Path(path)

        text = f"saving {path.name}…"
        if remote.handles(s.method):  # torch stays out of this process
            return self._start_job(remote.save_job, ("save", path), text,
                                   child_args=(images, s, path, protect, self.conv_model_file))

        def job():
            result = yield from pipeline.encode_job(images, s, measure=False)
            write_atomic(path, result.data, protect=protect)
            return result

        return self._start_job(job, ("save", path), text)

    def _ask_save_bundle(self):
        start = str(Path(self.store.value("last_save_dir", str(Path.home()))) / ((self.folder.name if self.folder else "images") + ".wbundle"))
        path, _ = QFileDialog.getSaveFileName(self, "Save bundle", start, "Bundles (*.wbundle)")
        if path:
            self.store.setValue("last_save_dir", str(Path(path).parent))
            self.save_bundle(path)

    def open_bundle(self, path) -> bool:
        path = Path(path)
        try:
            data = path.read_bytes()
        except OSError as exc:
            self.notice.show_text(f"Cannot read {path}: {exc.strerror}")
            return False
        def job():  # the method is read off the GUI thread (parsing checks every CRC)
            if remote.handles(bundle.parse(data).settings.method):  # torch stays out of this process
                return self.jobs.in_child(pipeline.decode_job, (data,))
            return pipeline.decode_job(data)

        return self._start_job(job, ("open", path), f"decoding {path.name}…")

    def _show_bundle(self, path, contents, decoded):
        images = [SourceImage(d.name, d.pixels) for d in decoded]
        self.folder, self.bundle_path = None, path
        self.panel.compare_with(f"the decoded images of {Path(path).name}")
        self.panel.apply(contents.settings)
        self._set_images(images)
        s = contents.settings
        self.notice.show_text(f"Showing the decoded images of {path.name} ({contents.size:,} bytes; {s.describe()}). "
                              "Read-outs now compare with these decoded images, not with the sources.")

    def _ask_bundle(self):
        path, _ = QFileDialog.getOpenFileName(self, "Open bundle", str(Path.home()), "Bundles (*.wbundle)")
        if path:
            self.open_bundle(path)

    def _ask_folder(self):
        path = QFileDialog.getExistingDirectory(self, "Open image folder", str(self.folder or Path.home()))
        if path:
            self.open_folder(path)

    def save_sheet(self, outdir) -> bool:
        try:
            from .. import sheet
        except ImportError:
            self.notice.show_text("The quality sheet is not available in this build.")
            return False
        if not self.images:
            self.notice.show_text("Nothing to report: open a folder first.")
            return False
        s = self.panel.settings()
        images, outdir, protect = list(self.images), Path(outdir), self._protected()

        text = "writing the quality sheet…"
        if remote.handles(s.method):  # torch stays out of this process
            return self._start_job(remote.sheet_job, ("sheet", outdir), text,
                                   child_args=(images, s, outdir, protect, self.conv_model_file))

        def job():
            return (yield from sheet.sheet_job(images, s, outdir, protect=protect))

        return self._start_job(job, ("sheet", outdir), text)

    def sheet_folder_suggestion(self) -> Path:
        """A new folder beside the images (``NAME-quality-sheet``, numbered if taken)."""
        base = Path(self.folder) if self.folder else (Path(self.bundle_path).parent if self.bundle_path else Path.home())
        stem = base.parent / f"{base.name}-quality-sheet"
        target, n = stem, 1
        while target.exists() and any(target.iterdir()):
            n += 1
            target = stem.with_name(f"{stem.name}-{n}")
        return target

    def _ask_save_sheet(self):
        # A file dialog that names a folder still to be made: the suggestion is created on accept.
        suggestion = self.sheet_folder_suggestion()
        path, _ = QFileDialog.getSaveFileName(self, "New folder for the quality sheet", str(suggestion),
                                              "Folders (*)", options=QFileDialog.Option.DontConfirmOverwrite)
        if path:
            Path(path).mkdir(parents=True, exist_ok=True)
            self.save_sheet(path)

    def apply_to_archive(self, src, dst) -> bool:
        """Start a batch of ``src`` into ``dst`` with the current setting, in a child process."""
        from .. import archive

        from . import training

        s = self.panel.settings()
        ref = None
        if s.method == training.METHOD and self.conv_model_file is not None:  # a model trained here travels along
            from ..modelfile import read_model

            ref = read_model(self.conv_model_file).sha256
            archive.store_shared(Path(dst), "model", Path(self.conv_model_file).read_bytes(), ref)
        recipe = archive.make_recipe(s, "model" if ref else None, ref)
        return self._start_job(archive.batch_job, ("batch", Path(dst)), f"compressing {Path(src).name}…",
                               child_args=(str(src), str(dst), recipe))

    def _ask_archive(self):
        src = QFileDialog.getExistingDirectory(self, "Archive to compress (searched recursively)",
                                               str(self.folder or Path.home()))
        if not src:
            return
        dst = QFileDialog.getExistingDirectory(self, "Folder for the bundles and the manifest", str(Path(src).parent))
        if dst:
            self.apply_to_archive(src, dst)

    def _ask_train(self):
        from . import training

        training.ask_and_train(self)

    def _on_trained(self, path, result):
        from ..modelfile import read_model

        # Only its description is read now (no torch): the model itself is loaded by the
        # first job that needs it.
        self.status_text.setText(f"Trained {path}; reading it…")
        self.model_lane.submit(lambda: (path, result, read_model(path)), tag=path)

    def _on_model_loaded(self, path, result, loaded):
        from . import training

        training.on_trained(self, path, result, loaded)

    # ------------------------------------------------------------------ drag and drop, about
    def dragEnterEvent(self, event):
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event):
        for url in event.mimeData().urls():
            p = Path(url.toLocalFile())
            if p.is_dir():
                self.open_folder(p)
                return
            if p.suffix == ".wbundle":
                self.open_bundle(p)
                return
        self.notice.show_text("Drop a folder of images or a .wbundle file.")

    def about_text(self) -> str:
        libs = []
        for name in ("numpy", "scipy", "Pillow", "scikit-image", "opencv-python-headless", "constriction",
                     "matplotlib", "PySide6-Essentials", "torch"):
            try:
                libs.append(f"{name} {md.version(name)}")
            except md.PackageNotFoundError:
                libs.append(f"{name} (not installed)")
        return (f"<h3>workbench {__version__}</h3>"
                "<p>Finds how far a folder of images from one source can be compressed, and with which transform: "
                "a block KLT or a small convolutional encoder learned from the folder, measured in real bytes "
                "against the standard codecs.</p>"
                f"<p><b>Caution.</b> {CAUTION}</p>"
                f"<p><small>{'<br>'.join(libs)}</small></p>")

    def show_about(self):
        QMessageBox.about(self, "About workbench", self.about_text())
