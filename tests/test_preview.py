"""Interactive previews: sketches for a dragging slider, read-outs, jobs in a child process."""

import numpy as np
import pytest
from skimage.transform import downscale_local_mean

from workbench import jobs, pipeline
from workbench import preview as previews
from workbench.errors import InputError
from workbench.formats.imagefiles import SourceImage
from workbench.settings import Settings


@pytest.fixture(scope="module")
def preview(request):
    from skimage import data

    # scikit-image's bundled 'astronaut' (512x512 RGB)
    return previews.ImagePreview(SourceImage("astronaut", data.astronaut()), Settings(count=12, step=6.0))


@pytest.mark.parametrize("factor", [2, 4, 8])
def test_a_sketch_is_the_exact_reconstruction_averaged_over_blocks(preview, factor):
    # Reference: scikit-image's downscale_local_mean of the decoder-exact reconstruction.
    s = preview.settings
    _, exact = preview.reconstruct(s)
    ref = downscale_local_mean(exact.astype(np.float64), (factor, factor, 1))
    sk = preview.sketch(s, factor)
    assert sk.pixels.shape == ref.shape and (sk.x0, sk.y0, sk.factor) == (0, 0, factor)
    # The sketch averages before rounding and clipping, the reference after; and at the
    # right and bottom edges 4:2:0 chroma is interpolated in one and averaged in the other.
    err = np.abs(sk.pixels - ref)[:-1, :-1]
    assert err.mean() < 0.5
    assert np.percentile(err, 99) <= 3


def test_a_full_scale_sketch_of_a_region_matches_the_decoder_there(preview):
    s = preview.settings
    _, exact = preview.reconstruct(s)
    sk = preview.sketch(s, 1, (200, 300, 100, 260))
    h, w = sk.pixels.shape[:2]
    assert sk.y0 <= 200 and sk.x0 <= 100 and sk.y0 + h >= 300 and sk.x0 + w >= 260
    crop = exact[sk.y0 : sk.y0 + h, sk.x0 : sk.x0 + w].astype(int)
    assert np.mean(np.abs(crop - sk.pixels)) < 0.5
    assert np.array_equal(sk.original, preview.img.pixels[sk.y0 : sk.y0 + h, sk.x0 : sk.x0 + w])


def test_a_sketch_follows_the_component_count(preview):
    few = preview.sketch(preview.settings.replace(count=2), 4).pixels.astype(int)
    many = preview.sketch(preview.settings.replace(count=40), 4).pixels.astype(int)
    orig = preview.original_small(4).astype(int)
    assert np.mean(np.abs(many - orig)) < np.mean(np.abs(few - orig))


def test_a_sketch_factor_outside_the_supported_set_is_refused(preview):
    with pytest.raises(InputError, match="factor"):
        preview.sketch(preview.settings, 3)


def test_evaluate_gives_the_numbers_of_a_real_one_image_bundle(preview):
    s = preview.settings
    coded, px, n = preview.evaluate(s)
    result = pipeline.encode([preview.img], s)
    assert n.bytes == len(result.data)
    assert n.psnr == pytest.approx(result.images[0].psnr, abs=1e-9)
    assert n.ssim == pytest.approx(result.images[0].ssim, abs=1e-9)
    assert np.array_equal(px, result.images[0].reconstruction)


def test_a_job_in_a_child_process_reports_progress_and_its_result(camera):
    proc, conn, cancel = jobs.start_child(pipeline.encode_job, ([SourceImage("c", camera)], Settings()))
    messages = []
    while not messages or messages[-1][0] == "progress":
        messages.append(conn.recv())
    proc.join(30)
    assert messages[-1][0] == "done" and any(m[0] == "progress" for m in messages)
    assert len(messages[-1][1].data) == len(pipeline.encode([SourceImage("c", camera)], Settings()).data)


def test_a_job_in_a_child_process_stops_when_cancelled(camera):
    proc, conn, cancel = jobs.start_child(pipeline.encode_job, ([SourceImage("c", camera)], Settings()))
    cancel.set()
    messages = []
    while not messages or messages[-1][0] == "progress":
        messages.append(conn.recv())
    proc.join(30)
    assert messages[-1][:2] == ("failed", "cancelled")


def test_the_helper_process_counts_the_same_bytes_as_the_coder(preview, camera):
    from workbench.gui.coderproc import CoderProcess

    coder = CoderProcess()
    try:
        for p in (preview, previews.ImagePreview(SourceImage("camera", camera), Settings(count=30))):
            coded, px, n = p.evaluate(p.settings, coder)
            assert n.bytes == len(pipeline.encode([p.img], p.settings).data)
            assert coder.submit(*p.codec.size_task(coded)).result() == len(p.codec.serialise(coded))
    finally:
        coder.close()
