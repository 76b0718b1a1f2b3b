"""The quality sheet: numbers from the decoded bundle, pages present, skipped files listed."""

import csv
import json
import re

import numpy as np
import pytest
from PIL import Image
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from workbench import cli, pipeline
from workbench.formats.imagefiles import read_image


@pytest.fixture(scope="module")
def sheet_dir(tmp_path_factory):
    from skimage import data

    src = tmp_path_factory.mktemp("src")
    Image.fromarray(data.chelsea()[:160, :200]).save(src / "cat.png")
    Image.fromarray(data.camera()[100:260, 150:330]).save(src / "cam.png")
    (src / "zz_broken.tif").write_bytes(b"II*\x00garbage")
    out = tmp_path_factory.mktemp("out")
    code = cli.main(["sheet", str(src), "-o", str(out), "--baselines", "jpeg,webp", "--step", "6",
                     "--require-psnr", "30"])
    return src, out, code


def test_all_five_outputs_are_written(sheet_dir):
    _, out, code = sheet_dir
    assert code == 0  # exit 1 would mean an image missed the 30 dB floor
    assert json.loads((out / "sheet.json").read_text())["totals"]["passed"] == 2
    assert sorted(p.name for p in out.iterdir()) == ["bundle.wbundle", "recipe.wrecipe", "sheet.csv", "sheet.json",
                                                     "sheet.pdf"]


def test_csv_quality_equals_scikit_image_on_the_decoded_bundle(sheet_dir):
    src, out, _ = sheet_dir
    _, decoded = pipeline.decode((out / "bundle.wbundle").read_bytes())
    got = {d.name: d.pixels for d in decoded}
    with open(out / "sheet.csv") as f:
        rows = list(csv.DictReader(f))
    assert [r["name"] for r in rows] == ["cam.png", "cat.png"]
    for r in rows:
        ref = read_image(src / r["name"]).pixels
        dec = got[r["name"]]
        ch = 2 if ref.ndim == 3 else None
        assert float(r["psnr"]) == pytest.approx(peak_signal_noise_ratio(ref, dec, data_range=255), abs=1e-9)
        sk = structural_similarity(ref, dec, gaussian_weights=True, sigma=1.5, use_sample_covariance=False,
                                   data_range=255, channel_axis=ch)
        assert abs(float(r["ssim"]) - sk) < 1e-4
        assert r["pass"] == str(float(r["psnr"]) >= 30)


def test_bytes_in_the_table_add_up_to_the_bundle(sheet_dir):
    _, out, _ = sheet_dir
    sheet = json.loads((out / "sheet.json").read_text())
    size = (out / "bundle.wbundle").stat().st_size
    assert all(isinstance(i["bytes"], int) for i in sheet["images"])  # the image's own bytes, whole
    assert sum(i["bytes"] + i["shared_bytes"] for i in sheet["images"]) == pytest.approx(size, abs=0.2)
    assert sheet["bundle"]["bytes"] == (out / "bundle.wbundle").stat().st_size


def test_unreadable_file_is_listed_as_skipped(sheet_dir):
    _, out, _ = sheet_dir
    sheet = json.loads((out / "sheet.json").read_text())
    assert [s["name"] for s in sheet["skipped"]] == ["zz_broken.tif"]


def test_bd_rates_and_curves_are_reported_per_image_and_for_the_folder(sheet_dir):
    _, out, _ = sheet_dir
    sheet = json.loads((out / "sheet.json").read_text())
    for img in sheet["images"]:
        assert set(img["bd_rate"]) == {"jpeg", "webp"}
        assert isinstance(img["bd_rate"]["jpeg"]["psnr"], float)
    assert set(sheet["folder"]["curves"]) == {"ours", "jpeg", "webp"}
    assert len(sheet["curves"]["cat.png"]["ours"]) >= 4


def test_pdf_has_summary_table_curves_and_tiles_pages(sheet_dir):
    _, out, _ = sheet_dir
    pdf = (out / "sheet.pdf").read_bytes()
    assert pdf.startswith(b"%PDF")
    assert len(re.findall(rb"/Type\s*/Page[^s]", pdf)) == 4  # summary, table, curves, worst tiles


def test_pdf_and_json_carry_the_caution(sheet_dir):
    _, out, _ = sheet_dir
    assert "professional guidelines" in json.loads((out / "sheet.json").read_text())["caution"]


def test_target_search_reports_the_saving(tmp_path, astronaut, camera):
    src = tmp_path / "src"
    src.mkdir()
    Image.fromarray(astronaut[:200, :200]).save(src / "a.png")
    Image.fromarray(camera[200:400, 200:400]).save(src / "c.png")  # scikit-image's 'camera': smoother
    assert cli.main(["sheet", str(src), "-o", str(tmp_path / "o"), "--baselines", "jpeg", "--target-psnr", "36"]) == 0
    ts = json.loads((tmp_path / "o" / "sheet.json").read_text())["target_search"]
    # one step for both must be the finer image's, which over-codes the other one
    assert ts["kind"] == "psnr" and ts["tuned_bytes"] < ts["one_step_bytes"]
    assert ts["saving_vs_one_step"] > 0 and ts["jpeg_bytes"] > 0


def test_output_into_the_source_folder_is_refused(tmp_path, camera):
    Image.fromarray(camera).save(tmp_path / "c.png")
    assert cli.main(["sheet", str(tmp_path), "-o", str(tmp_path)]) == 2


def test_a_sheet_that_fails_late_leaves_the_previous_set_untouched(tmp_path, camera, monkeypatch, capsys):
    from workbench import sheetpdf

    src = tmp_path / "src"
    src.mkdir()
    Image.fromarray(camera[:96, :96]).save(src / "c.png")
    out = tmp_path / "o"
    args = ["sheet", str(src), "-o", str(out), "--baselines", "jpeg"]
    assert cli.main(args + ["--step", "4"]) == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}

    def disk_full(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(sheetpdf, "render", disk_full)  # the last output to be made
    assert cli.main(args + ["--step", "12"]) == 2
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def _group_members(pgid: int) -> list[int]:
    """Live (not zombie) processes of a process group, from /proc (Linux's proc(5) stat fields)."""
    import os

    out = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as f:
                    fields = f.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if fields[0] != "Z" and int(fields[2]) == pgid:
                out.append(int(entry))
    return out


@pytest.mark.skipif(not __import__("sys").platform.startswith("linux"), reason="reads /proc")
def test_ctrl_c_ends_a_sheet_with_one_line_no_outputs_and_no_children(tmp_path, astronaut):
    import os
    import signal
    import subprocess
    import sys
    import time

    src = tmp_path / "src"
    src.mkdir()
    big = np.tile(astronaut, (2, 2, 1))  # a sheet of these takes well over the 6 s waited below
    for i in range(6):
        Image.fromarray(np.roll(big, 61 * i, axis=0)).save(src / f"f{i}.png")
    out = tmp_path / "o"
    # A terminal's default Ctrl-C, even where this suite itself was started in the background
    # (a shell's background job inherits SIGINT ignored, and Python then leaves it ignored).
    proc = subprocess.Popen([sys.executable, "-m", "workbench", "sheet", str(src), "-o", str(out)],
                            stderr=subprocess.PIPE, text=True, start_new_session=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    time.sleep(6)  # past the start, into encoding or the curves' worker pool
    os.killpg(proc.pid, signal.SIGINT)  # as a terminal's Ctrl-C does: the whole process group
    err = proc.communicate(timeout=120)[1]
    assert proc.returncode == 130, err
    assert "Traceback" not in err and err.strip().splitlines()[-1] == "error: interrupted"
    assert not out.exists() or list(out.iterdir()) == []
    deadline = time.monotonic() + 5.0  # issue 15's target: nothing of ours alive 5 s later
    while True:
        left = _group_members(proc.pid)
        if not left or time.monotonic() > deadline:
            break
        time.sleep(0.1)
    assert left == []


def test_measurements_give_csv_columns_and_a_safe_point_that_really_passes(tmp_path):
    from skimage import data

    from workbench.quality import measures

    src = tmp_path / "src"
    src.mkdir()
    blobs = (data.binary_blobs(128, blob_size_fraction=0.1, rng=5) * 180 + 30).astype(np.uint8)  # scikit-image
    Image.fromarray(blobs).save(src / "blobs.png")
    out = tmp_path / "o"
    assert cli.main(["sheet", str(src), "-o", str(out), "--baselines", "jpeg", "--measure", "regions,edges",
                     "--tolerance", "regions.dice>=0.99"]) == 0
    sheet = json.loads((out / "sheet.json").read_text())
    point = sheet["safe_point"]["per_image"]["blobs.png"]
    assert point is not None and "regions: dice >= 0.99" in sheet["safe_point"]["checks"]
    with open(out / "sheet.csv") as f:
        row = next(csv.DictReader(f))
    assert {"measures_ok", "safe_bpp", "regions.dice", "edges.f_score"} <= set(row)
    # the safe point's step, encoded and decoded for real, keeps every measurement in tolerance
    ms = measures.parse("regions,edges", ["regions.dice>=0.99"])
    bundle = pipeline.encode([read_image(src / "blobs.png")], pipeline.Settings(step=point["step"])).data
    (dec,) = pipeline.decode(bundle)[1]
    assert measures.Reference(ms, blobs, 255).judge(dec.pixels).ok


def test_sheet_progress_rises_steadily_and_is_mostly_the_curves(tmp_path, camera, astronaut):
    from workbench import jobs
    from workbench.formats.imagefiles import SourceImage
    from workbench.settings import Settings
    from workbench.sheet import sheet_job

    images = [SourceImage("c", camera[:128, :128]), SourceImage("a", astronaut[:128, :128])]
    seen = []
    jobs.run(sheet_job(images, Settings(), tmp_path / "o", baseline_names=("jpeg",)), seen.append)
    fractions = [p.fraction for p in seen]
    assert fractions == sorted(fractions) and fractions[-1] == 1.0
    start_curves = next(p.fraction for p in seen if p.text.startswith("rate"))
    assert start_curves < 0.2  # encoding the bundle is a small share of a sheet's work
    assert sum(p.text.startswith("curves for") for p in seen) == 2


def _small_folder(tmp_path, camera, chelsea):
    """Crops of scikit-image's 'camera' and 'chelsea' (one grey, one colour)."""
    src = tmp_path / "src"
    src.mkdir()
    Image.fromarray(camera[:96, :128]).save(src / "cam.png")
    Image.fromarray(chelsea[:80, :112]).save(src / "cat.png")
    return src


def test_a_bundle_just_saved_with_the_same_settings_is_reused_not_encoded_again(tmp_path, camera, chelsea,
                                                                                  monkeypatch, capsys):
    src = _small_folder(tmp_path, camera, chelsea)
    saved = tmp_path / "saved.wbundle"
    assert cli.main(["encode", str(src), "-o", str(saved), "--step", "6"]) == 0

    def no_encode(*a, **k):
        raise AssertionError("the sheet encoded again")

    monkeypatch.setattr(pipeline, "encode_job", no_encode)
    out = tmp_path / "out"
    assert cli.main(["sheet", str(src), "-o", str(out), "--baselines", "jpeg", "--step", "6",
                     "--reuse", str(saved)]) == 0
    assert "reused" in capsys.readouterr().out
    assert (out / "bundle.wbundle").read_bytes() == saved.read_bytes()
    sheet = json.loads((out / "sheet.json").read_text())
    assert sheet["bundle"]["reused_from"] == str(saved)
    # the read-outs still come from the decoded pixels (scikit-image's PSNR as the reference)
    _, decoded = pipeline.decode(saved.read_bytes())
    for row, d in zip(sorted(sheet["images"], key=lambda r: r["name"]), sorted(decoded, key=lambda d: d.name)):
        ref = read_image(src / d.name).pixels
        assert row["psnr"] == pytest.approx(peak_signal_noise_ratio(ref, d.pixels, data_range=255), abs=1e-9)
        assert row["step"] == pytest.approx(6.0)


def test_a_sheet_rerun_into_its_own_folder_reuses_its_bundle(tmp_path, camera, chelsea):
    src = _small_folder(tmp_path, camera, chelsea)
    out = tmp_path / "out"
    args = ["sheet", str(src), "-o", str(out), "--baselines", "jpeg", "--step", "6"]
    assert cli.main(args) == 0
    first = json.loads((out / "sheet.json").read_text())
    assert first["bundle"]["reused_from"] is None
    assert cli.main(args) == 0
    second = json.loads((out / "sheet.json").read_text())
    assert second["bundle"]["reused_from"] == str(out / "bundle.wbundle")
    assert second["bundle"]["sha256"] == first["bundle"]["sha256"]
    assert [r["bytes"] for r in second["images"]] == [r["bytes"] for r in first["images"]]


@pytest.mark.parametrize("change", ["settings", "pixels"])
def test_a_bundle_of_other_settings_or_other_pixels_is_not_reused(tmp_path, camera, chelsea, change):
    src = _small_folder(tmp_path, camera, chelsea)
    saved = tmp_path / "saved.wbundle"
    assert cli.main(["encode", str(src), "-o", str(saved), "--step", "6"]) == 0
    step = "6"
    if change == "settings":
        step = "7"
    else:
        px = camera[:96, :128].copy()
        px[0, 0] ^= 1
        Image.fromarray(px).save(src / "cam.png")
    out = tmp_path / "out"
    assert cli.main(["sheet", str(src), "-o", str(out), "--baselines", "jpeg", "--step", step,
                     "--reuse", str(saved)]) == 0
    assert json.loads((out / "sheet.json").read_text())["bundle"]["reused_from"] is None


def test_reuse_declines_a_bundle_whose_target_a_new_encode_would_miss(chelsea):
    from workbench.formats.imagefiles import SourceImage
    from workbench.settings import Settings

    img = SourceImage("cat.png", chelsea[:96, :128])  # at 4:2:0, far from 60 dB
    reachable = Settings(target=("psnr", 30.0))
    data = pipeline.encode([img], reachable).data
    assert pipeline.reused(data, [img], reachable).images[0].target_met is True
    beyond = Settings(target=("psnr", 60.0))
    missed = pipeline.encode([img], beyond).data
    assert pipeline.reused(missed, [img], beyond) is None  # a new encode gives the advice
