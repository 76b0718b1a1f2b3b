"""Codec registry: name -> module path; a codec module defines ``CODEC``.

Modules are imported on first use so that the learned codec's torch import is paid only
by those who use it. Adding a method is adding a module here and one line below.
"""

from __future__ import annotations

import importlib

from ..errors import InputError

REGISTRY = {
    "klt": ("workbench.codecs.klt", "Block KLT"),
    "conv": ("workbench.codecs.conv", "Conv encoder"),
}


def names() -> list[str]:
    return list(REGISTRY)


def label(name: str) -> str:
    return REGISTRY[name][1]


def get(name: str):
    """The codec object registered under ``name``."""
    if name not in REGISTRY:
        raise InputError(f"unknown method {name!r}; choose one of {', '.join(REGISTRY)}")
    return importlib.import_module(REGISTRY[name][0]).CODEC
