"""Codec registry: one :class:`Traits` record per method, readable without importing the codec.

A codec is one module defining ``CODEC`` (see :mod:`workbench.codecs.base` for what it
offers) plus one line in ``REGISTRY``. Modules are imported on first use, so the learned
codec's torch import is paid only by those who use it; everything that only needs to know
*about* a method (the CLI's choices, the app's panel, the sheet's steps) reads its traits.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field

from ..errors import InputError


@dataclass(frozen=True)
class Traits:
    """What the rest of the program needs to know about a method, without importing it.

    Attributes
    ----------
    module : str
        Module defining ``CODEC``.
    label : str
        Display name.
    count_label : str
        What the kept count counts ("components", "latent channels").
    uses_block : bool
        Whether the patch size B applies (then the count is at most B*B).
    fixed_chroma : str or None
        The chroma sampling it always uses, or None when the user chooses.
    shared_kind : str or None
        What its shared side is called ("basis", "model"), or None if it has none.
    folder_scope : bool
        Whether a shared side can be fitted on the folder's images.
    isolated : bool
        Whether the app runs its work in child processes (it imports torch).
    rd_steps : tuple of float
        Quantiser steps for rate–distortion curves.
    has_sketch : bool
        Whether it offers a fast reduced view for a dragging slider.
    fields : frozenset of str
        The Settings fields it reads (the others are not shown for it).
    """

    module: str
    label: str
    count_label: str
    uses_block: bool = False
    fixed_chroma: str | None = None
    shared_kind: str | None = None
    folder_scope: bool = False
    isolated: bool = False
    rd_steps: tuple = (2.0, 3.0, 4.5, 6.5, 9.5, 14.0, 20.0, 30.0, 44.0, 64.0)
    has_sketch: bool = False
    fields: frozenset = field(default_factory=lambda: frozenset({"method", "count", "step", "chroma", "target"}))


REGISTRY: dict[str, Traits] = {
    "klt": Traits("workbench.codecs.klt", "Block KLT", "components", uses_block=True, shared_kind="basis",
                  folder_scope=True, rd_steps=(2.5, 4.0, 6.0, 9.0, 13.5, 20.0, 30.0, 45.0), has_sketch=True,
                  fields=frozenset({"method", "block", "count", "step", "chroma", "basis_scope", "target",
                                    "deadzone"})),
    "conv": Traits("workbench.codecs.conv", "Conv encoder", "latent channels", fixed_chroma="444",
                   shared_kind="model", isolated=True, rd_steps=(2.8, 4.0, 5.6, 8.0, 11.0, 16.0, 22.0, 32.0, 45.0)),
}


BUILTIN = frozenset(REGISTRY)


def register(name: str, traits: Traits) -> None:
    """Add a method at run time (a codec that lives outside the package: one file, one call).

    Worker processes started through :mod:`workbench.jobs` register the same methods."""
    if not isinstance(traits, Traits):
        raise InputError(f"codec {name!r}: traits must be a Traits record")
    REGISTRY[name] = traits


def extras() -> dict[str, Traits]:
    """The methods registered at run time (passed on to child processes)."""
    return {k: v for k, v in REGISTRY.items() if k not in BUILTIN}


def names() -> list[str]:
    return list(REGISTRY)


def traits(name: str) -> Traits:
    if name not in REGISTRY:
        raise InputError(f"unknown method {name!r}; choose one of {', '.join(REGISTRY)}")
    return REGISTRY[name]


def label(name: str) -> str:
    return traits(name).label


def get(name: str):
    """The codec object registered under ``name``."""
    return importlib.import_module(traits(name).module).CODEC
