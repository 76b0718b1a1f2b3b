import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from skimage import data  # noqa: E402


@pytest.fixture(scope="session")
def camera():
    """scikit-image's bundled 'camera' (512x512 grey, uint8)."""
    return data.camera()


@pytest.fixture(scope="session")
def astronaut():
    """scikit-image's bundled 'astronaut' (512x512 RGB, uint8)."""
    return data.astronaut()


@pytest.fixture(scope="session")
def chelsea():
    """scikit-image's bundled 'chelsea' (300x451 RGB, uint8): odd width."""
    return data.chelsea()


@pytest.fixture(scope="session")
def camera16(camera):
    """'camera' spread to 16 bits with deterministic low bits, so all 16 bits matter."""
    rng = np.random.default_rng(7)
    return (camera.astype(np.uint16) * 257 + rng.integers(0, 200, camera.shape)).astype(np.uint16)
