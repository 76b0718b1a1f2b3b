"""The desktop app, offscreen (pytest-qt): the read-outs are the core's own numbers."""

import numpy as np
import pytest
from PIL import Image

pytest.importorskip("pytestqt")
from PySide6.QtCore import QSettings, Qt  # noqa: E402

from workbench import cli, pipeline, preview  # noqa: E402
from workbench.gui.window import MainWindow  # noqa: E402
from workbench.formats.imagefiles import read_image  # noqa: E402
from workbench.settings import Settings  # noqa: E402


@pytest.fixture()
def folder(tmp_path, chelsea, camera):
    d = tmp_path / "frames"
    d.mkdir()
    Image.fromarray(chelsea).save(d / "a_cat.png")
    Image.fromarray(camera[::2, ::2]).save(d / "b_camera.png")
    return d


def _open(qtbot, window, folder):
    window.open_folder(folder)
    qtbot.waitUntil(lambda: not window.loading, timeout=30000)


def _open_with_conv(qtbot, window, tmp_path, pixels):
    """A folder of one image ``cat.png``, opened, with the conv encoder chosen."""
    d = tmp_path / "one"
    d.mkdir()
    Image.fromarray(pixels).save(d / "cat.png")
    _open(qtbot, window, d)
    window.panel.method.setCurrentIndex(window.panel.method.findData("conv"))
    return d


@pytest.fixture()
def window(qtbot, tmp_path):
    w = MainWindow(QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w)
    w.show()
    return w


def _settled(w, expected):
    n = w.last_numbers
    return n is not None and n.step == pytest.approx(expected.step) and n.kept == expected.kept


def _core_numbers(path, settings):
    return pipeline.encode([read_image(path)], settings).images[0]


def test_readouts_follow_the_slider_and_equal_the_core(qtbot, window, folder):
    _open(qtbot, window, folder)
    qtbot.waitUntil(lambda: window.last_numbers is not None, timeout=30000)
    first = window.last_numbers
    window.panel.count.setValue(6)
    s = window.panel.settings()
    core = _core_numbers(folder / "a_cat.png", s)
    qtbot.waitUntil(lambda: window.last_numbers is not first and window.last_numbers.kept <= 6, timeout=30000)
    n = window.last_numbers
    assert n.bytes == round(core.bytes) and n.bpp == pytest.approx(core.bpp)
    assert n.psnr == pytest.approx(core.psnr) and n.ssim == pytest.approx(core.ssim)
    assert n.psnr < first.psnr and n.bytes < first.bytes
    assert window.panel.readouts["psnr"].text() == f"{core.psnr:.2f} dB"
    assert "energy kept" in window.panel.energy_label.text()


def test_switching_images_updates_the_views_and_numbers(qtbot, window, folder):
    _open(qtbot, window, folder)
    qtbot.waitUntil(lambda: window.last_numbers is not None, timeout=30000)
    a = window.last_numbers
    qtbot.keyClick(window.thumbs, Qt.Key.Key_Right)
    qtbot.waitUntil(lambda: window.index == 1 and window.last_numbers is not a, timeout=30000)
    core = _core_numbers(folder / "b_camera.png", window.panel.settings())
    qtbot.waitUntil(lambda: window.last_numbers.bytes == round(core.bytes), timeout=30000)
    qtbot.waitUntil(lambda: window._shown is not None and window._shown[0].shape == (256, 256), timeout=30000)


def test_saved_bundle_decodes_to_the_pixels_shown(qtbot, window, folder, tmp_path):
    _open(qtbot, window, folder)
    qtbot.waitUntil(lambda: window._shown is not None and window._shown[1] is not None, timeout=30000)
    shown = window._shown[1].copy()
    out = tmp_path / "saved.wbundle"
    with qtbot.waitSignal(window.jobs.finished, timeout=60000):
        assert window.save_bundle(out)
    assert cli.main(["decode", str(out), "-o", str(tmp_path / "dec")]) == 0
    decoded = read_image(tmp_path / "dec" / "a_cat.png").pixels
    assert np.array_equal(decoded, shown)
    from workbench import archive

    recipe = archive.read_recipe(out.with_suffix(".wrecipe"))  # the decision, saved beside the bundle
    assert recipe["settings"] == window.panel.settings().to_dict()
    assert sorted(p.name for p in folder.iterdir()) == ["a_cat.png", "b_camera.png"]  # source folder untouched


def test_unreadable_file_is_listed_and_skipped(qtbot, window, folder):
    (folder / "c_broken.png").write_bytes(b"\x89PNG\r\n\x1a\n garbage")
    _open(qtbot, window, folder)
    assert window.notice.isVisible() and "c_broken.png" in window.notice.label.text()
    assert [i.name for i in window.images] == ["a_cat.png", "b_camera.png"]


def test_a_long_job_can_be_cancelled_and_writes_nothing(qtbot, window, tmp_path, astronaut):
    big = tmp_path / "big"
    big.mkdir()
    for i in range(6):
        Image.fromarray(np.roll(astronaut, 37 * i, axis=1)).save(big / f"f{i}.png")
    _open(qtbot, window, big)
    window.panel.rate_mode.setCurrentIndex(window.panel.rate_mode.findData("psnr"))  # slow: searches the step
    out = tmp_path / "never.wbundle"
    with qtbot.waitSignal(window.jobs.failed, timeout=60000) as blocker:
        window.save_bundle(out)
        qtbot.waitUntil(lambda: window.progress.value() > 0, timeout=30000)
        qtbot.mouseClick(window.cancel_button, Qt.MouseButton.LeftButton)
    assert blocker.args[1] == "cancelled" and not out.exists()


def test_settings_are_remembered_between_runs(qtbot, tmp_path, folder):
    store = QSettings(str(tmp_path / "s.ini"), QSettings.Format.IniFormat)
    w = MainWindow(store)
    qtbot.addWidget(w)
    w.panel.apply(Settings(block=16, count=30, step=5.0, chroma="444"))
    w.folder = folder
    w.close()
    w2 = MainWindow(QSettings(str(tmp_path / "s.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w2)
    s = w2.panel.settings()
    assert (s.block, s.kept, s.step, s.chroma) == (16, 30, 5.0, "444")
    assert w2.store.value("last_folder") == str(folder)


def test_about_box_carries_the_caution_and_versions(window):
    text = window.about_text()
    assert "local regulations and professional guidelines" in text and "numpy" in text


def test_difference_view_outlines_the_worst_tiles(qtbot, window, folder):
    _open(qtbot, window, folder)
    qtbot.waitUntil(lambda: window._shown is not None, timeout=30000)
    assert len(window.views.views[2].marks) == 5
    window.panel.worst.setChecked(False)
    assert window.views.views[2].marks == []


def test_quality_sheet_is_saved_from_the_window(qtbot, window, folder, tmp_path):
    _open(qtbot, window, folder)
    out = tmp_path / "report"
    with qtbot.waitSignal(window.jobs.finished, timeout=120000):
        assert window.save_sheet(out)
    assert {p.name for p in out.iterdir()} == {"bundle.wbundle", "sheet.pdf", "sheet.csv", "sheet.json", "recipe.wrecipe"}


def test_quality_sheet_after_a_save_reuses_the_saved_bundle(qtbot, window, folder, tmp_path):
    _open(qtbot, window, folder)
    saved = tmp_path / "kept.wbundle"
    with qtbot.waitSignal(window.jobs.finished, timeout=120000):
        assert window.save_bundle(saved)
    out = tmp_path / "report"
    with qtbot.waitSignal(window.jobs.finished, timeout=120000):
        assert window.save_sheet(out)
    assert "reused from" in window.status_text.text()
    assert (out / "bundle.wbundle").read_bytes() == saved.read_bytes()


def test_quality_sheet_with_the_conv_encoder_is_saved_from_a_child_process(qtbot, window, tmp_path, chelsea):
    # The sheet's own worker pool then runs inside the child job (a crop of "chelsea").
    _open_with_conv(qtbot, window, tmp_path, chelsea[:64, :96])
    out = tmp_path / "report"
    assert window.save_sheet(out)
    qtbot.waitUntil(lambda: not window.jobs.active, timeout=240000)
    assert window.last_error == ""
    assert {p.name for p in out.iterdir()} == {"bundle.wbundle", "sheet.pdf", "sheet.csv", "sheet.json", "recipe.wrecipe"}
    contents, _ = pipeline.decode((out / "bundle.wbundle").read_bytes())
    assert contents.settings.method == "conv"


def test_training_from_the_window_makes_the_model_available(qtbot, window, folder, tmp_path):
    from workbench.gui import training

    _open(qtbot, window, folder)
    with qtbot.waitSignal(window.jobs.finished, timeout=120000):
        training.start_training(window, tmp_path / "m.wmodel", minutes=1, lam=0.01, latent=4, max_steps=3)
    qtbot.waitUntil(lambda: window.conv_model_file is not None, timeout=60000)  # read off the GUI thread
    assert window.conv_model_file == tmp_path / "m.wmodel" and window.panel.count.maximum() == 4
    assert "m)" in window.panel.method.itemText(window.panel.method.findData("conv"))
    assert window.last_training["steps"] == 3


def test_on_a_large_image_a_sketch_shows_first_and_the_exact_view_replaces_it(qtbot, window, tmp_path):
    # scikit-image's 'astronaut' enlarged past the sketch threshold (one megapixel)
    from skimage import data
    from skimage.transform import resize

    big = tmp_path / "big"
    big.mkdir()
    img = (resize(data.astronaut(), (1024, 1024), anti_aliasing=True) * 255).round().astype(np.uint8)
    Image.fromarray(img).save(big / "a.png")
    _open(qtbot, window, big)
    qtbot.waitUntil(lambda: window._exact_tag is not None, timeout=30000)
    rec = window.views.views[1]
    shown = rec.shown
    window.panel.count.setValue(5)
    qtbot.waitUntil(lambda: not rec.overlay.pixmap().isNull(), timeout=30000)  # the sketch
    assert rec.shown > shown
    qtbot.waitUntil(lambda: window._exact_tag == ("a.png", window.panel.settings()), timeout=30000)
    assert rec.overlay.pixmap().isNull()  # cleared once the exact image is up
    core = preview.ImagePreview(window.current, window.panel.settings()).reconstruct(window.panel.settings())[1]
    assert np.array_equal(window._shown[1], core)


def test_conv_readouts_come_from_the_helper_process_and_equal_the_core(qtbot, window, tmp_path, chelsea):
    # The conv encoder runs in a helper process (workbench.gui.remote); its numbers must still
    # be the core's own for the same settings (shipped model, scikit-image's "chelsea").
    d = _open_with_conv(qtbot, window, tmp_path, chelsea[:96, :128])
    s = window.panel.settings()
    core = _core_numbers(d / "cat.png", s)
    qtbot.waitUntil(lambda: _settled(window, core) and window.panel.settings().method == "conv", timeout=120000)
    n = window.last_numbers
    assert n.bytes == round(core.bytes) and n.psnr == pytest.approx(core.psnr) and n.ssim == pytest.approx(core.ssim)
    qtbot.waitUntil(lambda: window._exact_tag == ("cat.png", s), timeout=60000)  # the conv image is up
    assert np.array_equal(window._shown[1], core.reconstruction)


def test_the_apps_process_never_imports_torch(tmp_path, chelsea):
    # Importing torch holds the GIL for a noticeable time; the conv encoder's previews,
    # saves and bundle decoding therefore run in child processes. Checked in a fresh interpreter, since this
    # test session has torch loaded already.
    import subprocess
    import sys
    import textwrap

    d = tmp_path / "one"
    d.mkdir()
    Image.fromarray(chelsea[:64, :64]).save(d / "cat.png")
    script = textwrap.dedent(f"""
        import os, sys, time
        os.environ["QT_QPA_PLATFORM"] = "offscreen"
        from PySide6.QtCore import QSettings
        from PySide6.QtWidgets import QApplication
        from workbench.gui.window import MainWindow
        app = QApplication([])
        w = MainWindow(QSettings({str(tmp_path / 's.ini')!r}, QSettings.Format.IniFormat))
        w.open_folder({str(d)!r})
        def wait(cond, limit=120):
            end = time.time() + limit
            while not cond():
                app.processEvents()
                time.sleep(0.01)
                if time.time() > end:
                    sys.exit("timed out")
        wait(lambda: not w.loading and w.last_numbers is not None)
        w.panel.method.setCurrentIndex(w.panel.method.findData("conv"))
        wait(lambda: any(key[1] == "conv" for key in w._previews))  # fitted in the helper
        w.last_numbers = None
        w.refresh()
        wait(lambda: w.last_numbers is not None)
        w.save_bundle({str(tmp_path / 'c.wbundle')!r})
        wait(lambda: not w.jobs.active and os.path.exists({str(tmp_path / 'c.wbundle')!r}))
        w.open_bundle({str(tmp_path / 'c.wbundle')!r})
        wait(lambda: not w.jobs.active and w.bundle_path is not None)
        w.close()
        print("torch" in sys.modules)
    """)
    r = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    assert r.stdout.strip().splitlines()[-1] == "False"
    contents, decoded = pipeline.decode((tmp_path / "c.wbundle").read_bytes())
    assert contents.settings.method == "conv" and decoded[0].pixels.shape == (64, 64, 3)


def test_highlighting_the_conv_encoder_starts_its_helper_early(qtbot, window):
    # Its helper process needs seconds to start (it imports torch): begin while the user chooses.
    assert window._remote is None
    window.panel.method.highlighted.emit(window.panel.method.findData("conv"))
    first = window._remote
    assert first is not None
    window.panel.method.highlighted.emit(window.panel.method.findData("klt"))
    window.panel.method.highlighted.emit(window.panel.method.findData("conv"))
    assert window._remote is first  # highlighting again starts no second helper


def test_a_real_slider_drag_gives_readouts_that_match_the_saved_file(qtbot, window, tmp_path, chelsea):
    # Every read-out against an outside reference: PSNR and SSIM by scikit-image on the
    # pixels decoded from the file the app saves at that setting (SSIM with the settings of
    # Wang et al. 2004: Gaussian window sigma 1.5, population covariances), bytes and rate
    # from that file's size.
    from PySide6.QtCore import QPoint
    from PySide6.QtTest import QTest
    from PySide6.QtWidgets import QStyle, QStyleOptionSlider
    from skimage.metrics import peak_signal_noise_ratio, structural_similarity

    d = tmp_path / "one"
    d.mkdir()
    Image.fromarray(chelsea).save(d / "cat.png")
    _open(qtbot, window, d)
    qtbot.waitUntil(lambda: window.last_numbers is not None, timeout=30000)
    slider = window.panel.count
    opt = QStyleOptionSlider()
    slider.initStyleOption(opt)
    handle = slider.style().subControlRect(QStyle.ComplexControl.CC_Slider, opt,
                                           QStyle.SubControl.SC_SliderHandle, slider).center()
    QTest.mousePress(slider, Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier, handle)
    for frac in (0.8, 0.5, 0.3, 0.15):
        QTest.mouseMove(slider, QPoint(int(slider.width() * frac), handle.y()))
        qtbot.wait(30)
    QTest.mouseRelease(slider, Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier,
                       QPoint(int(slider.width() * 0.15), handle.y()))
    kept = slider.value()
    assert 1 < kept < slider.maximum() // 2  # the drag moved the setting
    qtbot.waitUntil(lambda: _settled(window, window.panel.settings()) and window.last_numbers.kept <= kept,
                    timeout=30000)
    out = tmp_path / "saved.wbundle"
    with qtbot.waitSignal(window.jobs.finished, timeout=60000):
        assert window.save_bundle(out)
    assert cli.main(["decode", str(out), "-o", str(tmp_path / "dec")]) == 0
    dec = read_image(tmp_path / "dec" / "cat.png").pixels
    size, pixels = out.stat().st_size, chelsea.shape[0] * chelsea.shape[1]
    r = window.panel.readouts
    assert r["psnr"].text() == f"{peak_signal_noise_ratio(chelsea, dec, data_range=255):.2f} dB"
    sk = structural_similarity(chelsea, dec, gaussian_weights=True, sigma=1.5, use_sample_covariance=False,
                               data_range=255, channel_axis=2)
    assert r["ssim"].text() == f"{sk:.4f}"
    assert r["bytes"].text() == f"{size:,} bytes"
    assert r["bpp"].text() == f"{8 * size / pixels:.3f}"
    assert r["ratio"].text() == f"{chelsea.nbytes / size:.1f} : 1"


def test_measurements_follow_the_shown_reconstruction_and_mark_the_spots(qtbot, window, tmp_path):
    from skimage import data

    from workbench.quality import measures

    d = tmp_path / "frames"
    d.mkdir()
    sky = data.hubble_deep_field()[:200, :240]  # scikit-image's bundled 'hubble_deep_field'
    Image.fromarray(sky).save(d / "sky.png")
    _open(qtbot, window, d)
    qtbot.waitUntil(lambda: window._shown is not None and window._shown[1] is not None, timeout=30000)
    window.panel.measure_boxes["spots"].setChecked(True)
    window.panel.measure_boxes["regions"].setChecked(True)
    qtbot.waitUntil(lambda: window.last_measured is not None, timeout=30000)
    rec = window._shown[1]
    ref = measures.Reference(measures.parse("spots,regions"), sky, 255)
    expected = ref.judge(rec)
    assert window.last_measured.values == expected.values
    assert window.panel.measure_result.text().startswith(expected.summary())
    assert len(window.views.views[0].items_shown) == len(ref.judge(rec, marks=True).marks) > 0


def test_the_last_folder_is_stored_as_an_absolute_path(qtbot, window, folder, monkeypatch):
    from pathlib import Path

    monkeypatch.chdir(folder.parent)
    _open(qtbot, window, Path(folder.name))
    window.close()
    assert Path(window.store.value("last_folder")) == folder.resolve()


def test_without_samples_beside_it_the_app_makes_the_demo_images_once(tmp_path, monkeypatch):
    from workbench.demo import samples
    from workbench.gui import app, window as window_module

    monkeypatch.setattr(window_module, "SAMPLES", tmp_path / "not-here")
    made = app.demo_folder(tmp_path / "data")
    assert sorted(p.name for p in made.glob("*.png")) == sorted(samples())
    stamp = {p.name: p.stat().st_mtime_ns for p in made.glob("*.png")}
    assert app.demo_folder(tmp_path / "data") == made
    assert {p.name: p.stat().st_mtime_ns for p in made.glob("*.png")} == stamp  # not made twice


def test_z_switches_between_the_whole_image_and_pixel_for_pixel(qtbot, window, folder):
    _open(qtbot, window, folder)
    qtbot.waitUntil(lambda: window._shown is not None, timeout=30000)
    window.views.fit()
    fitted = window.views.scale
    assert fitted != 1.0  # the 451-pixel cat fits the offscreen window only when scaled
    qtbot.keyClick(window, Qt.Key.Key_Z)
    assert window.views.scale == 1.0 and window.views.views[1].transform().m11() == 1.0
    qtbot.keyClick(window, Qt.Key.Key_Z)
    assert window.views.scale == pytest.approx(fitted)


def test_each_method_keeps_its_own_count_and_conv_shows_the_chroma_it_uses(qtbot, window):
    p = window.panel
    p.count.setValue(1)
    p.chroma.setCurrentIndex(p.chroma.findData("420"))
    p.method.setCurrentIndex(p.method.findData("conv"))
    assert p.count.value() == p.count.maximum()  # not the KLT's 1 (a grey picture)
    assert p.chroma.currentData() == "444" and not p.chroma.isEnabled() and not p.block.isEnabled()
    assert p.settings().count is None  # all of them
    p.method.setCurrentIndex(p.method.findData("klt"))
    assert p.count.value() == 1 and p.chroma.currentData() == "420" and p.chroma.isEnabled()


def test_the_energy_curve_separates_counts_near_full_energy():
    from PySide6.QtCore import QRectF

    from workbench.gui.views import EnergyCurve

    c = EnergyCurve()
    c.set_data([0.9, 0.99, 0.999, 1.0], 2)
    ys = [p.y() for p in c.points(QRectF(0, 0, 100, 60))]
    # left out 1e-1, 1e-2, 1e-3 and (capped) 1e-6: one decade is a tenth of the six shown
    assert ys == pytest.approx([10.0, 20.0, 30.0, 60.0])


def test_cancelling_training_says_what_it_kept(qtbot, window, folder, tmp_path):
    from workbench.gui import training

    _open(qtbot, window, folder)
    out = tmp_path / "m.wmodel"
    training.start_training(window, out, minutes=5, lam=0.01, latent=4, max_steps=100000)
    qtbot.waitUntil(lambda: "step" in window.status_text.text(), timeout=120000)  # training is under way
    with qtbot.waitSignal(window.jobs.failed, timeout=120000):
        qtbot.mouseClick(window.cancel_button, Qt.MouseButton.LeftButton)
    assert out.exists()  # a cancelled training keeps its last checkpoint…
    assert str(out) in window.status_text.text() and "resume" in window.status_text.text()  # …and says so


def test_the_sheet_is_offered_a_new_folder_beside_the_images(qtbot, window, folder):
    _open(qtbot, window, folder)
    assert window.sheet_folder_suggestion() == folder.parent / "frames-quality-sheet"
    (folder.parent / "frames-quality-sheet").mkdir()
    (folder.parent / "frames-quality-sheet" / "sheet.json").write_text("{}")
    assert window.sheet_folder_suggestion() == folder.parent / "frames-quality-sheet-2"  # never over an old sheet


def test_an_unreachable_target_says_why_and_what_would_meet_it(qtbot, window, tmp_path):
    from workbench.demo import fabric

    d = tmp_path / "loom"
    d.mkdir()
    Image.fromarray(fabric(np.random.default_rng(1))).save(d / "f.png")  # fine colour weave (demo data)
    _open(qtbot, window, d)
    qtbot.waitUntil(lambda: window.last_numbers is not None, timeout=30000)
    window.panel.rate_mode.setCurrentIndex(window.panel.rate_mode.findData("psnr"))
    window.panel.rate_value.setValue(40.0)
    qtbot.waitUntil(lambda: "out of reach" in window.notice.label.text(), timeout=60000)
    assert "4:4:4" in window.notice.label.text()


def test_after_opening_a_bundle_the_readouts_say_what_they_compare(qtbot, window, folder, tmp_path):
    out = tmp_path / "b.wbundle"
    assert cli.main(["encode", str(folder / "a_cat.png"), "-o", str(out)]) == 0
    assert "the source" in window.panel.readout_box.title()
    with qtbot.waitSignal(window.jobs.finished, timeout=60000):
        window.open_bundle(out)
    assert "decoded images of b.wbundle" in window.panel.readout_box.title()
    assert "not with the sources" in window.notice.label.text()


def test_the_current_setting_can_be_applied_to_an_archive_from_the_app(qtbot, window, folder, tmp_path):
    from workbench import archive

    _open(qtbot, window, folder)
    window.panel.count.setValue(10)
    dst = tmp_path / "archive"
    with qtbot.waitSignal(window.jobs.finished, timeout=120000):
        assert window.apply_to_archive(folder, dst)
    assert window.last_batch["done"] == 2 and "2 of 2 done" in window.status_text.text()
    made = {r["path"] for r in archive.rows(dst)}
    assert made == {"a_cat.png", "b_camera.png"}
    assert "2 of 2 items done" in window.show_archive_summary(dst)  # a finished archive's summary
    s = window.panel.settings()
    assert (dst / "a_cat.png.wbundle").read_bytes() == pipeline.encode([read_image(folder / "a_cat.png")], s).data


def test_cancelling_a_conv_save_in_its_child_process_writes_nothing(qtbot, window, tmp_path, astronaut):
    big = tmp_path / "big"
    big.mkdir()
    for i in range(6):
        Image.fromarray(np.roll(astronaut, 37 * i, axis=1)).save(big / f"f{i}.png")  # scikit-image's 'astronaut'
    _open(qtbot, window, big)
    window.panel.method.setCurrentIndex(window.panel.method.findData("conv"))
    out = tmp_path / "never.wbundle"
    with qtbot.waitSignal(window.jobs.failed, timeout=120000) as blocker:
        window.save_bundle(out)
        qtbot.waitUntil(lambda: window.progress.value() > 0, timeout=60000)  # the child is encoding
        qtbot.mouseClick(window.cancel_button, Qt.MouseButton.LeftButton)
    assert blocker.args[1] == "cancelled"
    assert not out.exists() and not out.with_suffix(".wrecipe").exists()
    assert not list(tmp_path.glob(".never.wbundle.*.part"))


def test_choosing_the_block_size_sets_the_panel_to_the_lowest_cost_block_and_chroma(qtbot, window, folder):
    from workbench import blockchoice

    _open(qtbot, window, folder)
    start = window.panel.settings()
    with qtbot.waitSignal(window.jobs.finished, timeout=120000):
        assert window.choose_block()
    expected, _ = blockchoice.choose_block(list(window.images), start, chromas=("420", "444"))
    s = window.panel.settings()
    assert (s.block, s.chroma) == (expected.block, expected.chroma)
    assert window.status_text.text().startswith(f"Block {expected.block}, chroma {expected.chroma} chosen by")


def test_a_wait_over_a_second_says_what_it_waits_for_and_how_far_it_is(qtbot, window, folder, monkeypatch):
    import threading

    _open(qtbot, window, folder)
    qtbot.waitUntil(lambda: window.last_numbers is not None, timeout=30000)
    release, real = threading.Event(), pipeline.encode

    def held(images, s, **kw):  # a search held after its first trial until the test lets it go
        kw["on_trial"](images[0].name, 1, 8.0, 33.3)
        release.wait(60)
        return real(images, s, **kw)

    monkeypatch.setattr(pipeline, "encode", held)
    window.panel.rate_mode.setCurrentIndex(window.panel.rate_mode.findData("psnr"))
    window.panel.rate_value.setValue(35.0)
    qtbot.waitUntil(lambda: "searching the step for the target" in window.waits.showing(), timeout=10000)
    qtbot.waitUntil(lambda: "trial 1: step 8 gives 33.3 dB" in window.waits.showing(), timeout=10000)
    release.set()
    qtbot.waitUntil(lambda: window.waits.showing() == "", timeout=60000)
    assert window.last_numbers.psnr >= 35.0 - 0.05
