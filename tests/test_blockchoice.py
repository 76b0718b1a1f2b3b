"""``--block auto`` / ``--chroma auto``: the block size and chroma sampling of lowest
rate–distortion cost, checked against the rate the pipeline really spends (Bjøntegaard BD-rate,
VCEG-M33) on scikit-image's bundled images."""

import numpy as np
import pytest
from skimage import data

from workbench import blockchoice, cli, pipeline
from workbench.quality import bdrate
from workbench.formats import bundle
from workbench.formats.imagefiles import SourceImage
from workbench.settings import Settings

STEPS = (3.0, 4.5, 6.5, 9.0, 13.0, 18.0)


def _tiles(a, side=128):
    return [SourceImage(f"t{y}_{x}", a[y:y + side, x:x + side])
            for y in range(0, a.shape[0] - side + 1, side) for x in range(0, a.shape[1] - side + 1, side)]


def test_the_chosen_block_spends_the_fewest_bits_at_equal_psnr(astronaut):
    # scikit-image's 'astronaut' (a quarter of it): every candidate's real RD curve
    img = SourceImage("astronaut", astronaut[:256, :256])
    chosen, costs = blockchoice.choose_block([img], Settings())
    curves = {c.block: pipeline.rd_points(img, Settings(block=c.block), STEPS, with_ssim=False) for c in costs}
    ref = curves[8]

    def bd(block):
        pts = curves[block]
        return bdrate.bd_rate([p.bpp for p in ref], [p.psnr for p in ref], [p.bpp for p in pts], [p.psnr for p in pts])

    assert {c.block for c in costs} == {4, 8, 16, 32}
    assert bd(chosen.block) == pytest.approx(min(bd(b) for b in curves), abs=1e-9)


def test_a_basis_shared_by_a_larger_archive_can_afford_a_larger_block():
    # scikit-image's 'grass' texture in 128 px tiles: the stored basis costs a 1/8 share
    # of itself for 8 files, almost nothing for 10,000, and the choice follows
    tiles = _tiles(data.grass())
    small, _ = blockchoice.choose_block(tiles, Settings(basis_scope="folder"), total=8)
    large, _ = blockchoice.choose_block(tiles, Settings(basis_scope="folder"), total=10_000)
    assert large.block > small.block


def test_the_count_is_kept_as_a_fraction_of_the_blocks_components(astronaut):
    img = SourceImage("astronaut", astronaut[:256, :256])
    chosen, _ = blockchoice.choose_block([img], Settings(count=32))  # half of 8 x 8
    assert chosen.count == chosen.block ** 2 // 2


def test_candidates_leave_out_blocks_larger_than_half_the_shortest_image():
    assert blockchoice.candidates([SourceImage("s", np.zeros((40, 300), np.uint8))]) == (4, 8, 16)


def test_cli_block_auto_writes_the_chosen_block_and_says_why(tmp_path, capsys, astronaut):
    from PIL import Image

    Image.fromarray(astronaut[:256, :256]).save(tmp_path / "a.png")
    out = tmp_path / "a.wbundle"
    assert cli.main(["encode", str(tmp_path / "a.png"), "--block", "auto", "-o", str(out)]) == 0
    line = capsys.readouterr().err.strip().splitlines()[-1]
    block = bundle.parse(out.read_bytes()).settings.block
    assert line.startswith(f"block {block} chosen by rate–distortion cost at step 8")


def test_chroma_auto_keeps_full_chroma_where_it_spends_fewer_bits_at_equal_psnr():
    # scikit-image's 'rocket' (a quarter): 4:2:0 caps its PSNR near 35 dB (red and blue detail)
    img = SourceImage("rocket", data.rocket()[:256, :256])
    chosen, costs = blockchoice.choose_block([img], Settings(block=8), blocks=(8,), chromas=("420", "444"))
    curves = {c: pipeline.rd_points(img, Settings(block=8, chroma=c), STEPS, with_ssim=False) for c in ("420", "444")}
    a, b = curves["420"], curves["444"]
    bd = bdrate.bd_rate([p.bpp for p in a], [p.psnr for p in a], [p.bpp for p in b], [p.psnr for p in b])
    assert {c.chroma for c in costs} == {"420", "444"}
    assert (chosen.chroma == "444") == (bd < 0)


def test_cli_block_auto_refuses_a_method_without_blocks(tmp_path, capsys, astronaut):
    from PIL import Image

    Image.fromarray(astronaut[:64, :64]).save(tmp_path / "a.png")
    assert cli.main(["encode", str(tmp_path / "a.png"), "--block", "auto", "--method", "conv",
                     "-o", str(tmp_path / "a.wbundle")]) == 2
    assert "--block/--chroma auto choose the KLT's" in capsys.readouterr().err
    assert not (tmp_path / "a.wbundle").exists()


def test_cli_chroma_auto_writes_the_chosen_chroma_and_says_why(tmp_path, capsys):
    from PIL import Image

    Image.fromarray(data.rocket()[:128, :128]).save(tmp_path / "r.png")  # scikit-image's 'rocket'
    out = tmp_path / "r.wbundle"
    assert cli.main(["encode", str(tmp_path / "r.png"), "--chroma", "auto", "-o", str(out)]) == 0
    line = capsys.readouterr().err.strip().splitlines()[-1]
    s = bundle.parse(out.read_bytes()).settings
    assert s.block == 8 and line.startswith(f"block 8, chroma {s.chroma} chosen by rate–distortion cost")
    assert "8/420:" in line and "8/444:" in line


def test_a_lone_image_is_judged_on_the_half_its_basis_was_not_fitted_on():
    # scikit-image's stereo_motorcycle: the choice made on the left view alone, with a folder
    # basis for a large archive, codes the right view in the fewest bits of the candidates
    import workbench.codecs
    from workbench.formats.basisfile import basis_hash

    left, right, _ = data.stereo_motorcycle()
    left, right = left[:256, :384], right[:256, :384]
    base = Settings(basis_scope="folder")
    chosen, _ = blockchoice.choose_block([SourceImage("l", left)], base, total=10_000, blocks=(8, 32),
                                         chromas=("444",))
    codec = workbench.codecs.get("klt")

    def curve(block):
        s = base.replace(block=block, chroma="444")
        basis, raw, _ = codec.prepare_shared([pipeline.image_planes(SourceImage("l", left), "444")], s)
        return pipeline.rd_points(SourceImage("r", right), s, STEPS, shared=basis, shared_ref=basis_hash(raw),
                                  with_ssim=False)

    c8, c32 = curve(8), curve(32)
    bd = bdrate.bd_rate([p.bpp for p in c8], [p.psnr for p in c8], [p.bpp for p in c32], [p.psnr for p in c32])
    assert chosen.block == (32 if bd < 0 else 8)
