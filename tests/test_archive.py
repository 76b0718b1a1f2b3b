"""Archives: a decision applied to a tree, on a process pool or a real Dask cluster, killed
and resumed, and restored. Real components throughout (no mocks): sqlite3, dask.distributed
on loopback, subprocesses killed with SIGKILL."""

import hashlib
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from PIL import Image

from workbench import archive, cli, pipeline
from workbench.formats.imagefiles import read_image


@pytest.fixture(scope="module")
def tree(tmp_path_factory):
    """A nested folder of crops of scikit-image's bundled images, a 16-bit TIFF and a corrupt file."""
    import tifffile
    from skimage import data

    src = tmp_path_factory.mktemp("src")
    (src / "day1" / "cam2").mkdir(parents=True)
    Image.fromarray(data.astronaut()[:96, :128]).save(src / "day1" / "a.png")
    Image.fromarray(data.camera()[:80, :96]).save(src / "day1" / "cam2" / "c.png")
    Image.fromarray(data.chelsea()[:64, :64]).save(src / "k.png")
    tifffile.imwrite(src / "deep.tif", (data.coffee()[:64, :80].astype(np.uint16) * 257), photometric="rgb")
    (src / "day1" / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n not really")
    return src


def _bundles(dst):
    return {p.relative_to(dst).as_posix(): p.read_bytes() for p in sorted(dst.rglob("*.wbundle"))}


def test_a_batch_records_every_source_and_handles_bad_and_16bit_inputs(tree, tmp_path, capsys):
    dst = tmp_path / "dst"
    assert cli.main(["batch", str(tree), "-o", str(dst), "--workers", "2", "--step", "5"]) == 1  # one failed
    rs = {r["path"]: r for r in archive.rows(dst)}
    assert set(rs) == {"day1/a.png", "day1/cam2/c.png", "day1/broken.png", "k.png", "deep.tif"}
    assert rs["day1/broken.png"]["status"] == "failed" and "not a readable image" in rs["day1/broken.png"]["error"]
    assert all(r["status"] == "done" for p, r in rs.items() if p != "day1/broken.png")
    assert (dst / "day1" / "cam2" / "c.png.wbundle").exists()
    deep = pipeline.decode((dst / "deep.tif.wbundle").read_bytes())[1][0].pixels
    assert deep.dtype == np.uint16  # all 16 bits kept
    for p, r in rs.items():
        if r["status"] == "done":
            assert r["source_sha256"] == hashlib.sha256((tree / p).read_bytes()).hexdigest()
            assert r["bundle_sha256"] == hashlib.sha256((dst / r["bundle"]).read_bytes()).hexdigest()


def test_a_process_pool_and_a_dask_cluster_give_byte_identical_bundles(tree, tmp_path):
    from dask.distributed import LocalCluster

    pool = tmp_path / "pool"
    cli.main(["batch", str(tree), "-o", str(pool), "--workers", "2"])
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        dask_dst = tmp_path / "dask"
        cli.main(["batch", str(tree), "-o", str(dask_dst), "--scheduler", cluster.scheduler_address])
    assert _bundles(pool) == _bundles(dask_dst) and len(_bundles(pool)) == 4
    workers = {r["worker"] for r in archive.rows(dask_dst) if r["status"] == "done"}
    assert len(workers) >= 1 and all(":" in w for w in workers)


def test_a_rerun_skips_what_is_done_and_redoes_a_changed_source(tree, tmp_path, capsys):
    src = tmp_path / "src"
    shutil.copytree(tree, src)
    dst = tmp_path / "dst"
    cli.main(["batch", str(src), "-o", str(dst), "--workers", "1"])
    before = {r["path"]: r for r in archive.rows(dst)}
    time.sleep(0.01)
    Image.fromarray(np.zeros((32, 32), np.uint8)).save(src / "k.png")  # changed since
    cli.main(["batch", str(src), "-o", str(dst), "--workers", "1"])
    after = {r["path"]: r for r in archive.rows(dst)}
    assert after["day1/a.png"] == before["day1/a.png"]  # untouched, not redone
    assert after["k.png"]["source_sha256"] != before["k.png"]["source_sha256"]


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="process groups and SIGKILL")
def test_a_batch_killed_midway_resumes_with_every_item_done_once_and_verified(tmp_path):
    from skimage import data

    src = tmp_path / "src"
    src.mkdir()
    base = data.astronaut()  # scikit-image's bundled 'astronaut', rolled into 12 distinct frames
    for i in range(12):
        Image.fromarray(np.roll(base, 41 * i, axis=1)).save(src / f"f{i:02d}.png")
    dst = tmp_path / "dst"
    cmd = [sys.executable, "-m", "workbench", "batch", str(src), "-o", str(dst), "--workers", "1"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    deadline = time.monotonic() + 120
    while archive.done_count(dst) < 3 and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    assert 3 <= archive.done_count(dst) < 12  # killed mid-way
    assert subprocess.run(cmd + ["--verify"], capture_output=True, text=True).returncode == 0
    rs = archive.rows(dst)
    assert sorted(r["path"] for r in rs) == [f"f{i:02d}.png" for i in range(12)]  # each once
    assert all(r["status"] == "done" for r in rs)
    assert not list(dst.rglob("*.part"))
    for r in rs:  # every bundle whole and the one the manifest names
        assert hashlib.sha256((dst / r["bundle"]).read_bytes()).hexdigest() == r["bundle_sha256"]


def test_restore_reproduces_the_decoders_pixels_at_the_same_paths(tree, tmp_path, capsys):
    dst, out = tmp_path / "dst", tmp_path / "out"
    cli.main(["batch", str(tree), "-o", str(dst), "--workers", "2"])
    assert cli.main(["restore", str(dst), "-o", str(out), "--verify"]) == 0
    assert "verified 4" in capsys.readouterr().out
    for rel in ("day1/a.png", "day1/cam2/c.png", "k.png"):
        _, decoded = pipeline.decode((dst / (rel + ".wbundle")).read_bytes())
        assert np.array_equal(read_image(out / rel).pixels, decoded[0].pixels)
    assert read_image(out / "deep.png").pixels.dtype == np.uint16
    assert cli.main(["restore", str(dst), "-o", str(out)]) == 0  # a rerun keeps what is there
    assert "kept 4" in capsys.readouterr().out


def test_the_manifest_is_readable_by_sqlite3_on_the_command_line(tree, tmp_path):
    dst = tmp_path / "dst"
    cli.main(["batch", str(tree), "-o", str(dst), "--workers", "1"])
    tool = shutil.which("sqlite3")
    query = "SELECT path, status FROM items ORDER BY path;"
    if tool:
        out = subprocess.run([tool, str(dst / archive.MANIFEST), query], capture_output=True, text=True, check=True)
        lines = out.stdout.split()
    else:  # the same file through another process's sqlite3 library
        code = f"import sqlite3; print(*('|'.join(r) for r in sqlite3.connect({str(dst / archive.MANIFEST)!r}).execute({query!r})))"
        lines = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert "day1/a.png|done" in lines and "day1/broken.png|failed" in lines


def test_a_sheet_writes_a_recipe_that_a_batch_applies(tmp_path, capsys):
    from skimage import data

    src = tmp_path / "src"
    src.mkdir()
    Image.fromarray(data.camera()[:96, :96]).save(src / "c.png")
    assert cli.main(["sheet", str(src), "-o", str(tmp_path / "sheet"), "--baselines", "jpeg", "--step", "7",
                     "--block", "16"]) == 0
    recipe = archive.read_recipe(tmp_path / "sheet" / "recipe.wrecipe")
    assert recipe["settings"]["block"] == 16 and recipe["settings"]["step"] == 7
    cli.main(["batch", str(src), "-o", str(tmp_path / "dst"), "--recipe", str(tmp_path / "sheet" / "recipe.wrecipe")])
    made = (tmp_path / "dst" / "c.png.wbundle").read_bytes()
    assert made == (tmp_path / "sheet" / "bundle.wbundle").read_bytes()  # the same decision, the same bytes


def test_restore_into_the_source_tree_is_refused(tree, tmp_path, capsys):
    dst = tmp_path / "dst"
    cli.main(["batch", str(tree), "-o", str(dst), "--workers", "1"])
    before = {p: p.read_bytes() for p in tree.rglob("*") if p.is_file()}
    assert cli.main(["restore", str(dst), "-o", str(tree / "day1")]) == 2
    assert "outside the sources" in capsys.readouterr().err
    assert {p: p.read_bytes() for p in tree.rglob("*") if p.is_file()} == before


@pytest.fixture(scope="module")
def photo_tree(tmp_path_factory):
    """Two crops of scikit-image's bundled 'astronaut' and 'chelsea'."""
    from skimage import data

    src = tmp_path_factory.mktemp("photos")
    Image.fromarray(data.astronaut()[100:196, 120:248]).save(src / "a.png")
    Image.fromarray(data.chelsea()[:96, :128]).save(src / "c.png")
    return src


def test_verification_accepts_conv_bundles_made_in_bfloat16_and_decoded_in_float32(photo_tree, tmp_path,
                                                                                   monkeypatch):
    # A cluster's workers and the machine that restores need not be the same kind of CPU:
    # bfloat16 on one and float32 on the other rounds some samples a grey level the other way.
    from workbench.codecs import conv_model
    from workbench.jobs import run
    from workbench.training import TrainConfig, train_job

    pytest.importorskip("torch")
    model = tmp_path / "tiny.wmodel"
    run(train_job([read_image(photo_tree / "a.png")], model,
                  TrainConfig(latent=8, hidden=16, side=0, side_hidden=0, max_steps=20, seed=3)))
    dst = tmp_path / "dst"
    monkeypatch.setenv("WORKBENCH_BF16", "1")  # bfloat16 even where it is emulated
    assert cli.main(["batch", str(photo_tree), "-o", str(dst), "--workers", "1", "--method", "conv",
                     "--model", str(model), "--step", "8"]) == 0
    monkeypatch.setenv("WORKBENCH_BF16", "0")
    assert not conv_model.bf16_fast()
    stats = run(archive.restore_job(dst, tmp_path / "out", verify=True))
    assert stats["verified"] == 2 and stats["mismatches"] == []
    # the float32 decode really differs from what the manifest measured
    rows = {r["path"]: r for r in archive.rows(dst)}
    from workbench.quality import metrics

    psnrs = [metrics.psnr(read_image(photo_tree / p).pixels, read_image(tmp_path / "out" / p).pixels)
             for p in ("a.png", "c.png")]
    assert max(abs(p - rows[n]["psnr"]) for p, n in zip(psnrs, ("a.png", "c.png"))) > 1e-6


def test_verification_reports_a_source_brightened_by_four_levels_since_the_batch(photo_tree, tmp_path, capsys):
    src = tmp_path / "src"
    shutil.copytree(photo_tree, src)
    dst = tmp_path / "dst"
    assert cli.main(["batch", str(src), "-o", str(dst), "--workers", "1", "--step", "5"]) == 0
    px = read_image(src / "c.png").pixels
    Image.fromarray(np.clip(px.astype(np.int16) + 4, 0, 255).astype(np.uint8)).save(src / "c.png")
    assert cli.main(["restore", str(dst), "-o", str(tmp_path / "out"), "--verify"]) == 1
    out = capsys.readouterr().out
    assert "mismatch: c.png: PSNR" in out and "a.png" not in out.split("verified")[1]


def test_a_lossless_manifest_entry_tolerates_no_real_loss():
    assert archive.same_psnr(float("inf"), None) and archive.same_psnr(float("inf"), float("inf"))
    assert archive.same_psnr(60.0, float("inf"))  # MSE 0.065 levels^2: one sample in 16 one level off
    assert not archive.same_psnr(48.0, float("inf"))  # MSE 1.03: every sample a level off


def test_restore_only_matching_paths_writes_just_those(tree, tmp_path, capsys):
    dst, out = tmp_path / "dst", tmp_path / "out"
    cli.main(["batch", str(tree), "-o", str(dst), "--workers", "1"])
    assert cli.main(["restore", str(dst), "-o", str(out), "--only", "day1/*", "--only", "*.tif"]) == 0
    written = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    assert written == ["day1/a.png", "day1/cam2/c.png", "deep.png"]


def test_restore_with_a_pattern_matching_nothing_is_refused_and_writes_nothing(tree, tmp_path, capsys):
    dst, out = tmp_path / "dst", tmp_path / "out"
    cli.main(["batch", str(tree), "-o", str(dst), "--workers", "1"])
    capsys.readouterr()
    assert cli.main(["restore", str(dst), "-o", str(out), "--only", "day2/*"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'day2/*' matches no image" in err[0]
    assert not out.exists() or not any(out.rglob("*"))
