"""One frozen settings object shared by the CLI, the GUI, bundle metadata and caches."""

from __future__ import annotations

import dataclasses
import json
import math
import numbers
from dataclasses import dataclass

from .errors import InputError

BLOCK_SIZES = (4, 8, 16, 32)
CHROMA_MODES = ("420", "444")
BASIS_SCOPES = ("image", "folder")
TARGET_KINDS = ("psnr", "ssim", "bpp")


@dataclass(frozen=True)
class Settings:
    """Codec settings.

    Parameters
    ----------
    method : str
        Registered codec name (see :mod:`workbench.codecs`; ``"klt"`` by default).
    block : int
        Patch side B for methods that tile into patches, one of 4, 8, 16, 32.
    count : int or None
        What the method keeps per patch or per position: the KLT's components (1..B*B),
        the conv encoder's latent channels. ``None`` keeps all (a KLT count of B*B is
        stored as ``None``, so one setting has one cache key).
    step : float
        Quantiser step, in units of one 8-bit grey level (1/255 of full scale), so that
        the same step means the same relative precision for 8- and 16-bit sources.
    chroma : str
        ``"420"`` (chroma halved in both directions) or ``"444"``; a method with a fixed
        chroma sampling (the conv encoder's 4:4:4) always gets its own.
    basis_scope : str
        ``"image"``: one basis per image, stored in the bundle; ``"folder"``: one basis fitted
        on all images of the bundle and stored once.
    target : tuple or None
        ``("psnr", dB)``, ``("ssim", value)`` or ``("bpp", rate)``: search the step per image.
    deadzone : float
        Rounding offset of the quantiser (0.5 is plain rounding, smaller widens the zero bin).
    """

    method: str = "klt"
    block: int = 8
    count: int | None = None
    step: float = 8.0
    chroma: str = "420"
    basis_scope: str = "image"
    target: tuple[str, float] | None = None
    deadzone: float = 0.5

    def __post_init__(self):
        from .codecs import REGISTRY

        if self.method not in REGISTRY:
            raise InputError(f"unknown method {self.method!r}; choose one of {', '.join(REGISTRY)}")
        t = REGISTRY[self.method]
        if self.block not in BLOCK_SIZES or not _is(self.block, int):
            raise InputError(f"block size must be one of {BLOCK_SIZES}, got {self.block!r}")
        if self.count is not None:
            if isinstance(self.count, numbers.Integral) and not isinstance(self.count, bool):
                object.__setattr__(self, "count", int(self.count))  # numpy integers too
            if not _is(self.count, int) or self.count < 1:
                raise InputError(f"the {t.count_label} kept must be a whole number of at least 1, got {self.count!r}")
            if t.uses_block and self.count > self.block**2:
                raise InputError(f"{t.count_label} must be between 1 and {self.block**2} for block {self.block}, "
                                 f"got {self.count!r}")
            if t.uses_block and self.count == self.block**2:
                object.__setattr__(self, "count", None)
        if not (0.01 <= _finite(self.step, "step") <= 4096):
            raise InputError(f"step must be between 0.01 and 4096 grey levels, got {self.step!r}")
        if self.chroma not in CHROMA_MODES:
            raise InputError(f"chroma must be one of {CHROMA_MODES}, got {self.chroma!r}")
        if self.basis_scope not in BASIS_SCOPES:
            raise InputError(f"basis scope must be one of {BASIS_SCOPES}, got {self.basis_scope!r}")
        if not (0.0 < _finite(self.deadzone, "deadzone") <= 0.5):
            raise InputError(f"deadzone rounding offset must be in (0, 0.5], got {self.deadzone!r}")
        if t.fixed_chroma and self.chroma != t.fixed_chroma:
            object.__setattr__(self, "chroma", t.fixed_chroma)
        if self.target is not None:
            kind, value = self.target
            if kind not in TARGET_KINDS:
                raise InputError(f"target kind must be one of {TARGET_KINDS}, got {kind!r}")
            limits = {"psnr": (5.0, 120.0), "ssim": (0.0, 1.0), "bpp": (0.001, 64.0)}[kind]
            if not (limits[0] < _finite(value, f"target {kind}") <= limits[1]):
                raise InputError(f"target {kind} must be in ({limits[0]}, {limits[1]}], got {value!r}")
            object.__setattr__(self, "target", (kind, _finite(value, "target")))

    @property
    def traits(self):
        from .codecs import traits

        return traits(self.method)

    @property
    def kept(self) -> int:
        """Components kept by a patch method (B*B when all are)."""
        return self.block**2 if self.count is None else int(self.count)

    def own(self) -> dict:
        """The fields that mean something for this method (a conv bundle has no block size)."""
        d = self.to_dict()
        keep = set(self.traits.fields)
        if self.target is not None:
            keep.discard("step")  # each image's step comes from the search, not from here
        return {k: v for k, v in d.items() if k in keep}

    def describe(self) -> str:
        """One line of this method's own settings, for people (banners, ``info``, the sheet)."""
        t = self.traits
        rate = f"target {self.target[0]} {self.target[1]:g}" if self.target else f"step {self.step:g}"
        parts = [t.label]
        if t.uses_block:
            parts.append(f"block {self.block}")
        kept = "all" if self.count is None else str(self.count)
        parts.append(f"{t.count_label} kept {kept}" + (f" of {self.block ** 2}" if t.uses_block else ""))
        parts.append(f"chroma {self.chroma[0]}:{self.chroma[1]}:{self.chroma[2]}")
        if t.folder_scope:
            parts.append(f"{t.shared_kind} per {self.basis_scope}")
        return ", ".join(parts + [rate])

    def replace(self, **changes) -> "Settings":
        """Return a copy with ``changes`` applied (validated again)."""
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["target"] = list(self.target) if self.target else None
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "Settings":
        """Settings from stored metadata, every field checked for its JSON type first.

        Bundles made before the one ``count`` field stored ``components`` (KLT) or
        ``latent`` (conv); either is read as ``count``.

        Raises
        ------
        InputError
            Naming the field, for unknown fields, wrong types (``8.0`` for a block size,
            ``true`` for a count), non-finite or out-of-range numbers.
        """
        if not isinstance(d, dict):
            raise InputError("settings must be a JSON object")
        d = dict(d)
        for old in LEGACY_COUNT_KEYS:
            if old in d:
                value = d.pop(old)
                if value is not None:
                    if d.get("count") is not None:
                        raise InputError(f"settings give both 'count' and {old!r}")
                    d["count"] = value
        unknown = set(d) - set(_FIELD_TYPES)
        if unknown:
            raise InputError(f"unknown settings: {sorted(unknown)[:5]}")
        for key, kinds in _FIELD_TYPES.items():
            if key in d and not _is(d[key], kinds):
                raise InputError(f"setting {key!r} has the wrong type ({type(d[key]).__name__})")
        t = d.get("target")
        if t is not None:
            if not (len(t) == 2 and isinstance(t[0], str) and _is(t[1], (int, float))):
                raise InputError("setting 'target' must be a [kind, number] pair")
            d["target"] = (t[0], t[1])
        return cls(**d)

    def cache_key(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)


LEGACY_COUNT_KEYS = ("components", "latent")

# JSON types each stored field may have (bool is not a number here, though Python says it is).
_FIELD_TYPES = {"method": (str,), "block": (int,), "count": (int, type(None)), "step": (int, float),
                "chroma": (str,), "basis_scope": (str,), "target": (list, tuple, type(None)),
                "deadzone": (int, float)}


def _is(value, kinds) -> bool:
    return isinstance(value, kinds) and not isinstance(value, bool)


def _finite(value, name: str) -> float:
    """``value`` as a finite float, or an InputError naming ``name``."""
    try:
        f = float(value)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"{name} must be a finite number, got {str(value)[:40]!r}") from None
    if not math.isfinite(f):
        raise InputError(f"{name} must be a finite number, got {value!r}")
    return f
