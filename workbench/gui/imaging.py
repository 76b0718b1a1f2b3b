"""Arrays to QImages (the numpy side lives in :mod:`workbench.display`)."""

from __future__ import annotations

import numpy as np
from PySide6.QtGui import QImage

from ..display import difference, display_rgb, legend  # noqa: F401  (re-exported for the window)


def to_qimage(rgb: np.ndarray) -> QImage:
    """QImage sharing nothing with ``rgb`` (copied), Format_RGB888."""
    h, w, _ = rgb.shape
    return QImage(rgb.data, w, h, 3 * w, QImage.Format.Format_RGB888).copy()
