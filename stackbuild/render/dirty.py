"""Which parts of the volume a change of transforms touches: aligned-frame boxes -> shards per level.

A section's rendering depends on its tile placements and intensity corrections,
its illumination profile, its alignment (affine and elastic field) and, with
``contrast``, its intensity range. When only some tiles of a section changed
(replaced, added, removed, moved or re-corrected), the pixels that can change
lie inside the aligned-frame footprints of those tiles, old and new, and of
the tiles that overlap them (an overlapping neighbour's blending and its
exclusive fast-path rectangle are cut by the changed tile's footprint; see
:func:`stackbuild.sampler.exclusive_boxes`). Any other change makes the
whole section dirty.

Shards are addressed ``(i, j)`` = (row, column) of the shard grid of a level;
level ``n + 1`` shard ``(i, j)`` is made from level ``n`` shards
``(2i .. 2i+1, 2j .. 2j+1)``.
"""
from __future__ import annotations

import math

import numpy as np

from ..transforms.records import Canvas, SectionAlignment, SectionStitch
from ..sampler import tile_footprints

_TILE_KEYS = ("path", "width", "height", "x", "y", "gain", "offset")

Box = tuple[float, float, float, float]


def same_alignment(a: SectionAlignment | None, b: SectionAlignment | None) -> bool:
    """Return whether two stored alignments map every pixel alike (affine and field equal; both absent counts)."""
    if a is None or b is None:
        return a is b
    if not np.array_equal(a.affine.matrix, b.affine.matrix):
        return False
    da, db = a.displacement, b.displacement
    if da is None or db is None:
        return da is db
    return da.origin == db.origin and da.spacing == db.spacing and np.array_equal(da.vectors, db.vectors)


def _same_illumination(a: SectionStitch, b: SectionStitch) -> bool:
    if a.illumination_step != b.illumination_step or a.dtype != b.dtype:
        return False
    if a.illumination is None or b.illumination is None:
        return a.illumination is None and b.illumination is None
    return a.illumination.shape == b.illumination.shape and np.array_equal(a.illumination, b.illumination)


def _whole(stitch: SectionStitch | None, alignment: SectionAlignment | None) -> list[Box]:
    if stitch is None or not stitch.tiles:
        return []
    b = tile_footprints(stitch, alignment)
    return [(float(b[:, 0].min()), float(b[:, 1].min()), float(b[:, 2].max()), float(b[:, 3].max()))]


def _meets(boxes: np.ndarray, box) -> np.ndarray:
    return (boxes[:, 0] <= box[2]) & (boxes[:, 2] >= box[0]) & (boxes[:, 1] <= box[3]) & (boxes[:, 3] >= box[1])


def tile_neighbourhood(stitch: SectionStitch | None, alignment: SectionAlignment | None,
                      names) -> list[Box]:
    """Return the aligned-frame footprints of the tiles ``names`` of a section and of every tile they meet.

    What a change of those tiles' pixels can reach: their own footprints and, through
    blending, those of the tiles overlapping them.
    """
    names = set(names)
    if not names or stitch is None or not stitch.tiles:
        return []
    boxes = tile_footprints(stitch, alignment)
    hit = np.zeros(len(boxes), bool)
    for i, t in enumerate(stitch.tiles):
        if t.tile in names:
            hit |= _meets(boxes, boxes[i])
    return [tuple(map(float, b)) for b in boxes[hit]]


def changed_boxes(old: tuple[SectionStitch | None, SectionAlignment | None],
                  new: tuple[SectionStitch | None, SectionAlignment | None], *,
                  range_changed: bool = False) -> tuple[list[Box], bool]:
    """Return the aligned-frame boxes (pixel edges) whose pixels may differ between two versions of a section.

    Parameters
    ----------
    old, new : (SectionStitch or None, SectionAlignment or None)
        The section's records before and after.
    range_changed : bool
        The section's contrast range changed (every pixel may change).

    Returns
    -------
    boxes : list of (x0, y0, x1, y1)
        Empty when nothing that reaches the pixels changed.
    whole : bool
        True when the whole section is dirty (alignment, illumination, pixel type or range changed).
    """
    (os_, oa), (ns, na) = old, new
    if os_ is None or ns is None or not os_.tiles or not ns.tiles:
        return _whole(os_, oa) + _whole(ns, na), True
    if range_changed or not same_alignment(oa, na) or not _same_illumination(os_, ns):
        return _whole(os_, oa) + _whole(ns, na), True
    changed = changed_tiles(os_, ns)
    if not changed:
        return [], False
    ob, nb = tile_footprints(os_, oa), tile_footprints(ns, na)
    core = _named(os_, ob, changed) + _named(ns, nb, changed)
    hit_old, hit_new = np.zeros(len(ob), bool), np.zeros(len(nb), bool)
    for box in core:
        hit_old |= _meets(ob, box)
        hit_new |= _meets(nb, box)
    return core + [tuple(map(float, b)) for b in ob[hit_old]] + [tuple(map(float, b)) for b in nb[hit_new]], False


def changed_tiles(before: SectionStitch, after: SectionStitch) -> set[str]:
    """Return the tiles added, removed, or whose pixel-relevant record (file, size, place, gain) differs."""
    old, new = {t.tile: t for t in before.tiles}, {t.tile: t for t in after.tiles}
    return {name for name in old.keys() | new.keys()
            if name not in old or name not in new
            or any(getattr(old[name], k) != getattr(new[name], k) for k in _TILE_KEYS)}


def tile_boxes(stitch: SectionStitch, alignment: SectionAlignment | None, names) -> list[Box]:
    """Return the aligned-frame footprints of the tiles ``names`` of a section."""
    return _named(stitch, tile_footprints(stitch, alignment), set(names))


def _named(stitch: SectionStitch, boxes: np.ndarray, names: set) -> list[Box]:
    return [tuple(map(float, boxes[i])) for i, t in enumerate(stitch.tiles) if t.tile in names]


def canvas_pixels(box: Box, canvas: Canvas) -> tuple[int, int, int, int] | None:
    """Return the level-0 canvas pixels ``(c0, r0, c1, r1)`` (inclusive) an aligned-frame box can change, or None.

    The box's edges are widened by one pixel each way (a bilinear sample reaches the next pixel
    centre), then clipped to the canvas; None when nothing of it is on the canvas.
    """
    x0, y0, x1, y1 = box
    c0 = max(0, math.floor(x0 - canvas.origin_x - 1))
    c1 = min(canvas.width - 1, math.ceil(x1 - canvas.origin_x + 1))
    r0 = max(0, math.floor(y0 - canvas.origin_y - 1))
    r1 = min(canvas.height - 1, math.ceil(y1 - canvas.origin_y + 1))
    return None if c1 < c0 or r1 < r0 else (c0, r0, c1, r1)


def level0_shards(boxes: list[Box], canvas: Canvas, block: int) -> set[tuple[int, int]]:
    """Return the level-0 shards ``(i, j)`` (edge ``block`` pixels) that aligned-frame ``boxes`` meet (:func:`canvas_pixels`)."""
    ny, nx = math.ceil(canvas.height / block), math.ceil(canvas.width / block)
    out = set()
    for box in boxes:
        pixels = canvas_pixels(box, canvas)
        if pixels is None:
            continue
        c0, r0, c1, r1 = pixels
        for i in range(r0 // block, min(ny - 1, r1 // block) + 1):
            for j in range(c0 // block, min(nx - 1, c1 // block) + 1):
                out.add((i, j))
    return out


def all_shards(shape: tuple[int, int], block: int) -> set[tuple[int, int]]:
    """Return every shard ``(i, j)`` of a level of ``shape = (height, width)``."""
    return {(i, j) for i in range(math.ceil(shape[0] / block)) for j in range(math.ceil(shape[1] / block))}


def pyramid_shards(level0: set[tuple[int, int]], shapes: list[tuple[int, int]], block: int,
                   extra: dict[int, set] | None = None) -> list[set[tuple[int, int]]]:
    """Return the dirty shards of every level: level 0's, and the parents of each level's dirty shards.

    ``extra`` adds shards of a level (``{level: {(i, j), ...}}``) that are dirty for another reason
    (a level the volume did not have before); their parents follow.
    """
    extra = extra or {}
    out = [set(level0) | set(extra.get(0, ()))]
    for n in range(1, len(shapes)):
        grid = all_shards(shapes[n], block)
        out.append(({(i // 2, j // 2) for i, j in out[-1]} | set(extra.get(n, ()))) & grid)
    return out
