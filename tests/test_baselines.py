"""Baselines are Pillow's own files, measured like ours."""

import io

import numpy as np
import pytest
from PIL import Image
from skimage.metrics import peak_signal_noise_ratio

from workbench.quality import baselines


@pytest.mark.parametrize("name", ["jpeg", "jpeg2000", "webp", "avif"])
def test_point_rate_is_the_size_of_pillows_file(name, chelsea):
    from PIL import features

    if name == "avif" and not features.check("avif"):
        pytest.skip("this Pillow build has no AVIF codec")
    b = baselines.get(name)
    knob = b.knobs[len(b.knobs) // 2]
    buf = io.BytesIO()
    Image.fromarray(chelsea).save(buf, format=b.pillow_format, **b.options(knob))
    p = baselines.point(b, chelsea, knob)
    assert p.bytes == len(buf.getvalue())
    assert p.bpp == pytest.approx(8 * len(buf.getvalue()) / (300 * 451))
    ref = np.asarray(Image.open(io.BytesIO(buf.getvalue())))
    assert p.psnr == pytest.approx(peak_signal_noise_ratio(chelsea, ref, data_range=255))


def test_jpeg_uses_optimised_huffman_tables_and_420(chelsea):
    b = baselines.get("jpeg")
    assert b.options(80) == {"quality": 80, "optimize": True, "subsampling": 2}
    plain = io.BytesIO()
    Image.fromarray(chelsea).save(plain, format="JPEG", quality=80, subsampling=2)
    assert baselines.point(b, chelsea, 80).bytes < len(plain.getvalue())


def test_sweep_is_ordered_by_rate_and_quality_rises(astronaut):
    pts = baselines.sweep(baselines.get("jpeg"), astronaut, [20, 50, 80], with_ssim=False)
    assert [p.bpp for p in pts] == sorted(p.bpp for p in pts)
    assert pts[0].psnr < pts[-1].psnr


def test_16bit_grey_goes_through_jpeg2000_only(camera16):
    assert baselines.supports(baselines.get("jpeg2000"), camera16)
    assert not baselines.supports(baselines.get("jpeg"), camera16)
    p = baselines.point(baselines.get("jpeg2000"), camera16, 10)
    assert 40 < p.psnr < 100


def test_grey_webp_is_measured_as_grey(camera):
    p = baselines.point(baselines.get("webp"), camera, 80)
    assert 25 < p.psnr < 60
