"""Arrays for the screen and the sheet: 8-bit display copies and the difference colouring."""

from __future__ import annotations

import numpy as np

# Our own diverging scale: slate blue below zero, neutral dark grey at zero, warm amber above.
NEG = np.array([70, 130, 230], np.float32)
MID = np.array([40, 40, 44], np.float32)
POS = np.array([250, 170, 40], np.float32)


def display_rgb(pixels: np.ndarray) -> np.ndarray:
    """8-bit (H, W, 3) view of any source for the screen (16-bit scaled, alpha dropped)."""
    a = pixels
    if a.ndim == 3 and a.shape[2] in (2, 4):
        a = a[..., :-1]
    if a.dtype == np.uint16:
        a = (a >> 8).astype(np.uint8)
    if a.ndim == 2:
        a = np.repeat(a[..., None], 3, axis=2)
    elif a.shape[2] == 1:
        a = np.repeat(a, 3, axis=2)
    return np.ascontiguousarray(a)


def difference(orig: np.ndarray, rec: np.ndarray, peak: int, gain: float, signed: bool = True) -> np.ndarray:
    """Colour image of ``rec - orig`` (channels averaged), in 8-bit levels times ``gain``.

    Signed: -128..+128 amplified levels map through NEG-MID-POS. Absolute: 0..255 on MID->POS.
    """
    a = orig[..., :3] if orig.ndim == 3 and orig.shape[2] == 4 else orig
    b = rec[..., :3] if rec.ndim == 3 and rec.shape[2] == 4 else rec
    d = (b.astype(np.float32) - a.astype(np.float32)) * np.float32(255.0 / peak)
    if d.ndim == 3:
        d = d.mean(axis=2)
    if signed:
        t = np.clip(d * gain / 128.0, -1, 1)[..., None]
        out = MID + np.where(t < 0, -t * (NEG - MID), t * (POS - MID))
    else:
        t = np.clip(np.abs(d) * gain / 255.0, 0, 1)[..., None]
        out = MID + t * (POS - MID)
    return np.ascontiguousarray(out.astype(np.uint8))


def legend(signed: bool, width: int = 256, height: int = 14) -> np.ndarray:
    """The colour bar of :func:`difference`, left to right."""
    t = np.linspace(-1, 1, width) if signed else np.linspace(0, 1, width)
    t = t[None, :, None]
    if signed:
        row = MID + np.where(t < 0, -t * (NEG - MID), t * (POS - MID))
    else:
        row = MID + t * (POS - MID)
    return np.ascontiguousarray(np.repeat(row, height, axis=0).astype(np.uint8))
