import sys

import numpy as np
import pytest

import workbench
from workbench.runtime import tune_allocator


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt")
def test_the_allocator_setting_takes_once_and_changes_no_result(camera):
    # camera: scikit-image's bundled 'camera'
    before = workbench.compress([camera], step=4.0)
    assert tune_allocator() is True
    assert tune_allocator() is True  # a second call is a no-op
    assert workbench.compress([camera], step=4.0) == before
    assert np.array_equal(workbench.decompress(before)["image_000"], workbench.decompress(before)["image_000"])
