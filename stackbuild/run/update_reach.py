"""Can re-imaged tiles reach their section's alignment? Compare the new pixels with the volume's old ones.

A section's alignment is a function of its pixels only. When a tile is imaged
again (refocused, a dust speck gone) and placed, with its untouched
neighbours held, in the section's old frame, the section usually shows the
same content where it showed it before. Then solving the alignment again
would move the section by no more than the noise of the solve, which an
update discards anyway (a held alignment is kept unless the re-solve moves it
by more than the update's ``hold_within`` tolerance).

So before any re-solve the update renders, in the aligned frame through the
section's current alignment, the footprint of every replaced tile with the
new records, reads the same pixels of the volume as it is (rendered from the
old records), and compares them block by block: the project's one sub-pixel
estimator (:func:`stackbuild.align.blockmatch.match_block_pairs`, all blocks of
a tile in one batch) gives each block's residual shift and the normalised
cross-correlation of the two blocks says whether they show the same thing. If every block moved by at
most the tolerance and correlates at least :data:`SAME_CONTENT_NCC`, the
change cannot reach the alignment beyond the tolerance and the section keeps
it without a re-solve; otherwise (or for tiles added where there were none,
for a tile whose quality flags changed, out of focus, blank or saturated, or
when no block has texture to measure) the update solves its window again.

One task per replaced tile: it holds the tile's footprint twice (the volume's old pixels and the new
ones rendered, in the tile's dtype: 2 x 32 MB at 4096 x 4096 px of 16 bits), the blocks of one
:data:`COMPARE_BATCH` as float32 and the estimator's working set for them (measured: 95 MB traced for
64 blocks of 128 px, the estimator's batch at that block size); its peak does not grow with the tile.

References
----------
Kuglin, C. D. & Hines, D. C. (1975). The phase correlation image alignment method.
Proc. IEEE Int. Conf. Cybernetics and Society, 163-165 (phase correlation).
Guizar-Sicairos, M., Thurman, S. T. & Fienup, J. R. (2008). Efficient subpixel image
registration algorithms. Optics Letters 33:156-158. doi:10.1364/OL.33.000156 (the sub-pixel
peak the estimator evaluates).
"""
from __future__ import annotations

import math
from dataclasses import asdict
from pathlib import Path

import numpy as np

#: Normalised cross-correlation at or above which an old and a new block show the same content.
#: Rule of thumb (no source): EM-like texture imaged twice with independent noise of a few grey
#: levels correlates above 0.9; a defocused or dust-covered block against a sharp one falls well below.
SAME_CONTENT_NCC = 0.8
#: Edge of the compared blocks (level-0 px) and the least grey-level spread a block needs to be measured.
BLOCK = 128
MIN_STD = 2.0
#: Largest shift (level-0 px) searched between the old and the new pixels of a block.
MAX_SHIFT = 8
#: Blocks handed to the estimator at once: what a task holds beside the two footprints is this many
#: blocks' float32 copies (2 x 32 MB at 128 px) and the estimator's own batch, whatever the tile's size.
COMPARE_BATCH = 256
#: Stitch flags that say what a tile shows, as opposed to where it is.
QUALITY_FLAGS = frozenset({"out_of_focus", "blank", "saturated"})


def compare_blocks(old: np.ndarray, new: np.ndarray, block: int = BLOCK, min_std: float = MIN_STD,
                   max_shift: int = MAX_SHIFT) -> list[tuple[float, float]]:
    """Return ``(shift length px, ncc)`` of every textured ``block x block`` block of two same-size images.

    The shift is that of ``new`` against ``old``, measured by the project's one sub-pixel
    estimator (:func:`stackbuild.align.blockmatch.match_block_pairs`), :data:`COMPARE_BATCH`
    blocks per call; NaN where it made no match (the content moved beyond ``max_shift`` or is
    not the same). The correlation is the plain normalised cross-correlation of the two blocks as
    they lie. Blocks where either image's standard deviation is below ``min_std`` (margin, blank
    resin) are left out.
    """
    from ..align.blockmatch import match_block_pairs

    if old.shape != new.shape or old.ndim != 2:
        raise ValueError(f"two 2-D images of one shape expected, got {old.shape} and {new.shape}")
    h, w = old.shape
    ny, nx = max(1, h // block), max(1, w // block)
    by, bx = min(block, h), min(block, w)
    oy, ox = (h - ny * by) // 2, (w - nx * bx) // 2
    corners, nccs = [], []
    for i in range(ny):
        for j in range(nx):
            y0, x0 = oy + i * by, ox + j * bx
            a = old[y0:y0 + by, x0:x0 + bx].astype(np.float32)
            b = new[y0:y0 + by, x0:x0 + bx].astype(np.float32)
            if min(a.shape) < 2 * max_shift + 8 or a.std() < min_std or b.std() < min_std:
                continue
            a0, b0 = a - a.mean(), b - b.mean()
            nccs.append(float((a0 * b0).sum() / math.sqrt(float((a0 * a0).sum()) * float((b0 * b0).sum()))))
            corners.append((y0, x0))
    def cut(img: np.ndarray, part: list) -> np.ndarray:
        return np.stack([img[y:y + by, x:x + bx] for y, x in part]).astype(np.float32)

    shifts = []
    for k in range(0, len(corners), COMPARE_BATCH):
        part = corners[k:k + COMPARE_BATCH]
        shifts += list(match_block_pairs(cut(old, part), cut(new, part), int(max_shift)).shifts)
    return [(float(math.hypot(*d)), c) for d, c in zip(shifts, nccs)]


def _tile_task(job: tuple) -> dict:
    """One replaced tile: its footprint rendered from the current records against the stored volume."""
    from ..render.lazy import RenderPlan, render_block
    from ..render.levelread import StoredArray
    from ..render.settings import RenderSettings
    from ..transforms.records import Canvas

    root, z, box, canvas_doc, settings_doc = job
    canvas = Canvas.from_json(canvas_doc)
    plan = RenderPlan.from_canvas(Path(root) / "transforms", canvas, RenderSettings(**settings_doc))
    y0, y1, x0, x1 = box
    new = render_block(plan, z, y0, y1, x0, x1)[0]
    level0 = Path(root) / "volume.zarr" / "em" / "0"
    stored = StoredArray.open(level0)  # the render's layout read without zarr-python, else through zarr
    if stored is None:
        import zarr

        stored = zarr.open_array(str(level0), mode="r")
    old = np.asarray(stored[z:z + 1, y0:y1, x0:x1])[0]
    found = compare_blocks(old, new)
    matched = [s for s, _ in found if math.isfinite(s)]
    return {"blocks": len(found), "unmatched": len(found) - len(matched), "max_shift_px": max(matched, default=None),
            "min_ncc": min((c for _, c in found), default=None)}


def _footprint(tile, alignment, canvas) -> tuple[int, int, int, int] | None:
    """Return the canvas box ``(y0, y1, x0, x1)`` of a tile's aligned-frame footprint, or None if outside."""
    from ..sampler import tile_footprints
    from ..transforms.records import SectionStitch

    one = SectionStitch(0, "uint8", [tile], [], None, 1)
    x0, y0, x1, y1 = tile_footprints(one, alignment)[0]
    c0 = max(0, math.floor(x0 - canvas.origin_x))
    c1 = min(canvas.width, math.ceil(x1 - canvas.origin_x))
    r0 = max(0, math.floor(y0 - canvas.origin_y))
    r1 = min(canvas.height, math.ceil(y1 - canvas.origin_y))
    return None if c1 - c0 < 16 or r1 - r0 < 16 else (r0, r1, c0, c1)


def alignment_reach(build, before, replaced: dict, tolerance: float, mapper) -> dict:
    """Return, per re-imaged section, whether its new pixels match the volume's old ones within ``tolerance``.

    Parameters
    ----------
    build : BuildFolder
        The build during an update: new stitch records, the alignment and volume as they were.
    before : TransformStore
        The records from before the update (to tell replaced tiles from added ones).
    replaced : dict
        Section (text) -> names of the tiles replaced or added.
    tolerance : float
        Largest residual shift (level-0 px) under which the alignment is kept.
    mapper : callable
        ``mapper(fn, items)``; one task per replaced tile.

    Returns
    -------
    dict
        ``section -> {"same": bool, "why": str, "tiles": {tile: {"blocks", "max_shift_px", "min_ncc"}}}``.
    """
    canvas = build.store.load_canvas()
    settings = asdict(build.config.render)
    out: dict[int, dict] = {}
    jobs, owners = [], []
    for key, names in sorted(replaced.items(), key=lambda kv: int(kv[0])):
        s = int(key)
        old, new, align = before.load_stitch(s), build.store.load_stitch(s), build.store.load_alignment(s)
        out[s] = {"same": False, "why": "", "tiles": {}}
        if canvas is None or old is None or new is None or align is None:
            out[s]["why"] = "no earlier alignment or volume"
            continue
        had = {t.tile for t in old.tiles}
        added = sorted(n for n in names if n not in had)
        if added:
            out[s]["why"] = f"tile(s) {added} added where the section had none"
            continue
        # A tile now (or no longer) out of focus, blank or saturated shows other content even where
        # its blocks still correlate (a 5 px blur of smooth texture keeps a correlation near 0.8).
        judged = [(n, sorted(QUALITY_FLAGS & set(old.tile(n).flags)), sorted(QUALITY_FLAGS & set(new.tile(n).flags)))
                  for n in names]
        differ = [(n, a, b) for n, a, b in judged if a != b]
        if differ:
            n, a, b = differ[0]
            out[s]["why"] = f"its content changed (tile {n!r} flagged {b or 'none'}, before {a or 'none'})"
            continue
        for name in names:
            box = _footprint(new.tile(name), align, canvas)
            if box is None:
                continue
            jobs.append((str(build.root), s - canvas.first_section, box, canvas.to_json(), settings))
            owners.append((s, name))
    for (s, name), facts in zip(owners, mapper(_tile_task, jobs)):
        out[s]["tiles"][name] = facts
    for s, rec in out.items():
        if rec["why"]:
            continue
        tiles = rec["tiles"].values()
        if not tiles or any(t["blocks"] == 0 for t in tiles):
            rec["why"] = "a replaced tile has no textured block to compare"
        elif any(t.get("unmatched") for t in tiles):
            rec["why"] = f"a block of its new pixels matches nothing of the old within {MAX_SHIFT} px"
        elif max(t["max_shift_px"] for t in tiles) > tolerance:
            rec["why"] = f"its content moved by {max(t['max_shift_px'] for t in tiles):.2f} px (> {tolerance:g})"
        elif min(t["min_ncc"] for t in tiles) < SAME_CONTENT_NCC:
            rec["why"] = (f"its content changed (block correlation {min(t['min_ncc'] for t in tiles):.2f} "
                          f"< {SAME_CONTENT_NCC})")
        else:
            rec["same"] = True
            rec["why"] = (f"new pixels within {max(t['max_shift_px'] for t in tiles):.2f} px of the old, block "
                          f"correlation >= {min(t['min_ncc'] for t in tiles):.2f}")
    return out
