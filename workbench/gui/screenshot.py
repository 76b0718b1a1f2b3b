"""Refresh the README's screenshot: ``python -m workbench.gui.screenshot [OUT.png] [FOLDER]``.

Opens the app on the synthetic samples (offscreen unless a display is set), waits until the
read-outs are real, and saves the window as drawn.
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    out = Path(argv[0]) if argv else ROOT / ".screenshots" / "window.png"
    folder = Path(argv[1]) if len(argv) > 1 else ROOT / "sample_images"
    if not os.environ.get("DISPLAY"):
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6.QtCore import QSettings
    from PySide6.QtWidgets import QApplication

    from .app import STYLE
    from .window import MainWindow

    app = QApplication.instance() or QApplication([])
    app.setStyleSheet(STYLE)
    with tempfile.TemporaryDirectory() as tmp:
        w = MainWindow(QSettings(str(Path(tmp) / "s.ini"), QSettings.Format.IniFormat))
        w.resize(1560, 900)
        w.show()

        def wait(cond, seconds=60):
            t = time.time()
            while not cond() and time.time() - t < seconds:
                app.processEvents()
                time.sleep(0.02)

        w.open_folder(folder)
        wait(lambda: not w.loading)
        names = [i.name for i in w.images]
        w.select(next((i for i, n in enumerate(names) if n.startswith("drone")), 0))
        w.panel.count.setValue(24)

        def settled():
            key = (w.current.name, w.panel.settings().cache_key())
            return w.last_numbers is not None and w.last_numbers is w._numbers.get(key) \
                and w._exact_tag == (w.current.name, w.panel.settings())

        wait(settled)
        w.views.fit()
        w.views._zoom(2.0, None)
        for _ in range(20):
            app.processEvents()
            time.sleep(0.02)
        out.parent.mkdir(parents=True, exist_ok=True)
        w.grab().save(str(out))
        w.close()
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
