"""Starting the desktop app."""

from __future__ import annotations

import sys
from pathlib import Path

STYLE = """
QMainWindow, QWidget { background: #23252b; color: #e4e4e8; }
QGroupBox { border: 1px solid #3a3d46; border-radius: 6px; margin-top: 14px; padding-top: 6px; }
QGroupBox::title { subcontrol-origin: margin; left: 8px; color: #8fd3b0; }
QLabel#paneTitle { color: #8fd3b0; font-weight: bold; padding: 2px; }
QLabel#readoutValue { font-family: monospace; font-size: 13px; }
QLabel#readout { font-family: monospace; color: #c8c8d0; }
QWidget#notice { background: #4a3b1c; border-radius: 4px; }
QListWidget { background: #1c1e22; border: none; }
QListWidget::item:selected { background: #2f5a48; }
QPushButton { background: #33363f; border: 1px solid #4a4e59; padding: 3px 10px; border-radius: 4px; }
QComboBox, QSpinBox, QDoubleSpinBox { background: #2c2f36; border: 1px solid #4a4e59; padding: 2px 4px; }
QToolBar { border: none; spacing: 6px; }
QComboBox:disabled, QSpinBox:disabled, QLabel:disabled, QCheckBox:disabled { color: #6b6e78; background: #26282e; }
"""


def demo_folder(data_dir=None) -> Path:
    """The demo images: the repository's ``sample_images``, or a copy generated once into the
    user's application-data folder (an installed package carries no image files)."""
    from PySide6.QtCore import QStandardPaths

    from .window import SAMPLES

    if SAMPLES.is_dir() and any(SAMPLES.glob("*.png")):
        return SAMPLES
    base = data_dir or QStandardPaths.writableLocation(QStandardPaths.StandardLocation.AppDataLocation)
    target = Path(base or Path.home() / ".workbench") / "demo images"
    if not any(target.glob("*.png")):
        from ..demo import write_samples

        write_samples(target)
    return target


def create_window(folder=None, store=None):
    """Build the window (the QApplication must exist) and open ``folder``, the last folder or the demo images."""
    from .window import MainWindow

    w = MainWindow(store)
    last = w.store.value("last_folder")
    if folder:
        target = folder
    elif last and Path(last).is_dir():
        target = last
    else:
        target = demo_folder()
    if Path(target).is_dir():
        w.open_folder(target)
    else:
        w.notice.show_text(f"{folder}: not a folder")
    return w


def quit_on_termination(app) -> None:
    """SIGTERM (a logout, ``kill PID``) and Ctrl-C close the window as the close button does,
    so its helpers are shut down; a timer lets Python's signal handler run inside Qt's loop."""
    import signal

    from PySide6.QtCore import QTimer

    def close(*_):
        app.closeAllWindows()
        app.quit()

    signal.signal(signal.SIGTERM, close)
    signal.signal(signal.SIGINT, close)
    tick = QTimer(app)
    tick.timeout.connect(lambda: None)
    tick.start(250)


def main(folder=None) -> int:
    from PySide6.QtWidgets import QApplication

    app = QApplication.instance() or QApplication(sys.argv[:1])
    app.setApplicationName("workbench")
    app.setStyleSheet(STYLE)
    quit_on_termination(app)
    w = create_window(folder)
    w.show()
    return app.exec()
