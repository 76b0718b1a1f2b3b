"""Arrays for the screen and the sheet: 8-bit display copies and the difference colouring."""

from __future__ import annotations

import cv2
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


def _ramp(t: np.ndarray, signed: bool) -> np.ndarray:
    """Colours of amplified errors ``t`` (in -1..1 signed, 0..1 absolute), float (..., 3)."""
    t = np.asarray(t, np.float32)[..., None]
    if signed:
        return MID + np.where(t < 0, -t * (NEG - MID), t * (POS - MID))
    return MID + t * (POS - MID)


def _lut(signed: bool) -> np.ndarray:
    """256-entry colour table for :func:`difference`: index 128 + 127 t (signed) or 255 t."""
    i = np.arange(256, dtype=np.float32)
    t = np.clip((i - 128) / 127, -1, 1) if signed else i / 255
    return np.round(_ramp(t, signed)).astype(np.uint8).reshape(1, 256, 3)


_LUTS = {True: _lut(True), False: _lut(False)}


def difference(orig: np.ndarray, rec: np.ndarray, peak: int, gain: float, signed: bool = True) -> np.ndarray:
    """Colour image of ``rec - orig`` (channels averaged), in 8-bit levels times ``gain``.

    Signed: -128..+128 amplified levels map through NEG-MID-POS. Absolute: 0..255 on MID->POS.
    The amplified error is quantised to 255 steps and coloured through a table, which
    keeps a 4-megapixel difference to a few passes of OpenCV.
    """
    a = orig[..., :3] if orig.ndim == 3 and orig.shape[2] == 4 else orig
    b = rec[..., :3] if rec.ndim == 3 and rec.shape[2] == 4 else rec
    a, b = np.ascontiguousarray(a), np.ascontiguousarray(b)
    channels = 1 if a.ndim == 2 else a.shape[2]
    depth = cv2.CV_16S if a.dtype == np.uint8 else cv2.CV_32F
    d = cv2.subtract(b, a, dtype=depth)
    if channels > 1:
        d = cv2.transform(d, np.ones((1, channels), np.float32))  # channel sum
    # amplified mean error per unit of the channel sum, in table steps
    per_level = np.float32(255.0 / peak / channels) * np.float32(gain)
    if signed:
        alpha = float(per_level / 128.0 * 127.0)
        lim = 127.0 / alpha
        d = np.clip(d, -np.floor(lim) if depth == cv2.CV_16S else -lim, np.floor(lim) if depth == cv2.CV_16S else lim)
        idx = cv2.convertScaleAbs(d, alpha=alpha, beta=128.0)
    else:
        idx = cv2.convertScaleAbs(d, alpha=float(per_level))  # |.| and saturation at 255
    return cv2.LUT(cv2.merge([idx, idx, idx]), _LUTS[signed])


def legend(signed: bool, width: int = 256, height: int = 14) -> np.ndarray:
    """The colour bar of :func:`difference`, left to right."""
    t = np.linspace(-1, 1, width) if signed else np.linspace(0, 1, width)
    row = np.round(_ramp(t, signed)).astype(np.uint8)[None]
    return np.ascontiguousarray(np.repeat(row, height, axis=0))
