"""Map points between volume pixels, raw tile pixels and stage positions, through one version of the records.

Frames (see :mod:`stackbuild.transforms`): a volume point ``(z, y, x)`` at
level 0 is aligned point ``(origin_x + x, origin_y + y)`` of section
``first_section + z``; the section's alignment maps it to section pixels; a
tile placed at ``(t.x, t.y)`` (its pixel ``(0, 0)`` centre in section pixels)
holds section point ``p`` at tile pixel ``p - (t.x, t.y)``; the stage position
of a tile pixel is the tile's stage position (``t.stage_x, t.stage_y``, from
the tile manifest) plus the tile pixel. Where tiles overlap, the point is
given on the tile that sees it farthest from its edges (the one whose pixels
weigh most in the rendered volume).

Pure functions of records: no files, no Dask.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .records import Canvas, SectionAlignment, SectionStitch

#: Flags a located point may carry.
FLAGS = ("lost_section", "outside_volume", "no_tile", "outside_tissue")


@dataclass
class Located:
    """One point in all three frames (None where it has no meaning), with flags.

    ``z, y, x`` are level-0 volume pixels; ``tile_x, tile_y`` pixels of raw tile ``tile``;
    ``stage_x, stage_y`` stage positions in full-resolution pixels.
    """

    section: int
    z: float | None = None
    y: float | None = None
    x: float | None = None
    tile: str | None = None
    tile_x: float | None = None
    tile_y: float | None = None
    stage_x: float | None = None
    stage_y: float | None = None
    flags: list[str] = field(default_factory=list)


def _edge_distance(stitch: SectionStitch, p: np.ndarray) -> np.ndarray:
    """Return, per tile, how far section point ``p`` lies inside the tile's pixel area (negative: outside)."""
    x = np.array([t.x for t in stitch.tiles])
    y = np.array([t.y for t in stitch.tiles])
    w = np.array([t.width for t in stitch.tiles])
    h = np.array([t.height for t in stitch.tiles])
    dx = np.minimum(p[0] - (x - 0.5), (x + w - 0.5) - p[0])
    dy = np.minimum(p[1] - (y - 0.5), (y + h - 0.5) - p[1])
    return np.minimum(dx, dy)


def _best_tile(stitch: SectionStitch, p: np.ndarray) -> tuple[int, bool]:
    """Return the index of the tile that sees section point ``p`` best, and whether any tile covers it."""
    d = _edge_distance(stitch, p)
    k = int(np.argmax(d))
    return k, bool(d[k] > 0)


def _fill_tile(out: Located, stitch: SectionStitch, k: int, p: np.ndarray, covered: bool) -> None:
    t = stitch.tiles[k]
    out.tile = t.tile
    out.tile_x, out.tile_y = float(p[0] - t.x), float(p[1] - t.y)
    out.stage_x, out.stage_y = t.stage_x + out.tile_x, t.stage_y + out.tile_y
    if not covered:
        out.flags += ["no_tile", "outside_tissue"]
    elif "blank" in t.flags:
        out.flags.append("outside_tissue")


def _fill_volume(out: Located, canvas: Canvas, alignment: SectionAlignment | None, p: np.ndarray) -> None:
    a = p if alignment is None else alignment.section_to_aligned(p[None])[0]
    out.z = float(out.section - canvas.first_section)
    out.x, out.y = float(a[0] - canvas.origin_x), float(a[1] - canvas.origin_y)
    if not (-0.5 <= out.x < canvas.width - 0.5 and -0.5 <= out.y < canvas.height - 0.5
            and 0 <= out.z < canvas.depth):
        out.flags.append("outside_volume")


def from_volume(z: float, y: float, x: float, canvas: Canvas, stitch: SectionStitch | None,
                alignment: SectionAlignment | None) -> Located:
    """Return the point at level-0 volume pixel ``(z, y, x)`` (``z`` rounds to its plane) in every frame."""
    plane = int(round(z))
    out = Located(section=canvas.first_section + plane, z=float(plane), y=float(y), x=float(x))
    if not (-0.5 <= x < canvas.width - 0.5 and -0.5 <= y < canvas.height - 0.5 and 0 <= plane < canvas.depth):
        out.flags.append("outside_volume")
    if stitch is None or not stitch.tiles:
        out.flags.append("lost_section")
        return out
    a = np.array([x + canvas.origin_x, y + canvas.origin_y])
    p = a if alignment is None else alignment.aligned_to_section(a[None])[0]
    k, covered = _best_tile(stitch, p)
    _fill_tile(out, stitch, k, p, covered)
    return out


def from_tile(section: int, tile: str, tile_x: float, tile_y: float, canvas: Canvas,
              stitch: SectionStitch | None, alignment: SectionAlignment | None) -> Located:
    """Return raw-tile pixel ``(tile_x, tile_y)`` of ``tile`` in every frame.

    Raises
    ------
    KeyError
        If the section has no tile of that name.
    """
    out = Located(section=int(section))
    if stitch is None or not stitch.tiles:
        out.flags.append("lost_section")
        return out
    t = stitch.tile(tile)
    out.tile, out.tile_x, out.tile_y = t.tile, float(tile_x), float(tile_y)
    out.stage_x, out.stage_y = t.stage_x + tile_x, t.stage_y + tile_y
    if not (-0.5 <= tile_x < t.width - 0.5 and -0.5 <= tile_y < t.height - 0.5):
        out.flags += ["no_tile", "outside_tissue"]
    elif "blank" in t.flags:
        out.flags.append("outside_tissue")
    _fill_volume(out, canvas, alignment, np.array([t.x + tile_x, t.y + tile_y]))
    return out


def from_stage(section: int, stage_x: float, stage_y: float, canvas: Canvas, stitch: SectionStitch | None,
               alignment: SectionAlignment | None) -> Located:
    """Return stage position ``(stage_x, stage_y)`` of a section in every frame.

    The tile whose stage rectangle holds the position farthest from its edges is used; a
    position no tile's rectangle holds is placed through the nearest tile and flagged.
    """
    out = Located(section=int(section), stage_x=float(stage_x), stage_y=float(stage_y))
    if stitch is None or not stitch.tiles:
        out.flags.append("lost_section")
        return out
    sx = np.array([t.stage_x for t in stitch.tiles])
    sy = np.array([t.stage_y for t in stitch.tiles])
    w = np.array([t.width for t in stitch.tiles])
    h = np.array([t.height for t in stitch.tiles])
    d = np.minimum(np.minimum(stage_x - (sx - 0.5), (sx + w - 0.5) - stage_x),
                   np.minimum(stage_y - (sy - 0.5), (sy + h - 0.5) - stage_y))
    k = int(np.argmax(d))
    # Overlapping tiles disagree about a stage position by their stage errors: take the tile that
    # would be chosen for the section point it gives (so stage -> volume -> stage comes back).
    for c in np.argsort(-d):
        if d[c] <= 0:
            break
        tc = stitch.tiles[c]
        if _best_tile(stitch, np.array([tc.x + stage_x - tc.stage_x, tc.y + stage_y - tc.stage_y]))[0] == c:
            k = int(c)
            break
    t = stitch.tiles[k]
    tx, ty = stage_x - t.stage_x, stage_y - t.stage_y
    out.tile, out.tile_x, out.tile_y = t.tile, float(tx), float(ty)
    if d[k] <= 0:
        out.flags += ["no_tile", "outside_tissue"]
    elif "blank" in t.flags:
        out.flags.append("outside_tissue")
    _fill_volume(out, canvas, alignment, np.array([t.x + tx, t.y + ty]))
    return out
