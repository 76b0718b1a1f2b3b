"""A third codec, for the tests only: each plane's samples uniformly quantised and deflated.

It lives outside the package and is registered with one line (``codecs.register("plain",
TRAITS)``); nothing else in the program is edited for it. ``count`` keeps the first planes
(luma alone when 1); the others decode to mid-grey chroma.
"""

import struct
import zlib
from dataclasses import dataclass

import numpy as np

from workbench.codecs import Traits
from workbench.codecs.base import CodecBase
from workbench.errors import BundleError

TRAITS = Traits("plaincodec", "Plain samples", "planes", rd_steps=(1.0, 2.0, 4.0, 8.0, 16.0, 32.0))
HEAD = struct.Struct("<fB")


@dataclass
class Coded:
    step: float
    q: list
    kept: int
    planes: list


def _planes(q, step, shapes, kept):
    return [q[i] * step if i < kept else np.full(shapes[i], 128.0) for i in range(len(shapes))]


class PlainCodec(CodecBase):
    def prepare_shared(self, plane_sets, settings):
        return None, None, None

    def shared_to_bytes(self, shared):
        raise BundleError("the plain codec has no shared side")

    def shared_from_bytes(self, data):
        raise BundleError("the plain codec has no shared side")

    def analyse(self, planes, settings, shared=None):
        return [np.asarray(p, np.float64) for p in planes]

    def quantise(self, analysis, *, step, count):
        step = float(np.float32(step))
        kept = len(analysis) if count is None else min(count, len(analysis))
        q = [np.round(p / step).astype(np.int32) for p in analysis[:kept]]
        return Coded(step, q, kept, _planes(q, step, [p.shape for p in analysis], kept))

    def serialise(self, c):
        return HEAD.pack(c.step, c.kept) + zlib.compress(b"".join(q.astype("<i4").tobytes() for q in c.q), 9)

    def decode(self, payload, shapes, settings, shared=None):
        if len(payload) < HEAD.size:
            raise BundleError("plain payload is truncated")
        step, kept = HEAD.unpack_from(payload)
        if not (np.isfinite(step) and step > 0 and 1 <= kept <= len(shapes)):
            raise BundleError("plain payload header is invalid")
        try:
            raw = zlib.decompress(payload[HEAD.size:])
        except zlib.error as exc:
            raise BundleError(f"plain payload is corrupt ({exc})") from None
        sizes = [h * w for h, w in shapes[:kept]]
        if len(raw) != 4 * sum(sizes):
            raise BundleError("plain payload has the wrong length")
        flat = np.frombuffer(raw, "<i4")
        q, at = [], 0
        for (h, w), n in zip(shapes, sizes):
            q.append(flat[at:at + n].reshape(h, w))
            at += n
        return _planes(q, step, shapes, kept)


CODEC = PlainCodec()
