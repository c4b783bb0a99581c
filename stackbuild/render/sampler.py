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
_MAX_MAP = 16384
#: Blended weights below this (level-0 pixels of distance to a tile edge) count as uncovered:
#: only the outer rim of a mosaic, where cubic overshoot could make the ratio unstable.
_MIN_WEIGHT = 0.05  # cv2.remap handles maps up to SHRT_MAX per side; stay well below


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


def _section_coords(alignment: SectionAlignment, xs: np.ndarray, ys: np.ndarray):
    """Return section-frame ``(sx, sy)`` (float64, ``len(ys) x len(xs)``) of aligned grid points, through the field."""
    m = alignment.affine.matrix
    d = alignment.displacement.displacement_grid(xs, ys).astype(np.float64)
    cx = xs[None, :] + d[..., 0]
    cy = ys[:, None] + d[..., 1]
    return m[0, 0] * cx + m[0, 1] * cy + m[0, 2], m[1, 0] * cx + m[1, 1] * cy + m[1, 2]


def _remap(img: np.ndarray, mx: np.ndarray, my: np.ndarray, flag: int) -> np.ndarray:
    out = np.empty(mx.shape, np.float32)
    for r0 in range(0, mx.shape[0], _MAX_MAP):
        for c0 in range(0, mx.shape[1], _MAX_MAP):
            sl = np.s_[r0:r0 + _MAX_MAP, c0:c0 + _MAX_MAP]
            out[sl] = cv2.remap(img, mx[sl], my[sl], flag, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
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
    Corrected intensity is ``gain * raw / illumination + offset``. Each tile
    carries a feather weight, the distance (full-resolution pixels) from a
    pixel centre to the nearest edge of the tile's rectangle. Value and weight
    are resampled together, and ``sum(weight * value) / sum(weight)`` over the
    tiles is the result, so a single tile gives plain interpolation and
    overlaps are feathered. Beyond the outermost pixel centres the value
    repeats the edge pixel while the weight falls to 0 over one pixel, so the
    mosaic's outer edge is not darkened. With an elastic
    field the maps are explicit (``cv2.remap``); with an affine only,
    ``cv2.warpAffine`` computes them (both quantise bilinear weights to
    1/32 pixel).
    """
    if scale < 1 or int(scale) != scale:
        raise ValueError(f"scale must be a positive integer, got {scale}")
    if order not in _INTERP:
        raise ValueError(f"order must be 0, 1 or 3, got {order}")
    if width < 0 or height < 0:
        raise ValueError(f"width and height must be >= 0, got {width} x {height}")
    acc = np.zeros((2, height, width), np.float32)
    half = (scale - 1) / 2.0
    cx0, cy0 = x0 + half, y0 + half
    boxes = tile_footprints(stitch, alignment) if stitch.tiles else np.zeros((0, 4))
    hits = [i for i, b in enumerate(boxes)
            if b[2] >= cx0 and b[0] <= cx0 + (width - 1) * scale
            and b[3] >= cy0 and b[1] <= cy0 + (height - 1) * scale]
    if hits and width and height:
        key = profile_digest(stitch.illumination)
        if alignment is not None and alignment.displacement is not None:
            sub = boxes[hits]
            c_a, c_b = _index_range(sub[:, 0].min(), sub[:, 2].max(), cx0, scale, width)
            r_a, r_b = _index_range(sub[:, 1].min(), sub[:, 3].max(), cy0, scale, height)
            xs = cx0 + scale * np.arange(c_a, c_b, dtype=np.float64)
            ys = cy0 + scale * np.arange(r_a, r_b, dtype=np.float64)
            sx, sy = _section_coords(alignment, xs, ys)
            for i in hits:
                _blend_tile(stitch, stitch.tiles[i], boxes[i], key, sx, sy, (c_a, r_a, cx0, cy0),
                            scale, _INTERP[order], acc[:, r_a:r_b, c_a:c_b])
        else:
            m = np.eye(2, 3) if alignment is None else alignment.affine.matrix
            for i in hits:
                _warp_tile(stitch, stitch.tiles[i], boxes[i], key, m, (cx0, cy0, width, height),
                           scale, _INTERP[order], acc)
    wsum = acc[1]
    covered = wsum > _MIN_WEIGHT
    out = np.zeros((height, width), np.float32)
    np.divide(acc[0], wsum, out=out, where=covered)
    wsum = np.where(covered, wsum, np.float32(0))
    if contrast is not None:
        gain, offset = contrast
        out[covered] = np.float32(gain) * out[covered] + np.float32(offset)
    return (out, wsum) if return_weight else out


def _warp_tile(stitch, t, box, key, m, grid, scale, flag, acc) -> None:
    """Add one tile's value and weight, warped by the affine ``m`` (aligned -> section), to ``acc``."""
    cx0, cy0, width, height = grid
    a, b = _index_range(box[0], box[2], cx0, scale, width)
    c, d = _index_range(box[1], box[3], cy0, scale, height)
    if a >= b or c >= d:
        return
    img = prepared_tile(t, stitch.illumination, key, scale, stitch.section)
    half = (scale - 1) / 2.0
    # Output pixel (a + i, c + j) -> reduced tile pixel, as a 2x3 map on (i, j).
    x, y = cx0 + scale * a, cy0 + scale * c
    u = (m[0, 0] * x + m[0, 1] * y + m[0, 2] - t.x - half) / scale + 1  # + 1: the tile's ring
    v = (m[1, 0] * x + m[1, 1] * y + m[1, 2] - t.y - half) / scale + 1
    inv = np.array([[m[0, 0], m[0, 1], u], [m[1, 0], m[1, 1], v]])
    for r0 in range(c, d, _MAX_MAP):
        for c0 in range(a, b, _MAX_MAP):
            r1, c1 = min(r0 + _MAX_MAP, d), min(c0 + _MAX_MAP, b)
            part = inv.copy()
            part[:, 2] += inv[:, 0] * (c0 - a) + inv[:, 1] * (r0 - c)
            val, w = (cv2.warpAffine(src, part, (c1 - c0, r1 - r0), flags=flag | cv2.WARP_INVERSE_MAP,
                                     borderMode=cv2.BORDER_CONSTANT, borderValue=0) for src in img)
            _accumulate(acc[:, r0:r1, c0:c1], val, w)


def _accumulate(acc: np.ndarray, val: np.ndarray, w: np.ndarray) -> None:
    """Add ``weight * value`` and ``weight`` of resampled values and weights to ``acc``."""
    acc[0] += val * w
    acc[1] += w


def _blend_tile(stitch, t, box, key, sx, sy, grid, scale, flag, acc) -> None:
    """Add one tile's value and weight, resampled at section points ``(sx, sy)``, to ``acc`` (a view)."""
    c_a, r_a, cx0, cy0 = grid
    n_r, n_c = sx.shape
    a, b = _index_range(box[0], box[2], cx0 + scale * c_a, scale, n_c)
    c, d = _index_range(box[1], box[3], cy0 + scale * r_a, scale, n_r)
    if a >= b or c >= d:
        return
    img = prepared_tile(t, stitch.illumination, key, scale, stitch.section)
    half = (scale - 1) / 2.0
    mx = np.empty((d - c, b - a), np.float32)
    my = np.empty((d - c, b - a), np.float32)
    # + scale before dividing: element [j + 1, k + 1] of the prepared tile is its pixel (k, j).
    np.subtract(sx[c:d, a:b], t.x + half - scale, out=mx, casting="unsafe")
    np.subtract(sy[c:d, a:b], t.y + half - scale, out=my, casting="unsafe")
    if scale != 1:
        mx /= np.float32(scale)
        my /= np.float32(scale)
    _accumulate(acc[:, c:d, a:b], *(_remap(src, mx, my, flag) for src in img))
