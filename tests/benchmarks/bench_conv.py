"""Conv-encoder benchmark in one run: one table of BD-rates (shipped model on held-out
photographs, a model fine-tuned on one stereo view and tested on the other) against JPEG,
JPEG 2000, WebP and AVIF at equal PSNR and SSIM with the winner per row; the quality range;
speed and memory on a 4-megapixel image.

Run: python tests/benchmarks/bench_conv.py [--minutes 10] [--skip-training]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "sample_images"))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_klt  # noqa: E402
from workbench import pipeline  # noqa: E402
from workbench.codecs import get  # noqa: E402
from workbench.formats.imagefiles import SourceImage  # noqa: E402
from workbench.jobs import run  # noqa: E402
from workbench.settings import Settings  # noqa: E402

STEPS = (1.4, 2.0, 2.8, 4.0, 5.6, 8.0, 11.0, 16.0, 22.0, 32.0)
CODECS = ("jpeg", "jpeg2000", "webp", "avif")


def _bd(base_pts, ours, metric):
    from workbench.quality import bdrate

    lo, hi = min(p.bpp for p in ours), max(p.bpp for p in ours)
    pts = [p for p in base_pts if 0.7 * lo <= p.bpp <= 1.4 * hi] or base_pts
    try:
        return bdrate.bd_rate([p.bpp for p in pts], [getattr(p, metric) for p in pts],
                              [p.bpp for p in ours], [getattr(p, metric) for p in ours])
    except ValueError:
        return float("nan")


def table_row(label, img, ours):
    """BD-rate of ``ours`` against every codec at equal PSNR and at equal SSIM, and the winner:
    the codec that needs the fewest bits for the same quality (by PSNR)."""
    from workbench.quality import baselines

    cells, by_psnr = [], {}
    for n in CODECS:
        pts = baselines.sweep(baselines.get(n), img, with_ssim=True)
        by_psnr[n] = _bd(pts, ours, "psnr")
        cells.append(f"{by_psnr[n]:+6.1f} / {_bd(pts, ours, 'ssim'):+6.1f}")
    best = max(by_psnr, key=lambda n: by_psnr[n])
    winner = "conv" if by_psnr[best] < 0 else best
    print(f"{label:34s} " + "  ".join(f"{c:>15s}" for c in cells) + f"   {winner}")
    return by_psnr


def header(title):
    print(f"\n== {title}")
    print("BD-rate of the conv encoder against each codec, % at equal PSNR / at equal SSIM "
          "(negative: the conv encoder needs fewer bits)")
    print(f"{'image (model)':34s} " + "  ".join(f"{n:>15s}" for n in CODECS) + "   winner")


def section_table(minutes, skip_training):
    from workbench.training import TrainConfig, train_job

    header("Shipped model on scikit-image colour photographs it was not trained on; a model fine-tuned on one "
           "view of a scene, tested on the other")
    model, sha = get("conv").default_model()
    jpeg = []
    for name in bench_klt.PHOTOS:
        img = getattr(bench_klt.data, name)()
        pts = pipeline.rd_points(SourceImage(name, img), Settings(method="conv"), STEPS, shared=model, shared_ref=sha)
        jpeg.append(table_row(f"{name} (shipped)", img, pts)["jpeg"])
        print(f"{'':34s} bpp/dB: " + ", ".join(f"{p.bpp:.2f}/{p.psnr:.1f}" for p in pts[::2]))
    print(f"mean BD-rate of the shipped model vs JPEG: {statistics.mean(jpeg):+.1f} % (target -30 %)")
    left, right, _ = bench_klt.data.stereo_motorcycle()
    src = SourceImage("right", right)
    pts = pipeline.rd_points(src, Settings(method="conv"), STEPS, shared=model, shared_ref=sha)
    table_row("motorcycle right (shipped)", right, pts)
    if skip_training:
        return
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "m.wmodel"
        t = time.perf_counter()
        rec = run(train_job([SourceImage("left", left)], path, TrainConfig(minutes=minutes)))
        took = time.perf_counter() - t
        tuned, tsha = get("conv").load_model(path)
        pts = pipeline.rd_points(src, Settings(method="conv"), STEPS, shared=tuned, shared_ref=tsha)
    table_row(f"motorcycle right (tuned {minutes:g} min)", right, pts)
    print(f"fine-tuned {rec['steps']} steps in {took:.0f} s on the left view; last held-out record "
          f"{rec['history'][-1]}; target: -45 % vs JPEG and ahead of WebP")


def section_range():
    print("\n== Quality range: --target-psnr 42 on a 512x512 colour photograph (astronaut)")
    model, sha = get("conv").default_model()
    img = SourceImage("astronaut", bench_klt.data.astronaut())
    r = pipeline.encode([img], Settings(method="conv", target=("psnr", 42.0)), shared=model, shared_ref=sha)
    im = r.images[0]
    print(f"reached {im.psnr:.2f} dB at {8 * r.size / (512 * 512):.2f} bpp (step {im.step:.3g})"
          + (f"; {im.advice}" if getattr(im, "advice", None) else ""))


def section_speed():
    print("\n== 4-megapixel RGB (bench_klt.four_mp_photo: a mosaic of 512 px photograph crops) with the shipped model, "
          "allocator tuned as the command line and the app tune it")
    code = ("import sys, time, statistics, resource; sys.path.insert(0, %r); sys.path.insert(0, %r); "
            "import bench_klt, workbench; from workbench.runtime import tune_allocator; tune_allocator(); "
            "from workbench.codecs import get; m, sha = get('conv').default_model(); "
            "img = bench_klt.four_mp_photo(); base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss\n"
            "es, ds = [], []\n"
            "for i in range(4):\n"
            "    t = time.perf_counter(); b = workbench.compress({'x': img}, method='conv', basis=m, basis_ref=sha)\n"
            "    es.append(time.perf_counter() - t); t = time.perf_counter()\n"
            "    workbench.decompress(b, basis=m, basis_ref=sha); ds.append(time.perf_counter() - t)\n"
            "print(es[0], statistics.median(es[1:]), statistics.median(ds[1:]), base, "
            "resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, len(b))"
            % (str(Path(__file__).resolve().parent), str(ROOT)))
    first, e, d, base, peak, size = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                                                   check=True).stdout.split()
    print(f"encode {float(e):.2f} s (first call {float(first):.2f} s), decode {float(d):.2f} s (medians of 3 after "
          f"the first; targets 1.5 s each); {8 * int(size) / 2048**2:.3f} bpp; peak RSS {int(peak) / 1024:.0f} MB "
          f"(process, {int(base) / 1024:.0f} MB before coding; target 2048 MB)")


def main():
    # as the command line and the app do for themselves (workbench.runtime)
    from workbench.runtime import tune_allocator

    tune_allocator()
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--skip-training", action="store_true")
    a = ap.parse_args()
    section_table(a.minutes, a.skip_training)
    section_range()
    section_speed()


if __name__ == "__main__":
    main()
