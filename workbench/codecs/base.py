"""What a codec offers: the protocol every ``CODEC`` object follows, and a base class with the
optional parts' defaults.

The pipeline calls, for each image: ``analyse`` once (fit or transform, the expensive part),
then ``quantise`` at any step and count (each result's ``planes`` is the decoder's exact
reconstruction), then ``serialise`` for the payload bytes; ``decode`` inverts ``serialise``
from the payload and the bundle's metadata alone. A method with a side shared by many
images (a basis, a model) makes it in ``prepare_shared`` and turns it into and out of bytes.
Facts about a method that need no import live in its :class:`workbench.codecs.Traits`.
"""

from __future__ import annotations

from typing import Any, Protocol


class Codec(Protocol):
    def prepare_shared(self, plane_sets, settings) -> tuple[Any, bytes | None, str | None]:
        """``(shared, bytes to store in the bundle, external reference)`` for the images' planes
        (``plane_sets`` None when the settings ask for nothing shared)."""

    def shared_to_bytes(self, shared) -> bytes: ...

    def shared_from_bytes(self, data: bytes): ...

    def analyse(self, planes, settings, shared=None): ...

    def quantise(self, analysis, *, step: float, count: int | None):
        """The image at quantiser ``step`` keeping ``count`` (None: all); ``.planes`` is exact."""

    def serialise(self, coded) -> bytes: ...

    def decode(self, payload: bytes, shapes, settings, shared=None) -> list: ...

    def payload_header(self, payload: bytes) -> tuple[float, int]:
        """``(step, count)`` a payload was coded with, read from its head alone."""


class CodecBase:
    """Defaults for the optional parts of :class:`Codec`."""

    def load_shared(self, path) -> tuple[Any, str]:
        """``(shared, sha256)`` from a file of this codec's shared side (``.wbasis``, ``.wmodel``)."""
        raise NotImplementedError(f"{type(self).__name__} has no shared side to load")

    def builtin(self, ref: str):
        """A shared side this codec ships with, if ``ref`` names it (else None)."""
        return None

    def count_range(self, analysis) -> int | None:
        """The largest count this analysis offers, where the block size does not set it."""
        return None

    def energy_kept(self, analysis):
        """Fraction of the energy kept against the count (a KLT's curve), or None."""
        return None

    def size_task(self, coded):
        """``(function, scalars, arrays)`` to size the payload in a helper process, or None."""
        return None
