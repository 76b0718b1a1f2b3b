"""The main window: wiring between the core, the panel, the views and the workers."""

from __future__ import annotations

import importlib.metadata as md
import threading
from collections import OrderedDict
from pathlib import Path

import numpy as np
from PySide6.QtCore import QSettings, QSize, Qt, QThreadPool, QTimer
from PySide6.QtGui import QAction, QIcon, QKeySequence, QPixmap
from PySide6.QtWidgets import (QHBoxLayout, QLabel, QListWidget, QListWidgetItem, QMainWindow,
                               QMessageBox, QProgressBar, QPushButton, QSplitter, QToolBar, QVBoxLayout, QWidget)

from ..quality import measures, metrics
from ..version import __version__
from ..formats.imagefiles import SourceImage, read_many
from ..notices import CAUTION
from ..session import Session
from ..settings import Settings
from . import imaging
from .actions import JobActions
from .previewing import PreviewFlow
from .panel import SidePanel
from .views import Triptych
from .waiting import WaitIndicator
from .worker import JobRunner, Lane

ICONS = Path(__file__).resolve().parents[2] / "icons"
SAMPLES = Path(__file__).resolve().parents[2] / "sample_images"
THUMB = 96


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


def _session_fields(*names: str, **renamed: str):
    """Class decorator: each name (and each ``attribute=field``) becomes a window attribute that
    is the session's field of that name (the window only draws the session)."""
    def add(cls):
        for attr, field in [(n, n) for n in names] + list(renamed.items()):
            setattr(cls, attr, property(lambda self, f=field: getattr(self.session, f),
                                        lambda self, v, f=field: setattr(self.session, f, v), doc=f"``session.{field}``"))
        return cls
    return add


@_session_fields("folder", "bundle_path", "images", "index", "conv_model_file", "last_numbers", "last_measured",
                 "last_training", "last_batch", "last_error", _previews="previews", _shared="shared", _numbers="numbers")
class MainWindow(PreviewFlow, JobActions, QMainWindow):
    current = property(lambda self: self.session.current)

    def __init__(self, store: QSettings | None = None):
        super().__init__()
        self.store = store or QSettings("workbench", "workbench")
        self.setWindowTitle("workbench")
        self.setWindowIcon(icon("app"))
        self.session = Session()  # what is open and computed; the window draws it
        self._shown = None  # (orig, rec) arrays on screen
        self._recipes: dict = {}  # bundle path -> recipe, written once the bundle is saved
        self.last_saved_bundle: Path | None = None  # offered to the quality sheet for reuse
        self._remote = None  # the helper process of the conv encoder (remote.py), on first use
        self._remote_lock = threading.Lock()

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
        self.waits = WaitIndicator(self)
        for lane, text in ((self.fit_lane, "fitting the transform"), (self.preview_lane, "working out the read-outs"),
                           (self.target_lane, "searching the step for the target"),
                           (self.render_lane, "drawing the views"), (self.measure_lane, "measuring"),
                           (self.folder_lane, "reading the folder"), (self.model_lane, "loading the model")):
            self.waits.watch(lane, text)
        sb.addPermanentWidget(self.waits.label)
        sb.addPermanentWidget(self.waits.bar)
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
        self.act_block = act("Choose block size and chroma for this folder", "", self.choose_block)
        self.act_archive = act("Apply to an archive…", "save-bundle", self._ask_archive)
        self.act_archive_summary = act("Show an archive's summary…", "open-bundle", self._ask_archive_summary)
        self.menuBar().addMenu("&Tools").addActions([self.act_block, self.act_train, self.act_archive,
                                                     self.act_archive_summary])
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
        self.store.setValue("last_folder", str(Path(folder).resolve()))
        self.session.open_images(images, folder=folder)
        self._show_images(thumbs)
        if skipped:
            names = ", ".join(n for n, _ in skipped)
            self.notice.show_text(f"Skipped {len(skipped)} unreadable file(s): {names}")
        else:
            self.notice.hide()
        self.status_text.setText(f"{folder}: {len(images)} image(s)")

    def _show_images(self, thumbs=None):
        images = self.images
        self.panel.compare_with(self.session.source_label)
        self.thumbs.blockSignals(True)
        self.thumbs.clear()
        for img, thumb in zip(images, thumbs or [_thumbnail_image(i) for i in images]):
            item = QListWidgetItem(QIcon(QPixmap.fromImage(thumb)), self._caption(img))
            item.setSizeHint(QSize(THUMB + 70, THUMB + 48))
            self.thumbs.addItem(item)
        self.thumbs.blockSignals(False)
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
        if not self.session.select(row):
            return
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
            outcome = ref.judge(rec, marks=True)
            return img, outcome, outcome.marks

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
        for name in ("numpy", "scipy", "Pillow", "scikit-image", "opencv-python-headless", "constriction", "numba",
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
