"""Three image views whose zoom and pan move together, with a pixel read-out."""

from __future__ import annotations

from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QPainter, QPen, QPixmap
from PySide6.QtWidgets import (QFrame, QGraphicsPixmapItem, QGraphicsRectItem, QGraphicsScene, QGraphicsView,
                               QGridLayout, QLabel, QVBoxLayout, QWidget)

from .imaging import to_qimage


class ImageView(QGraphicsView):
    """One pane: a pixmap in a scene; reports wheel zooms, pans and the hovered pixel."""

    zoomed = Signal(float, QPointF)
    panned = Signal(int, int)
    hovered = Signal(int, int)

    def __init__(self, parent=None):
        super().__init__(parent)
        self.setScene(QGraphicsScene(self))
        self.item = QGraphicsPixmapItem()
        self.item.setTransformationMode(Qt.TransformationMode.FastTransformation)
        self.scene().addItem(self.item)
        # A reduced or partial view drawn over the exact image while a slider moves.
        self.overlay = QGraphicsPixmapItem()
        self.overlay.setTransformationMode(Qt.TransformationMode.FastTransformation)
        self.overlay.setZValue(1)
        self.scene().addItem(self.overlay)
        self.shown = 0  # counts what was put on screen (exact images and sketches)
        self.marks: list[QGraphicsRectItem] = []
        self.setDragMode(QGraphicsView.DragMode.ScrollHandDrag)
        self.setTransformationAnchor(QGraphicsView.ViewportAnchor.AnchorUnderMouse)
        self.setMouseTracking(True)
        self.setBackgroundBrush(QColor(28, 30, 34))
        self.setFrameShape(QFrame.Shape.NoFrame)
        self.horizontalScrollBar().valueChanged.connect(self._emit_pan)
        self.verticalScrollBar().valueChanged.connect(self._emit_pan)
        self._syncing = False

    def set_array(self, rgb) -> None:
        self.set_qimage(to_qimage(rgb))

    def set_qimage(self, image) -> None:
        self.item.setPixmap(QPixmap.fromImage(image))
        self.scene().setSceneRect(QRectF(self.item.pixmap().rect()))
        self.clear_sketch()
        self.shown += 1

    def set_sketch(self, image, x0: int, y0: int, factor: int) -> None:
        """Show ``image`` over image pixels from (x0, y0), each of its pixels covering
        ``factor`` x ``factor`` image pixels."""
        self.overlay.setPixmap(QPixmap.fromImage(image))
        self.overlay.setPos(x0, y0)
        self.overlay.setScale(factor)
        self.shown += 1

    def clear_sketch(self) -> None:
        if not self.overlay.pixmap().isNull():
            self.overlay.setPixmap(QPixmap())

    def visible_rect(self) -> QRectF:
        """The part of the scene (image pixels) the viewport shows."""
        return self.mapToScene(self.viewport().rect()).boundingRect()

    def clear(self) -> None:
        self.item.setPixmap(QPixmap())
        self.clear_sketch()
        self.set_marks([])

    def set_marks(self, rects) -> None:
        for m in self.marks:
            self.scene().removeItem(m)
        self.marks = []
        pen = QPen(QColor(255, 255, 255), 0)
        pen.setCosmetic(True)
        pen.setWidth(2)
        for x, y, w, h in rects:
            r = QGraphicsRectItem(x, y, w, h)
            r.setPen(pen)
            r.setZValue(2)
            self.scene().addItem(r)
            self.marks.append(r)

    # matched / missed / spurious items of a measurement: ring colours of our own
    ITEM_COLOURS = {"matched": QColor(80, 220, 160), "missed": QColor(255, 170, 40), "spurious": QColor(220, 90, 255)}

    def set_items(self, items) -> None:
        """Rings at ``(y, x, kind)`` image positions (see :meth:`workbench.quality.measures.Reference.marks`)."""
        from PySide6.QtWidgets import QGraphicsEllipseItem

        for m in getattr(self, "items_shown", []):
            self.scene().removeItem(m)
        self.items_shown = []
        for y, x, kind in items:
            pen = QPen(self.ITEM_COLOURS[kind], 0)
            pen.setCosmetic(True)
            pen.setWidth(2)
            ring = QGraphicsEllipseItem(x - 4, y - 4, 8, 8)
            ring.setPen(pen)
            ring.setZValue(3)
            self.scene().addItem(ring)
            self.items_shown.append(ring)

    def wheelEvent(self, event):
        factor = 1.25 if event.angleDelta().y() > 0 else 0.8
        self.zoomed.emit(factor, self.mapToScene(event.position().toPoint()))

    def mouseMoveEvent(self, event):
        super().mouseMoveEvent(event)
        p = self.mapToScene(event.position().toPoint())
        self.hovered.emit(int(p.x()), int(p.y()))

    def _emit_pan(self):
        if not self._syncing:
            self.panned.emit(self.horizontalScrollBar().value(), self.verticalScrollBar().value())

    def set_pan(self, x, y):
        self._syncing = True
        self.horizontalScrollBar().setValue(x)
        self.verticalScrollBar().setValue(y)
        self._syncing = False


class Triptych(QWidget):
    """Original | Reconstruction | Difference, locked together, plus a legend and read-out."""

    hovered = Signal(int, int)

    def __init__(self, parent=None):
        super().__init__(parent)
        grid = QGridLayout(self)
        grid.setContentsMargins(0, 0, 0, 0)
        grid.setHorizontalSpacing(6)
        self.titles = []
        self.views = []
        for i, title in enumerate(("Original", "Reconstruction", "Difference")):
            t = QLabel(title)
            t.setObjectName("paneTitle")
            v = ImageView()
            grid.addWidget(t, 0, i)
            grid.addWidget(v, 1, i)
            self.titles.append(t)
            self.views.append(v)
            v.zoomed.connect(self._zoom)
            v.panned.connect(lambda x, y, src=v: self._pan(src, x, y))
            v.hovered.connect(self.hovered)
        grid.setRowStretch(1, 1)
        self.legend = QLabel()
        self.legend_text = QLabel()
        box = QVBoxLayout()
        box.setSpacing(0)
        box.addWidget(self.legend)
        box.addWidget(self.legend_text)
        grid.addLayout(box, 2, 2)
        self.readout = QLabel(" ")
        self.readout.setObjectName("readout")
        grid.addWidget(self.readout, 2, 0, 1, 2)
        self.scale = 1.0

    def _zoom(self, factor, _at):
        new = min(64.0, max(1 / 32, self.scale * factor))
        factor = new / self.scale
        self.scale = new
        for v in self.views:
            v.scale(factor, factor)

    def _pan(self, src, x, y):
        for v in self.views:
            if v is not src:
                v.set_pan(x, y)

    def fit(self) -> None:
        v = self.views[0]
        rect = v.scene().sceneRect()
        if rect.isEmpty():
            return
        for w in self.views:
            w.fitInView(rect, Qt.AspectRatioMode.KeepAspectRatio)
        self.scale = v.transform().m11()

    def one_to_one(self) -> None:
        for v in self.views:
            v.resetTransform()
        self.scale = 1.0

    def toggle_zoom(self) -> None:
        """Pixel for pixel when the whole image is shown (or any other zoom), else the whole image."""
        if self.scale == 1.0:
            self.fit()
        else:
            self.one_to_one()

    def set_legend(self, rgb, text: str) -> None:
        self.legend.setPixmap(QPixmap.fromImage(to_qimage(rgb)))
        self.legend_text.setText(text)


class EnergyCurve(QWidget):
    """Small plot of the energy *left out* against the component count, on a log scale
    (10^0 at the top down to 10^-DECADES): the kept fraction sits near 100 % after a few
    components, where a linear plot says nothing."""

    DECADES = 6

    def __init__(self, parent=None):
        super().__init__(parent)
        self.energy = None
        self.k = 1
        self.setMinimumHeight(70)

    def set_data(self, energy, k) -> None:
        self.energy, self.k = energy, k
        self.update()

    def points(self, rect) -> list:
        """Where each count's left-out energy is drawn inside ``rect`` (for tests, too)."""
        import math

        n = len(self.energy)
        out = []
        for i in range(n):
            left = max(1.0 - float(self.energy[i]), 10.0 ** -self.DECADES)
            frac = min(1.0, -math.log10(left) / self.DECADES)
            out.append(QPointF(rect.left() + rect.width() * i / (n - 1), rect.top() + rect.height() * frac))
        return out

    def paintEvent(self, _event):
        p = QPainter(self)
        p.setRenderHint(QPainter.RenderHint.Antialiasing)
        r = self.rect().adjusted(4, 4, -4, -14)
        p.fillRect(self.rect(), QColor(36, 38, 44))
        if self.energy is None or len(self.energy) < 2:
            p.setPen(QColor(150, 150, 150))
            p.drawText(r, Qt.AlignmentFlag.AlignCenter, "energy curve: KLT only")
            return
        p.setPen(QPen(QColor(70, 74, 84), 1))
        for d in range(0, self.DECADES + 1, 2):
            y = r.top() + r.height() * d / self.DECADES
            p.drawLine(QPointF(r.left(), y), QPointF(r.right(), y))
        pts = self.points(r)
        p.setPen(QPen(QColor(120, 200, 160), 1.5))
        for a, b in zip(pts[:-1], pts[1:]):
            p.drawLine(a, b)
        n = len(self.energy)
        x = r.left() + r.width() * (self.k - 1) / (n - 1)
        p.setPen(QPen(QColor(250, 170, 40), 1))
        p.drawLine(QPointF(x, r.top()), QPointF(x, r.bottom()))
        p.setPen(QColor(150, 150, 150))
        p.drawText(QRectF(r.left(), r.bottom(), r.width(), 14), Qt.AlignmentFlag.AlignLeft,
                   "energy left out, log scale 1 … 1e-6")
