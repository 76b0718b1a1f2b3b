"""The conv encoder's hyperprior: an integer synthesis that every machine evaluates alike,
exact round trips, and a rate model that tracks what is coded."""

import types

import numpy as np
import pytest

torch = pytest.importorskip("torch")

import workbench  # noqa: E402
from workbench.errors import BundleError  # noqa: E402
from workbench.formats import bundle, modelfile  # noqa: E402
from workbench import pipeline  # noqa: E402
from workbench.codecs import conv, get, hyperprior  # noqa: E402
from workbench.codecs.conv_model import _pad_grid  # noqa: E402
from workbench.formats.imagefiles import SourceImage  # noqa: E402
from workbench.jobs import run  # noqa: E402
from workbench.settings import Settings  # noqa: E402
from workbench.training import TrainConfig, train_job  # noqa: E402


@pytest.fixture(scope="module")
def images():
    from skimage import data

    return [SourceImage("cat", data.chelsea()[:128, :160]), SourceImage("cam", data.camera()[200:328, 100:228])]


@pytest.fixture(scope="module")
def hyper_model(tmp_path_factory, images):
    path = tmp_path_factory.mktemp("h") / "hyper.wmodel"
    cfg = TrainConfig(latent=12, hidden=16, side=4, side_hidden=8, max_steps=40, seed=4)
    record = run(train_job(images, path, cfg))
    # The hyperprior's stream is tried whatever the training measured (see the latent-coder tests).
    model = conv.Model(modelfile.read_model(path), coder="both")
    return model, model.sha256, record


def _reference_synthesis(weights, z, latent):
    """The integer hyper-synthesis in int64 arithmetic alone (no floats): what
    :func:`hyperprior.int_synthesis` must equal bit for bit."""
    x = np.asarray(z, np.int64)
    frac_in = 0
    for name in ("s1", "s2", "s3"):
        wi, bi, f = hyperprior._int_weights(weights[f"hyper.{name}.weight"], weights[f"hyper.{name}.bias"], frac_in)
        wi, bi = wi.astype(np.int64), bi.astype(np.int64)
        k = wi.shape[2]
        p = k // 2
        xp = np.pad(x, ((0, 0), (p, p), (p, p)))
        acc = np.zeros((wi.shape[0],) + x.shape[1:], np.int64) + bi[:, None, None]
        for dy in range(k):
            for dx in range(k):
                acc += np.einsum("oc,chw->ohw", wi[:, :, dy, dx], xp[:, dy:dy + x.shape[1], dx:dx + x.shape[2]])
        if name != "s3":
            shift = f + frac_in - hyperprior.ACT_FRAC
            x = hyperprior._shuffle(np.clip(acc >> shift, 0, hyperprior.ACT_MAX))
            frac_in = hyperprior.ACT_FRAC
    total = f + frac_in

    def rounded(v, frac):
        s = total - frac
        return np.clip((v + (1 << (s - 1))) >> s, -hyperprior.OUT_CLIP, hyperprior.OUT_CLIP)

    return rounded(acc[:latent], hyperprior.MEAN_FRAC), rounded(acc[latent:], hyperprior.LOG_FRAC)


def test_integer_synthesis_equals_pure_integer_arithmetic(hyper_model):
    # The float64 matrix products hold integers far below 2**53 (IEEE 754: such sums are exact
    # in any order), so they must equal int64 arithmetic exactly; a decoder on another machine
    # or BLAS library then rebuilds the encoder's tables.
    model, _, _ = hyper_model
    rng = np.random.default_rng(1)
    z = rng.integers(-6, 7, (model.arch.side, 5, 7))
    got = hyperprior.int_synthesis(model.data.weights, "hyper.", z, model.channels)
    want = _reference_synthesis(model.data.weights, z, model.channels)
    assert np.array_equal(got[0], want[0]) and np.array_equal(got[1], want[1])


def test_integer_synthesis_follows_the_trained_float_network(hyper_model):
    model, _, _ = hyper_model
    rng = np.random.default_rng(2)
    z = rng.integers(-3, 4, (model.arch.side, 4, 4))
    with torch.no_grad():
        mean, log_scale = model.net.hyper.synthesise(torch.from_numpy(z.astype(np.float32))[None])
    m16, l8 = hyperprior.int_synthesis(model.data.weights, "hyper.", z, model.channels)
    # Outputs are rounded to 1/16 latent unit and 1/8 octave; weights and activations add a little.
    assert np.abs(m16 / 16 - mean[0].numpy()).max() < 0.05
    assert np.abs(l8 / 8 - log_scale[0].numpy()).max() < 0.1


def test_step_constants_are_two_to_the_minus_eighths():
    # 2**(-b/8) in 30-bit fixed point, written out in the source so no pow() is involved.
    assert hyperprior._INV_STEP == tuple(round(2**30 * 2 ** (-b / 8)) for b in range(8))


def test_mean_offset_is_the_mean_in_steps_rounded():
    rng = np.random.default_rng(3)
    mean16 = rng.integers(-4000, 4000, 5000)
    for j in (-20, -1, 0, 5, 8, 17, 40):
        _, offset = hyperprior.table_and_offset(mean16, np.zeros_like(mean16), j, -96, 128)
        exact = mean16 / 16 * 2 ** (-j / 8)
        clear = np.abs(exact - np.floor(exact) - 0.5) > 1e-6  # away from ties
        assert np.array_equal(offset[clear], np.round(exact[clear]).astype(np.int64))


def test_table_index_is_the_scale_in_eighth_octaves_of_the_step():
    log8 = np.array([-200, -10, 0, 7, 300])
    table, _ = hyperprior.table_and_offset(np.zeros_like(log8), log8, 8, -96, 128)
    assert table.tolist() == [-96, -18, -8, -1, 128]


def test_hyperprior_bundles_decode_to_the_in_process_reconstruction(hyper_model, images, monkeypatch):
    model, sha, _ = hyper_model
    for step in (2.0, 8.0, 30.0):
        with monkeypatch.context() as m:
            # the latents' adaptive coder, which a young model may lose to, out of the way
            # (the residual layer below the knee keeps it)
            m.setattr(conv, "coefcode", types.SimpleNamespace(**{**vars(conv.coefcode),
                                                                 "encode_grids": lambda *a: b"\0" * (1 << 20)}))
            result = pipeline.encode(images, Settings(method="conv", step=step), shared=model, shared_ref=sha)
        assert {e.payload[3] & ~(conv.RESIDUAL | conv.BF16 | conv.INT_TOKENS) for e in bundle.parse(result.data).entries} == {conv.HYPER_ADAPTIVE}
        out = workbench.decompress(result.data, basis=model, basis_ref=sha)
        for r in result.images:
            assert np.array_equal(out[r.name], r.reconstruction)


def test_streams_under_the_fixed_hyperprior_tables_still_decode(hyper_model, images):
    # Coder 3 (fixed tables) was written by development models before the adapted coder.
    model, _, _ = hyper_model
    planes = pipeline.image_planes(images[0], "444")
    cd = conv.CODEC.quantise(conv.CODEC.analyse(planes, Settings(method="conv"), model), step=16.0, count=None)
    lo, hi = modelfile.TABLE_MIN, modelfile.TABLE_MAX
    table, offset = hyperprior.table_and_offset(cd.analysis.prior[0], cd.analysis.prior[1], cd.step_index, lo, hi)
    tabs = model.data.tables
    side = conv.symbols.encode_fixed(list(cd.analysis.side), [tabs[t] for t in model.side_tables])
    payload = (conv._HEAD.pack(cd.step_index, cd.kept, conv.HYPER | (conv.BF16 if cd.analysis.bf16 else 0)) + conv._SIDE.pack(len(side)) + side
               + conv.symbols.encode_grouped(cd.q - offset, table - lo, tabs))
    out = conv.CODEC.decode(payload, [planes[0].shape] * 3, Settings(method="conv"), model)
    assert all(np.array_equal(a, b) for a, b in zip(out, cd.planes))


@pytest.mark.parametrize("int_coder", [True, False], ids=["own range coder", "constriction (before version 7)"])
def test_adapted_latent_coding_round_trips_every_magnitude(int_coder):
    rng = np.random.default_rng(8)
    tabs = modelfile.scale_tables()
    values = np.round(rng.laplace(0, 3, (5, 7, 9))).astype(np.int64)
    values[0, 0, 0], values[1, 3, 4], values[4, 6, 8] = 2**20, -(2**25), 40
    table = rng.integers(0, len(tabs), values.shape)
    data = hyperprior.encode_latents(values, table, tabs, int_coder)
    assert np.array_equal(hyperprior.decode_latents(data, table, tabs, int_coder), values)


def test_latents_coded_about_their_offsets_equal_the_residuals_coded():
    rng = np.random.default_rng(9)
    tabs = modelfile.scale_tables()
    values = np.round(rng.laplace(0, 3, (4, 6, 8))).astype(np.int64)
    offset = rng.integers(-50, 50, values.shape)
    table = rng.integers(0, len(tabs), values.shape)
    assert hyperprior.encode_latents(values, table + 7, tabs, offset=offset, table_min=7) == \
        hyperprior.encode_latents(values - offset, table, tabs)


def test_a_latent_beyond_the_coders_range_is_refused_before_it_wraps():
    tabs = modelfile.scale_tables()
    values = np.zeros((2, 3, 4), np.int64)
    values[1, 2, 3] = 2**32 + 5  # 5 once wrapped to 32 bits
    with pytest.raises(ValueError, match="latent magnitude 4294967301"):
        hyperprior.encode_latents(values, np.zeros(values.shape, np.int64), tabs)


def test_adapted_coding_recovers_from_miscalibrated_scales():
    # Coding a source under a wrong model costs its cross-entropy, more than its entropy
    # (Cover & Thomas, Elements of Information Theory, 2nd ed., sec. 5.4): latents of
    # Laplace scale 4 under tables predicting scale 1/2 cost far more than under counts
    # that adapt to them, which come within 8 % of the matched tables (16,384 symbols: the
    # first row is coded under the wrong prior and each context learns on its own).
    rng = np.random.default_rng(2)
    tabs = modelfile.scale_tables()
    lo = modelfile.TABLE_MIN
    values = np.round(rng.laplace(0, 4, (16, 32, 32))).astype(np.int64)
    wrong = np.full(values.shape, -8 - lo)  # scale 2**(-8/8)
    right = np.full(values.shape, 16 - lo)  # scale 2**(16/8) = 4
    fixed_wrong = len(conv.symbols.encode_grouped(values, wrong, tabs))
    fixed_right = len(conv.symbols.encode_grouped(values, right, tabs))
    adapted = len(hyperprior.encode_latents(values, wrong, tabs))
    assert adapted < 0.75 * fixed_wrong
    assert adapted < 1.08 * fixed_right


def test_fewer_kept_latents_cost_fewer_bytes_under_the_hyperprior(hyper_model, images, monkeypatch):
    model, sha, _ = hyper_model
    monkeypatch.setattr(conv.coefcode, "encode_grids", lambda *a: b"\0" * (1 << 20))
    sizes = [pipeline.encode(images[:1], Settings(method="conv", count=c, step=2.0), shared=model,
                             shared_ref=sha).size for c in (2, 6, 12)]
    assert sizes[0] < sizes[1] < sizes[2]


def test_coded_size_tracks_the_models_rate_estimate(hyper_model, images, monkeypatch):
    # The training objective's rate (Ballé et al. 2018: -log2 of the discretised density) and
    # the bytes the range coder writes should agree to within the coder's rounding of the
    # mean and the scale, plus the streams' small headers.
    model, sha, _ = hyper_model
    img = images[0]
    planes = pipeline.image_planes(img, "444")
    x = torch.from_numpy((np.stack(planes) / 255.0).astype(np.float32))[None]
    with torch.no_grad():
        y = model.net.encoder(x)
        q = torch.round(y)
        keep = torch.ones(1, model.channels, 1, 1)
        estimate = float(model.net.hyper_bits(y, q, torch.ones(1, 1, 1, 1), keep, None)[0])
    monkeypatch.setattr(conv, "RESIDUAL_KNEE", 0.0)  # the latents alone, at a latent step of 1
    cd = conv.CODEC.quantise(conv.CODEC.analyse(planes, Settings(method="conv"), model), step=8.0, count=None)
    lo, hi = modelfile.TABLE_MIN, modelfile.TABLE_MAX
    table, offset = hyperprior.table_and_offset(cd.analysis.prior[0], cd.analysis.prior[1], cd.step_index, lo, hi)
    tabs = model.data.tables
    coded = 8 * (len(conv.symbols.encode_grouped(cd.q - offset, table - lo, tabs))
                 + len(conv.symbols.encode_fixed(list(cd.analysis.side), [tabs[t] for t in model.side_tables])))
    assert coded == pytest.approx(estimate, rel=0.1)


def test_a_truncated_side_stream_gives_the_clear_error(hyper_model, images, monkeypatch):
    model, sha, _ = hyper_model
    monkeypatch.setattr(conv.coefcode, "encode_grids", lambda *a: b"\0" * (1 << 20))
    payload = bundle.parse(pipeline.encode(images[:1], Settings(method="conv", step=16.0), shared=model,
                                                     shared_ref=sha).data).entries[0].payload
    with pytest.raises(BundleError, match="side stream"):
        conv.CODEC.decode(payload[:6], [(128, 160)] * 3, Settings(method="conv"), model)


def test_a_truncated_latent_stream_before_a_residual_layer_gives_the_clear_error(hyper_model, images):
    model, sha, _ = hyper_model
    payload = bundle.parse(pipeline.encode(images[:1], Settings(method="conv", step=4.0), shared=model,
                                           shared_ref=sha).data).entries[0].payload
    assert payload[3] & conv.RESIDUAL
    with pytest.raises(BundleError, match="latent stream is truncated"):
        conv.CODEC.decode(payload[:12], [(128, 160)] * 3, Settings(method="conv"), model)


def test_side_latents_cover_the_latent_grid(hyper_model):
    model, _, _ = hyper_model
    y = torch.zeros(1, model.channels, 9, 13)
    z = model.net.hyper.analyse(_pad_grid(y, hyperprior.DOWN), model.net.log_scale)
    assert tuple(z.shape[2:]) == (3, 4)


def test_a_wider_model_starts_as_the_smaller_one_where_they_overlap(images, tmp_path):
    small = tmp_path / "small.wmodel"
    run(train_job(images, small, TrainConfig(latent=6, hidden=8, side=0, side_hidden=0, max_steps=3, seed=1,
                                                    start_from=None)))
    cfg = TrainConfig(latent=10, hidden=8, side=2, side_hidden=4, max_steps=0, seed=1, start_from=str(small))
    run(train_job(images, tmp_path / "wide.wmodel", cfg))
    a, _ = get("conv").load_model(small)
    b, _ = get("conv").load_model(tmp_path / "wide.wmodel")
    wa, wb = a.data.weights, b.data.weights
    assert np.array_equal(wb["analysis.weight"][:6], wa["analysis.weight"])
    assert np.array_equal(wb["encoder_deep.4.weight"][:6], wa["encoder_deep.4.weight"])
    assert b.arch.side == 2 and b.data.info["started_from"] == a.sha256


def test_adapting_the_synthesis_only_keeps_the_encoder(images, tmp_path, hyper_model):
    model, _, _ = hyper_model
    src = tmp_path / "base.wmodel"
    src.write_bytes(model.data.raw)
    cfg = TrainConfig(latent=12, hidden=16, side=4, side_hidden=8, max_steps=5, seed=6, start_from=str(src),
                      adapt="synthesis")
    run(train_job(images, tmp_path / "tuned.wmodel", cfg))
    tuned, _ = get("conv").load_model(tmp_path / "tuned.wmodel")
    before, after = model.data.weights, tuned.data.weights
    assert all(np.array_equal(before[k], after[k]) for k in before if k.startswith(("analysis.", "encoder_deep.")))
    assert not np.array_equal(before["synthesis.weight"], after["synthesis.weight"])


def test_a_trained_model_records_which_latent_coder_paid_on_its_validation_crops(hyper_model, images, tmp_path):
    # The record equals a direct comparison of both coders' streams on crops of the images.
    from workbench.training import CALIBRATION_STEPS, _planes01, latent_coder

    model, _, _ = hyper_model
    crops = np.stack([_planes01(i)[:, :64, :64] for i in images])
    total = {"hyperprior": 0, "context": 0}
    for x in crops:
        a = conv.CODEC.analyse([p * 255.0 for p in x.astype(np.float64)], None, model)
        for step in CALIBRATION_STEPS:
            for k, n in conv.stream_sizes(conv.CODEC.quantise(a, step=step, count=None)).items():
                total[k] += n
    expected = "hyperprior" if total["hyperprior"] < total["context"] else "context"
    assert latent_coder(model.data.raw, crops) == expected


def test_a_model_whose_record_says_context_is_coded_without_its_hyperprior(hyper_model, images):
    model, _, _ = hyper_model
    ctx = conv.Model(model.data, coder="context")
    a = conv.CODEC.analyse(pipeline.image_planes(images[0], "444"), None, ctx)
    assert a.side is None and a.prior is None
    assert set(conv.stream_sizes(conv.CODEC.quantise(a, step=16.0, count=None))) == {"context"}
