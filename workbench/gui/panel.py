"""The side panel: codec settings in, read-outs out. It only edits a Settings value."""

from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QCheckBox, QComboBox, QDoubleSpinBox, QFormLayout, QGroupBox, QHBoxLayout, QLabel,
                               QLineEdit, QPushButton, QSlider, QSpinBox, QVBoxLayout, QWidget)

from .. import codecs
from ..settings import BLOCK_SIZES, Settings
from .views import EnergyCurve

RATE_MODES = [("step", "Quantiser step"), ("psnr", "Target PSNR (dB)"), ("ssim", "Target SSIM"),
              ("bpp", "Target rate (bpp)")]
RATE_DEFAULTS = {"step": 8.0, "psnr": 38.0, "ssim": 0.95, "bpp": 1.0}
RATE_RANGES = {"step": (0.05, 1024.0, 2, 0.5), "psnr": (10.0, 99.0, 1, 0.5), "ssim": (0.05, 1.0, 4, 0.005),
               "bpp": (0.01, 24.0, 3, 0.05)}


MEASURE_NOTE = ("A measurement file is Python code: it runs with your own rights, like any script you run. "
                "Choose only files you trust; bundles never carry one.")


class SidePanel(QWidget):
    changed = Signal()
    diff_changed = Signal()
    measures_changed = Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        self.setMinimumWidth(340)
        outer = QVBoxLayout(self)

        codec_box = QGroupBox("Transform")
        f = QFormLayout(codec_box)
        self.method = QComboBox()
        for name in codecs.names():
            self.method.addItem(codecs.label(name), name)
        self.block = QComboBox()
        for b in BLOCK_SIZES:
            self.block.addItem(f"{b} x {b}", b)
        self.chroma = QComboBox()
        self.chroma.addItem("4:2:0 (halved)", "420")
        self.chroma.addItem("4:4:4 (full)", "444")
        self.scope = QComboBox()
        self.scope.addItem("This image", "image")
        self.scope.addItem("Whole folder", "folder")
        f.addRow("Method", self.method)
        f.addRow("Block size", self.block)
        f.addRow("Chroma", self.chroma)
        f.addRow("Basis fitted on", self.scope)
        self.count_label = QLabel("Components kept")
        self.count = QSlider(Qt.Orientation.Horizontal)
        self.count_spin = QSpinBox()
        row = QHBoxLayout()
        row.addWidget(self.count, 1)
        row.addWidget(self.count_spin)
        f.addRow(self.count_label, row)
        self.energy_label = QLabel("")
        f.addRow("", self.energy_label)
        self.curve = EnergyCurve()
        f.addRow(self.curve)
        outer.addWidget(codec_box)

        rate_box = QGroupBox("Rate")
        g = QFormLayout(rate_box)
        self.rate_mode = QComboBox()
        for key, text in RATE_MODES:
            self.rate_mode.addItem(text, key)
        self.rate_value = QDoubleSpinBox()
        g.addRow("Mode", self.rate_mode)
        g.addRow("Value", self.rate_value)
        outer.addWidget(rate_box)

        out_box = self.readout_box = QGroupBox("Read-outs (real bundle) against the source")
        h = QFormLayout(out_box)
        self.readouts = {}
        for key, text in (("psnr", "PSNR"), ("ssim", "SSIM"), ("bpp", "Bits per pixel"), ("ratio", "Compression ratio"),
                          ("bytes", "Bundle size"), ("step", "Step, count")):
            lab = QLabel("–")
            lab.setObjectName("readoutValue")
            lab.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
            self.readouts[key] = lab
            h.addRow(text, lab)
        outer.addWidget(out_box)

        m_box = QGroupBox("Measurements (original vs reconstruction)")
        mf = QFormLayout(m_box)
        self.measure_boxes = {}
        row = QHBoxLayout()
        for key, text in (("spots", "Spots"), ("regions", "Regions"), ("edges", "Edges")):
            box = QCheckBox(text)
            self.measure_boxes[key] = box
            row.addWidget(box)
        self.measure_file_button = QPushButton("Own file…")
        self.measure_file_button.setToolTip(MEASURE_NOTE)
        row.addWidget(self.measure_file_button)
        mf.addRow(row)
        self.measure_file = None
        self.tolerances = QLineEdit()
        self.tolerances.setPlaceholderText("defaults; e.g. spots.shift_px<=0.3, regions.dice>=0.99")
        mf.addRow("Tolerances", self.tolerances)
        self.measure_result = QLabel("–")
        self.measure_result.setObjectName("readout")
        self.measure_result.setWordWrap(True)
        self.measure_result.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        mf.addRow(self.measure_result)
        outer.addWidget(m_box)

        diff_box = QGroupBox("Difference view")
        d = QFormLayout(diff_box)
        self.diff_mode = QComboBox()
        self.diff_mode.addItem("Signed error", True)
        self.diff_mode.addItem("Absolute error", False)
        self.gain = QDoubleSpinBox()
        self.gain.setRange(1, 256)
        self.gain.setValue(8)
        self.gain.setSuffix(" x")
        self.worst = QCheckBox("Outline the 5 worst 32 px tiles")
        self.worst.setChecked(True)
        d.addRow("Show", self.diff_mode)
        d.addRow("Gain", self.gain)
        d.addRow(self.worst)
        outer.addWidget(diff_box)
        outer.addStretch(1)

        self._quiet = False
        self._method, self._chosen_chroma = self.method.currentData(), "420"
        self._saved_count: dict[str, int | None] = {}
        self.block.setCurrentIndex(self.block.findData(8))
        self._set_rate_mode("step")
        self._set_block(8)
        for w in (self.method, self.block, self.chroma, self.scope, self.rate_mode):
            w.currentIndexChanged.connect(self._on_change)
        self.count.valueChanged.connect(self._on_count)
        self.count_spin.valueChanged.connect(self._on_count_spin)
        self.rate_value.valueChanged.connect(self._on_change)
        for w in (self.diff_mode,):
            w.currentIndexChanged.connect(self.diff_changed)
        self.gain.valueChanged.connect(self.diff_changed)
        self.worst.toggled.connect(self.diff_changed)
        for box in self.measure_boxes.values():
            box.toggled.connect(self.measures_changed)
        self.tolerances.editingFinished.connect(self.measures_changed)
        self.measure_file_button.clicked.connect(self._choose_measure_file)

    # -------------------------------------------------------------- settings
    def _set_block(self, b: int) -> None:
        self._quiet = True
        n = b * b
        self.count.setRange(1, n)
        self.count_spin.setRange(1, n)
        self.count.setValue(n)
        self.count_spin.setValue(n)
        self._quiet = False

    def _set_rate_mode(self, key: str, value: float | None = None) -> None:
        self._quiet = True
        lo, hi, dec, stepsz = RATE_RANGES[key]
        self.rate_value.setDecimals(dec)
        self.rate_value.setRange(lo, hi)
        self.rate_value.setSingleStep(stepsz)
        self.rate_value.setValue(RATE_DEFAULTS[key] if value is None else value)
        self._quiet = False

    def _on_change(self, *_):
        if self._quiet:
            return
        sender = self.sender()
        if sender is self.block:
            self._set_block(self.block.currentData())
        if sender is self.rate_mode:
            self._set_rate_mode(self.rate_mode.currentData())
        if sender is self.method:
            self._switch_method(self.method.currentData())
        self._show_method_fields()
        self.changed.emit()

    def _switch_method(self, new: str) -> None:
        """Each method keeps its own count (a KLT count of 1 is no latent count); a method with a
        fixed chroma shows it, and the chosen one comes back after."""
        old = self._method
        self._saved_count[old] = None if self.count.value() == self.count.maximum() else self.count.value()
        self._method = new
        self._quiet = True
        fixed = codecs.traits(new).fixed_chroma
        if fixed:
            if codecs.traits(old).fixed_chroma is None:
                self._chosen_chroma = self.chroma.currentData()
            self.chroma.setCurrentIndex(self.chroma.findData(fixed))  # what the method really uses
        else:
            self.chroma.setCurrentIndex(self.chroma.findData(self._chosen_chroma))
            n = self.block.currentData() ** 2
            self.count.setRange(1, n)
            self.count_spin.setRange(1, n)
        saved = self._saved_count.get(new)
        self.count.setValue(self.count.maximum() if saved is None else min(saved, self.count.maximum()))
        self.count_spin.setValue(self.count.value())
        self._quiet = False

    def _show_method_fields(self) -> None:
        t = codecs.traits(self.method.currentData())
        self.block.setEnabled(t.uses_block)
        self.scope.setEnabled(t.folder_scope)
        self.chroma.setEnabled(t.fixed_chroma is None)
        self.count_label.setText(t.count_label.capitalize() + " kept")

    def _on_count(self, v):
        if self._quiet:
            return
        self._quiet = True
        self.count_spin.setValue(v)
        self._quiet = False
        self.changed.emit()

    def _on_count_spin(self, v):
        if self._quiet:
            return
        self.count.setValue(v)  # emits through _on_count

    def set_count_range(self, n: int) -> None:
        """For the conv encoder: the model's latent channel count."""
        all_kept = self.count.value() == self.count.maximum() and self._saved_count.get(self._method) is None
        cur = self.count.value()
        self._quiet = True
        self.count.setRange(1, n)
        self.count_spin.setRange(1, n)
        self.count.setValue(n if all_kept else min(cur, n))
        self.count_spin.setValue(self.count.value())
        self._quiet = False

    def settings(self) -> Settings:
        method = self.method.currentData()
        mode = self.rate_mode.currentData()
        value = float(self.rate_value.value())
        t = codecs.traits(method)
        # the slider at its end keeps all (None), whatever the range is until a model reports it
        count = None if self.count.value() == self.count.maximum() else self.count.value()
        kw = dict(method=method, chroma=self.chroma.currentData(), count=count)
        if t.uses_block:
            kw["block"] = self.block.currentData()
        if t.folder_scope:
            kw["basis_scope"] = self.scope.currentData()
        if mode == "step":
            kw["step"] = value
        else:
            kw["target"] = (mode, value)
        return Settings(**kw)

    def apply(self, s: Settings) -> None:
        """Show ``s`` in the widgets (from QSettings or an opened bundle)."""
        self._quiet = True
        self.method.setCurrentIndex(max(0, self.method.findData(s.method)))
        self.block.setCurrentIndex(max(0, self.block.findData(s.block)))
        self.chroma.setCurrentIndex(max(0, self.chroma.findData(s.chroma)))
        self.scope.setCurrentIndex(max(0, self.scope.findData(s.basis_scope)))
        self._quiet = False
        self._set_block(s.block)
        self._quiet = True
        self.count.setValue(s.count or self.count.maximum())
        self.count_spin.setValue(self.count.value())
        if s.target is None:
            self.rate_mode.setCurrentIndex(0)
            self._quiet = False
            self._set_rate_mode("step", s.step)
        else:
            self.rate_mode.setCurrentIndex(self.rate_mode.findData(s.target[0]))
            self._quiet = False
            self._set_rate_mode(s.target[0], s.target[1])
        self._method = s.method
        if s.traits.fixed_chroma is None:
            self._chosen_chroma = s.chroma
        self._show_method_fields()

    def compare_with(self, what: str) -> None:
        """Say what the read-outs compare the reconstruction with (the sources, or decoded images)."""
        self.readout_box.setTitle(f"Read-outs (real bundle) against {what}")

    # -------------------------------------------------------------- measurements
    def measure_spec(self) -> tuple[str, list[str]] | None:
        """The chosen measurements and tolerances as text (see :func:`workbench.quality.measures.parse`)."""
        names = [k for k, box in self.measure_boxes.items() if box.isChecked()]
        if self.measure_file:
            names.append(str(self.measure_file))
        if not names:
            return None
        tol = [t.strip() for t in self.tolerances.text().split(",") if t.strip()]
        return ",".join(names), tol

    def _choose_measure_file(self) -> None:
        from PySide6.QtWidgets import QFileDialog, QMessageBox

        if self.measure_file:
            self.set_measure_file(None)
            return
        path, _ = QFileDialog.getOpenFileName(self, "Measurement file", "", "Python files (*.py)")
        if path and QMessageBox.question(self, "Run your own code?", MEASURE_NOTE + "\n\nUse " + path + "?") \
                == QMessageBox.StandardButton.Yes:
            self.set_measure_file(path)

    def set_measure_file(self, path) -> None:
        self.measure_file = path
        self.measure_file_button.setText("Own file: " + Path(path).name + " (remove)" if path else "Own file…")
        self.measures_changed.emit()

    def show_measured(self, outcome, error: str | None = None) -> None:
        if error:
            self.measure_result.setText(error)
        elif outcome is None:
            self.measure_result.setText("–" if self.measure_spec() is None else "measuring…")
        else:
            verdict = "within tolerance" if outcome.ok else "out of tolerance: " + "; ".join(outcome.failed)
            self.measure_result.setText(f"{outcome.summary()}\n{verdict}")

    # -------------------------------------------------------------- read-outs
    def show_numbers(self, n) -> None:
        if n is None:
            for lab in self.readouts.values():
                lab.setText("estimating…")
            return
        self.readouts["psnr"].setText("lossless (inf)" if n.psnr == float("inf") else f"{n.psnr:.2f} dB")
        self.readouts["ssim"].setText(f"{n.ssim:.4f}")
        self.readouts["bpp"].setText(f"{n.bpp:.3f}")
        self.readouts["ratio"].setText(f"{n.ratio:.1f} : 1")
        self.readouts["bytes"].setText(f"{n.bytes:,} bytes")
        what = codecs.traits(self.method.currentData()).count_label
        self.readouts["step"].setText(f"{n.step:.3g}, {n.kept} {what} coded")

    def show_energy(self, energy, k) -> None:
        if energy is None:
            self.energy_label.setText("")
            self.curve.set_data(None, k)
            return
        k = min(k, len(energy))
        self.energy_label.setText(f"{100 * float(energy[k - 1]):.2f} % of the energy kept")
        self.curve.set_data(energy, k)
