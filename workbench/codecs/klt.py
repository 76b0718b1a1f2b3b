"""Block KLT codec: patches -> KLT coefficients -> deadzone quantiser -> adaptive range coder.

Per image payload (little-endian)::

    step f32 | kept u16 | flags u8 | plane means i16 x planes
    [inline basis: precision u8 x kept | u32 length | vector stream]
    coefficient stream (see :mod:`workbench.codecs.coefcode`)

``flags``: bit 0 an inline basis follows, bit 1 tokens are coded in two stages (always set
by this version; files without it decode as before), bit 2 the decoder smooths the block
edges of plane 0 (:func:`deblock`), bits 3 and 4 those of planes 1 and 2: the encoder sets
a plane's bit where the filter brings that plane closer to the source (never for the conv
codec's residual layer); files without them decode as before; bit 5 the tokens went
through :mod:`workbench.codecs.ans` (always set by this version; without it,
through constriction's range coder).

``kept`` is the number of leading components that carry any non-zero coefficient in this
image (at most the requested count): trailing all-zero components cost neither basis
vectors nor symbols. With an inline basis the vectors are quantised to a precision that
follows each component's spread relative to the step (:func:`workbench.codecs.klt_basis.quantise_vectors`).
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

import cv2
import numpy as np

from . import coefcode, klt_basis, tiling
from ..formats.basisfile import basis_from_bytes, basis_to_bytes
from ..errors import BundleError
from .base import CodecBase

_HEAD = struct.Struct("<fHB")
TWO_STAGE = 2  # payload flag: tokens in two stages
DEBLOCKED = 4  # payload flag: plane 0's block edges smoothed after synthesis (plane i: 4 << i)
INT_TOKENS = 32  # payload flag: tokens through workbench's own coder over integer counts (ans.py)
TOKEN_SPLIT = coefcode.SPLIT  # what this version writes (None: one stage, as format 4 and before)
MAX_STEP = 1e5


@dataclass
class Analysis:
    """An image prepared for quantisation at any step (the expensive part done once)."""

    patches: list[np.ndarray]
    means: list[int]
    shapes: list[tuple[int, int]]
    basis: klt_basis.Basis
    inline: bool
    settings: object
    _sketch_step: tuple | None = None  # ((step, count), synthesis, dequantised coefficients)
    sources: list[np.ndarray] | None = None  # the planes analysed, for the edge filter's choice

    @property
    def directions(self) -> int:
        """How many components a basis fitted on these patches can carry: one per patch,
        less each plane's mean. Beyond that the eigenvalues are rounding noise, and the
        quantised vectors of an inline basis would make the analysis ill-conditioned
        (large, cancelling coefficients in every component)."""
        return max(1, sum(p.shape[0] * p.shape[1] - 1 for p in self.patches))


@dataclass
class Coded:
    """One image quantised at one step; ``planes`` is the decoder's exact reconstruction,
    computed on first use (compressing alone does not need it)."""

    step: float
    q: list[np.ndarray]
    kept: int
    ints: np.ndarray | None
    bits: np.ndarray | None
    synthesis: np.ndarray
    analysis: Analysis
    deblock: bool = True  # may the edge filter be chosen (per plane, where it lowers the error)
    _planes: list[np.ndarray] | None = None
    _filtered: tuple[bool, ...] | None = None

    @property
    def planes(self) -> list[np.ndarray]:
        if self._planes is None:
            a = self.analysis
            block = a.settings.block
            wholes = [_whole_blocks(qp, self.synthesis, self.step, m, block) for qp, m in zip(self.q, a.means)]
            if self._filtered is None:  # decided on these planes rather than on a fresh sample
                self._filtered = self._choose(lambda i, rows: wholes[i][rows])
            self._planes = [(deblock(w, block, self.step) if f else w)[: shape[0], : shape[1]]
                            for w, f, shape in zip(wholes, self.filtered, a.shapes)]
        return self._planes

    @property
    def filtered(self) -> tuple[bool, ...]:
        """Per plane, whether the decoder smooths its block edges (the payload's flags)."""
        if self._filtered is None:
            a = self.analysis
            block = a.settings.block
            # only the sampled patch rows are synthesised (compressing alone needs no planes)
            self._filtered = self._choose(lambda i, rows: _whole_blocks(
                self.q[i][rows[::block] // block], self.synthesis, self.step, a.means[i], block))
        return self._filtered

    def _choose(self, sampled_rows) -> tuple[bool, ...]:
        """Per plane, :func:`_filter_pays` on the pixel rows :func:`_edge_rows` picks;
        ``sampled_rows(i, rows)`` gives plane i's plain reconstruction at those rows."""
        a = self.analysis
        if not self.deblock or a.sources is None:
            return (False,) * len(self.q)
        block = a.settings.block
        out = []
        for i, src in enumerate(a.sources):
            rows, bands = _edge_rows(self.q[i].shape[0], src.shape[0], block)
            out.append(_filter_pays(sampled_rows(i, rows), src, rows, bands, block, self.step))
        return tuple(out)


# Edge filter thresholds, in steps: an edge is smoothed where the jump across it is below
# EDGE_JUMP steps and each side is flat within EDGE_FLAT steps (a real edge in the image
# jumps further, or is not flat beside the block edge), by at most EDGE_CHANGE steps. Chosen
# from 27 combinations (jump 1/2/4, change 0.25/0.5/1, flat 0.25/0.5/1) on scikit-image's
# camera and immunohistochemistry and scikit-learn's china at steps 8, 16, 32 and 48: mean
# +0.12 dB, +0.0 to +0.42 dB; none of those images is a benchmark image. It can also cost
# (scikit-image's moon at step 8: -0.42 dB), so the encoder decides per plane (_filter_pays).
EDGE_JUMP, EDGE_CHANGE, EDGE_FLAT = 1.0, 0.25, 0.5


def deblock(plane: np.ndarray, block: int, step: float) -> np.ndarray:
    """Smooth the block edges of a decoded float ``plane`` (H, W), both multiples of
    ``block``, in place and return it (a stack (N, H, W) is filtered as N planes).

    Across each edge between pixels p1 p0 | q0 q1 (vertical edges first, then horizontal),
    ``d = (4 (q0 - p0) + (p1 - q1)) / 8`` clipped to ``EDGE_CHANGE * step`` moves p0 and q0
    towards each other where the edge is a quantiser's step and not the image's: the low-pass
    edge filter of H.264's deblocking, from memory, with thresholds in units of the step
    instead of its tables.
    """
    if plane.ndim not in (2, 3) or plane.shape[-1] % block or plane.shape[-2] % block:
        raise ValueError(f"deblock needs an (H, W) plane or (N, H, W) stack of whole {block}-pixel blocks, "
                         f"got shape {plane.shape}")
    limit, jump, flat = (np.float32(c * step) for c in (EDGE_CHANGE, EDGE_JUMP, EDGE_FLAT))
    from . import compiled

    compiled.deblock(plane if plane.ndim == 3 else plane[None], block, limit, jump, flat)
    return plane


EDGE_SAMPLE = 16  # the encoder judges the filter on two adjacent patch rows in this many


def _edge_rows(grid_rows: int, h: int, block: int) -> tuple[np.ndarray, int]:
    """``(pixel rows, bands)`` on which the encoder judges the edge filter: two adjacent
    patch rows in every EDGE_SAMPLE, inside the source's ``h`` rows (their vertical edges and
    the edge between them: an eighth of the plane), or the whole grid as one band for a
    plane too small for 4 pairs."""
    starts = np.arange(0, h // block - 1, EDGE_SAMPLE)
    if starts.size < 4:
        return np.arange(grid_rows * block), 1
    return (block * starts[:, None] + np.arange(2 * block)).reshape(-1), starts.size


def _filter_pays(plain: np.ndarray, src: np.ndarray, rows: np.ndarray, bands: int, block: int,
                 step: float) -> bool:
    """Whether :func:`deblock` brings the plain reconstruction's pixel ``rows`` (whole
    blocks wide; ``bands`` bands of whole blocks, from :func:`_edge_rows`) closer to the
    source ``src``. The decoder only follows the resulting flag, so the sampling never
    affects what it reproduces."""
    h, w = src.shape
    ref = src[rows[rows < h]].reshape(bands, -1, w)
    plain = plain.reshape(bands, -1, plain.shape[-1])
    smooth = deblock(plain.copy(), block, step)[..., :ref.shape[1], :w]
    plain = plain[..., :ref.shape[1], :w]
    at = np.flatnonzero(smooth != plain)  # the filter moves few pixels: compare those
    a, b, o = (v.reshape(-1).take(at).astype(np.float64) for v in (smooth, plain, ref))
    return bool(np.square(a - o).sum() < np.square(b - o).sum())


def _whole_blocks(qp, synthesis, step, mean, block) -> np.ndarray:
    """The plain reconstruction ``mean + (q * step) @ S`` of grid ``qp`` (rows, cols, K) as
    whole blocks (rows * block, cols * block), float32."""
    rows, cols, kept = qp.shape
    # float32 throughout: the decoder's cost is dominated by this product. Grids are
    # stored component-major, so (K, patches) is a view and BLAS takes it transposed.
    s = (synthesis[:kept] * step).astype(np.float32)
    qk = np.moveaxis(qp, -1, 0).reshape(kept, -1).astype(np.float32)
    patches = (qk.T @ s).reshape(rows, cols, -1)
    patches += np.float32(mean)
    return tiling.from_patches(patches, (rows * block, cols * block), block)


def synthesise(q, synthesis, step, means, shapes, block, filtered=()):
    """Planes from quantised coefficients: ``mean + (q * step) @ S`` per patch, untiled;
    plane i's block edges smoothed (:func:`deblock`, on whole blocks, the padding beyond the
    image cropped after) where ``filtered[i]`` is true."""
    out = []
    for i, (qp, m, shape) in enumerate(zip(q, means, shapes)):
        whole = _whole_blocks(qp, synthesis, step, m, block)
        if i < len(filtered) and filtered[i]:
            deblock(whole, block, step)
        out.append(whole[: shape[0], : shape[1]])
    return out


def _matrices(a: Analysis, kept: int, step: float):
    """``(ints, bits, synthesis, analysis)`` for ``kept`` components at ``step``: the stored
    basis integers and precisions (inline basis only, else None), the decoder's synthesis
    vectors (kept x n) and the float32 analysis matrix already divided by the step (n x kept).
    With an inline basis ``kept`` is capped at :attr:`Analysis.directions`."""
    if a.inline:
        kept = min(kept, a.directions)
        ints, bits = klt_basis.quantise_vectors(a.basis, kept, step)
        synthesis = klt_basis.dequantise_vectors(ints, bits)
        # A small matrix: threaded LAPACK gains nothing and, with the other core busy, took
        # 92 ms instead of 1 ms (64 x 64); serial, it is also the same in every process.
        with klt_basis.serial_blas():
            analysis_m = np.linalg.pinv(synthesis)
    else:
        ints = bits = None
        synthesis = a.basis.vectors[:, :kept].T
        analysis_m = synthesis.T
    return ints, bits, synthesis, (analysis_m / step).astype(np.float32)


# Lagrange multiplier of rate against squared error, per bit and per squared step: the
# slope of a uniform quantiser at high rate (2 ln 2 / 12 = 0.116) and, from memory, what
# H.264's reference encoder uses (0.85 * 2**((QP - 12) / 3) = 0.13 * Qstep**2).
RD_LAMBDA = 0.13
SPARSE = 0.02  # shared basis: trailing components with non-zeros in fewer patches are candidates
COEF_BITS = 6.0  # rough cost of a lone non-zero coefficient far down a patch (token, sign, extent)


def rd_kept(q: list[np.ndarray], bits: np.ndarray | None, n: int) -> int:
    """How many leading components to keep: the count that minimises distortion + lambda x
    rate (over every component with an inline basis, over the sparse trailing ones with a
    shared basis).

    A component costs its stored basis vector (``n`` values of ``bits[k]`` bits each, inline
    bases only) and its few non-zero coefficients; dropping it adds about ``q**2`` squared
    steps of error per coefficient. Without this, one stray coefficient in component 40
    would cost 40 stored vectors and make the rate grow as the step grows.
    """
    K = q[0].shape[2]
    flats = [np.moveaxis(qp, -1, 0).reshape(K, -1) for qp in q]  # component-major underneath: views
    counts = np.zeros(K)
    for flat in flats:
        counts += np.count_nonzero(flat, axis=1)
    used = np.flatnonzero(counts)
    last = int(used[-1]) + 1 if used.size else 1
    patches = sum(qp.shape[0] * qp.shape[1] for qp in q)
    if bits is not None:  # every stored vector is at stake
        first = 1
    else:  # only coefficient bits are: dense components always pay for themselves
        dense = np.flatnonzero(counts[:last] >= SPARSE * patches)
        first = max(1, int(dense[-1]) + 1 if dense.size else 1)  # components below this stay
    if first >= last:
        return last
    value = np.zeros(last)  # error avoided by coding component k, in squared steps
    for flat in flats:
        value[first:] += np.einsum("kn,kn->k", flat[first:last], flat[first:last], dtype=np.float64, casting="unsafe")
    cost = COEF_BITS * counts[:last]
    if bits is not None:
        cost = cost + n * bits[:last].astype(np.float64)
    gain = np.cumsum((value - RD_LAMBDA * cost)[first:])  # of keeping first..first+i
    best = int(np.argmax(gain))
    return first + best + 1 if gain[best] > 0 else first


def payload(step, kept, inline, means, ints, bits, q, filtered=()) -> bytes:
    """The image payload (layout in the module docstring) of grids ``q`` (rows, cols, K);
    ``filtered``: per plane, whether the decoder smooths its block edges."""
    flags = int(inline) | (TWO_STAGE if TOKEN_SPLIT is not None else 0) | (INT_TOKENS if coefcode.INT_CODER else 0)
    flags |= sum(DEBLOCKED << i for i, f in enumerate(filtered) if f)
    parts = [_HEAD.pack(step, kept, flags), struct.pack(f"<{len(means)}h", *means)]
    if inline:
        vec = coefcode.encode_grids([ints.reshape(1, kept, -1)], [2], TOKEN_SPLIT)
        parts += [bits.astype(np.uint8).tobytes(), struct.pack("<I", len(vec)), vec]
    parts.append(coefcode.encode_grids(q, [0] + [1] * (len(q) - 1), TOKEN_SPLIT))
    return b"".join(parts)


def payload_size(step, kept, inline, means, arrays) -> int:
    """``len(payload(...))`` from :meth:`KLTCodec.size_task`'s arrays: the basis integers
    and precisions (inline only), then the grids component-major, (K, rows, cols)."""
    ints, bits, grids = (arrays[0], arrays[1], arrays[2:]) if inline else (None, None, arrays)
    return len(payload(step, kept, inline, means, ints, bits, [np.moveaxis(g, 0, -1) for g in grids]))


# Rate–distortion optimised quantisation (RDOQ). The rate of a level is estimated from the
# image's own first-pass levels: per component, a zeroth-order code of the magnitude plus a
# sign bit. The coder's contexts make real rates lower than that estimate, hence a smaller
# multiplier than RD_LAMBDA's; 0.09 measured best (from 0.08-0.2 with the offset 0.38-0.5)
# on scikit-image's astronaut, coffee and chelsea.
RDOQ_LAMBDA = 0.09
_RDOQ_MAGS = 64  # magnitudes at and above this share one rate estimate


def rdo_levels(x: np.ndarray, q: np.ndarray, lam: float = RDOQ_LAMBDA) -> np.ndarray:
    """Levels chosen by distortion + ``lam`` x rate, from coefficients ``x`` already divided by
    the step and their first-pass levels ``q``, both (K, N) component-major.

    Each non-zero level may drop one towards zero, where that lowers ``(|x| - level)**2 +
    lam * bits(level)``; then, twice, a patch's last non-zero level is set to zero where the
    error that adds is worth less than its bits and those of the zeros coded before it (the
    extent shrinks to the previous non-zero). Component 0 is left alone (the planar
    predictor codes it). The rate table comes from the non-zero levels; the choices are made
    patch by patch in compiled code (:mod:`workbench.codecs.compiled`). Returns ``q`` changed in place (a
    contiguous copy of it if it was not contiguous).
    """
    k, n = q.shape
    q = np.ascontiguousarray(q)
    from . import compiled

    hist = compiled.rdo_histogram(q, _RDOQ_MAGS)  # of components 1..K-1 (component 0 is left alone)
    if not hist[:, 1:].any():
        return q
    hist[:, 0] = n - hist[:, 1:].sum(axis=1)
    hist += 0.5
    bits = -np.log2(hist / hist.sum(axis=1, keepdims=True))
    bits[:, 1:] += 1.0  # the sign
    table = (lam * bits).astype(np.float32).reshape(-1)
    zero_run = np.concatenate([[0.0], np.cumsum(bits[:, 0])])  # zero_run[j]: bits of zeros in 0..j-1
    compiled.rdo_choose(q, np.ascontiguousarray(x.reshape(k, n)), table, bits, zero_run, float(lam), _RDOQ_MAGS)
    return q


def deadzone_quantise(c: np.ndarray, step: float, offset: float) -> np.ndarray:
    """``sign(c) * floor(|c| / step + offset)``; offset 0.5 is rounding.

    Computed as ``trunc(c / step + copysign(offset, c))``, the same for offset < 1."""
    return _deadzone_in_place(np.multiply(c, np.asarray(1.0 / step, dtype=c.dtype)), offset)


def _levels(x: np.ndarray, offset: float) -> np.ndarray:
    """The encoder's levels of (K, N) coefficients ``x`` already divided by the step: the
    deadzone quantiser's, then :func:`rdo_levels`; ``x`` is not kept."""
    return rdo_levels(x, _deadzone_in_place(x.copy(), offset), RDOQ_LAMBDA)


def _deadzone_in_place(x: np.ndarray, offset: float) -> np.ndarray:
    """:func:`deadzone_quantise` of ``x`` already divided by the step; ``x`` is overwritten."""
    x += np.copysign(np.asarray(offset, dtype=x.dtype), x)
    return np.trunc(x, out=x).astype(np.int32)  # |q| < 2**31 for every allowed step


class KLTCodec(CodecBase):
    name = "klt"

    def load_shared(self, path):
        from ..formats.basisfile import load_basis

        return load_basis(path)

    def energy_kept(self, analysis):
        return analysis.basis.energy_kept()

    # ------------------------------------------------------------- shared side
    def prepare_shared(self, plane_sets, settings):
        """``(shared, bytes_to_store, reference)``. Folder scope: one basis for all images,
        stored in the bundle (rebuilt from its stored bytes so the encoder uses what the
        decoder will). Image scope (``plane_sets`` is None): nothing shared."""
        if plane_sets is None:
            return None, None, None
        patches = (tiling.to_patches(p, settings.block) for planes in plane_sets for p in planes)
        data = basis_to_bytes(klt_basis.fit_basis(patches, settings.block), settings.kept)
        return basis_from_bytes(data), data, None

    def shared_from_bytes(self, data: bytes) -> klt_basis.Basis:
        return basis_from_bytes(data)

    def shared_to_bytes(self, basis: klt_basis.Basis) -> bytes:
        return basis_to_bytes(basis)

    # ---------------------------------------------------------------- encoding
    def analyse(self, planes, settings, shared=None) -> Analysis:
        patches, means = [], []
        for p in planes:
            m = int(np.clip(np.round(p.mean(dtype=np.float64)), -32768, 32767))
            x = tiling.to_patches(p, settings.block).astype(np.float32, copy=False)
            x -= np.float32(m)
            patches.append(x)
            means.append(m)
        if shared is None:
            basis = klt_basis.fit_basis(patches, settings.block)
        else:
            if shared.block != settings.block:
                raise BundleError(f"basis is for block {shared.block}, settings ask for block {settings.block}")
            basis = shared
        return Analysis(patches, means, [p.shape for p in planes], basis, shared is None, settings,
                        sources=list(planes))

    def quantise(self, a: Analysis, *, step: float, count: int | None, deblock: bool = True) -> Coded:
        """Quantise at ``step`` keeping at most ``count`` components (None: all), and
        reconstruct exactly as the decoder will; ``deblock``: smooth each plane's block edges
        where that brings it closer to the source (False for a residual that is added to
        another reconstruction)."""
        step = float(np.float32(step))
        n = a.settings.block ** 2
        kept_max = n if count is None else min(int(count), n)
        ints, bits, synthesis, analysis_m = _matrices(a, kept_max, step)
        analysis_m = analysis_m.T
        # Component-major (K, rows, cols) underneath, viewed as (rows, cols, K): the entropy
        # coder walks one component at a time.
        q = [np.moveaxis(_levels(analysis_m @ p.reshape(-1, p.shape[2]).T, a.settings.deadzone)
                         .reshape(-1, *p.shape[:2]), 0, -1) for p in a.patches]
        kept = rd_kept(q, bits if a.inline else None, a.settings.block ** 2)
        q = [qp[:, :, :kept] for qp in q]
        if a.inline:
            ints, bits = ints[:kept], bits[:kept]
        return Coded(step, q, kept, ints, bits, synthesis, a, deblock)

    def serialise(self, c: Coded) -> bytes:
        a = c.analysis
        return payload(c.step, c.kept, a.inline, a.means, c.ints, c.bits, c.q, c.filtered)

    def size_task(self, c: Coded):
        """``(function, scalars, arrays)`` such that ``function(*scalars, arrays)`` is
        ``len(self.serialise(c))``, from plain arrays only (to run in another process)."""
        a = c.analysis
        extra = [] if c.ints is None else [c.ints, c.bits]
        return payload_size, (c.step, c.kept, a.inline, tuple(a.means)), extra + [np.moveaxis(g, -1, 0) for g in c.q]

    # ---------------------------------------------------------------- decoding
    def payload_header(self, payload: bytes) -> tuple[float, int]:
        if len(payload) < _HEAD.size:
            raise BundleError("image payload is truncated")
        step, kept, _ = _HEAD.unpack_from(payload, 0)
        return float(step), int(kept)

    def decode(self, payload: bytes, shapes, settings, shared=None) -> list[np.ndarray]:
        """Planes of one image from its payload; ``shapes`` come from the bundle metadata."""
        n_planes = len(shapes)
        block, n = settings.block, settings.block**2
        pos = _HEAD.size + 2 * n_planes
        if len(payload) < pos:
            raise BundleError("image payload is truncated")
        step, kept, flags = _HEAD.unpack_from(payload, 0)
        means = struct.unpack_from(f"<{n_planes}h", payload, _HEAD.size)
        if not (np.isfinite(step) and 0 < step <= MAX_STEP):
            raise BundleError(f"image payload has an invalid step {step!r}")
        if flags & ~(1 | TWO_STAGE | INT_TOKENS | sum(DEBLOCKED << i for i in range(n_planes))):
            raise BundleError(f"image payload has unknown flags {flags}")
        inline, split = flags & 1, (coefcode.SPLIT if flags & TWO_STAGE else None)
        int_coder = bool(flags & INT_TOKENS)
        if not 1 <= kept <= settings.kept:
            raise BundleError(f"image payload claims {kept} components (settings allow {settings.kept})")
        if inline:
            if len(payload) < pos + kept + 4:
                raise BundleError("image payload is truncated in its basis")
            bits = np.frombuffer(payload, np.uint8, kept, pos).copy()
            if bits.max() > 12:
                raise BundleError("image payload has an invalid basis precision")
            (vlen,) = struct.unpack_from("<I", payload, pos + kept)
            pos += kept + 4
            if pos + vlen > len(payload):
                raise BundleError("image payload is truncated in its basis")
            ints = coefcode.decode_grids(payload[pos : pos + vlen], [(1, kept, n)], [2], split,
                                         int_coder)[0].reshape(kept, n)
            pos += vlen
            synthesis = klt_basis.dequantise_vectors(ints, bits)
        else:
            if shared is None:
                raise BundleError("image needs a shared basis that the bundle does not provide")
            if shared.block != block:
                raise BundleError(f"basis is for block {shared.block}, bundle uses block {block}")
            synthesis = shared.vectors[:, :kept].T
        grid = [tiling.grid_shape(s, block) + (kept,) for s in shapes]
        kinds = [0] + [1] * (n_planes - 1)
        q = coefcode.decode_grids(payload[pos:], grid, kinds, split, int_coder)
        filtered = tuple(bool(flags & (DEBLOCKED << i)) for i in range(n_planes))
        return synthesise(q, synthesis, float(step), means, shapes, block, filtered)


    # ----------------------------------------------------------------- sketches
    SKETCH_FACTORS = (1, 2, 4, 8)

    @staticmethod
    def sketch_alignment(settings) -> int:
        """Region edges for :meth:`sketch` fall on multiples of this many luma pixels."""
        return settings.block * (2 if settings.chroma == "420" else 1) * 8

    def sketch(self, a: Analysis, step: float, kept: int, factor: int, region) -> list[np.ndarray]:
        """Planes of a reconstruction of ``region`` seen at 1/``factor`` scale.

        For a dragging slider: the image is quantised as :meth:`quantise` would (kept for
        the step and count), then synthesised with the basis vectors averaged over
        ``factor`` x ``factor`` pixels, a product ``factor**2`` times smaller than the full
        synthesis (averaging is linear, so this is the area-downscaled reconstruction).

        Parameters
        ----------
        region : (y0, y1, x0, x1)
            In full-resolution luma pixels, multiples of :meth:`sketch_alignment`.

        Returns
        -------
        list of ndarray
            float32 planes of the region at 1/factor of the luma size, all the same shape.
        """
        if a._sketch_step is None or a._sketch_step[0] != (step, kept):
            # The same analysis as quantise() (refitted to the count), so that the sketch
            # differs from the decoder's image only by rounding after the averaging.
            _, _, synthesis, am = _matrices(a, kept, step)
            a._sketch_step = ((step, kept), synthesis, [
                _levels(am.T @ p.reshape(-1, p.shape[2]).T, a.settings.deadzone).T.astype(np.float32)
                * np.float32(step) for p in a.patches])
        _, synthesis, coefs = a._sketch_step
        block = a.settings.block
        y0, y1, x0, x1 = region
        out_shape = ((y1 - y0) // factor, (x1 - x0) // factor)
        planes = []
        for i, (d, m, shape) in enumerate(zip(coefs, a.means, a.shapes)):
            sub = 2 if (i and a.settings.chroma == "420") else 1
            rows, cols = tiling.grid_shape(shape, block)
            cell = block * sub  # luma pixels per patch
            r0, r1 = y0 // cell, min(rows, -(-y1 // cell))
            c0, c1 = x0 // cell, min(cols, -(-x1 // cell))
            g = factor / sub  # plane pixels per sketch pixel
            gb = int(min(max(g, 1), block))
            v = synthesis[:kept].reshape(kept, block // gb, gb, block // gb, gb).mean(axis=(2, 4))
            dd = d.reshape(rows, cols, -1)[r0:r1, c0:c1]
            pix = dd @ v.reshape(kept, -1).astype(np.float32)
            pix += np.float32(m)
            plane = tiling.from_patches(pix, (pix.shape[0] * (block // gb), pix.shape[1] * (block // gb)), block // gb)
            if g != gb:  # further down (g > block) or up (4:2:0 chroma seen at full size)
                size = (max(1, round(plane.shape[1] * gb / g)), max(1, round(plane.shape[0] * gb / g)))
                plane = cv2.resize(plane, size, interpolation=cv2.INTER_AREA if g > gb else cv2.INTER_LINEAR)
            if sub == 2 and g >= 1:
                # The decoder interpolates 4:2:0 chroma (weights 3/4, 1/4); averaged over g
                # chroma samples that interpolation is this three-tap filter.
                k = np.array([1 / (8 * g), 1 - 1 / (4 * g), 1 / (8 * g)], np.float32)
                plane = cv2.sepFilter2D(plane, cv2.CV_32F, k, k, borderType=cv2.BORDER_REPLICATE)
            planes.append(_fit(plane, out_shape))
        return planes


def _fit(plane: np.ndarray, shape) -> np.ndarray:
    """Crop or edge-extend ``plane`` to ``shape`` (sketch planes can differ by a pixel)."""
    plane = plane[: shape[0], : shape[1]]
    pad = ((0, shape[0] - plane.shape[0]), (0, shape[1] - plane.shape[1]))
    return np.pad(plane, pad, mode="edge") if pad[0][1] or pad[1][1] else plane


CODEC = KLTCodec()
