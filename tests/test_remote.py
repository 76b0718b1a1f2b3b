"""The app's helper process for the conv encoder gives the core's own results."""

import os
import signal

import numpy as np
import pytest

from workbench import codecs, preview
from workbench.errors import InputError
from workbench.formats.imagefiles import SourceImage
from workbench.gui.remote import PreviewProcess
from workbench.settings import Settings


@pytest.fixture()
def helper():
    h = PreviewProcess()
    yield h
    h.close()


@pytest.fixture()
def cat(chelsea):
    # a crop of scikit-image's bundled "chelsea"
    return SourceImage("cat.png", chelsea[:80, :112])


def test_remote_preview_gives_the_pixels_and_numbers_of_the_local_one(helper, cat):
    s = Settings(method="conv", count=12)
    remote = helper.open("k", cat, s)
    model, ref = codecs.get("conv").load_model(None)  # the shipped model, as the helper uses it
    local = preview.ImagePreview(cat, s, shared=model, shared_ref=ref)
    _, px, n = remote.evaluate(s)
    _, px_local, n_local = local.evaluate(s)
    assert np.array_equal(px, px_local)
    assert (n.bytes, n.kept) == (n_local.bytes, n_local.kept) and n.psnr == pytest.approx(n_local.psnr)
    assert remote.channels == local.channels and remote.sketch(s, 1) is None


def test_a_helper_that_died_gives_one_clear_error_then_starts_again(helper, cat):
    s = Settings(method="conv")
    remote = helper.open("k", cat, s)
    for pid in list(helper._pool._processes):
        os.kill(pid, signal.SIGKILL)
    with pytest.raises(InputError, match="helper process stopped"):
        for _ in range(50):  # the pool notices the death on its next call
            remote.evaluate(s)
    _, px, n = remote.evaluate(s)  # a fresh helper fits the image again
    assert px.shape == (80, 112, 3) and n.bytes > 0


def test_closing_stops_the_helper_and_a_waiting_call_gives_up(cat):
    import threading

    from workbench.errors import Cancelled

    h = PreviewProcess()
    s = Settings(method="conv")
    remote = h.open("k", cat, s)
    outcome = []

    def wait_for_it():
        try:
            for _ in range(200):  # keeps the helper busy until it is closed
                remote.evaluate(s)
            outcome.append("finished")
        except Cancelled:
            outcome.append("cancelled")

    t = threading.Thread(target=wait_for_it)
    t.start()
    h.close()
    t.join(60)
    assert outcome == ["cancelled"]
