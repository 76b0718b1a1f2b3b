"""What the window is waiting for: once a piece of background work (a fit, read-outs, a
target search, a folder or model being read) has run for more than a second, the status
bar says what it is, how long it has taken and, where the work reports it, how far it is.
Long jobs (saving, sheets, training) have their own progress bar and Cancel."""

from __future__ import annotations

import time

from PySide6.QtCore import QObject, QTimer
from PySide6.QtWidgets import QLabel, QProgressBar

SHOW_AFTER = 1.0  # seconds: shorter waits pass without a word
TICK_MS = 200


class WaitIndicator(QObject):
    """Watches :class:`workbench.gui.worker.Lane` objects and shows the oldest running one
    in its ``label`` beside a busy ``bar`` (both for the status bar)."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self.label, self.bar = QLabel(), QProgressBar()
        self.bar.setRange(0, 0)  # busy: no fraction is known
        self.bar.setMaximumWidth(80)
        self.bar.setTextVisible(False)
        self.bar.hide()
        self._texts: dict[int, str] = {}
        self._since: dict[int, float] = {}
        self._detail: dict[int, str] = {}
        self._timer = QTimer(self)
        self._timer.setInterval(TICK_MS)
        self._timer.timeout.connect(self._tick)
        self._timer.start()
        self.label.hide()

    def watch(self, lane, text: str) -> None:
        """Say ``text`` while ``lane`` has been busy for more than :data:`SHOW_AFTER`."""
        key = id(lane)
        self._texts[key] = text
        lane.busy.connect(lambda on, key=key: self._busy(key, on))

    def detail(self, lane, text: str) -> None:
        """How far ``lane``'s running work is (any thread; read by the GUI's timer)."""
        self._detail[id(lane)] = text

    def _busy(self, key: int, on: bool) -> None:
        if on:
            self._since.setdefault(key, time.monotonic())
        else:
            self._since.pop(key, None)
        self._detail.pop(key, None)
        self._tick()

    def showing(self) -> str:
        """The text on show, or '' when nothing has waited long enough."""
        return self.label.text() if self.label.isVisible() else ""

    def _tick(self) -> None:
        now = time.monotonic()
        waits = [(since, key) for key, since in self._since.items() if now - since >= SHOW_AFTER]
        if not waits:
            self.label.hide()
            self.bar.hide()
            return
        since, key = min(waits)
        detail = self._detail.get(key)
        self.label.setText(f"{self._texts[key]}… {now - since:.0f} s" + (f" ({detail})" if detail else ""))
        self.label.show()
        self.bar.show()
