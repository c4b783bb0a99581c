"""Helpers shared by both tissue families: blocks of space with their own random streams, drawing.

Random objects are laid out in fixed blocks of space (``BLOCK`` px square,
``ZBLOCK`` sections deep), each block with its own random stream keyed by its
indices, so any crop of the true frame shows the same tissue.
"""
from __future__ import annotations

import math

import cv2
import numpy as np
from scipy.spatial import cKDTree

from .layout import rng

BLOCK = 256
ZBLOCK = 16
KEY = 1 << 20  # shifts block indices to non-negative seeds


def blocks(x0, x1, y0, y1):
    """Yield ``(bx, by)`` of every block of space that meets the box ``[x0, x1] x [y0, y1]``."""
    for by in range(math.floor(y0 / BLOCK), math.floor(y1 / BLOCK) + 1):
        for bx in range(math.floor(x0 / BLOCK), math.floor(x1 / BLOCK) + 1):
            yield bx, by


def membranes(seeds, ox, oy, h, w):
    """Return the distance to the nearest cell boundary, and a per-cell lookup of seed columns, on the box.

    The two nearest seeds are found at half resolution; the distance to their
    bisector is linear in (x, y), so its coefficients are carried to full
    resolution and the distance evaluated there exactly (wrong only within a
    pixel or two of junctions of three cells).
    """
    tree = cKDTree(seeds[:, :2])
    gx, gy = np.meshgrid(ox + np.arange(0, w, 2) + 0.5, oy + np.arange(0, h, 2) + 0.5)
    _, idx = tree.query(np.column_stack([gx.ravel(), gy.ravel()]), k=2, workers=2)
    i1, i2 = idx[:, 0].reshape(gx.shape), idx[:, 1].reshape(gx.shape)
    s1, s2 = seeds[i1, :2], seeds[i2, :2]
    n = s2 - s1
    n /= np.maximum(np.sqrt((n ** 2).sum(-1, keepdims=True)), 1e-3)
    c = -((0.5 * (s1 + s2)) * n).sum(-1)

    def full(a):
        return np.repeat(np.repeat(a.astype(np.float32), 2, 0), 2, 1)[:h, :w]

    xs = (ox + np.arange(w, dtype=np.float32))[None, :]
    ys = (oy + np.arange(h, dtype=np.float32))[:, None]
    t = full(n[..., 0]) * xs + full(n[..., 1]) * ys + full(c)
    nearer_second = t > 0
    return np.abs(t), lambda column: np.where(nearer_second, full(seeds[i2, column]), full(seeds[i1, column]))


def noise_slab(params, tag, j, ox, oy, h, w, s1=1.2, s2=3.5, pad=16):
    """Return band-pass noise of unit variance on the box, slab ``j`` of the random stream ``tag``."""
    bx0, by0 = math.floor((ox - pad) / BLOCK), math.floor((oy - pad) / BLOCK)
    bx1, by1 = math.floor((ox + w + pad) / BLOCK), math.floor((oy + h + pad) / BLOCK)
    big = np.empty(((by1 - by0 + 1) * BLOCK, (bx1 - bx0 + 1) * BLOCK), np.float32)
    for by in range(by0, by1 + 1):
        for bx in range(bx0, bx1 + 1):
            g = rng(params, tag, j + KEY, bx + KEY, by + KEY)
            big[(by - by0) * BLOCK:(by - by0 + 1) * BLOCK, (bx - bx0) * BLOCK:(bx - bx0 + 1) * BLOCK] = \
                g.standard_normal((BLOCK, BLOCK), dtype=np.float32)
    r0, c0 = oy - pad - by0 * BLOCK, ox - pad - bx0 * BLOCK
    crop = big[r0:r0 + h + 2 * pad, c0:c0 + w + 2 * pad]
    dog = cv2.GaussianBlur(crop, (0, 0), s1) - cv2.GaussianBlur(crop, (0, 0), s2)
    # variance of a difference of Gaussians applied to unit white noise (continuous approximation)
    var = 1 / (4 * math.pi * s1 ** 2) + 1 / (4 * math.pi * s2 ** 2) - 1 / (math.pi * (s1 ** 2 + s2 ** 2))
    return dog[pad:pad + h, pad:pad + w] / np.float32(math.sqrt(var))


def draw(shape, ox, oy, items, draw_one):
    """Return ``draw_one(canvas, item, ox, oy)`` of every item on a uint8 canvas, as float32 in [0, 1]."""
    canvas = np.zeros(shape, np.uint8)
    for it in items:
        draw_one(canvas, it, ox, oy)
    return canvas.astype(np.float32) / 255.0


def sixteenths(v):
    """Return ``v`` in sixteenths of a pixel, the fixed-point positions of OpenCV drawing with ``shift=4``."""
    return int(round(v * 16))
