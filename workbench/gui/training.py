"""“Train encoder on this folder…”: options, a background job with Cancel, the validation curve."""

from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import QPointF, Qt
from PySide6.QtGui import QColor, QPainter, QPen
from PySide6.QtWidgets import (QDialog, QDialogButtonBox, QDoubleSpinBox, QFileDialog, QFormLayout, QLabel,
                               QSpinBox, QVBoxLayout, QWidget)

METHOD = "conv"  # the method a folder training trains (its model then serves that method)


class TrainOptions(QDialog):
    def __init__(self, parent, default_path: Path):
        super().__init__(parent)
        self.setWindowTitle("Train the conv encoder on this folder")
        f = QFormLayout(self)
        self.minutes = QDoubleSpinBox()
        self.minutes.setRange(0.5, 240)
        self.minutes.setValue(10)
        self.minutes.setSuffix(" min")
        self.lam = QDoubleSpinBox()
        self.lam.setDecimals(4)
        self.lam.setRange(0.0005, 10)
        self.lam.setValue(0.08)
        self.latent = QSpinBox()
        self.latent.setRange(4, 256)
        self.latent.setValue(192)
        self.path = default_path
        self.path_label = QLabel(str(default_path))
        f.addRow("Time budget", self.minutes)
        f.addRow("Distortion weight (lambda)", self.lam)
        f.addRow("Latent channels", self.latent)
        f.addRow("Model file", self.path_label)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        f.addRow(buttons)


def ask_and_train(window) -> None:
    if not window.images:
        window.notice.show_text("Open a folder first: training uses its images.")
        return
    start = Path(window.store.value("last_save_dir", str(Path.home()))) / (
        (window.folder.name if window.folder else "folder") + ".wmodel")
    path, _ = QFileDialog.getSaveFileName(window, "Save the trained model as", str(start), "Models (*.wmodel)")
    if not path:
        return
    dlg = TrainOptions(window, Path(path))
    if dlg.exec() != QDialog.DialogCode.Accepted:
        return
    start_training(window, Path(path), minutes=dlg.minutes.value(), lam=dlg.lam.value(), latent=dlg.latent.value())


def start_training(window, path: Path, *, minutes: float, lam: float, latent: int, max_steps: int | None = None):
    from ..training import TrainConfig, train_job

    images = list(window.images)
    cfg = TrainConfig(latent=latent, lam=lam, minutes=minutes, max_steps=max_steps)
    # In a child process: torch's import and the training loop then never hold the GUI's GIL.
    return window._start_job(train_job, ("train", path), "training the conv encoder…", child_args=(images, path, cfg))


def on_trained(window, path, result, description) -> None:
    """Make the freshly trained model the conv encoder of this window (``description``:
    its parsed file, read off the GUI thread; the model is loaded when first used)."""
    window.conv_model_file = Path(path)
    window._previews.clear()
    i = window.panel.method.findData(METHOD)
    window.panel.method.setItemText(i, f"Conv encoder ({Path(path).stem})")
    window.panel.set_count_range(description.arch["latent"])
    window.status_text.setText(f"Trained {path} ({result['steps']} steps); the conv encoder now uses it.")
    window.last_training = result
    if window.isVisible():
        CurveDialog(window, result["history"]).show()


class CurveDialog(QDialog):
    def __init__(self, parent, history):
        super().__init__(parent)
        self.setWindowTitle("Validation during training")
        lay = QVBoxLayout(self)
        lay.addWidget(QLabel("Validation PSNR (green, dB) and rate (amber, bpp) against training steps"))
        lay.addWidget(_Curve(history))
        self.resize(520, 320)


class _Curve(QWidget):
    def __init__(self, history):
        super().__init__()
        self.h = history
        self.setMinimumSize(480, 240)

    def paintEvent(self, _e):
        p = QPainter(self)
        p.setRenderHint(QPainter.RenderHint.Antialiasing)
        r = self.rect().adjusted(30, 10, -30, -20)
        p.fillRect(self.rect(), QColor(36, 38, 44))
        if len(self.h) < 2:
            p.drawText(r, Qt.AlignmentFlag.AlignCenter, "not enough points")
            return
        steps = [x["step"] for x in self.h]
        for key, colour in (("heldout_psnr", QColor(120, 200, 160)), ("heldout_bpp", QColor(250, 170, 40))):
            v = [x[key] for x in self.h]
            lo, hi = min(v), max(v) if max(v) > min(v) else min(v) + 1
            pts = [QPointF(r.left() + r.width() * (s - steps[0]) / max(1, steps[-1] - steps[0]),
                           r.bottom() - r.height() * (y - lo) / (hi - lo)) for s, y in zip(steps, v)]
            p.setPen(QPen(colour, 1.5))
            for a, b in zip(pts[:-1], pts[1:]):
                p.drawLine(a, b)
            p.drawText(r.right() - 150, r.top() + (15 if key == "heldout_psnr" else 30), f"{key}: {v[-1]:.3g}")
