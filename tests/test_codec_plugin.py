"""A new codec is one file and one registry line: the test-only plain codec (plaincodec.py)
is driven by the CLI, the pipeline, the sheet (in its worker processes) and the app's panel
with no edit anywhere else."""

import json

import pytest
from PIL import Image
from skimage.metrics import peak_signal_noise_ratio

import plaincodec
from workbench import cli, codecs, pipeline
from workbench.formats.imagefiles import SourceImage, read_image
from workbench.settings import Settings


@pytest.fixture()
def plain(monkeypatch):
    monkeypatch.setitem(codecs.REGISTRY, "plain", plaincodec.TRAITS)  # the one registry line
    return "plain"


@pytest.fixture()
def photo(tmp_path, astronaut):
    d = tmp_path / "src"
    d.mkdir()
    Image.fromarray(astronaut[:96, :128]).save(d / "a.png")  # scikit-image's bundled 'astronaut'
    return d


def test_the_cli_encodes_and_decodes_with_the_new_codec(plain, photo, tmp_path, capsys):
    out = tmp_path / "p.wbundle"
    assert cli.main(["encode", str(photo), "-o", str(out), "--method", "plain", "--step", "1", "--chroma", "444"]) == 0
    assert cli.main(["decode", str(out), "-o", str(tmp_path / "dec")]) == 0
    src, dec = read_image(photo / "a.png").pixels, read_image(tmp_path / "dec" / "a.png").pixels
    assert peak_signal_noise_ratio(src, dec, data_range=255) > 45  # step 1 on 4:4:4: a grey level or so
    assert cli.main(["info", str(out), "--json"]) == 0
    info = json.loads(capsys.readouterr().out.splitlines()[-1])
    assert info["summary"].startswith("Plain samples") and "block" not in info["settings"]


def test_the_pipeline_gives_its_rate_distortion_curve(plain, astronaut):
    pts = pipeline.rd_points(SourceImage("a", astronaut[:64, :64]), Settings(method="plain"))
    assert [p.step for p in sorted(pts, key=lambda p: -p.bpp)] == list(plaincodec.TRAITS.rd_steps)
    assert all(a.psnr > b.psnr for a, b in zip(sorted(pts, key=lambda p: -p.bpp), sorted(pts, key=lambda p: -p.bpp)[1:]))


def test_the_quality_sheet_runs_it_in_its_worker_processes(plain, photo, tmp_path, capsys):
    out = tmp_path / "sheet"
    assert cli.main(["sheet", str(photo), "-o", str(out), "--method", "plain", "--baselines", "jpeg"]) == 0
    sheet = json.loads((out / "sheet.json").read_text())
    assert sheet["settings"]["method"] == "plain" and len(sheet["curves"]["a.png"]["ours"]) == 6


def test_the_apps_panel_offers_it_with_its_own_fields(plain, qtbot, tmp_path):
    from workbench.gui.panel import SidePanel

    panel = SidePanel()
    qtbot.addWidget(panel)
    i = panel.method.findData("plain")
    assert panel.method.itemText(i) == "Plain samples"
    panel.method.setCurrentIndex(i)
    assert panel.settings().method == "plain" and not panel.block.isEnabled() and not panel.scope.isEnabled()
    assert panel.count_label.text() == "Planes kept"


def test_a_dask_cluster_learns_the_new_codec_too(plain, photo, tmp_path):
    # Dask's workers are started by the cluster, not by our pool's initializer: each task
    # carries the run-time registrations.
    from dask.distributed import LocalCluster

    from workbench import archive
    from workbench.jobs import run

    recipe = archive.make_recipe(Settings(method="plain", step=1.0, chroma="444"))
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        run(archive.batch_job(photo, tmp_path / "dst", recipe, scheduler=cluster.scheduler_address))
    rows = archive.rows(tmp_path / "dst")
    assert [r["status"] for r in rows] == ["done"]
