"""What the measurements cost, and whether they find what the demo frames hold.

Run: python tests/benchmarks/bench_measures.py
1. On a 1-megapixel frame: the app's exact read-outs (ImagePreview.evaluate) against the
   measurements of one reconstruction (spots, regions, edges), medians of repeated runs in
   the same process; the ratio is what a slider move's measurement adds.
2. A quality sheet of four demo frames with and without --measure spots,regions,edges
   (three of each, alternated; medians).
3. The synthetic fluorescence frames (made here with known spot centres): spots found on the
   original against the truth, and the safe operating point the sheet reports.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from skimage.transform import resize  # noqa: E402

from workbench import demo, jobs, pipeline, preview
from workbench.quality import measures  # noqa: E402
from workbench.formats.imagefiles import SourceImage  # noqa: E402
from workbench.settings import Settings  # noqa: E402
from workbench.sheet import sheet_job  # noqa: E402


def median_time(fn, repeat=5):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def spots_frame(rng, n=40, size=1024):
    """A fluorescence-like frame with ``n`` round spots at known centres (demo data)."""
    yy, xx = np.mgrid[:size, :size]
    img = np.full((size, size), 1500.0)
    centres = rng.uniform(20, size - 20, (n, 2))
    for cy, cx in centres:
        img += 30000 * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * 3.0**2))
    img = rng.poisson(img / 4.0) * 4.0
    return np.clip(img, 0, 65535).astype(np.uint16), centres


def main():
    rng = np.random.default_rng(16)
    print("== 1. slider move on a 1 MP frame")
    frame = (resize(demo.fluorescence(rng), (1024, 1024)) * 65535).astype(np.uint16)
    img = SourceImage("f", frame)
    s = Settings(step=6)
    prev = preview.ImagePreview(img, s)
    t_read = median_time(lambda: prev.evaluate(s))
    _, rec, _ = prev.evaluate(s)
    ref = measures.Reference(measures.parse("spots,regions,edges"), frame, img.peak)
    for m, f in zip(ref.measures, ref.found):
        tm = median_time(lambda: m.compare(f, rec, img.peak))
        print(f"  {m.name:8s} {1000 * tm:7.1f} ms")
    t_meas = median_time(lambda: ref.judge(rec))
    print(f"  read-outs {1000 * t_read:.0f} ms; all three measurements {1000 * t_meas:.0f} ms "
          f"= {100 * t_meas / t_read:.0f} % of the read-outs (run in their own lane, after them)")

    print("== 2. quality sheet, four demo frames, jpeg baseline")
    frames = [SourceImage(f"loom{i}", demo.fabric(rng, defect=i == 1)) for i in range(2)] + \
             [SourceImage(f"cells{i}", demo.fluorescence(rng)) for i in range(2)]
    plain_times, measured_times = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for run in range(3):  # alternated, medians: a sheet of four small frames lasts a few seconds
            t0 = time.perf_counter()
            jobs.run(sheet_job(frames, Settings(), Path(tmp) / f"a{run}", baseline_names=("jpeg",)))
            plain_times.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            sheet = jobs.run(sheet_job(frames, Settings(), Path(tmp) / f"b{run}", baseline_names=("jpeg",),
                                       measures=("spots,regions,edges", [])))
            measured_times.append(time.perf_counter() - t0)
    plain, measured = statistics.median(plain_times), statistics.median(measured_times)
    print(f"  without measurements {plain:.1f} s, with {measured:.1f} s (+{100 * (measured / plain - 1):.0f} %)")
    print(f"  safe points: {sheet['safe_point']['per_image']}")

    print("== 3. spots found against the truth (synthetic frames with known centres)")
    for trial in range(3):
        px, truth = spots_frame(rng)
        found = measures.Spots(min_sigma=1.5, max_sigma=5, threshold=0.05).spots(px, 65535)
        ia, _, dist = measures.match_points(truth, found, 3.0)
        print(f"  frame {trial}: {len(truth)} spots made, {len(found)} found, {len(ia)} matched, "
              f"mean error {dist.mean():.2f} px")
        for step in (4, 16, 64):
            rec = pipeline.encode([SourceImage("s", px)], Settings(step=step)).images[0]
            got = measures.Spots(min_sigma=1.5, max_sigma=5, threshold=0.05).spots(rec.reconstruction, 65535)
            ia2, _, d2 = measures.match_points(truth, got, 3.0)
            print(f"    step {step:3d}: {rec.bpp:.3f} bpp, {len(got)} found, {len(ia2)} matched to the truth, "
                  f"error {d2.mean():.2f} px")


if __name__ == "__main__":
    main()
