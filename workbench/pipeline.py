"""From images to a bundle and back: colour planes, codec, rate control, alpha, metrics.

This is the one place the CLI, the Python API, the GUI and the quality sheet call to
encode and decode, so the numbers they show are the same numbers.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, field


import numpy as np

from . import codecs, color
from .formats import bundle
from .quality import metrics
from .version import __version__
from .quality import measures as measures_mod
from .errors import BundleError, InputError
from .formats.imagefiles import SourceImage
from .jobs import Progress, run
from .ratecontrol import STEP_RANGE, search_step
from .settings import Settings



# ------------------------------------------------------------------ planes


def plane_shapes(height: int, width: int, channels: int, chroma: str) -> list[tuple[int, int]]:
    if channels == 1:
        return [(height, width)]
    c = ((height + 1) // 2, (width + 1) // 2) if chroma == "420" else (height, width)
    return [(height, width), c, c]


def image_planes(img: SourceImage, chroma: str) -> list[np.ndarray]:
    return color.to_planes(img.pixels, chroma, 255.0 / img.peak)


def planes_to_pixels(planes, shape, chroma, bits) -> np.ndarray:
    """Decoded planes to integer pixels: colour back to RGB, rounded and clipped."""
    return color.to_pixels(planes, shape, chroma, bits)


def encode_alpha(alpha: np.ndarray) -> bytes:
    """Lossless alpha: horizontal differences (mod 2^bits), deflated."""
    d = np.diff(alpha, axis=1, prepend=alpha.dtype.type(0))
    return zlib.compress(d.astype(alpha.dtype.newbyteorder("<")).tobytes(), 9)


def decode_alpha(data: bytes, height: int, width: int, bits: int) -> np.ndarray:
    dtype = np.dtype("<u2" if bits == 16 else "u1")
    need = height * width * dtype.itemsize
    try:
        d = zlib.decompressobj()
        raw = d.decompress(data, need + 1)
    except zlib.error as exc:
        raise BundleError(f"alpha chunk is unreadable ({exc})") from None
    if len(raw) != need:
        raise BundleError("alpha chunk has the wrong size")
    a = np.frombuffer(raw, dtype).reshape(height, width)
    return np.cumsum(a, axis=1, dtype=dtype).astype(np.uint16 if bits == 16 else np.uint8)


# ------------------------------------------------------------------ results


@dataclass
class ImageResult:
    """What one image became: the numbers of the saved bundle and the decoded pixels."""

    name: str
    width: int
    height: int
    bits: int
    channels: int
    payload_bytes: int
    step: float
    kept: int
    psnr: float
    ssim: float
    reconstruction: np.ndarray | None
    bytes: float = 0.0
    bpp: float = 0.0
    target_met: bool | None = None
    measured: object | None = None  # measures.Outcome of the saved reconstruction, when measured
    own_bytes: int = 0  # this image's payload and alpha; ``bytes`` adds its share of the shared ones
    advice: str | None = None  # why a target was missed and what would meet it; a rate past lossless

    @property
    def pixels(self) -> int:
        return self.width * self.height

    @property
    def ratio(self) -> float:
        """Uncompressed colour samples (at the source bit depth) over compressed bytes."""
        raw = self.pixels * self.channels * self.bits / 8
        return raw / self.bytes if self.bytes else float("inf")

    def summary(self) -> dict:
        return {"name": self.name, "width": self.width, "height": self.height, "bytes": round(self.bytes, 1),
                "bpp": self.bpp, "psnr": self.psnr, "ssim": self.ssim, "step": self.step,
                "count": self.kept, "target_met": self.target_met}


@dataclass
class EncodeResult:
    data: bytes
    settings: Settings
    images: list[ImageResult] = field(default_factory=list)

    @property
    def size(self) -> int:
        return len(self.data)


# ------------------------------------------------------------------ rate control


def plane_quality(kind: str, img: SourceImage, coded_planes, chroma: str, ssim_ref=None) -> float:
    """PSNR or SSIM (``kind``) of ``img`` against the pixels of ``coded_planes``; an SSIM
    against ``ssim_ref`` (a :class:`metrics.SSIMReference` of ``img``) when given."""
    rec = planes_to_pixels(coded_planes, img.pixels.shape[:2], chroma, img.bits)
    if kind == "psnr":
        return metrics.psnr(img.pixels, rec, data_range=img.peak)
    if ssim_ref is not None:
        return ssim_ref.ssim(rec)
    return metrics.ssim(img.pixels, rec, data_range=img.peak)


# ------------------------------------------------------------------ encoding


def _image_meta(img: SourceImage) -> dict:
    return {"name": img.name, "width": img.width, "height": img.height, "bits": img.bits,
            "channels": img.channels, "sha256": img.checksum()}


def _meta(settings: Settings, images: list[SourceImage], shared_ref: str | None) -> dict:
    meta = {"format": "wbundle", "version": bundle.VERSION, "tool": f"workbench {__version__}",
            "settings": settings.to_dict(), "images": [_image_meta(i) for i in images]}
    if shared_ref is not None:
        meta["basis_sha256"] = shared_ref
    return meta


def _overhead_bytes(img: SourceImage, settings: Settings, shared_ref: str | None) -> int:
    """Bytes a one-image bundle spends besides the image payload (headers, metadata, alpha);
    in a folder bundle the real share is smaller, so a rate target stays met."""
    alpha = None if img.alpha is None else encode_alpha(img.alpha)
    return len(bundle.assemble(_meta(settings, [img], shared_ref), None, [b""], [alpha]))


def encode_job(images: list[SourceImage], settings: Settings, *, shared=None, shared_ref: str | None = None,
               embed: bool = False, measure: bool = True, max_pixels: int = bundle.MAX_PIXELS,
               measures=None, target_measures: bool = False, on_trial=None):
    """Generator job: encode ``images`` into one bundle.

    Parameters
    ----------
    images : list of SourceImage
    settings : Settings
    shared : object, optional
        An external shared side (a KLT basis from a ``.wbasis`` file, a conv model); the
        bundle then refers to it by ``shared_ref`` (its content hash) instead of carrying it.
    max_pixels : int
        The decoder's pixel budget: a bundle it would refuse is refused here, before any work.
    measures : list of workbench.quality.measures.Measure, optional
        Run on each original and its reconstruction; the outcome is in each result.
    target_measures : bool
        Search each image's step for the coarsest at which every measurement's checks hold
        (bisection, as for a PSNR target; it assumes the checks fail beyond some step).
    on_trial : callable, optional
        Told of each trial of a target search as ``on_trial(name, trial, step, value)``
        (for progress; it may be called from the job's thread).

    Returns
    -------
    EncodeResult
    """
    if not images:
        raise InputError("nothing to encode: no readable images")
    bundle.check_images([(i.name, i.width, i.height, i.bits, i.channels) for i in images],
                        max_pixels=max_pixels, error=InputError)
    codec = codecs.get(settings.method)
    total = len(images) + 1
    shared_bytes = None
    yield Progress(0, total, "preparing")
    if shared is None:
        shared, shared_bytes, shared_ref = codec.prepare_shared(
            [image_planes(i, settings.chroma) for i in images] if settings.basis_scope == "folder" else None,
            settings)
    if shared is not None and embed:
        shared_bytes, shared_ref = codec.shared_to_bytes(shared), None
    payloads, alphas, results = [], [], []
    for n, img in enumerate(images):
        yield Progress(n + 0.5, total, f"encoding {img.name}")
        planes = image_planes(img, settings.chroma)
        analysis = codec.analyse(planes, settings, shared)
        met = None
        step = settings.step
        mref = None if not measures else measures_mod.Reference(measures, img.pixels, img.peak)

        trials: dict = {}  # the last few trials of a search, so the chosen one is not redone

        def at(s, analysis=analysis, trials=trials):
            if s not in trials:
                while len(trials) >= 3:
                    trials.pop(next(iter(trials)))
                trials[s] = [codec.quantise(analysis, step=s, count=settings.count), None]
            return trials[s][0]

        def serialised(s, trials=trials):
            coded = at(s)
            if trials[s][1] is None:
                trials[s][1] = codec.serialise(coded)
            return trials[s][1]

        if target_measures and mref is not None:
            def passes(s):
                rec = planes_to_pixels(at(s).planes, img.pixels.shape[:2], settings.chroma, img.bits)
                return 1.0 if mref.judge(rec).ok else 0.0
            step, met = search_step(_told(passes, on_trial, img.name), "pass", 0.5)
        elif settings.target is not None:
            kind, value = settings.target
            overhead = 8 * _overhead_bytes(img, settings, shared_ref)
            if kind == "bpp":
                def evaluate(s):
                    return (8 * len(serialised(s)) + overhead) / (img.width * img.height)
            else:
                ref = metrics.SSIMReference(img.pixels, data_range=img.peak) \
                    if kind == "ssim" and metrics.ssim_applies(img.height, img.width) else None

                def evaluate(s, ref=ref):
                    return plane_quality(kind, img, at(s).planes, settings.chroma, ref)
            step, met = search_step(_told(evaluate, on_trial, img.name), kind, value, start=settings.step)
        coded = at(step)
        advice = None if met in (None, True) else target_advice(img, settings, evaluate(step), shared)
        payload = serialised(step)
        p = s = float("nan")
        full = outcome = None
        if measure or mref is not None:
            rec = planes_to_pixels(coded.planes, img.pixels.shape[:2], settings.chroma, img.bits)
            outcome = None if mref is None else mref.judge(rec)
            full = rec if img.alpha is None else SourceImage(img.name, rec, img.alpha).full()
            p = metrics.psnr(img.pixels, rec, data_range=img.peak)
            if metrics.ssim_applies(img.height, img.width):
                s = metrics.ssim(img.pixels, rec, data_range=img.peak)
        if 8 * len(payload) >= LOSSLESS_CHECK_BPP * img.width * img.height:
            from .formats.imagefiles import encode_png

            png = len(encode_png(img.full()))
            if len(payload) >= png:
                advice = ((advice + " ") if advice else "") + (
                    f"At {len(payload):,} bytes it is larger than the source's lossless PNG ({png:,} bytes): "
                    "keep the original file instead.")
        results.append(ImageResult(img.name, img.width, img.height, img.bits, img.channels, len(payload),
                                   coded.step, coded.kept, p, s, full, target_met=met, measured=outcome,
                                   advice=advice))
        payloads.append(payload)
        alphas.append(None if img.alpha is None else encode_alpha(img.alpha))
    data = bundle.assemble(_meta(settings, images, shared_ref), shared_bytes, payloads, alphas)
    bundle.parse(data, max_pixels=max_pixels)  # the decoder's own reading, before anyone writes the bytes
    _share_bytes(results, [len(p) + (len(a) if a else 0) for p, a in zip(payloads, alphas)], len(data))
    yield Progress(total, total, "done")
    return EncodeResult(data, settings, results)


def reused(data: bytes, images: list[SourceImage], settings: Settings, *, shared=None,
           shared_ref: str | None = None) -> EncodeResult | None:
    """What :func:`encode_job` would return for ``images`` at ``settings``, taken from an
    existing bundle ``data`` made from them (same settings, same names and pixel checksums,
    same external basis or model); None when it was not, or when it misses its target (a
    new encode then says why).

    An encode is deterministic, so the bundle is what a new encode would write; this only
    decodes it.
    """
    try:
        contents = bundle.parse(data)
    except (BundleError, InputError):
        return None
    if contents.settings.to_dict() != settings.to_dict() or contents.basis_ref != shared_ref:
        return None
    if [(e.name, e.checksum) for e in contents.entries] != [(i.name, i.checksum()) for i in images]:
        return None
    codec = codecs.get(settings.method)
    try:
        _, decoded = run(decode_job(data, shared=shared, shared_ref=shared_ref))
    except BundleError:
        return None
    results = []
    for img, e, d in zip(images, contents.entries, decoded):
        step, kept = codec.payload_header(e.payload)
        rec = d.pixels if img.alpha is None else d.pixels[..., :-1].reshape(img.pixels.shape)
        p = metrics.psnr(img.pixels, rec, data_range=img.peak)
        q = metrics.ssim(img.pixels, rec, data_range=img.peak) if metrics.ssim_applies(img.height, img.width) \
            else float("nan")
        met = None
        if settings.target is not None:
            kind, value = settings.target
            if kind == "bpp":
                reached = 8 * (len(e.payload) + _overhead_bytes(img, settings, shared_ref)) / (img.width * img.height)
                met = reached <= value
            else:
                met = (p if kind == "psnr" else q) >= value
            if not met:
                return None
        results.append(ImageResult(img.name, img.width, img.height, img.bits, img.channels, len(e.payload),
                                   step, kept, p, q, d.pixels, target_met=met))
    _share_bytes(results, [len(e.payload) + (len(e.alpha) if e.alpha else 0) for e in contents.entries], len(data))
    return EncodeResult(data, settings, results)


def _share_bytes(results: list[ImageResult], own: list[int], size: int) -> None:
    """Each result's own bytes, and its rate with the bundle's shared bytes split by pixels."""
    overhead = size - sum(own)
    pixels = sum(r.pixels for r in results)
    for r, b in zip(results, own):
        r.own_bytes = b
        r.bytes = b + overhead * r.pixels / pixels
        r.bpp = 8 * r.bytes / r.pixels


def _told(evaluate, on_trial, name):
    """``evaluate`` reporting each trial to ``on_trial`` (unchanged when that is None)."""
    if on_trial is None:
        return evaluate
    count = 0

    def told(step):
        nonlocal count
        value = evaluate(step)
        count += 1
        on_trial(name, count, step, value)
        return value

    return told


LOSSLESS_CHECK_BPP = 4.0  # from this rate on, compare the payload with the source's lossless PNG


def target_advice(img: SourceImage, settings: Settings, reached: float, shared=None) -> str:
    """Why a quality or rate target was missed, and what would meet it (one sentence or two).

    For a colour image at 4:2:0, with a method that lets the chroma be chosen, it tries
    4:4:4, which keeps the chroma detail that a PSNR or SSIM over R, G and B counts.
    """
    kind, value = settings.target
    unit = {"psnr": " dB", "ssim": "", "bpp": " bpp"}[kind]
    text = (f"The {kind.upper()} target {value:g}{unit} is out of reach: the finest step gives {reached:.4g}{unit}."
            if kind != "bpp" else
            f"The rate target {value:g} bpp is out of reach: the coarsest step needs {reached:.4g} bpp.")
    if kind != "bpp" and settings.traits.fixed_chroma is None and settings.chroma == "420" and img.channels == 3:
        full = settings.replace(chroma="444", target=None)
        codec = codecs.get(settings.method)
        a = codec.analyse(image_planes(img, "444"), full, shared if settings.basis_scope == "folder" else None)

        def at(step):
            return codec.quantise(a, step=step, count=settings.count)

        def quality(step):
            return plane_quality(kind, img, at(step).planes, "444")

        step, met = search_step(quality, kind, value)
        if met:
            bpp = 8 * len(codec.serialise(at(step))) / (img.width * img.height)
            text += f" With 4:4:4 chroma it reaches {quality(step):.4g}{unit} at {bpp:.2f} bpp (step {step:.3g})."
        else:
            text += f" Even 4:4:4 chroma reaches only {quality(STEP_RANGE[0]):.4g}{unit}."
    return text


def encode(images, settings: Settings, **kw) -> EncodeResult:
    """Blocking form of :func:`encode_job`."""
    return run(encode_job(images, settings, **kw))


# ------------------------------------------------------------------ decoding


@dataclass
class Decoded:
    name: str
    pixels: np.ndarray
    checksum: str


def decode_job(data: bytes, *, shared=None, shared_ref: str | None = None, max_pixels: int = bundle.MAX_PIXELS):
    """Generator job: decode every image of a bundle; returns ``(Contents, list[Decoded])``.

    A bundle declaring more than ``max_pixels`` pixels in all is refused before any work.
    """
    contents = bundle.parse(data, max_pixels=max_pixels)
    s = contents.settings
    codec = codecs.get(s.method)
    if contents.shared is not None:
        shared = codec.shared_from_bytes(contents.shared)
    elif contents.basis_ref is not None:
        if shared is None:
            shared, shared_ref = codec.builtin(contents.basis_ref), contents.basis_ref
        if shared is None:
            raise BundleError(f"this bundle needs its external basis/model (sha256 {contents.basis_ref[:12]}…); pass it with --basis/--model")
        if shared_ref != contents.basis_ref:
            raise BundleError(f"the basis/model given (sha256 {str(shared_ref)[:12]}…) is not the one this bundle was made with ({contents.basis_ref[:12]}…)")
    out = []
    for n, e in enumerate(contents.entries):
        yield Progress(n, len(contents.entries), f"decoding {e.name}")
        shapes = plane_shapes(e.height, e.width, e.channels, s.chroma)
        planes = codec.decode(e.payload, shapes, s, shared)
        px = planes_to_pixels(planes, (e.height, e.width), s.chroma, e.bits)
        if e.alpha is not None:
            px = SourceImage(e.name, px, decode_alpha(e.alpha, e.height, e.width, e.bits)).full()
        out.append(Decoded(e.name, px, e.checksum))
    yield Progress(len(contents.entries), len(contents.entries), "done")
    return contents, out


def decode(data: bytes, **kw):
    return run(decode_job(data, **kw))


# ------------------------------------------------------------------ rate–distortion


@dataclass(frozen=True)
class RDPoint:
    step: float
    bytes: int
    bpp: float
    psnr: float
    ssim: float
    measured: object | None = None  # measures.Outcome, when rd_points was given a reference


def rd_points(img: SourceImage, settings: Settings, steps=None, *, shared=None, shared_ref=None,
              with_ssim: bool = True, ssim_ref=None, measure_ref=None,
              measure_until_failure: bool = False) -> list[RDPoint]:
    """Rate–distortion points of one image, each the size of a real one-image bundle.

    The transform is fitted once; each step is quantised, entropy-coded and laid out as a
    complete bundle whose length is the rate. With ``measure_ref`` (a
    :class:`workbench.quality.measures.Reference` of this image) each point also says what the
    measurements found in its reconstruction; with ``measure_until_failure`` the steps are
    measured from the finest on and the rest are left unmeasured after the first that fails
    (all a safe operating point needs).
    """
    codec = codecs.get(settings.method)
    steps = steps or settings.traits.rd_steps
    analysis = codec.analyse(image_planes(img, settings.chroma), settings, shared)
    alpha = None if img.alpha is None else encode_alpha(img.alpha)
    meta = _meta(settings, [img], shared_ref)
    out, failed = [], False
    for step in sorted(steps) if measure_until_failure else steps:
        coded = codec.quantise(analysis, step=step, count=settings.count)
        size = len(bundle.assemble(dict(meta, images=[dict(m) for m in meta["images"]]), None,
                                   [codec.serialise(coded)], [alpha]))
        rec = planes_to_pixels(coded.planes, img.pixels.shape[:2], settings.chroma, img.bits)
        out.append(RDPoint(coded.step, size, 8 * size / (img.width * img.height),
                           metrics.psnr(img.pixels, rec, data_range=img.peak),
                           float("nan") if not with_ssim else ssim_ref.ssim(rec) if ssim_ref is not None
                           else metrics.ssim(img.pixels, rec, data_range=img.peak),
                           None if measure_ref is None or failed else measure_ref.judge(rec)))
        failed = failed or (measure_until_failure and out[-1].measured is not None and not out[-1].measured.ok)
    return sorted(out, key=lambda p: p.bpp)
