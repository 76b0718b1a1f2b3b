"""Learned codec: conv encoder -> latents -> scalar quantiser -> per-channel learned tables.

Per image payload::

    step index i8 (latent quantiser step 2**(i/8)) | kept u16 | coder u8 | latent stream

and, for a model with a hyperprior (coder 3), the latent stream is
``side length u32 | side stream | latents``: the side latents under the model's per-channel
tables, then each latent under the Laplace table and around the whole-step mean that the
integer hyper-synthesis gives (:mod:`workbench.codecs.hyperprior`), so encoder and decoder
derive the same distributions on any machine.

The workbench's step (in 8-bit grey levels) maps to a latent step of ``step / 8``: the
model is trained so that one latent unit is worth roughly eight grey levels, which keeps
the default step and the rate-control range of the KLT meaningful here.

Only the first ``kept`` latent channels are coded (nested-dropout order). Two coders
are tried and the smaller stream is kept (the byte says which): the model's own entropy
model (3, the hyperprior, where the model has one; else 0, its learned per-channel tables:
integers stored in the model file, so decoding elsewhere gives the same latents); or 2, the
adaptive context coder of the KLT
(:mod:`workbench.codecs.coefcode`), which also exploits spatial context (1: the same with
its tokens in one stage, as older files have it). The pixels then come
from the same torch decoder.
The model works on full-resolution Y, Cb, Cr planes scaled to [0, 1] (grey images: Y
with neutral chroma; only Y is kept on decoding).

Below a step of :data:`RESIDUAL_KNEE` the latents stay at that step and a residual layer
carries the rest: what the conv decoder leaves out (source minus its reconstruction) is
coded as a block KLT payload (:mod:`workbench.codecs.klt`) under the fixed 8 x 8 DCT at
:func:`residual_step` of the step asked for (all latents kept only: with fewer, the
latents alone are coded). The coder byte's :data:`RESIDUAL` bit says so, and the payload is then
``head | latent stream length u32 | latent stream | residual payload``. An autoencoder
does not invert exactly: the shipped one stops near 40 dB on photographs however fine its
step (39.8 dB at a latent step of 0.05 on astronaut, at 19 bpp), while the residual layer
takes it to any PSNR.

Where the CPU multiplies bfloat16 in hardware, the networks' GDN paths run in bfloat16
(:func:`workbench.codecs.conv_model.bf16_fast`); the coder byte's :data:`BF16` bit records
it for the synthesis, and a decoder with such hardware follows the bit, so that it rebuilds
the reconstruction the encoder measured; one without it runs the synthesis in float32
(emulating bfloat16 there is some 40 times slower), a fraction of a grey level away.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np

from . import coefcode, hyperprior, klt, klt_basis, symbols
from ..errors import BundleError, InputError
from ..formats.modelfile import TABLE_MAX, TABLE_MIN, ModelData, parse_model, read_model
from .base import CodecBase

MODELS = Path(__file__).resolve().parents[1] / "models"
DEFAULT_MODEL = MODELS / "default.wmodel"
EARLIER_MODELS = (MODELS / "conv-v1.wmodel", MODELS / "conv-v2.wmodel", MODELS / "conv-v3.wmodel")  # shipped before; their bundles decode
_HEAD = struct.Struct("<bHB")
_SIDE = struct.Struct("<I")
LEARNED, ADAPTIVE, ADAPTIVE_ONE_STAGE, HYPER, HYPER_ADAPTIVE = 0, 2, 1, 3, 4
# 1: the adaptive coder's tokens in one stage (older files); 3: the hyperprior's fixed tables
# (development models only); 4: the hyperprior's tables adapted to the image (what is written)
CODERS = (LEARNED, ADAPTIVE_ONE_STAGE, ADAPTIVE, HYPER, HYPER_ADAPTIVE)
TOKEN_SPLIT = coefcode.SPLIT  # what this version writes
STEP_INDEX_RANGE = (-64, 64)
RESIDUAL = 0x80  # coder-byte flag: a residual layer follows the latents
BF16 = 0x40  # coder-byte flag: the encoder's synthesis ran its GDN path in bfloat16 (conv_model.bf16_fast)
INT_TOKENS = 0x20  # coder-byte flag: an adaptive coder's tokens went through ans.py (else constriction's)
# Below this step the latents stop getting finer and the residual layer takes over. On the
# four held-out photographs (astronaut, coffee, chelsea, rocket) with the second shipped
# model, the latents alone cost more than a DCT-coded residual above about 36 dB. Mean
# BD-rate vs JPEG (with the latent deadzone below) for knees of 8, 11, 16, 22 and 32:
# -22.2, -23.1, -23.4, -22.9, -21.2 %; the best knee differs per image (chelsea 11 or
# less, rocket 22).
RESIDUAL_KNEE = 11.0
# The residual's step grows from the step asked for (far below the knee) to infinity at the
# knee, ``b = s / (1 - (s / K)**2)``, so rate and PSNR are continuous across it: with the
# residual at the step itself, the step 10.9 gave 1.77 bpp and 37.4 dB against 1.04 bpp and
# 34.0 dB at 11.0 (a 1 MP photograph mosaic), a gap no target could land in. Mean BD-rate
# vs JPEG on the four held-out photographs: -23.2 % with the gap, -23.1 % with powers 2
# and 8, -22.8 % with 4 (and knees of 16 or 22 at power 2: -22.9, -23.0 %).
RESIDUAL_POWER = 2


def residual_step(step: float) -> float:
    """The residual layer's quantiser step for a requested ``step`` below the knee."""
    return step / (1.0 - (step / RESIDUAL_KNEE) ** RESIDUAL_POWER)


def step_from_residual(b: float) -> float:
    """Inverse of :func:`residual_step` (bisection on a monotone function)."""
    lo, hi = 0.0, RESIDUAL_KNEE
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if residual_step(mid) < b else (lo, mid)
    return 0.5 * (lo + hi)


@lru_cache(maxsize=1)
def _residual_settings():
    from ..settings import Settings

    return Settings(method="klt", block=8, chroma="444")


class Model:
    """A loaded model: torch modules in eval mode plus its entropy tables."""

    def __init__(self, data: ModelData, coder: str | None = None):
        import torch

        from .conv_model import Arch, Autoencoder

        self.data = data
        self.sha256 = data.sha256
        self.arch = Arch(**data.arch)
        net = Autoencoder(self.arch)
        state = {k: torch.from_numpy(v.copy()) for k, v in data.weights.items()}
        try:
            net.load_state_dict(state, strict=True)
        except RuntimeError as exc:
            raise BundleError(f"model weights do not fit the architecture ({str(exc).splitlines()[0]})") from None
        from .conv_model import for_inference

        self.net = for_inference(net)
        self.hyper = bool(self.arch.side)
        # Whether the encoder tries the hyperprior's stream: a trained model records which
        # latent coder paid on its validation crops (training.latent_coder); "both" for
        # models without that record, and for the measurement itself.
        self.uses_hyper = self.hyper and (coder or data.info.get("latent_coder", "both")) != "context"
        if self.hyper:
            # Exact: a float32 times 8 and rounding are the same everywhere.
            zl = np.asarray(data.weights["hyper.z_log_scale"], np.float64)
            self.side_tables = np.clip(np.round(8 * zl).astype(np.int64), TABLE_MIN, TABLE_MAX) - TABLE_MIN

    @property
    def channels(self) -> int:
        return self.arch.latent

    def prior(self, z: np.ndarray, shape) -> tuple[np.ndarray, np.ndarray]:
        """Integer (mean16, log8) of every latent element from side latents ``z``, cropped to
        the latent grid ``shape``."""
        m16, l8 = hyperprior.int_synthesis(self.data.weights, "hyper.", z, self.channels)
        return m16[:, :shape[0], :shape[1]], l8[:, :shape[0], :shape[1]]


@lru_cache(maxsize=4)
def _load_default() -> Model:
    if not DEFAULT_MODEL.exists():
        raise InputError("the shipped conv model is missing; train one with `workbench train` and pass --model")
    return Model(read_model(DEFAULT_MODEL))


@lru_cache(maxsize=4)
def _load_earlier(path: Path) -> Model:
    return Model(read_model(path))


@dataclass
class Analysis:
    latents: np.ndarray
    shape: tuple[int, int]
    grey: bool
    model: Model
    settings: object
    side: np.ndarray | None = None  # integer side latents (hyperprior models)
    prior: tuple | None = None  # their integer (mean16, log8), the same at every step
    source: list | None = None  # the planes coded (for a residual layer)
    _tables: tuple | None = None  # (step index, the prior's table, offset) of the last step asked for
    _residual: tuple | None = None  # ((step index, kept), base planes, residual's klt analysis, latent streams)
    bf16: bool = False  # GDN paths in bfloat16; the payload says so for decoders that can follow

    def tables_at(self, j: int, kept: int):
        """The hyperprior's (table, whole-step offset) of the first ``kept`` channels at step
        index ``j``, computed once per step (quantise and serialise both need them)."""
        t = self._tables  # read once: the coder thread asks too
        if t is None or t[0] != j:
            t = self._tables = (j,) + hyperprior.table_and_offset(self.prior[0], self.prior[1], j, TABLE_MIN, TABLE_MAX)
        return t[1][:kept], t[2][:kept]


@dataclass
class Coded:
    step: float
    step_index: int
    q: np.ndarray
    kept: int
    analysis: Analysis
    _planes: list | None = None
    residual: object | None = None  # the residual layer's klt.Coded, below RESIDUAL_KNEE

    @property
    def planes(self):
        if self._planes is None:
            a = self.analysis
            self._planes = _synthesise(a.model, self.q, 2.0 ** (self.step_index / 8), a.shape, a.grey, a.bf16)
        return self._planes


def _synthesise(model: Model, q: np.ndarray, step: float, shape, grey: bool, bf16: bool):
    from .conv_model import decode_array

    y = np.zeros((model.channels,) + q.shape[1:], np.float32)
    y[: q.shape[0]] = q.astype(np.float32) * np.float32(step)
    x = decode_array(model.net, y, shape, bf16) * np.float32(255.0)
    if grey:
        return [x[0].astype(np.float64)]
    return [x[0].astype(np.float64), x[1].astype(np.float64), x[2].astype(np.float64)]


# Rounding offset of the latents' quantiser, about the hyperprior's whole-step mean: values
# within 0.6 of a step above a level go to it. On the four held-out photographs with the
# second shipped model, mean BD-rate vs JPEG: 0.5 (plain rounding) -20.2 %, 0.45 -22.5 %,
# 0.42 -23.0 %, 0.40 -23.1 %, 0.35 -22.7 %; a zone widening as the predicted scale
# shrinks (0.5 - k / scale, k = 0.1 to 0.35) did worse (-21.9 to -21.0 %).
LATENT_DEADZONE = 0.40


def _levels(a: Analysis, kept: int, j: int, s: float) -> np.ndarray:
    """Latent levels at latent step ``s`` (index ``j``): deadzone rounding about the mean
    the decoder predicts (zero for a model without a hyperprior)."""
    x = a.latents[:kept] * np.float32(1.0 / s)
    if a.prior is None:
        off = None
    else:
        off = a.tables_at(j, kept)[1]
        x -= off.astype(np.float32)  # |offset| < 2**24: exact in float32
    x += np.copysign(np.float32(LATENT_DEADZONE), x)
    q = np.trunc(x, out=x).astype(np.int64)
    if off is not None:
        q += off
    return q


@lru_cache(maxsize=1)
def _coder_thread():
    """The module's one latent-coder thread, made on first use."""
    from concurrent.futures import ThreadPoolExecutor

    return ThreadPoolExecutor(1, thread_name_prefix="latent-coder")


def _step_index(step: float) -> int:
    return int(np.clip(np.round(8 * np.log2(max(step, 1e-9))), *STEP_INDEX_RANGE))


class ConvCodec(CodecBase):
    name = "conv"

    def load_shared(self, path):
        return self.load_model(path)

    def count_range(self, analysis) -> int:
        return analysis.model.channels

    # ------------------------------------------------------------- models
    def default_model(self):
        m = _load_default()
        return m, m.sha256

    def load_model(self, path=None):
        """``(model, sha256)`` of a model file, or of the shipped one when ``path`` is None."""
        if path is None:
            return self.default_model()
        m = Model(read_model(path))
        return m, m.sha256

    def builtin(self, ref: str):
        """The shipped model if ``ref`` names it (bundles made with it need no --model)."""
        try:
            m = _load_default()
        except InputError:
            m = None
        if m is not None and m.sha256 == ref:
            return m
        for path in EARLIER_MODELS:
            if path.exists():
                e = _load_earlier(path)
                if e.sha256 == ref:
                    return e
        return None

    def prepare_shared(self, plane_sets, settings):
        m, ref = self.default_model()
        return m, None, ref

    def shared_to_bytes(self, model: Model) -> bytes:
        return model.data.raw

    def shared_from_bytes(self, data: bytes) -> Model:
        return Model(parse_model(data))

    # ------------------------------------------------------------- coding
    def analyse(self, planes, settings, shared=None) -> Analysis:
        from .conv_model import bf16_fast, encode_array

        model = shared if shared is not None else _load_default()
        if not isinstance(model, Model):
            raise InputError("the conv method needs a conv model (.wmodel), not a KLT basis")
        shape = planes[0].shape
        grey = len(planes) == 1
        stack = [planes[0]] + ([np.full(shape, 128.0)] * 2 if grey else list(planes[1:]))
        x = (np.stack(stack) / 255.0).astype(np.float32)
        bf16 = bf16_fast()
        y = encode_array(model.net, x, bf16)
        if not model.uses_hyper:
            return Analysis(y, shape, grey, model, settings, source=list(planes), bf16=bf16)
        from .conv_model import side_latents

        z = side_latents(model.net, y, bf16)
        return Analysis(y, shape, grey, model, settings, z, model.prior(z, y.shape[1:]), list(planes), bf16=bf16)

    def quantise(self, a: Analysis, *, step: float, count: int | None) -> Coded:
        kept = min(count or a.model.channels, a.model.channels)
        # With fewer latents than the model has, the latents alone are coded, so that the
        # latent-size slider shows what they carry.
        residual = step < RESIDUAL_KNEE and a.source is not None and kept == a.model.channels
        j = _step_index((RESIDUAL_KNEE if residual else step) / 8.0)
        s = float(2.0 ** (j / 8))
        c = Coded(8.0 * s, j, _levels(a, kept, j, s), kept, a)
        if residual:
            # Every step below the knee shares the latents at the knee: their decoding and the
            # residual's analysis are done once.
            if a._residual is None or a._residual[0] != (j, kept):
                base = c.planes
                # The model's own latent stream at the knee is coded on a second thread while
                # the residual is worked out (the coders and most of the residual's numpy
                # work run on one core each); the context coder's follows on the calling
                # thread in serialise. Started before the synthesis, whose convolutions use both
                # cores, it gained a third as much.
                latents = _coder_thread().submit(_model_streams, Coded(8.0 * s, j, c.q, kept, a))
                rest = [src.astype(np.float64) - b for src, b in zip(a.source, base)]
                a._residual = ((j, kept), base, klt.CODEC.analyse(rest, _residual_settings(), klt_basis.dct_basis(8)),
                               latents)
            _, base, ra, _ = a._residual
            r = klt.CODEC.quantise(ra, step=residual_step(step), count=None, deblock=False)
            c.residual, c.step = r, float(step)
            c._planes = [b + p for b, p in zip(base, r.planes)]
        return c

    def serialise(self, c: Coded) -> bytes:
        if c.residual is None:
            return self._serialise_latents(c)
        residual = klt.CODEC.serialise(c.residual)  # while the coder thread codes the latents
        knee = c.analysis._residual
        if knee is not None and knee[0] == (c.step_index, c.kept):
            # every step below the knee shares its latents
            if not isinstance(knee[3], bytes):
                context = _context_stream(c)
                c.analysis._residual = knee = knee[:3] + (self._serialise_latents(c, {**context, **knee[3].result()}),)
            latents = knee[3]
        else:
            latents = self._serialise_latents(c)
        head = bytearray(latents[:_HEAD.size])
        head[-1] |= RESIDUAL
        return bytes(head) + _SIDE.pack(len(latents) - _HEAD.size) + latents[_HEAD.size:] + residual

    def _serialise_latents(self, c: Coded, streams: dict | None = None) -> bytes:
        # The model's own entropy model, or the adaptive context coder where it does better
        # (a model early in its training, or images unlike its training set).
        coder, body = min((streams or _latent_streams(c)).values(), key=lambda cb: len(cb[1]))
        if coefcode.INT_CODER and coder in (ADAPTIVE, ADAPTIVE_ONE_STAGE, HYPER_ADAPTIVE):
            coder |= INT_TOKENS
        return _HEAD.pack(c.step_index, c.kept, coder | (BF16 if c.analysis.bf16 else 0)) + body

    def payload_header(self, payload: bytes) -> tuple[float, int]:
        if len(payload) < _HEAD.size:
            raise BundleError("image payload is truncated")
        j, kept, coder = _HEAD.unpack_from(payload, 0)
        if coder & RESIDUAL:
            _, rest = _split_residual(payload)
            return step_from_residual(klt.CODEC.payload_header(rest)[0]), int(kept)
        return 8.0 * float(2.0 ** (j / 8)), int(kept)

    def decode(self, payload: bytes, shapes, settings, shared=None):
        if not isinstance(shared, Model):
            raise BundleError("this bundle needs the conv model it was made with; pass it with --model")
        if len(payload) < _HEAD.size:
            raise BundleError("image payload is truncated")
        j, kept, coder = _HEAD.unpack_from(payload, 0)
        # A CPU without bfloat16 hardware emulates it some 40x slower than float32 (oneDNN
        # limited to AVX2: 1 MP 8.1 s against 0.2 s): there the float32 synthesis stands in.
        # On the 4-MP mosaic with the shipped model, steps 4/8/24: 3.5-3.8 % of the decoded
        # samples one grey level off the encoder's, none more; PSNR within 0.003 dB.
        from .conv_model import bf16_fast

        residual, bf16 = None, bool(coder & BF16) and bf16_fast()
        if coder & RESIDUAL:
            body, residual = _split_residual(payload)
        else:
            body = payload[_HEAD.size:]
        int_coder = bool(coder & INT_TOKENS)
        coder &= ~(RESIDUAL | BF16 | INT_TOKENS)
        if not (STEP_INDEX_RANGE[0] <= j <= STEP_INDEX_RANGE[1]) or not (1 <= kept <= shared.channels) \
                or coder not in CODERS or (coder in (HYPER, HYPER_ADAPTIVE) and not shared.hyper) \
                or (int_coder and coder in (LEARNED, HYPER)):
            raise BundleError(f"image payload has invalid step index {j}, channel count {kept} or coder {coder}")
        from .conv_model import STRIDE

        h, w = shapes[0]
        lh, lw = -(-h // STRIDE), -(-w // STRIDE)
        if coder in (HYPER, HYPER_ADAPTIVE):
            q = self._decode_hyper(body, shared, j, kept, (lh, lw), coder == HYPER_ADAPTIVE, int_coder)
        elif coder != LEARNED:
            split = coefcode.SPLIT if coder == ADAPTIVE else None
            q = coefcode.decode_grids(body, [(lh, lw, kept)], [3], split, int_coder)[0].transpose(2, 0, 1)
        else:
            counts = [shared.data.counts(ch, j) for ch in range(kept)]
            q = np.stack(symbols.decode_fixed(body, [lh * lw] * kept, counts)).reshape(kept, lh, lw)
        planes = _synthesise(shared, q, float(2.0 ** (j / 8)), (h, w), len(shapes) == 1, bf16)
        if residual is None:
            return planes
        rest = klt.CODEC.decode(residual, [(h, w)] * len(planes), _residual_settings(), klt_basis.dct_basis(8))
        return [b + p for b, p in zip(planes, rest)]

    @staticmethod
    def _decode_hyper(body: bytes, model: Model, j: int, kept: int, grid, adapted: bool, int_coder: bool) -> np.ndarray:
        if len(body) < _SIDE.size or _SIDE.unpack_from(body)[0] > len(body) - _SIDE.size:
            raise BundleError("image payload's side stream is truncated")
        n = _SIDE.unpack_from(body)[0]
        side_shape = (-(-grid[0] // hyperprior.DOWN), -(-grid[1] // hyperprior.DOWN))
        tabs = model.data.tables
        z = symbols.decode_fixed(body[_SIDE.size:_SIDE.size + n], [side_shape[0] * side_shape[1]] * model.arch.side,
                                 [tabs[t] for t in model.side_tables])
        z = np.stack(z).reshape((model.arch.side,) + side_shape)
        if np.abs(z).max(initial=0) > 1 << 16:
            raise BundleError("image payload's side latents are out of range")
        m16, l8 = model.prior(z, grid)
        table, offset = hyperprior.table_and_offset(m16[:kept], l8[:kept], j, TABLE_MIN, TABLE_MAX)
        rest = body[_SIDE.size + n:]
        if adapted:
            return hyperprior.decode_latents(rest, table - TABLE_MIN, tabs, int_coder) + offset
        return symbols.decode_grouped(rest, table - TABLE_MIN, tabs) + offset


def _latent_streams(c: Coded) -> dict:
    """``{kind: (coder byte, stream)}`` of the latent coders this model tries: ``context``
    (the adaptive context coder), and ``hyperprior`` or ``tables`` (the model's own)."""
    return {**_context_stream(c), **_model_streams(c)}  # in this order: the context coder wins a tie


def _context_stream(c: Coded) -> dict:
    # The context coder holds grids component-major: the (h, w, C) view it is handed is
    # turned back into c.q's own layout without a copy (a transposing copy cost 0.2 s at 4 MP).
    return {"context": (ADAPTIVE if TOKEN_SPLIT is not None else ADAPTIVE_ONE_STAGE,
                        coefcode.encode_grids([c.q.transpose(1, 2, 0)], [3], TOKEN_SPLIT))}


def _model_streams(c: Coded) -> dict:
    a = c.analysis
    out = {}
    if a.model.uses_hyper:
        tabs = a.model.data.tables
        side = symbols.encode_fixed(list(a.side), [tabs[t] for t in a.model.side_tables])
        table, offset = a.tables_at(c.step_index, c.kept)
        out["hyperprior"] = (HYPER_ADAPTIVE, _SIDE.pack(len(side)) + side
                             + hyperprior.encode_latents(c.q, table, tabs, offset=offset, table_min=TABLE_MIN))
    elif not a.model.hyper:
        counts = [a.model.data.counts(ch, c.step_index) for ch in range(c.kept)]
        out["tables"] = (LEARNED, symbols.encode_fixed(list(c.q), counts))
    return out


def stream_sizes(c: Coded) -> dict:
    """Bytes of each latent coder's stream for ``c`` (see :func:`_latent_streams`)."""
    return {k: len(body) for k, (_, body) in _latent_streams(c).items()}


def _split_residual(payload: bytes) -> tuple[bytes, bytes]:
    """``(latent stream, residual payload)`` of a payload whose coder byte has RESIDUAL."""
    end = _HEAD.size + _SIDE.size
    if len(payload) < end or _SIDE.unpack_from(payload, _HEAD.size)[0] > len(payload) - end:
        raise BundleError("image payload's latent stream is truncated")
    n = _SIDE.unpack_from(payload, _HEAD.size)[0]
    return payload[end:end + n], payload[end + n:]


CODEC = ConvCodec()
