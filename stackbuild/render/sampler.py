"""Render a region of one section from its raw tiles through the stored transforms.

An output pixel is mapped backwards, ``aligned -> coarse -> section -> tile``
(see :mod:`stackbuild.transforms` for the frames and the pixel-centre
convention), each tile is resampled with :func:`cv2.remap`, and overlapping
tiles are blended with feathered weights (distance to the tile's edge),
normalised by their sum. Pixels that no tile covers are 0.

Only tiles whose aligned-frame footprint meets the region are read. The
footprint of a tile is the affine image of its rectangle, widened by the
largest displacement of the elastic field (a point ``p`` maps to coarse
``p + d(p)``, so ``p`` lies within ``max |d|`` of the coarse footprint).
"""
from __future__ import annotations

import math

import cv2
import numpy as np

from ..transforms.records import SectionAlignment, SectionStitch
from .tiles import prepared_tile, profile_digest

_INTERP = {0: cv2.INTER_NEAREST, 1: cv2.INTER_LINEAR, 3: cv2.INTER_CUBIC}
_MAX_MAP = 16384  # cv2.remap handles maps up to SHRT_MAX per side; stay well below


def interpolation_order(name: str) -> int:
    """Return the spline order for a settings name (``"linear"`` -> 1, ``"cubic"`` -> 3, ``"nearest"`` -> 0)."""
    orders = {"nearest": 0, "linear": 1, "cubic": 3}
    if name not in orders:
        raise ValueError(f"interpolation must be one of {sorted(orders)}, got {name!r}")
    return orders[name]


def tile_footprints(stitch: SectionStitch, alignment: SectionAlignment | None) -> np.ndarray:
    """Return each tile's conservative aligned-frame bounding box, shape ``(n, 4)``: ``x0, y0, x1, y1``.

    Coordinates are pixel edges in the aligned frame (the section frame when
    ``alignment`` is None).
    """
    n = len(stitch.tiles)
    x0 = np.array([t.x for t in stitch.tiles]) - 0.5
    y0 = np.array([t.y for t in stitch.tiles]) - 0.5
    x1 = x0 + np.array([t.width for t in stitch.tiles])
    y1 = y0 + np.array([t.height for t in stitch.tiles])
    corners = np.stack([np.stack([x0, y0], 1), np.stack([x1, y0], 1),
                        np.stack([x0, y1], 1), np.stack([x1, y1], 1)], 1).reshape(-1, 2)
    margin = 1.0
    if alignment is not None:
        corners = alignment.affine.inverse().apply(corners)
        if alignment.displacement is not None:
            margin += alignment.displacement.magnitude_stats()["max"]
    c = corners.reshape(n, 4, 2)
    return np.column_stack([c[..., 0].min(1) - margin, c[..., 1].min(1) - margin,
                            c[..., 0].max(1) + margin, c[..., 1].max(1) + margin])


def _section_coords(alignment: SectionAlignment | None, xs: np.ndarray, ys: np.ndarray):
    """Return section-frame ``(sx, sy)`` (float64, ``len(ys) x len(xs)``) of aligned points on a grid."""
    if alignment is None:
        return np.broadcast_to(xs[None, :], (len(ys), len(xs))), np.broadcast_to(ys[:, None], (len(ys), len(xs)))
    m = alignment.affine.matrix
    if alignment.displacement is None:
        sx = m[0, 0] * xs[None, :] + (m[0, 1] * ys[:, None] + m[0, 2])
        sy = m[1, 0] * xs[None, :] + (m[1, 1] * ys[:, None] + m[1, 2])
        return sx, sy
    d = alignment.displacement.displacement_grid(xs, ys).astype(np.float64)
    cx = xs[None, :] + d[..., 0]
    cy = ys[:, None] + d[..., 1]
    return m[0, 0] * cx + m[0, 1] * cy + m[0, 2], m[1, 0] * cx + m[1, 1] * cy + m[1, 2]


def _remap(img: np.ndarray, mx: np.ndarray, my: np.ndarray, flag: int) -> np.ndarray:
    out = np.empty(mx.shape, np.float32)
    for r0 in range(0, mx.shape[0], _MAX_MAP):
        for c0 in range(0, mx.shape[1], _MAX_MAP):
            sl = np.s_[r0:r0 + _MAX_MAP, c0:c0 + _MAX_MAP]
            out[sl] = cv2.remap(img, mx[sl], my[sl], flag, borderMode=cv2.BORDER_REPLICATE)
    return out


def _index_range(lo: float, hi: float, start: float, step: int, n: int) -> tuple[int, int]:
    """Return output indices ``[a, b)`` whose centres ``start + i*step`` lie in ``[lo, hi]``."""
    a = max(0, math.ceil((lo - start) / step))
    b = min(n, math.floor((hi - start) / step) + 1)
    return a, b


def render_region(stitch: SectionStitch, alignment: SectionAlignment | None, x0: int, y0: int,
                  width: int, height: int, scale: int = 1, order: int = 1,
                  contrast: tuple[float, float] | None = None, return_weight: bool = False):
    """Return a region of one section rendered in the aligned frame (float32, ``height x width``).

    Parameters
    ----------
    stitch : SectionStitch
        Tile placements and intensity corrections (``tile -> section``).
    alignment : SectionAlignment or None
        ``aligned -> section`` transforms; None renders in the section frame.
    x0, y0 : int
        Aligned-frame position of the region's first full-resolution pixel.
    width, height : int
        Output size in pixels of this scale.
    scale : int
        Output pixel ``[r, c]`` is the mean over the ``scale x scale`` block of
        full-resolution pixels starting at ``(x0 + c*scale, y0 + r*scale)``; its
        centre is ``(x0 + c*scale + (scale-1)/2, y0 + r*scale + (scale-1)/2)``.
        Tiles are reduced first (block means), so the result is anti-aliased.
    order : int
        0 nearest, 1 bilinear (default), 3 bicubic (OpenCV's cubic convolution).
    contrast : (gain, offset), optional
        Applied to covered pixels after blending: ``gain * value + offset``.
    return_weight : bool
        Also return the summed blending weight (0 where no tile covers).

    Returns
    -------
    ndarray or (ndarray, ndarray)
        The corrected intensities (not rounded), and the weight if asked.

    Notes
    -----
    Corrected intensity is ``gain * raw / illumination + offset``. Tiles are
    sampled with ``cv2.remap`` (bilinear weights quantised to 1/32 pixel);
    the sampling domain of a tile is its rectangle of pixel edges, and the
    half-pixel rim beyond the outermost centres repeats the edge pixel, so
    the edge of a mosaic is not darkened. The feather weight of a tile at a
    point is the distance (full-resolution pixels) from the point to the
    nearest edge of the tile's rectangle.
    """
    if scale < 1 or int(scale) != scale:
        raise ValueError(f"scale must be a positive integer, got {scale}")
    if order not in _INTERP:
        raise ValueError(f"order must be 0, 1 or 3, got {order}")
    if width < 0 or height < 0:
        raise ValueError(f"width and height must be >= 0, got {width} x {height}")
    acc = np.zeros((height, width), np.float32)
    wsum = np.zeros((height, width), np.float32)
    half = (scale - 1) / 2.0
    cx0, cy0 = x0 + half, y0 + half
    boxes = tile_footprints(stitch, alignment) if stitch.tiles else np.zeros((0, 4))
    hits = [i for i, b in enumerate(boxes)
            if b[2] >= cx0 and b[0] <= cx0 + (width - 1) * scale
            and b[3] >= cy0 and b[1] <= cy0 + (height - 1) * scale]
    if hits and width and height:
        sub = boxes[hits]
        c_a, c_b = _index_range(sub[:, 0].min(), sub[:, 2].max(), cx0, scale, width)
        r_a, r_b = _index_range(sub[:, 1].min(), sub[:, 3].max(), cy0, scale, height)
        xs = cx0 + scale * np.arange(c_a, c_b, dtype=np.float64)
        ys = cy0 + scale * np.arange(r_a, r_b, dtype=np.float64)
        sx, sy = _section_coords(alignment, xs, ys)
        key = profile_digest(stitch.illumination)
        for i in hits:
            _blend_tile(stitch, stitch.tiles[i], boxes[i], key, sx, sy, (c_a, r_a, cx0, cy0),
                        scale, _INTERP[order], acc[r_a:r_b, c_a:c_b], wsum[r_a:r_b, c_a:c_b])
    covered = wsum > 0
    out = np.zeros((height, width), np.float32)
    np.divide(acc, wsum, out=out, where=covered)
    if contrast is not None:
        gain, offset = contrast
        out[covered] = np.float32(gain) * out[covered] + np.float32(offset)
    return (out, wsum) if return_weight else out


def _blend_tile(stitch, t, box, key, sx, sy, grid, scale, flag, acc, wsum) -> None:
    """Add one tile's weighted samples to ``acc`` and its weights to ``wsum`` (views of the region)."""
    c_a, r_a, cx0, cy0 = grid
    n_r, n_c = sx.shape
    a, b = _index_range(box[0], box[2], cx0 + scale * c_a, scale, n_c)
    c, d = _index_range(box[1], box[3], cy0 + scale * r_a, scale, n_r)
    if a >= b or c >= d:
        return
    u0 = sx[c:d, a:b] - t.x
    v0 = sy[c:d, a:b] - t.y
    w = np.minimum(np.minimum(u0 + 0.5, t.width - 0.5 - u0), np.minimum(v0 + 0.5, t.height - 0.5 - v0))
    w = np.maximum(w, 0.0).astype(np.float32)
    if not w.any():
        return
    img = prepared_tile(t, stitch.illumination, key, scale, stitch.section)
    half = (scale - 1) / 2.0
    mx = ((u0 - half) / scale).astype(np.float32)
    my = ((v0 - half) / scale).astype(np.float32)
    val = _remap(img, mx, my, flag)
    acc[c:d, a:b] += w * val
    wsum[c:d, a:b] += w
