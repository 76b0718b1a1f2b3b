"""A short seeded run of the structure-aware fuzzer (``fuzzing.py``); the long run with
time and memory limits is ``benchmarks/bench_fuzz.py``."""

import numpy as np
import pytest
from skimage import data

import workbench
from workbench import codecs, pipeline
from workbench.codecs import klt_basis, tiling
from workbench.formats import basisfile, bundle, modelfile

import fuzzing


def read_bundle(m: bytes):
    contents, decoded = pipeline.decode(m)
    for e, d in zip(contents.entries, decoded):
        assert d.pixels.shape[:2] == (e.height, e.width), "decoded pixels of the wrong size"


def _bugs(report):
    return [(kind, msg) for kind, msg, _ in report.bugs]


@pytest.mark.parametrize("settings", [dict(step=4), dict(step=8, basis_scope="folder"), dict(step=3, chroma="444")])
def test_klt_bundle_mutants_give_only_our_error(settings):
    # crops of scikit-image's 'astronaut' and 'camera'; one with alpha
    rgba = np.dstack([data.astronaut()[:40, :56], np.full((40, 56), 200, np.uint8)])
    b = workbench.compress({"a.png": rgba, "c.png": data.camera()[:24, :32]}, **settings)
    report = fuzzing.run(read_bundle, b, bundle.MAGIC, bundle.VERSION, seed=1, count=300)
    assert report.refused > 50 and not report.bugs, _bugs(report)


def test_basis_file_mutants_give_only_our_error():
    basis = klt_basis.fit_basis([tiling.to_patches(data.camera().astype(float), 8)], 8)
    b = basisfile.basis_file_bytes(basis, sources=["camera"])
    report = fuzzing.run(basisfile.parse_basis_file, b, basisfile.MAGIC, basisfile.VERSION, seed=2, count=400)
    assert report.refused > 50 and not report.bugs, _bugs(report)


def test_conv_bundle_and_model_file_mutants_give_only_our_error():
    pytest.importorskip("torch")
    b = workbench.compress({"a.png": data.astronaut()[:32, :48]}, method="conv", step=6)
    report = fuzzing.run(read_bundle, b, bundle.MAGIC, bundle.VERSION, seed=3, count=60)
    model, _ = codecs.get("conv").default_model()
    conv = codecs.get("conv")
    report_m = fuzzing.run(conv.shared_from_bytes, model.data.raw, modelfile.MAGIC, modelfile.VERSION, seed=4, count=40)
    assert not report.bugs and not report_m.bugs, _bugs(report) + _bugs(report_m)


@pytest.mark.parametrize("arch", [{"hidden": 16, "latent": 8, "zz": 1}, {"hidden": True, "latent": 8},
                                  {"hidden": 16.0, "latent": 8}, {"hidden": 16}],
                         ids=["extra key", "bool", "float", "missing"])
def test_a_model_file_with_a_malformed_architecture_is_refused(arch):
    # found by the long fuzzer run (bench_fuzz.py): these reached torch's constructors
    pytest.importorskip("torch")
    from workbench.formats import container
    from workbench.errors import BundleError

    model, _ = codecs.get("conv").default_model()
    chunks = container.unpack(model.data.raw, modelfile.MAGIC, (modelfile.VERSION,), "m")
    meta = container.unpack_json(chunks[0][1], "m")
    bad = container.pack(modelfile.MAGIC, modelfile.VERSION,
                         [(b"META", container.pack_json({**meta, "arch": arch}))] + chunks[1:])
    with pytest.raises(BundleError, match="architecture"):
        codecs.get("conv").shared_from_bytes(bad)


def _model_with(edit_weights=None, edit_meta=None):
    """The shipped model file rebuilt with edited weights or metadata, CRCs valid."""
    from safetensors.numpy import load, save

    from workbench.formats import container

    model, _ = codecs.get("conv").default_model()
    chunks = dict(container.unpack(model.data.raw, modelfile.MAGIC, (modelfile.VERSION,), "m"))
    meta = container.unpack_json(chunks[b"META"], "m")
    w = load(chunks[b"WGTS"])
    if edit_weights:
        w = edit_weights(w)
        chunks[b"WGTS"] = save(w)
    if edit_meta:
        meta = edit_meta(meta)
    chunks[b"META"] = container.pack_json(meta)
    return container.pack(modelfile.MAGIC, modelfile.VERSION, list(chunks.items()))


def _nan_first(w):
    k = sorted(w)[0]
    bad = w[k].copy()
    bad.flat[0] = np.nan
    return {**w, k: bad}


def _wrong_shape(w):
    k = sorted(w)[0]
    return {**w, k: np.zeros((3,) + w[k].shape[1:], np.float32)}


def _changed_weight(w):
    k = sorted(w)[0]
    v = w[k].copy()
    v.flat[0] += 1.0
    return {**w, k: v}


@pytest.mark.parametrize("edit, why", [
    (dict(edit_weights=_nan_first), "not finite"),
    (dict(edit_weights=_changed_weight), "hash"),  # content changed under its recorded SHA-256
    (dict(edit_weights=_wrong_shape, edit_meta=lambda m: {k: v for k, v in m.items() if k != "sha256"}), "fit"),
    (dict(edit_meta=lambda m: {**m, "tables": [0, 99]}), "tables"),
], ids=["nan weight", "hash mismatch", "wrong shape", "tables out of range"])
def test_hostile_model_files_are_refused_with_our_error(edit, why):
    pytest.importorskip("torch")
    from workbench.errors import BundleError

    with pytest.raises(BundleError, match=why):
        codecs.get("conv").shared_from_bytes(_model_with(**edit))


def test_a_hostile_model_embedded_in_a_bundle_is_refused_on_decode():
    pytest.importorskip("torch")
    from workbench.formats import container
    from workbench.errors import BundleError

    model, ref = codecs.get("conv").default_model()
    embedded = pipeline.encode([pipeline.SourceImage("a.png", data.astronaut()[:32, :32])],
                               pipeline.Settings(method="conv"), shared=model, shared_ref=ref, embed=True).data
    chunks = container.unpack(embedded, bundle.MAGIC, (bundle.VERSION,), "b")
    hostile = _model_with(edit_weights=_nan_first)
    swapped = [(t, hostile if t == b"BASE" else body) for t, body in chunks]
    with pytest.raises(BundleError, match="not finite"):
        pipeline.decode(container.pack(bundle.MAGIC, bundle.VERSION, swapped))
    assert len(pipeline.decode(embedded)[1]) == 1  # while the bundle as made decodes
