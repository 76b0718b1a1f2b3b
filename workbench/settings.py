"""One frozen settings object shared by the CLI, the GUI, bundle metadata and caches."""

from __future__ import annotations

import dataclasses
import json
import math
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
        Registered codec name (``"klt"`` or ``"conv"``).
    block : int
        Patch side B for the KLT, one of 4, 8, 16, 32.
    components : int or None
        KLT components kept per patch (1..B*B); ``None`` keeps all.
    step : float
        Quantiser step, in units of one 8-bit grey level (1/255 of full scale), so that
        the same step means the same relative precision for 8- and 16-bit sources.
    chroma : str
        ``"420"`` (chroma halved in both directions) or ``"444"``.
    basis_scope : str
        ``"image"``: one basis per image, stored in the bundle; ``"folder"``: one basis fitted
        on all images of the bundle and stored once.
    target : tuple or None
        ``("psnr", dB)``, ``("ssim", value)`` or ``("bpp", rate)``: search the step per image.
    latent : int or None
        Latent channels kept by the learned encoder; ``None`` keeps all.
    deadzone : float
        Rounding offset of the quantiser (0.5 is plain rounding, smaller widens the zero bin).
    """

    method: str = "klt"
    block: int = 8
    components: int | None = None
    step: float = 8.0
    chroma: str = "420"
    basis_scope: str = "image"
    target: tuple[str, float] | None = None
    latent: int | None = None
    deadzone: float = 0.38

    def __post_init__(self):
        from .codecs import REGISTRY

        if self.method not in REGISTRY:
            raise InputError(f"unknown method {self.method!r}; choose one of {', '.join(REGISTRY)}")
        if self.block not in BLOCK_SIZES or not _is(self.block, int):
            raise InputError(f"block size must be one of {BLOCK_SIZES}, got {self.block!r}")
        if self.components is not None and not (1 <= int(self.components) <= self.block**2):
            raise InputError(
                f"components must be between 1 and {self.block**2} for block {self.block}, "
                f"got {self.components!r}"
            )
        if not (0.01 <= _finite(self.step, "step") <= 4096):
            raise InputError(f"step must be between 0.01 and 4096 grey levels, got {self.step!r}")
        if self.chroma not in CHROMA_MODES:
            raise InputError(f"chroma must be one of {CHROMA_MODES}, got {self.chroma!r}")
        if self.basis_scope not in BASIS_SCOPES:
            raise InputError(f"basis scope must be one of {BASIS_SCOPES}, got {self.basis_scope!r}")
        if not (0.0 < _finite(self.deadzone, "deadzone") <= 0.5):
            raise InputError(f"deadzone rounding offset must be in (0, 0.5], got {self.deadzone!r}")
        if self.latent is not None and int(self.latent) < 1:
            raise InputError(f"latent channels must be at least 1, got {self.latent!r}")
        if self.method == "conv" and self.chroma != "444":
            # The learned encoder works on full-resolution planes.
            object.__setattr__(self, "chroma", "444")
        if self.target is not None:
            kind, value = self.target
            if kind not in TARGET_KINDS:
                raise InputError(f"target kind must be one of {TARGET_KINDS}, got {kind!r}")
            limits = {"psnr": (5.0, 120.0), "ssim": (0.0, 1.0), "bpp": (0.001, 64.0)}[kind]
            if not (limits[0] < _finite(value, f"target {kind}") <= limits[1]):
                raise InputError(f"target {kind} must be in ({limits[0]}, {limits[1]}], got {value!r}")
            object.__setattr__(self, "target", (kind, _finite(value, "target")))

    @property
    def kept(self) -> int:
        """Number of KLT components kept."""
        return self.block**2 if self.components is None else int(self.components)

    def own(self) -> dict:
        """The fields that mean something for this method (a conv bundle has no block size)."""
        d = self.to_dict()
        keep = set(METHOD_FIELDS.get(self.method, d))
        if self.target is not None:
            keep.discard("step")  # each image's step comes from the search, not from here
        return {k: v for k, v in d.items() if k in keep}

    def describe(self) -> str:
        """One line of this method's own settings, for people (banners, ``info``, the sheet)."""
        rate = (f"target {self.target[0]} {self.target[1]:g}" if self.target else f"step {self.step:g}")
        if self.method == "klt":
            count = "all" if self.components is None else str(self.components)
            return (f"Block KLT, block {self.block}, components kept {count} of {self.block ** 2}, chroma "
                    f"{self.chroma[0]}:{self.chroma[1]}:{self.chroma[2]}, basis per {self.basis_scope}, {rate}")
        if self.method == "conv":
            return f"Conv encoder, latent channels kept {self.latent or 'all'}, chroma 4:4:4, {rate}"
        return f"{self.method}, {rate}"

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

        Raises
        ------
        InputError
            Naming the field, for unknown fields, wrong types (``8.0`` for a block size,
            ``true`` for a count), non-finite or out-of-range numbers.
        """
        if not isinstance(d, dict):
            raise InputError("settings must be a JSON object")
        unknown = set(d) - set(_FIELD_TYPES)
        if unknown:
            raise InputError(f"unknown settings: {sorted(unknown)[:5]}")
        d = dict(d)
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


# The fields each built-in method reads (the rest keep their defaults and are not shown).
METHOD_FIELDS = {"klt": {"method", "block", "components", "step", "chroma", "basis_scope", "target", "deadzone"},
                 "conv": {"method", "step", "chroma", "target", "latent"}}

# JSON types each stored field may have (bool is not a number here, though Python says it is).
_FIELD_TYPES = {"method": (str,), "block": (int,), "components": (int, type(None)), "step": (int, float),
                "chroma": (str,), "basis_scope": (str,), "target": (list, tuple, type(None)),
                "latent": (int, type(None)), "deadzone": (int, float)}


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
