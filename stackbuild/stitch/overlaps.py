"""Which tiles overlap, and where: nominal footprints from stage positions.

Boxes are integer pixel ranges ``(x0, y0, x1, y1)``, half-open
(``x0 <= x < x1``), in the pixel indices of one tile (or, for footprints, in
section pixels at the stage positions). A tile at stage position ``(sx, sy)``
with size ``w x h`` covers section pixels ``sx + [0, w)`` by ``sy + [0, h)``.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Overlap:
    """One pair of tiles whose nominal footprints overlap.

    Attributes
    ----------
    a, b : int
        Indices of the two tiles, ``a < b``.
    box_a, box_b : (int, int, int, int)
        The nominal overlap as ``(x0, y0, x1, y1)`` in the pixels of tile ``a``
        and of tile ``b``; both have the same size.
    pad_a, pad_b : (int, int, int, int)
        The overlap grown by the margin on every side and clipped to each
        tile: the strip kept from each tile, from which the overlap can be
        cut again once the true offset is known.
    """

    a: int
    b: int
    box_a: tuple[int, int, int, int]
    box_b: tuple[int, int, int, int]
    pad_a: tuple[int, int, int, int]
    pad_b: tuple[int, int, int, int]

    @property
    def size(self) -> tuple[int, int]:
        """``(width, height)`` of the nominal overlap."""
        x0, y0, x1, y1 = self.box_a
        return x1 - x0, y1 - y0


def _clip(box, width: int, height: int) -> tuple[int, int, int, int]:
    x0, y0, x1, y1 = box
    return max(0, x0), max(0, y0), min(width, x1), min(height, y1)


def find_overlaps(positions: np.ndarray, sizes: np.ndarray, min_overlap: int,
                  margin: int = 0) -> list[Overlap]:
    """Return every tile pair whose footprints may overlap by at least ``min_overlap`` px both ways.

    With stage errors the true overlap differs from the nominal one by up to
    ``margin``; a pair counts when its nominal overlap, grown by ``margin``,
    reaches ``min_overlap`` in both directions (a nominal overlap may then be
    empty, its box inverted: the strips, grown by ``margin``, still hold it).

    Parameters
    ----------
    positions : ndarray, shape (N, 2)
        Stage positions ``(x, y)`` of each tile's top-left pixel, section pixels.
    sizes : ndarray, shape (N, 2)
        ``(width, height)`` of each tile.
    min_overlap : int
        Smallest overlap width *and* height for a pair to count.
    margin : int
        How far (pixels) to grow each strip beyond the nominal overlap, within
        the tile (usually the largest expected stage error).

    Returns
    -------
    list of Overlap
        Sorted by ``(a, b)``.

    Notes
    -----
    Stage positions are rounded to whole pixels so that both boxes of a pair
    have the same size; the fractional part is carried by the pair's stage
    offset, not by the boxes.
    """
    pos = np.round(np.asarray(positions, dtype=np.float64)).astype(np.int64)
    size = np.asarray(sizes, dtype=np.int64)
    if pos.ndim != 2 or pos.shape[1] != 2 or size.shape != pos.shape:
        raise ValueError(f"positions and sizes must both be (N, 2), got {pos.shape} and {size.shape}")
    if min_overlap < 1:
        raise ValueError(f"min_overlap must be >= 1, got {min_overlap}")
    lo, hi = pos, pos + size
    out = []
    # One vectorised row per tile keeps memory linear; N is at most a few thousand.
    for i in range(len(pos) - 1):
        ox0 = np.maximum(lo[i, 0], lo[i + 1:, 0])
        oy0 = np.maximum(lo[i, 1], lo[i + 1:, 1])
        ox1 = np.minimum(hi[i, 0], hi[i + 1:, 0])
        oy1 = np.minimum(hi[i, 1], hi[i + 1:, 1])
        hit = np.flatnonzero((ox1 - ox0 + margin >= min_overlap) & (oy1 - oy0 + margin >= min_overlap))
        for k in hit:
            j = i + 1 + int(k)
            box = np.array([ox0[k], oy0[k], ox1[k], oy1[k]])
            grown = box + np.array([-margin, -margin, margin, margin])
            sa = np.r_[pos[i], pos[i]]
            sb = np.r_[pos[j], pos[j]]
            out.append(Overlap(
                i, j,
                tuple(int(v) for v in box - sa), tuple(int(v) for v in box - sb),
                _clip(tuple(int(v) for v in grown - sa), int(size[i, 0]), int(size[i, 1])),
                _clip(tuple(int(v) for v in grown - sb), int(size[j, 0]), int(size[j, 1])),
            ))
    return out


def neighbours(overlaps: list[Overlap], n_tiles: int) -> list[list[int]]:
    """Return, for each tile, the indices of the tiles it nominally overlaps."""
    near: list[list[int]] = [[] for _ in range(n_tiles)]
    for ov in overlaps:
        near[ov.a].append(ov.b)
        near[ov.b].append(ov.a)
    return near
