"""Imaging a distorted section as tiles: vignetting, gain and offset, noise, defects.

A tile pixel at tile index ``(i, j)`` (x, y) sees the section point
``q = (i, j) + t`` (``t`` = true tile position) and records

    I = gain * f(i, j) * S(q) + offset + n,     n ~ N(0, sigma^2),

where ``S(q) = U(A q + w(q))`` is the undistorted section image ``U`` sampled
bilinearly, ``f = 1 - vignetting * (r / r_corner)^2`` is the shared radial
falloff about the tile centre, and ``sigma = std(clean signal) / snr`` over the
section's non-blank tiles (this is the definition of SNR used throughout). A
blank tile images empty resin: ``S = RESIN_LEVEL`` everywhere.

Defects live in the section frame, so every tile that sees them agrees:
a fold (a dark band of doubled tissue, about a fifth of the section) and a
periodic pattern filling one overlap (to trap phase correlation).
"""
from __future__ import annotations

import math

import cv2
import numpy as np

from .layout import TAG_FOLD, TAG_TILE, rng, section_shape
from .params import SynthParams

RESIN_LEVEL = 205.0
FOLD_FRACTION = 0.2
REPEAT_PERIOD = 14.0


def vignetting_profile(shape: tuple[int, int], amount: float) -> np.ndarray:
    """Return the radial falloff ``1 - amount * (r / r_corner)^2`` on a tile of ``(height, width)`` (float32)."""
    h, w = shape
    ys, xs = np.ogrid[:h, :w]
    cx, cy = (w - 1) / 2.0, (h - 1) / 2.0
    r2 = ((xs - cx) ** 2 + (ys - cy) ** 2) / (cx ** 2 + cy ** 2)
    return (1.0 - amount * r2).astype(np.float32)


def tile_gain_offset(params: SynthParams, section: int, row: int, col: int) -> tuple[float, float]:
    """Return the ``(gain, offset)`` of one tile (offset in 8-bit grey levels)."""
    g = rng(params, TAG_TILE, section, row, col)
    return (float(1.0 + g.uniform(-params.gain_spread, params.gain_spread)),
            float(g.uniform(-params.offset_spread, params.offset_spread)))


def fold_record(params: SynthParams, section: int) -> dict:
    """Return a fold: a band ``|(q - point) . normal| < half_width`` covering ~20 % of the section."""
    h, w = section_shape(params)
    g = rng(params, TAG_FOLD, section)
    ang = g.uniform(0, math.pi)
    normal = np.array([math.cos(ang), math.sin(ang)])
    point = np.array([(w - 1) / 2, (h - 1) / 2]) + g.uniform(-0.15, 0.15, 2) * [w, h]
    gx, gy = np.meshgrid(np.arange(0, w, 4.0), np.arange(0, h, 4.0))
    d = np.abs((gx - point[0]) * normal[0] + (gy - point[1]) * normal[1])
    return {"point": point.tolist(), "normal": normal.tolist(),
            "half_width": float(np.quantile(d, FOLD_FRACTION))}


def fold_mask(fold: dict, xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
    """Return the fold's soft mask (1 inside, 2 px ramp) on the section grid ``xs`` x ``ys``."""
    (px, py), (nx, ny) = fold["point"], fold["normal"]
    d = np.abs((np.asarray(xs)[None, :] - px) * nx + (np.asarray(ys)[:, None] - py) * ny)
    return np.clip((fold["half_width"] - d) / 2.0 + 0.5, 0.0, 1.0).astype(np.float32)


def repeat_record(layout: dict, tile_a: str, tile_b: str, tile_size: int) -> dict:
    """Return the section-frame box ``[x0, y0, x1, y1]`` of the overlap of two tiles, and the period."""
    (xa, ya), (xb, yb) = layout[tile_a]["true"], layout[tile_b]["true"]
    box = [max(xa, xb), max(ya, yb), min(xa, xb) + tile_size - 1, min(ya, yb) + tile_size - 1]
    return {"tiles": [tile_a, tile_b], "box": box, "period": REPEAT_PERIOD}


def _apply_defects(s, xs, ys, fold, repeat):
    if fold is not None:
        m = fold_mask(fold, xs, ys)
        s = s * (1 - m) + m * (0.4 * s + 20.0)  # doubled tissue: darker, content still faintly visible
    if repeat is not None:
        x0, y0, x1, y1 = repeat["box"]
        inside = ((xs[None, :] >= x0) & (xs[None, :] <= x1) & (ys[:, None] >= y0) & (ys[:, None] <= y1))
        k = 2 * math.pi / repeat["period"]
        pattern = 150.0 + 45.0 * np.cos(k * xs)[None, :] * np.cos(k * ys)[:, None]
        s = np.where(inside, pattern, s)
    return s.astype(np.float32)


def clean_tile(undistorted: np.ndarray, px: np.ndarray, py: np.ndarray) -> np.ndarray:
    """Return ``U`` sampled bilinearly at true-frame points ``(px, py)`` (float32)."""
    return cv2.remap(undistorted, px.astype(np.float32), py.astype(np.float32), cv2.INTER_LINEAR,
                     borderMode=cv2.BORDER_REFLECT)


def expose(signal: np.ndarray, vignette: np.ndarray, gain: float, offset: float) -> np.ndarray:
    """Return the noise-free recorded tile ``gain * vignette * signal + offset``."""
    return (gain * vignette * signal + offset).astype(np.float32)


def tile_signal(undistorted, px, py, xs, ys, blank, fold, repeat):
    """Return the section content a tile sees (before vignetting, gain and noise)."""
    if blank:
        return np.full(px.shape, RESIN_LEVEL, np.float32)
    return _apply_defects(clean_tile(undistorted, px, py), xs, ys, fold, repeat)


def intensity_scale(dtype: str, bit_depth: int = 0) -> int:
    """Return the factor from the 8-bit model grey scale to stored values (1, 16 for 12 bits, 256 for 16)."""
    bits = bit_depth or (16 if dtype == "uint16" else 8)
    return 2 ** (bits - 8)


def quantise(values: np.ndarray, dtype: str, bit_depth: int = 0) -> np.ndarray:
    """Return ``values`` (8-bit grey scale) scaled to ``bit_depth`` bits, rounded and clipped into ``dtype``.

    ``bit_depth`` 0 is the pixel type's full range (uint16 = x256); 12 in uint16 is x16, values 0..4095.
    """
    scale = intensity_scale(dtype, bit_depth)
    top = 2 ** (bit_depth or (16 if dtype == "uint16" else 8)) - 1
    return np.clip(np.rint(values * float(scale)), 0, top).astype(np.uint16 if dtype == "uint16" else np.uint8)
