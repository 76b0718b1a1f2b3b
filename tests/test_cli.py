"""The command line, end to end, in a subprocess where it matters."""

import json
import subprocess
import sys

import numpy as np
import pytest
from PIL import Image

from workbench import cli
from workbench.formats.imagefiles import encode_png, read_image


@pytest.fixture()
def folder(tmp_path, chelsea, camera16):
    d = tmp_path / "in"
    d.mkdir()
    Image.fromarray(chelsea).save(d / "cat.png")
    (d / "deep.png").write_bytes(encode_png(camera16[:200, :300]))
    (d / "notes.txt").write_text("not an image")
    return d


def _run(*args):
    return subprocess.run([sys.executable, "-m", "workbench", *map(str, args)], capture_output=True, text=True)


def test_encode_json_then_decode_gives_the_reported_pixels(folder, tmp_path, capsys):
    out = tmp_path / "b.wbundle"
    assert cli.main(["encode", str(folder), "-o", str(out), "--step", "5", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["bundle"] == str(out) and report["bytes"] == out.stat().st_size
    assert [i["name"] for i in report["images"]] == ["cat.png", "deep.png"]
    assert set(report["images"][0]) == {"name", "width", "height", "bpp", "psnr", "ssim"}
    assert cli.main(["decode", str(out), "-o", str(tmp_path / "dec")]) == 0
    deep = read_image(tmp_path / "dec" / "deep.png").pixels
    assert deep.dtype == np.uint16 and deep.shape == (200, 300)
    src = read_image(folder / "deep.png").pixels
    psnr = 10 * np.log10(65535.0**2 / np.mean((deep.astype(float) - src) ** 2))
    assert psnr == pytest.approx(report["images"][1]["psnr"], abs=1e-9)


def test_info_describes_without_decoding(folder, tmp_path, capsys):
    out = tmp_path / "b.wbundle"
    cli.main(["encode", str(folder / "cat.png"), "-o", str(out)])
    capsys.readouterr()
    assert cli.main(["info", str(out), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["images"][0]["width"] == 451 and info["settings"]["block"] == 8


def test_fit_basis_then_encode_by_reference(folder, tmp_path, capsys):
    basis = tmp_path / "src.wbasis"
    assert cli.main(["fit-basis", str(folder), "-o", str(basis)]) == 0
    out = tmp_path / "r.wbundle"
    assert cli.main(["encode", str(folder / "cat.png"), "-o", str(out), "--basis", str(basis)]) == 0
    own = tmp_path / "own.wbundle"
    cli.main(["encode", str(folder / "cat.png"), "-o", str(own)])
    assert out.stat().st_size < own.stat().st_size  # no basis carried
    assert cli.main(["decode", str(out), "-o", str(tmp_path / "d1")]) == 2
    assert "external basis" in capsys.readouterr().err
    assert cli.main(["decode", str(out), "-o", str(tmp_path / "d2"), "--basis", str(basis)]) == 0


def test_corrupt_bundle_gives_one_error_line_and_status_2(tmp_path):
    bad = tmp_path / "bad.wbundle"
    bad.write_bytes(b"WKBUNDLE" + bytes(40))
    r = _run("info", bad)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and r.stderr.startswith("error: ")
    assert "Traceback" not in r.stderr


def test_output_over_a_source_is_refused(folder):
    before = (folder / "cat.png").read_bytes()
    r = _run("encode", folder / "cat.png", "-o", folder / "cat.png")
    assert r.returncode == 2 and "source image" in r.stderr
    assert (folder / "cat.png").read_bytes() == before


def test_decode_does_not_replace_existing_files(folder, tmp_path):
    out = tmp_path / "b.wbundle"
    cli.main(["encode", str(folder / "cat.png"), "-o", str(out)])
    before = (folder / "cat.png").read_bytes()
    assert cli.main(["decode", str(out), "-o", str(folder)]) == 2
    assert (folder / "cat.png").read_bytes() == before


def test_unreadable_inputs_are_skipped_with_a_warning(folder, tmp_path):
    (folder / "broken.jpg").write_bytes(b"\xff\xd8\xff\xe0garbage")
    r = _run("encode", folder, "-o", tmp_path / "b.wbundle")
    assert r.returncode == 0 and "skipped broken.jpg" in r.stderr


def test_klt_path_imports_neither_torch_nor_qt(folder, tmp_path):
    code = (
        "import sys, workbench; from workbench import cli; "
        f"cli.main(['encode', {str(folder)!r}, '-o', {str(tmp_path / 'x.wbundle')!r}]); "
        "bad = [m for m in ('torch', 'PySide6') if m in sys.modules]; print(bad); sys.exit(1 if bad else 0)"
    )
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert r.returncode == 0, r.stdout + r.stderr


def test_help_lists_the_commands():
    r = _run("--help")
    assert r.returncode == 0
    for word in ("encode", "decode", "info", "fit-basis"):
        assert word in r.stdout


def test_a_reader_that_stops_early_is_not_an_error(folder, tmp_path):
    # `workbench info --json | head -c 10`: the reader closes the pipe; Python's docs ("Note
    # on SIGPIPE") say to go quiet then rather than print a traceback or an error line.
    out = tmp_path / "b.wbundle"
    assert _run("encode", folder / "cat.png", "-o", out).returncode == 0
    p = subprocess.Popen([sys.executable, "-m", "workbench", "info", str(out), "--json"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    p.stdout.close()  # the reader is gone before anything is written
    with p.stderr:
        err = p.stderr.read().decode()
    p.wait(timeout=60)
    assert "error" not in err and "Traceback" not in err


def test_a_terminal_gets_a_progress_bar_and_a_pipe_does_not(folder, tmp_path, monkeypatch, capsys):
    import io

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    term = Terminal()
    monkeypatch.setattr(sys, "stderr", term)
    assert cli.main(["encode", str(folder), "-o", str(tmp_path / "t.wbundle")]) == 0
    assert "%|" in term.getvalue()  # tqdm's bar
    monkeypatch.undo()
    assert cli.main(["encode", str(folder), "-o", str(tmp_path / "p.wbundle")]) == 0
    assert "%|" not in capsys.readouterr().err
