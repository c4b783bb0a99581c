"""Render a region of one section from its raw tiles through the stored transforms.

An output pixel is mapped backwards, ``aligned -> coarse -> section -> tile``
(see :mod:`stackbuild.transforms` for the frames and the pixel-centre
convention), each tile is resampled with :func:`cv2.remap`, and overlapping
tiles are blended with feathered weights (distance to the tile's edge),
normalised by their sum. Pixels that no tile covers are 0.

The sampler is a pure function of records and pixels: the tiles come from a
tile provider, ``tiles(tile, scale) -> (value, weight)`` (see
:class:`stackbuild.tiles.SectionTiles`, which reads and caches them, and
:func:`stackbuild.tiles.correct_tile` to build one from arrays).

Only tiles whose aligned-frame footprint meets the region are asked for. The
footprint of a tile is the affine image of its rectangle, widened by the
largest displacement of the elastic field (a point ``p`` maps to coarse
``p + d(p)``, so ``p`` lies within ``max |d|`` of the coarse footprint).
"""
from __future__ import annotations

import math

import cv2
import numpy as np

from .render.settings import INTERPOLATIONS
from .transforms.records import SectionAlignment, SectionStitch

_INTERP = {0: cv2.INTER_NEAREST, 1: cv2.INTER_LINEAR, 3: cv2.INTER_CUBIC}
_MAX_MAP = 16384
#: Blended weights below this (level-0 pixels of distance to a tile edge) count as uncovered:
#: only the outer rim of a mosaic, where cubic overshoot could make the ratio unstable.
_MIN_WEIGHT = 0.05  # cv2.remap handles maps up to SHRT_MAX per side; stay well below


def interpolation_order(name: str) -> int:
    """Return the spline order for a settings name (``"linear"`` -> 1, ``"cubic"`` -> 3, ``"nearest"`` -> 0)."""
    if name not in INTERPOLATIONS:
        raise ValueError(f"interpolation must be one of {sorted(INTERPOLATIONS)}, got {name!r}")
    return INTERPOLATIONS[name]


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


def exclusive_boxes(stitch: SectionStitch, alignment: SectionAlignment | None,
                    boxes: np.ndarray, scale: int = 1, which=None) -> dict:
    """Return ``{tile index: rectangle}`` for tiles ``which`` (all by default): an aligned-frame rectangle ``x0, y0, x1, y1`` only that tile reaches, or None.

    The rectangle lies inside the tile, at least ``scale + 1`` level-0 pixels from its
    edges (so the feather weight there is positive and the value never mixes with the
    border), and outside every other tile's footprint ``boxes`` (see :func:`tile_footprints`).
    It is conservative: pixels outside it are blended as usual. The rectangle is None when
    there is none.

    Notes
    -----
    The tile's image in the aligned frame is a parallelogram; the candidate rectangle spans
    the 2nd to 3rd smallest corner coordinates in x and in y, and is kept only if its
    corners map back inside the tile. Each other footprint that meets it is then cut away
    by whichever of the four sides keeps the larger rectangle. With an elastic field a
    point ``p`` maps to ``A (p + d(p))``, at most ``|A| max |d|`` (spectral norm of the
    affine's linear part; ``d`` is interpolated bilinearly, so never longer than its
    longest node vector) from ``A p``: the rectangle keeps that much more distance from
    the tile's edges, and the footprints already carry the field's reach.
    """
    which = range(len(stitch.tiles)) if which is None else which
    fwd = np.eye(2, 3) if alignment is None else alignment.affine.matrix  # aligned -> section
    back = np.linalg.inv(np.vstack([fwd, [0.0, 0.0, 1.0]]))[:2]
    pad = scale + 1.0
    if alignment is not None and alignment.displacement is not None:
        pad += float(np.linalg.norm(fwd[:, :2], 2)) * alignment.displacement.magnitude_stats()["max"]
    result = {}
    for i in which:
        t = stitch.tiles[i]
        lo = np.array([t.x + pad, t.y + pad])
        hi = np.array([t.x + t.width - 1 - pad, t.y + t.height - 1 - pad])
        if np.any(hi <= lo):
            result[i] = None
            continue
        quad = np.array([[lo[0], lo[1]], [hi[0], lo[1]], [lo[0], hi[1]], [hi[0], hi[1]]])
        q = quad @ back[:, :2].T + back[:, 2]
        xs, ys = np.sort(q[:, 0]), np.sort(q[:, 1])
        r = [xs[1], ys[1], xs[2], ys[2]]
        corners = np.array([[r[0], r[1]], [r[2], r[1]], [r[0], r[3]], [r[2], r[3]]])
        sec = corners @ fwd[:, :2].T + fwd[:, 2]
        eps = 1e-6
        if r[2] <= r[0] or r[3] <= r[1] or np.any(sec < lo - eps) or np.any(sec > hi + eps):
            result[i] = None
            continue
        meets = (boxes[:, 0] <= r[2]) & (boxes[:, 2] >= r[0]) & (boxes[:, 1] <= r[3]) & (boxes[:, 3] >= r[1])
        meets[i] = False
        result[i] = _cut_away(r, boxes[meets])
    return result


def _cut_away(r: list, others: np.ndarray):
    """Shrink rectangle ``r`` until no box of ``others`` meets it (closed intervals); None if nothing is left."""
    for bx0, by0, bx1, by1 in others:
        if bx0 > r[2] or bx1 < r[0] or by0 > r[3] or by1 < r[1]:
            continue
        cuts = [[bx1 + 1e-6, r[1], r[2], r[3]], [r[0], r[1], bx0 - 1e-6, r[3]],
                [r[0], by1 + 1e-6, r[2], r[3]], [r[0], r[1], r[2], by0 - 1e-6]]
        r = max(cuts, key=lambda k: max(k[2] - k[0], 0.0) * max(k[3] - k[1], 0.0))
        if r[2] <= r[0] or r[3] <= r[1]:
            return None
    return r


def _remap(img: np.ndarray, mx: np.ndarray, my: np.ndarray, flag: int, out: np.ndarray | None = None) -> np.ndarray:
    """Return ``img`` resampled at ``(mx, my)`` (float32), written into ``out`` (may be a strided view) if given."""
    if out is None:
        out = np.empty(mx.shape, np.float32)
    for r0 in range(0, mx.shape[0], _MAX_MAP):
        for c0 in range(0, mx.shape[1], _MAX_MAP):
            sl = np.s_[r0:r0 + _MAX_MAP, c0:c0 + _MAX_MAP]
            dst = out[sl]
            got = cv2.remap(img, mx[sl], my[sl], flag, dst=dst, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
            if got is not dst:  # OpenCV reallocated (it should not): keep the result anyway
                dst[...] = got
    return out


def _direct_then_blend(acc, box, inner, val_img, w_img, sample):
    """Return ``(direct, blended)``: the output rectangles a tile wrote straight in and those it blended.

    ``box`` (a, b, c, d) is the tile's part of ``acc`` (x from a to b, y from c to d); ``inner``
    (e0, e1, f0, f1, relative to the box) is where it is the only tile: its value is sampled straight
    into ``acc[0]`` there (OpenCV writes into the strided view itself: no temporary, no copy); the
    strips around it get value and weight, accumulated. ``sample(img, (r0, r1, c0, c1), out=None)``
    samples a tile image at the rows and columns of the box given.
    """
    a, b, c, d = box
    e0, e1, f0, f1 = inner
    direct = None
    if e0 < e1 and f0 < f1:
        direct = (c + f0, c + f1, a + e0, a + e1)
        sample(val_img, (f0, f1, e0, e1), out=acc[0, c + f0:c + f1, a + e0:a + e1])
        strips = [(0, f0, 0, b - a), (f1, d - c, 0, b - a), (f0, f1, 0, e0), (f0, f1, e1, b - a)]
    else:
        strips = [(0, d - c, 0, b - a)]
    blended = []
    for r0, r1, c0, c1 in strips:
        if r0 < r1 and c0 < c1:
            rect = (r0, r1, c0, c1)
            _accumulate(acc[:, c + r0:c + r1, a + c0:a + c1], sample(val_img, rect), sample(w_img, rect))
            blended.append((c + r0, c + r1, a + c0, a + c1))
    return direct, blended


def _direct_box(only, x0, y0, scale, nx, ny, box):
    """Return ``(e0, e1, f0, f1)``: the part of a tile's output ``box`` (a, b, c, d) inside its exclusive
    rectangle ``only``, relative to the box (empty, all 0, when ``only`` is None)."""
    if only is None:
        return 0, 0, 0, 0
    a, b, c, d = box
    e0, e1 = _index_range(only[0], only[2], x0, scale, nx)
    f0, f1 = _index_range(only[1], only[3], y0, scale, ny)
    return max(e0, a) - a, min(e1, b) - a, max(f0, c) - c, min(f1, d) - c


def _index_range(lo: float, hi: float, start: float, step: int, n: int) -> tuple[int, int]:
    """Return output indices ``[a, b)`` whose centres ``start + i*step`` lie in ``[lo, hi]``."""
    a = max(0, math.ceil((lo - start) / step))
    b = min(n, math.floor((hi - start) / step) + 1)
    return a, b


def render_region(stitch: SectionStitch, alignment: SectionAlignment | None, x0: int, y0: int,
                  width: int, height: int, scale: int = 1, order: int = 1,
                  contrast: tuple[float, float] | None = None, return_weight: bool = False, *, tiles):
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
    tiles : callable
        The tile provider: ``tiles(tile, scale)`` returns the tile (a ``TilePlacement``
        of ``stitch``) corrected and reduced by ``scale``, and its feather weight, both
        with a one-pixel ring (see :func:`stackbuild.tiles.prepared_tile`). A provider with a
        true ``windows`` attribute is asked only for the part a region reads,
        ``tiles(tile, scale, window=(r0, r1, c0, c1))`` (rows and columns of the ringed tile),
        so a large tile need not be read whole for each region it meets.

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
    mosaic's outer edge is not darkened. Where only one tile reaches (see
    :func:`exclusive_boxes`; weight not asked for) the blend is the value itself,
    so it is stored directly and the weight is not resampled there: this saves about
    half the resampling work. With an elastic
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
        if alignment is not None and alignment.displacement is not None:
            sub = boxes[hits]
            c_a, c_b = _index_range(sub[:, 0].min(), sub[:, 2].max(), cx0, scale, width)
            r_a, r_b = _index_range(sub[:, 1].min(), sub[:, 3].max(), cy0, scale, height)
            xs = cx0 + scale * np.arange(c_a, c_b, dtype=np.float64)
            ys = cy0 + scale * np.arange(r_a, r_b, dtype=np.float64)
            sx, sy, ref = section_grid(alignment, xs, ys)
            only = {} if return_weight else exclusive_boxes(stitch, alignment, boxes, scale, hits)
            parts = [_blend_tile(tiles, stitch.tiles[i], boxes[i], sx, sy, ref, (c_a, r_a, cx0, cy0),
                                 scale, _INTERP[order], acc[:, r_a:r_b, c_a:c_b], only.get(i)) for i in hits]
            if not return_weight:
                return _normalise_parts(acc, [_shifted(part, r_a, c_a) for part in parts], contrast)
        else:
            m = np.eye(2, 3) if alignment is None else alignment.affine.matrix
            # The weight is only needed where tiles overlap, unless the caller wants it.
            only = {} if return_weight else exclusive_boxes(stitch, alignment, boxes, scale, hits)
            parts = [_warp_tile(tiles, stitch.tiles[i], boxes[i], m, (cx0, cy0, width, height),
                                scale, _INTERP[order], acc, only.get(i)) for i in hits]
            if not return_weight:
                return _normalise_parts(acc, parts, contrast)
    wsum = acc[1]
    covered = wsum > _MIN_WEIGHT
    out = np.zeros((height, width), np.float32)
    np.divide(acc[0], wsum, out=out, where=covered)
    if return_weight:
        wsum = np.where(covered, wsum, np.float32(0))
    if contrast is not None:
        gain, offset = contrast
        out[covered] = np.float32(gain) * out[covered] + np.float32(offset)
    return (out, wsum) if return_weight else out


def _normalise_parts(acc: np.ndarray, parts: list, contrast) -> np.ndarray:
    """Return ``acc[0] / acc[1]`` (0 where the weight is too small), computed only where tiles were blended.

    ``parts`` holds, per tile, ``(direct, blended)`` from :func:`_warp_tile`: a rectangle of
    ``acc[0]`` that already holds final values (or None) and a list of rectangles that hold
    weighted sums. Blended rectangles of neighbouring tiles overlap, so each normalisation
    leaves weight 1 (covered) or 0 (not), which makes a second one a no-op: ``v / 1 == v``.
    """
    value, wsum = acc
    for _, blended in parts:
        for r0, r1, c0, c1 in blended:
            v, w = value[r0:r1, c0:c1], wsum[r0:r1, c0:c1]
            ok = w > _MIN_WEIGHT
            # A plain divide then a masked zero is about twice as fast as a masked divide.
            with np.errstate(divide="ignore", invalid="ignore"):
                np.divide(v, w, out=v)
            np.copyto(v, 0.0, where=~ok)
            w[...] = ok
    if contrast is not None:
        covered = wsum > 0.5
        for direct, _ in parts:
            if direct is not None:
                covered[direct[0]:direct[1], direct[2]:direct[3]] = True
        gain, offset = contrast
        value[covered] = np.float32(gain) * value[covered] + np.float32(offset)
    return value


def _warp_tile(tiles, t, box, m, grid, scale, flag, acc, only=None):
    """Add one tile's value and weight, warped by the affine ``m`` (aligned -> section), to ``acc``.

    ``only`` is the tile's exclusive rectangle (aligned frame, see :func:`exclusive_boxes`) or None.
    Inside it no other tile reaches, so ``weight * value / weight`` would be the value itself:
    the value is stored in ``acc[0]`` as final and the weight image is resampled only outside it.
    Returns ``(direct, blended)``: that rectangle of ``acc`` (``r0, r1, c0, c1``, or None) and
    the rectangles holding weighted sums.
    """
    cx0, cy0, width, height = grid
    a, b = _index_range(box[0], box[2], cx0, scale, width)
    c, d = _index_range(box[1], box[3], cy0, scale, height)
    if a >= b or c >= d:
        return None, []
    half = (scale - 1) / 2.0
    # Output pixel (a + i, c + j) -> reduced tile pixel, as a 2x3 map on (i, j).
    x, y = cx0 + scale * a, cy0 + scale * c
    u = (m[0, 0] * x + m[0, 1] * y + m[0, 2] - t.x - half) / scale + 1  # + 1: the tile's ring
    v = (m[1, 0] * x + m[1, 1] * y + m[1, 2] - t.y - half) / scale + 1
    inv = np.array([[m[0, 0], m[0, 1], u], [m[1, 0], m[1, 1], v]])
    if getattr(tiles, "windows", False):
        corners = np.array([[0, 0, 1], [b - a - 1, 0, 1], [0, d - c - 1, 1], [b - a - 1, d - c - 1, 1]], float)
        src = corners @ inv.T  # (col, row) of the ringed tile
        window = _window(src[:, 1].min(), src[:, 1].max(), src[:, 0].min(), src[:, 0].max(), t, scale)
        if window is None:
            return None, []
        val_img, w_img = tiles(t, scale, window=window)
        inv[0, 2] -= window[2]
        inv[1, 2] -= window[0]
    else:
        val_img, w_img = tiles(t, scale)
    inner = _direct_box(only, cx0, cy0, scale, width, height, (a, b, c, d))
    return _direct_then_blend(acc, (a, b, c, d), inner, val_img, w_img,
                              lambda img, rect, out=None: _warp_rect(img, inv, rect, flag, out=out))


def _warp_rect(src: np.ndarray, inv: np.ndarray, rect, flag: int, out: np.ndarray | None = None) -> np.ndarray:
    """Return rows ``r0:r1``, columns ``c0:c1`` of ``src`` warped by the 2x3 output -> source map ``inv``.

    The result is written into ``out`` (float32, ``(r1 - r0, c1 - c0)``, may be a strided view) if given.
    """
    r0, r1, c0, c1 = rect
    if out is None:
        out = np.empty((r1 - r0, c1 - c0), np.float32)
    for i in range(r0, r1, _MAX_MAP):
        for j in range(c0, c1, _MAX_MAP):
            i1, j1 = min(i + _MAX_MAP, r1), min(j + _MAX_MAP, c1)
            part = inv.copy()
            part[:, 2] += inv[:, 0] * j + inv[:, 1] * i
            dst = out[i - r0:i1 - r0, j - c0:j1 - c0]
            got = cv2.warpAffine(src, part, (j1 - j, i1 - i), dst=dst, flags=flag | cv2.WARP_INVERSE_MAP,
                                 borderMode=cv2.BORDER_CONSTANT, borderValue=0)
            if got is not dst:  # OpenCV reallocated (it should not): keep the result anyway
                dst[...] = got
    return out


#: Ringed-tile pixels kept beyond the mapped extent of a region on each side: the taps of
#: bicubic interpolation reach 1 below and 2 above a source point, plus OpenCV's rounding.
_WINDOW_MARGIN = 3


def _window(r_lo: float, r_hi: float, c_lo: float, c_hi: float, t, scale: int):
    """Return the window ``(r0, r1, c0, c1)`` of the ringed, reduced tile that source points in the given ranges read, or None.

    The ranges are the least and greatest (row, column) a region maps to; the window adds
    :data:`_WINDOW_MARGIN` pixels on each side and is clipped to the ringed tile, so
    resampling the window gives the same pixels as resampling the whole tile.
    """
    if not all(map(math.isfinite, (r_lo, r_hi, c_lo, c_hi))):
        return None
    hh, ww = -(-t.height // scale) + 2, -(-t.width // scale) + 2
    r0 = max(0, math.floor(r_lo) - _WINDOW_MARGIN)
    r1 = min(hh, math.floor(r_hi) + _WINDOW_MARGIN + 1)
    c0 = max(0, math.floor(c_lo) - _WINDOW_MARGIN)
    c1 = min(ww, math.floor(c_hi) + _WINDOW_MARGIN + 1)
    if r0 >= r1 or c0 >= c1:
        return None
    return r0, r1, c0, c1


def _accumulate(acc: np.ndarray, val: np.ndarray, w: np.ndarray) -> None:
    """Add ``weight * value`` and ``weight`` of resampled values and weights to ``acc`` (``val`` is overwritten)."""
    val *= w
    acc[0] += val
    acc[1] += w


def _axis_weights(coords: np.ndarray, origin: float, spacing: float, n: int):
    """Return the node index below each coordinate and the fraction towards the next, clamped to the nodes.

    The same rule as :meth:`stackbuild.transforms.DisplacementField.displacement_grid`.
    """
    g = np.clip((coords - origin) / spacing, 0, n - 1)
    i = np.minimum(np.floor(g).astype(np.intp), max(n - 2, 0))
    return i, np.minimum(i + 1, n - 1), (g - i).astype(np.float32)


def section_grid(alignment: SectionAlignment, xs: np.ndarray, ys: np.ndarray):
    """Return the section-frame points of the aligned grid ``xs`` x ``ys`` as float32 offsets from a reference point.

    Returns ``(sx, sy, (rx, ry))``: the points are ``(rx + sx, ry + sy)``, shape
    ``(len(ys), len(xs))``, the same points as
    :meth:`~stackbuild.transforms.SectionAlignment.aligned_to_section_grid` (float rounding
    apart), where ``(rx, ry)`` is the whole pixel nearest the grid's first point, so the
    offsets stay small and float32 keeps them to well under 1/32 px.

    Notes
    -----
    The affine ``A`` is linear, so ``A (p + d(p))`` is ``A p`` plus the bilinear
    interpolation of the nodes ``A_lin d`` (a linear map of bilinearly interpolated
    vectors is the bilinear interpolation of the mapped vectors). The nodes are mapped
    once, interpolated along x for every node row together with the per-column part of
    ``A p``, and the full grid is made with one weighted sum of two gathered rows per
    output row plus the per-row part: a few passes over float32 instead of float64
    temporaries of the whole grid.
    """
    m = alignment.affine.matrix
    x0, y0 = float(xs[0]), float(ys[0])
    ref = (round(m[0, 0] * x0 + m[0, 1] * y0 + m[0, 2]), round(m[1, 0] * x0 + m[1, 1] * y0 + m[1, 2]))
    dxs, dys = xs - x0, ys - y0
    f = alignment.displacement
    ny, nx = f.vectors.shape[:2]
    ix, ix1, fx = _axis_weights(xs, f.origin[0], f.spacing, nx)
    iy, iy1, fy = _axis_weights(ys, f.origin[1], f.spacing, ny)
    v = f.vectors.astype(np.float64)
    out = []
    for k in range(2):
        nodes = m[k, 0] * v[..., 0] + m[k, 1] * v[..., 1]
        rows = nodes[:, ix] * (1 - fx) + nodes[:, ix1] * fx + m[k, 0] * dxs
        rows = rows.astype(np.float32)
        lo = np.take(rows, iy, axis=0)
        lo *= (1 - fy)[:, None]
        hi = np.take(rows, iy1, axis=0)
        hi *= fy[:, None]
        lo += hi
        lo += (m[k, 1] * dys + (m[k, 0] * x0 + m[k, 1] * y0 + m[k, 2] - ref[k])).astype(np.float32)[:, None]
        out.append(lo)
    return out[0], out[1], ref


def _shifted(part, dr: int, dc: int):
    """Return a :func:`_blend_tile` result ``(direct, blended)`` with its rectangles moved by ``dr`` rows, ``dc`` columns."""
    direct, blended = part

    def move(r):
        return (r[0] + dr, r[1] + dr, r[2] + dc, r[3] + dc)
    return (None if direct is None else move(direct)), [move(r) for r in blended]


def _blend_tile(tiles, t, box, sx, sy, ref, grid, scale, flag, acc, only=None):
    """Add one tile's value and weight, resampled at section points ``ref + (sx, sy)``, to ``acc`` (a view).

    ``only`` is the tile's exclusive rectangle (aligned frame, see :func:`exclusive_boxes`) or
    None; inside it the value is stored as final and the weight is not resampled (as in
    :func:`_warp_tile`). Returns ``(direct, blended)``, rectangles ``r0, r1, c0, c1`` of ``acc``.
    """
    c_a, r_a, cx0, cy0 = grid
    n_r, n_c = sx.shape
    gx0, gy0 = cx0 + scale * c_a, cy0 + scale * r_a
    a, b = _index_range(box[0], box[2], gx0, scale, n_c)
    c, d = _index_range(box[1], box[3], gy0, scale, n_r)
    if a >= b or c >= d:
        return None, []
    half = (scale - 1) / 2.0
    bx, by = sx[c:d, a:b], sy[c:d, a:b]
    r0 = c0 = 0
    if getattr(tiles, "windows", False):
        # + 1 after dividing: element [j + 1, k + 1] of the prepared tile is its pixel (k, j).
        oy, ox = ref[1] - t.y - half, ref[0] - t.x - half
        window = _window((float(by.min()) + oy) / scale + 1, (float(by.max()) + oy) / scale + 1,
                         (float(bx.min()) + ox) / scale + 1, (float(bx.max()) + ox) / scale + 1, t, scale)
        if window is None:
            return None, []
        r0, c0 = window[0], window[2]
        val_img, w_img = tiles(t, scale, window=window)
    else:
        val_img, w_img = tiles(t, scale)
    mx = np.empty((d - c, b - a), np.float32)
    my = np.empty((d - c, b - a), np.float32)
    # + scale before dividing: element [j + 1, k + 1] of the prepared tile is its pixel (k, j).
    np.subtract(bx, t.x + half - scale + c0 * scale - ref[0], out=mx, casting="unsafe")
    np.subtract(by, t.y + half - scale + r0 * scale - ref[1], out=my, casting="unsafe")
    if scale != 1:
        mx /= np.float32(scale)
        my /= np.float32(scale)
    inner = _direct_box(only, gx0, gy0, scale, n_c, n_r, (a, b, c, d))

    def sample(img, rect, out=None):
        sub = np.s_[rect[0]:rect[1], rect[2]:rect[3]]
        return _remap(img, mx[sub], my[sub], flag, out=out)

    return _direct_then_blend(acc, (a, b, c, d), inner, val_img, w_img, sample)
