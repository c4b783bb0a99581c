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
old records), and compares them block by block: phase correlation and a
gradient fit give each block's residual shift and the normalised cross-correlation of the
two blocks says whether they show the same thing. If every block moved by at
most the tolerance and correlates at least :data:`SAME_CONTENT_NCC`, the
change cannot reach the alignment beyond the tolerance and the section keeps
it without a re-solve; otherwise (or for tiles added where there were none,
for a tile whose quality flags changed, out of focus, blank or saturated, or
when no block has texture to measure) the update solves its window again.

One task per replaced tile: it holds the tile's footprint twice (at
4096 x 4096 px of 16 bits, 2 x 64 MB in float32) and nothing else.

References
----------
Kuglin, C. D. & Hines, D. C. (1975). The phase correlation image alignment method.
Proc. IEEE Int. Conf. Cybernetics and Society, 163-165 (phase correlation).
Lucas, B. D. & Kanade, T. (1981). An iterative image registration technique with an
application to stereo vision. Proc. IJCAI, 674-679 (the sub-pixel gradient fit).
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
#: Stitch flags that say what a tile shows, as opposed to where it is.
QUALITY_FLAGS = frozenset({"out_of_focus", "blank", "saturated"})


def block_shift(old: np.ndarray, new: np.ndarray, max_shift: float = 8.0, rounds: int = 4) -> tuple[float, float]:
    """Return the shift ``(dx, dy)`` of ``new`` against ``old`` (two same-size float blocks), in pixels.

    The whole-pixel shift comes from phase correlation
    (:func:`stackbuild.stitch.phasecorr.phase_correlate`, no refinement); the
    fraction from the iterated least-squares (Lucas-Kanade) fit of the gradient
    of ``old`` to the difference of the two blocks, with a gain and an offset
    between them, on the block's inside (a 4 px border is left out). Phase
    correlation's sub-pixel peak on a windowed 128 px block reads a third low
    (0.2 px for a 0.3 px shift, checked against ``scipy.ndimage.shift``); the
    gradient fit does not.

    References
    ----------
    Lucas, B. D. & Kanade, T. (1981). An iterative image registration technique with an
    application to stereo vision. Proc. IJCAI, 674-679.
    """
    from scipy import ndimage

    from ..stitch.phasecorr import phase_correlate

    a = ndimage.gaussian_filter(old.astype(np.float64), 1.0)
    b = ndimage.gaussian_filter(new.astype(np.float64), 1.0)
    (dx, dy), _ = phase_correlate(a, b, upsample=1, max_shift=max_shift)
    gy, gx = np.gradient(a)
    inner = (slice(4, -4), slice(4, -4))
    design = np.column_stack([-gx[inner].ravel(), -gy[inner].ravel(), a[inner].ravel(),
                              np.ones(gx[inner].size)])
    for _ in range(rounds):
        back = ndimage.shift(b, (-dy, -dx), order=3, mode="nearest")  # back(x) = new(x + d)
        coef = np.linalg.lstsq(design, back[inner].ravel(), rcond=None)[0]
        gain = coef[2] if abs(coef[2]) > 1e-6 else 1.0
        dx, dy = dx + coef[0] / gain, dy + coef[1] / gain
        if abs(dx) > max_shift or abs(dy) > max_shift:
            break
    return float(dx), float(dy)


def compare_blocks(old: np.ndarray, new: np.ndarray, block: int = BLOCK, min_std: float = MIN_STD,
                   max_shift: float = 8.0) -> list[tuple[float, float]]:
    """Return ``(shift length px, ncc)`` of every textured ``block x block`` block of two same-size images.

    The shift is that of ``new`` against ``old`` (:func:`block_shift`); the
    correlation is the plain normalised cross-correlation of the two blocks as
    they lie. Blocks where either image's standard deviation is below
    ``min_std`` (margin, blank resin) are left out.
    """
    if old.shape != new.shape or old.ndim != 2:
        raise ValueError(f"two 2-D images of one shape expected, got {old.shape} and {new.shape}")
    out = []
    h, w = old.shape
    ny, nx = max(1, h // block), max(1, w // block)
    by, bx = min(block, h), min(block, w)
    oy, ox = (h - ny * by) // 2, (w - nx * bx) // 2
    for i in range(ny):
        for j in range(nx):
            a = old[oy + i * by:oy + (i + 1) * by, ox + j * bx:ox + (j + 1) * bx].astype(np.float32)
            b = new[oy + i * by:oy + (i + 1) * by, ox + j * bx:ox + (j + 1) * bx].astype(np.float32)
            if min(a.shape) < 16 or a.std() < min_std or b.std() < min_std:
                continue
            dx, dy = block_shift(a, b, max_shift)
            a0, b0 = a - a.mean(), b - b.mean()
            ncc = float((a0 * b0).sum() / math.sqrt(float((a0 * a0).sum()) * float((b0 * b0).sum())))
            out.append((float(math.hypot(dx, dy)), ncc))
    return out


def _tile_task(job: tuple) -> dict:
    """One replaced tile: its footprint rendered from the current records against the stored volume."""
    import zarr

    from ..render.lazy import RenderPlan, render_block
    from ..render.settings import RenderSettings
    from ..transforms.records import Canvas

    root, z, box, canvas_doc, settings_doc = job
    canvas = Canvas.from_json(canvas_doc)
    plan = RenderPlan.from_canvas(Path(root) / "transforms", canvas, RenderSettings(**settings_doc))
    y0, y1, x0, x1 = box
    new = render_block(plan, z, y0, y1, x0, x1)[0]
    old = np.asarray(zarr.open_array(str(Path(root) / "volume.zarr" / "em" / "0"), mode="r")[z, y0:y1, x0:x1])
    found = compare_blocks(old, new)
    return {"blocks": len(found), "max_shift_px": max((s for s, _ in found), default=None),
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
