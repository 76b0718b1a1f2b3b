"""Conv-encoder benchmark: BD-rate of the shipped model, of a model trained on one source,
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

import numpy as np

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

STEPS = (2.8, 4.0, 5.6, 8.0, 11.0, 16.0, 22.0, 32.0)


def bd_jpeg(img, pts):
    return bench_klt.bd_against(img, pts, ("jpeg",))["jpeg"]


def section_default():
    print("\n== Shipped conv model on scikit-image's colour photographs (held out from its training)")
    model, sha = get("conv").default_model()
    out = []
    for name in bench_klt.PHOTOS:
        img = getattr(bench_klt.data, name)()
        pts = pipeline.rd_points(SourceImage(name, img), Settings(method="conv"), STEPS, shared=model,
                                 shared_ref=sha, with_ssim=False)
        bd = bench_klt.bd_against(img, pts)
        out.append(bd["jpeg"])
        print(f"{name:10s} " + "  ".join(f"{k} {v:+6.1f}%" for k, v in bd.items()) +
              "   (bpp/dB: " + ", ".join(f"{p.bpp:.2f}/{p.psnr:.1f}" for p in pts[::2]) + ")")
    print(f"mean BD-rate vs JPEG: {statistics.mean(out):+.1f} %")


def section_trained(minutes):
    import make_samples

    from workbench.training import TrainConfig, train_job

    print(f"\n== Conv model trained {minutes:g} min on one source, tested on held-out images")
    rng = np.random.default_rng(99)
    imgs = [make_samples.aerial(rng) for _ in range(10)]
    train, test = imgs[:5], imgs[5:]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "m.wmodel"
        t = time.perf_counter()
        rec = run(train_job([SourceImage(f"t{i}", a) for i, a in enumerate(train)], path,
                            TrainConfig(minutes=minutes)))
        print(f"trained {rec['steps']} steps in {time.perf_counter() - t:.0f} s; last validation {rec['history'][-1]}")
        model, sha = get("conv").load_model(path)
        s = Settings(basis_scope="folder")
        codec = get("klt")
        basis, raw, _ = codec.prepare_shared([pipeline.image_planes(SourceImage("t", a), "420") for a in train], s)
        from workbench.formats.basisfile import basis_hash

        conv_bd, klt_bd, conv_vs_klt = [], [], []
        for i, a in enumerate(test):
            src = SourceImage(f"h{i}", a)
            c = pipeline.rd_points(src, Settings(method="conv"), STEPS, shared=model, shared_ref=sha, with_ssim=False)
            k = pipeline.rd_points(src, s, bench_klt.STEPS, shared=basis, shared_ref=basis_hash(raw), with_ssim=False)
            conv_bd.append(bd_jpeg(a, c))
            klt_bd.append(bd_jpeg(a, k))
            from workbench.quality import bdrate

            try:
                conv_vs_klt.append(bdrate.bd_rate([p.bpp for p in k], [p.psnr for p in k],
                                                  [p.bpp for p in c], [p.psnr for p in c]))
            except ValueError:
                pass
        print(f"drone tiles (synthetic): conv vs JPEG {statistics.mean(conv_bd):+.1f} %, folder-basis KLT vs JPEG "
              f"{statistics.mean(klt_bd):+.1f} %, conv vs folder-basis KLT "
              f"{statistics.mean(conv_vs_klt) if conv_vs_klt else float('nan'):+.1f} %")


def section_speed():
    print("\n== 4-megapixel RGB (bench_klt.four_mp_photo: a mosaic of 512 px photograph crops) with the shipped model")
    code = ("import sys, time, statistics, resource; sys.path.insert(0, %r); sys.path.insert(0, %r); "
            "import bench_klt, workbench; from workbench.codecs import get; m, sha = get('conv').default_model(); "
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
    section_default()
    section_speed()
    if not a.skip_training:
        section_trained(a.minutes)


if __name__ == "__main__":
    main()
