"""KLT benchmark: rate–distortion and BD-rate against Pillow's codecs, speed, memory.

Run: python tests/benchmarks/bench_klt.py [--quick] [--speed]
Prints, in one run and side by side: per-image BD-rate (PSNR) of the per-image-basis KLT
against JPEG, JPEG 2000, WebP and AVIF on scikit-image's colour photographs; the folder-basis
KLT on held-out images of one source; encode/decode time of a 4-megapixel image as ratios
to Pillow's JPEG at the same rate (medians of repeated runs); and peak memory.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from skimage import data
from skimage.transform import resize

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "sample_images"))

import workbench  # noqa: E402
import workbench.formats.basisfile  # noqa: E402
import workbench.codecs  # noqa: E402
import workbench.quality.metrics  # noqa: E402
from workbench import pipeline
from workbench.quality import baselines, bdrate  # noqa: E402
from workbench.formats.imagefiles import SourceImage  # noqa: E402
from workbench.settings import Settings  # noqa: E402

PHOTOS = ["astronaut", "coffee", "chelsea", "rocket"]
STEPS = (2.0, 3.0, 4.5, 6.5, 9.0, 13.0, 18.0, 26.0)


def bd_against(img, ours, names=("jpeg", "jpeg2000", "webp", "avif")):
    out = {}
    for n in names:
        b = baselines.get(n)
        pts = baselines.sweep(b, img, with_ssim=False)
        lo, hi = min(p.bpp for p in ours), max(p.bpp for p in ours)
        pts = [p for p in pts if 0.7 * lo <= p.bpp <= 1.4 * hi] or pts
        out[n] = bdrate.bd_rate([p.bpp for p in pts], [p.psnr for p in pts],
                                [p.bpp for p in ours], [p.psnr for p in ours])
    return out


def section_per_image():
    print("\n== Per-image basis (stored in each bundle), BD-rate by PSNR, negative = fewer bits than the codec")
    from workbench import blockchoice

    rows = {"block 8, 4:2:0": [], "block auto": [], "block+chroma auto": []}
    for name in PHOTOS:
        img = getattr(data, name)()
        src = SourceImage(name, img)
        auto, _ = blockchoice.choose_block([src], Settings())
        both, _ = blockchoice.choose_block([src], Settings(), chromas=("420", "444"))
        for tag, s in zip(rows, (Settings(), auto, both)):
            ours = pipeline.rd_points(src, s, STEPS, with_ssim=False)
            bd = bd_against(img, ours)
            rows[tag].append(bd)
            pts = ", ".join(f"{p.bpp:.2f}/{p.psnr:.1f}" for p in ours[::2])
            label = tag + (f" ({s.block}, {s.chroma})" if "auto" in tag else "")
            print(f"{name:10s} {label:29s} " + "  ".join(f"{k} {v:+6.1f}%" for k, v in bd.items())
                  + f"   (bpp/dB: {pts})")
    for tag, r in rows.items():
        mean = {k: statistics.mean(x[k] for x in r) for k in r[0]}
        print(f"{'mean':10s} {tag:29s} " + "  ".join(f"{k} {v:+6.1f}%" for k, v in mean.items()))
    return rows


def _tiles(img, side):
    h, w = img.shape[:2]
    return [img[y:y + side, x:x + side] for y in range(0, h - side + 1, side) for x in range(0, w - side + 1, side)]


def section_folder_basis():
    print("\n== Folder basis fitted on other images of the same source (an archive's shared basis, stored once "
          "and not counted per image), tested on held-out images; BD-rate by PSNR")
    import make_samples

    from workbench import blockchoice

    rng = np.random.default_rng(99)
    sources = {
        "loom frames (synthetic)": [make_samples.fabric(rng, defect=(i == 5)) for i in range(10)],
        "drone tiles (synthetic)": [make_samples.aerial(rng) for _ in range(10)],
        "retina tiles (scikit-image)": _tiles(data.retina(), 352)[:16],
    }
    results = {}
    codec = workbench.codecs.get("klt")
    for label, imgs in sources.items():
        half = len(imgs) // 2
        train, test = imgs[:half], imgs[half:]
        fit = [SourceImage(f"f{i}", t) for i, t in enumerate(train)]
        auto, _ = blockchoice.choose_block(fit, Settings(basis_scope="folder"), total=10_000, chromas=("420", "444"))
        for s in (Settings(basis_scope="folder"), auto):
            basis, raw, _ = codec.prepare_shared([pipeline.image_planes(f, s.chroma) for f in fit], s)
            ref = workbench.formats.basisfile.basis_hash(raw)
            bds = []
            for i, img in enumerate(test):
                ours = pipeline.rd_points(SourceImage(f"t{i}", img), s, STEPS, shared=basis, shared_ref=ref,
                                          with_ssim=False)
                bds.append(bd_against(img, ours))
            mean = {k: statistics.mean(b[k] for b in bds) for k in bds[0]}
            tag = f"block {s.block} {s.chroma}" + (" (auto)" if s is auto else "")
            results[label, tag] = mean
            print(f"{label:28s} {tag:20s} " + "  ".join(f"{k} {v:+6.1f}%" for k, v in mean.items())
                  + f"   ({half} fit / {len(test)} held out)")
    return results


def section_other_view():
    print("\n== One view of a scene (scikit-image's stereo_motorcycle): basis fitted on the left view, "
          "the right view coded with it; BD-rate by PSNR")
    from workbench import blockchoice
    from workbench.formats.basisfile import basis_hash

    left, right, _ = data.stereo_motorcycle()
    fit = SourceImage("left", left)
    auto, _ = blockchoice.choose_block([fit], Settings(basis_scope="folder"), total=10_000, chromas=("420", "444"))
    codec = workbench.codecs.get("klt")
    out = {}
    for s in (Settings(basis_scope="folder"), auto):
        basis, raw, _ = codec.prepare_shared([pipeline.image_planes(fit, s.chroma)], s)
        ours = pipeline.rd_points(SourceImage("right", right), s, STEPS, shared=basis, shared_ref=basis_hash(raw),
                                  with_ssim=False)
        out[s.block, s.chroma] = bd = bd_against(right, ours)
        tag = f"block {s.block} {s.chroma}" + (" (auto)" if s is auto else "")
        print(f"{tag:20s} " + "  ".join(f"{k} {v:+6.1f}%" for k, v in bd.items()))
    return out


def four_mp():
    return (resize(data.retina(), (2048, 2048), anti_aliasing=True) * 255).round().astype(np.uint8)


def _speed_at(img, step, repeats):
    """Median encode/decode seconds of ours at ``step`` and of Pillow JPEG at the same rate,
    interleaved (alternating which goes first, so that drifts of this machine's speed fall on
    both sides of each ratio); the first round warms up."""
    jpeg = baselines.get("jpeg")
    b = workbench.compress({"x": img}, step=step)
    bpp = 8 * len(b) / img.shape[0] / img.shape[1]
    q = baselines.at_rate(jpeg, img, bpp).knob
    jb = baselines.encode(jpeg, img, q)
    ours = (lambda: workbench.compress({"x": img}, step=step), lambda: workbench.decompress(b))
    theirs = (lambda: baselines.encode(jpeg, img, q), lambda: baselines.decode(jb))
    times = {key: [] for key in ("enc", "dec", "jenc", "jdec")}
    for i in range(repeats + 1):
        pairs = [(("enc", "dec"), ours), (("jenc", "jdec"), theirs)]
        for keys, fns in pairs if i % 2 else pairs[::-1]:
            for key, fn in zip(keys, fns):
                t = time.perf_counter()
                fn()
                if i:
                    times[key].append(time.perf_counter() - t)
    e, d, e0, d0 = (statistics.median(times[k]) for k in ("enc", "dec", "jenc", "jdec"))
    print(f"  ours {bpp:.2f} bpp (step {step:.3g}): encode {e:.3f} s, decode {d:.3f} s | JPEG q{int(q)} "
          f"{8 * len(jb) / img.shape[0] / img.shape[1]:.2f} bpp: encode {e0:.3f} s, decode {d0:.3f} s | "
          f"ratios encode {e / e0:.1f}x, decode {d / d0:.1f}x (median of {repeats})")


def four_mp_photo():
    """4 megapixels of photographic detail at its own scale: 512 x 512 crops of scikit-image's
    astronaut, coffee, chelsea and rocket in a 2 x 2 mosaic, repeated 2 x 2 (2048 x 2048)."""
    crops = [getattr(data, n)()[:512, :512] for n in PHOTOS]
    crops = [np.pad(c, ((0, 512 - c.shape[0]), (0, 512 - c.shape[1]), (0, 0)), mode="reflect") for c in crops]
    mosaic = np.concatenate([np.concatenate(crops[:2], axis=1), np.concatenate(crops[2:], axis=1)], axis=0)
    return np.ascontiguousarray(np.tile(mosaic, (2, 2, 1)))


def section_speed(repeats):
    print("\n== 4-megapixel RGB: time ratios to Pillow JPEG at the same rate")
    print("retina resized to 2048x2048 (smooth):")
    _speed_at(four_mp(), 6.0, repeats)
    photo = four_mp_photo()
    print("a mosaic of 512 px crops of the four photographs, 2048x2048, at about 0.25, 1 and 2 bpp:")
    for rate in (0.25, 1.0, 2.0):
        r = pipeline.encode([SourceImage("x", photo)], Settings(target=("bpp", rate))).images[0]
        _speed_at(photo, float(np.float32(r.step)), repeats)
    img = four_mp()
    t0 = time.perf_counter()
    for _ in range(repeats):
        workbench.quality.metrics.ssim(img, img)
    print(f"SSIM of a 4-MP RGB image: {(time.perf_counter() - t0) / repeats * 1000:.0f} ms (mean of {repeats})")


def section_targets(repeats):
    print("\n== Rate control, 4-megapixel RGB: a target's encode against one encode at the step it found "
          "(interleaved, same process)")
    img = four_mp()
    src = [SourceImage("x", img)]
    psnr8 = pipeline.encode(src, Settings(step=8.0)).images[0].psnr
    targets = [("--target-bpp 1", ("bpp", 1.0)), ("--target-bpp 0.25", ("bpp", 0.25)),
               (f"--target-psnr {psnr8 + 2:.1f}", ("psnr", round(psnr8 + 2, 1))),
               ("--target-ssim 0.95", ("ssim", 0.95))]
    for label, target in targets:
        r = pipeline.encode(src, Settings(target=target)).images[0]
        pair = [Settings(target=target), Settings(step=float(np.float32(r.step)))]
        times = [[], []]
        for i in range(repeats):
            for j in ((0, 1) if i % 2 else (1, 0)):
                t = time.perf_counter()
                pipeline.encode(src, pair[j])
                times[j].append(time.perf_counter() - t)
        a, b = statistics.median(times[0]), statistics.median(times[1])
        print(f"  {label:20s} {r.bpp:.3f} bpp, PSNR {r.psnr:.2f} dB, SSIM {r.ssim:.4f}, step {r.step:.3g}: "
              f"{a / b:.1f}x one fixed-step encode ({a:.2f} s against {b:.2f} s; median of {repeats})")


def section_memory():
    code = ("import sys, tracemalloc, resource; sys.path.insert(0, %r); sys.path.insert(0, %r); import bench_klt, workbench; "
            "img = bench_klt.four_mp(); tracemalloc.start(); b = workbench.compress({'x': img}, step=6.0); "
            "c = tracemalloc.get_traced_memory()[1]; tracemalloc.reset_peak(); workbench.decompress(b); "
            "d = tracemalloc.get_traced_memory()[1]; print(c, d, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)"
            % (str(Path(__file__).parent), str(ROOT)))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    c, d, rss = int(out[0]) / 2**20, int(out[1]) / 2**20, int(out[2]) / 1024
    print(f"\n== Peak memory, 4-MP RGB: compress {c:.0f} MB, decompress {d:.0f} MB allocated at peak (tracemalloc); "
          f"process peak RSS {rss:.0f} MB including the test-image preparation")


def main():
    # as the command line and the app do for themselves (workbench.runtime)
    from workbench.runtime import tune_allocator

    tune_allocator()
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="fewer repeats")
    ap.add_argument("--speed", action="store_true", help="only the speed and memory sections")
    a = ap.parse_args()
    if not a.speed:
        section_per_image()
        section_folder_basis()
        section_other_view()
    section_speed(5 if a.quick else 11)
    section_targets(3 if a.quick else 5)
    section_memory()


if __name__ == "__main__":
    main()
