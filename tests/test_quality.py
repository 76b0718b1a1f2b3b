"""The main job, measured from outside: our files against Pillow's JPEG on open images.

Images: scikit-image's bundled colour photographs. Rate: the size of the file on disk.
Quality: scikit-image's ``peak_signal_noise_ratio`` on pixels that a fresh interpreter
decoded from the file's bytes alone (no in-memory model or basis handed over). Reference:
Pillow's JPEG with optimised Huffman tables and 4:2:0 sampling, the way a practitioner
saves a JPEG. Comparison: Bjøntegaard delta rate (G. Bjøntegaard, ITU-T VCEG-M33, 2001),
negative when we need fewer bits for the same PSNR.
"""

import io
import subprocess
import sys

import numpy as np
import pytest
from PIL import Image
from skimage import data
from skimage.metrics import peak_signal_noise_ratio

import workbench
from workbench.quality.bdrate import bd_rate

PHOTOS = ["astronaut", "coffee", "chelsea", "rocket"]
JPEG_QUALITIES = (30, 45, 60, 72, 82, 90, 95)

DECODER = """
import sys
from pathlib import Path
import numpy as np
import workbench
for path in sys.argv[1:]:
    (pixels,) = workbench.decompress(Path(path).read_bytes()).values()
    np.save(path + ".npy", pixels)
"""


def _decoded_elsewhere(paths):
    subprocess.run([sys.executable, "-c", DECODER, *map(str, paths)], check=True, capture_output=True, timeout=280)
    return [np.load(f"{p}.npy") for p in paths]


def _jpeg_curve(img):
    rates, psnrs = [], []
    for q in JPEG_QUALITIES:
        buf = io.BytesIO()
        Image.fromarray(img).save(buf, format="JPEG", quality=q, optimize=True, subsampling=2)
        dec = np.asarray(Image.open(io.BytesIO(buf.getvalue())).convert("RGB"))
        rates.append(8 * len(buf.getvalue()) / (img.shape[0] * img.shape[1]))
        psnrs.append(peak_signal_noise_ratio(img, dec, data_range=255))
    return rates, psnrs


def _our_curve(tmp_path, name, img, steps, **settings):
    paths = []
    for i, step in enumerate(steps):
        p = tmp_path / f"{name}-{i}.wbundle"
        p.write_bytes(workbench.compress({name: img}, step=step, **settings))
        paths.append(p)
    decoded = _decoded_elsewhere(paths)
    rates = [8 * p.stat().st_size / (img.shape[0] * img.shape[1]) for p in paths]
    return rates, [peak_signal_noise_ratio(img, d, data_range=255) for d in decoded]


def _bd_per_photo(tmp_path, steps, **settings):
    out = {}
    for name in PHOTOS:
        img = getattr(data, name)()
        jr, jq = _jpeg_curve(img)
        out[name] = bd_rate(jr, jq, *_our_curve(tmp_path, name, img, steps, **settings))
    return out


def test_block_klt_at_default_settings_needs_fewer_bits_than_jpeg(tmp_path):
    bd = _bd_per_photo(tmp_path, (2.0, 3.0, 4.5, 6.5, 9.0, 13.0, 18.0))
    assert np.mean(list(bd.values())) <= 0.0, bd


def test_shipped_conv_model_needs_no_more_bits_than_jpeg(tmp_path):
    pytest.importorskip("torch")
    bd = _bd_per_photo(tmp_path, (4.0, 8.0, 13.0, 22.0, 32.0), method="conv")
    assert np.mean(list(bd.values())) <= 0.0, bd
