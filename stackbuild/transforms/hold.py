"""Holding what did not change: new transforms expressed so untouched tiles and sections stay put.

After some tiles of a section are imaged again, the section is stitched again
and the stack aligned again. Left alone, both solves would move everything a
little (each fixes its gauge, the free translation or affine, afresh), so every
plane would have to be written again and every coordinate anyone noted down
would drift. Here the new solutions are brought back to the old frame:

* :func:`hold_tiles` keeps every untouched tile's placement, intensity
  correction and the section's illumination profile exactly, and places the
  new tiles by least squares on the freshly measured pair offsets, with the
  untouched tiles as fixed anchors.
* :func:`hold_alignments` fits the affine that takes the new aligned frame to
  the old one on the untouched sections, re-expresses every new alignment in
  the old frame, and keeps an untouched section's old record when the
  re-solve would move none of its points by more than a tolerance.

Pure functions of records: no files, no Dask.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from .records import SectionAlignment, SectionStitch
from .types import Affine2D, DisplacementField


def _free_positions(new: SectionStitch, anchors: dict[str, np.ndarray], free: list[str],
                    fallback: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Least-squares positions of ``free`` tiles from accepted pair offsets, ``anchors`` fixed.

    A weak pull (weight 1e-6) towards ``fallback`` fixes tiles no pair links to an anchor.
    """
    index = {name: k for k, name in enumerate(free)}
    rows, rhs, wts = [], [], []
    for p in new.pairs:
        if not p.accepted or (p.a not in index and p.b not in index):
            continue
        if p.a not in index and p.a not in anchors or p.b not in index and p.b not in anchors:
            continue
        d = np.array([p.dx, p.dy])
        row = np.zeros(len(free))
        target = d.copy()
        if p.b in index:
            row[index[p.b]] += 1.0
        else:
            target -= anchors[p.b]
        if p.a in index:
            row[index[p.a]] -= 1.0
        else:
            target += anchors[p.a]
        rows.append(row)
        rhs.append(target)
        wts.append(max(float(p.weight), 1e-3))
    for name, k in index.items():
        row = np.zeros(len(free))
        row[k] = 1.0
        rows.append(row)
        rhs.append(fallback[name])
        wts.append(1e-6)
    a = np.array(rows) * np.sqrt(wts)[:, None]
    b = np.array(rhs) * np.sqrt(wts)[:, None]
    sol = np.linalg.lstsq(a, b, rcond=None)[0]
    return {name: sol[k] for name, k in index.items()}


def hold_tiles(old: SectionStitch, new: SectionStitch, changed: set[str]) -> tuple[SectionStitch, dict]:
    """Return ``new`` with every tile not in ``changed`` held at its ``old`` placement, and facts.

    Parameters
    ----------
    old : SectionStitch
        The section's record before the update.
    new : SectionStitch
        The record of a fresh stitch of the updated tiles (its pairs measured on them).
    changed : set of str
        Tiles replaced or added (held tiles are the others present in both records).

    Returns
    -------
    stitch : SectionStitch
        Held tiles: the old placement, gain, offset, flags and statistics; illumination
        from ``old``. Changed tiles: positions from the pair offsets with held tiles fixed
        (least squares), gain and offset mapped by the affine intensity relation that takes
        the new solve's held tiles to their old values.
    facts : dict
        ``held``, ``placed`` (tile counts) and ``held_moved_px``: the largest distance the
        free re-solve put an untouched tile from its old place, after removing the common shift.
    """
    before = {t.tile: t for t in old.tiles}
    held = [t.tile for t in new.tiles if t.tile in before and t.tile not in changed]
    free = [t.tile for t in new.tiles if t.tile not in held]
    if not held:
        return new, {"held": 0, "placed": len(free), "held_moved_px": None}
    now = {t.tile: t for t in new.tiles}
    old_xy = np.array([[before[n].x, before[n].y] for n in held])
    new_xy = np.array([[now[n].x, now[n].y] for n in held])
    shift = np.median(old_xy - new_xy, axis=0)
    moved = float(np.hypot(*(new_xy + shift - old_xy).T).max())
    anchors = {n: np.array([before[n].x, before[n].y]) for n in held}
    fallback = {n: np.array([now[n].x, now[n].y]) + shift for n in free}
    pos = _free_positions(new, anchors, free, fallback) if free else {}
    g_new = np.array([now[n].gain for n in held])
    o_new = np.array([now[n].offset for n in held])
    g_old = np.array([before[n].gain for n in held])
    o_old = np.array([before[n].offset for n in held])
    scale = float(np.median(g_old / np.where(g_new == 0, 1.0, g_new)))
    bias = float(np.median(o_old - scale * o_new))
    tiles = []
    for t in new.tiles:
        if t.tile in anchors:
            tiles.append(before[t.tile])
        else:
            x, y = pos[t.tile]
            tiles.append(replace(t, x=float(x), y=float(y), gain=float(t.gain * scale),
                                 offset=float(t.offset * scale + bias)))
    stats = dict(new.stats)
    stats["held"] = {"tiles": len(held), "placed": len(free), "moved_px": moved}
    out = replace(new, tiles=tiles, illumination=old.illumination, illumination_step=old.illumination_step,
                  stats=stats)
    return out, {"held": len(held), "placed": len(free), "held_moved_px": moved}


def bbox_grid(bbox, n: int = 9) -> np.ndarray:
    """Return ``n x n`` points spread over a section extent ``(x0, y0, x1, y1)``, one pixel inside it."""
    x0, y0, x1, y1 = bbox
    gx, gy = np.meshgrid(np.linspace(x0 + 1, x1 - 1, n), np.linspace(y0 + 1, y1 - 1, n))
    return np.column_stack([gx.ravel(), gy.ravel()])


def fit_affine(src: np.ndarray, dst: np.ndarray) -> Affine2D:
    """Return the least-squares affine taking ``(N, 2)`` points ``src`` to ``dst``."""
    a = np.column_stack([src, np.ones(len(src))])
    m = np.linalg.lstsq(a, dst, rcond=None)[0]
    return Affine2D(m.T)


def reframe(alignment: SectionAlignment, to_new: Affine2D) -> SectionAlignment:
    """Return ``alignment`` preceded by ``to_new`` (old aligned frame -> new aligned frame).

    Without a field the two affines are composed. With one, the field is re-sampled at
    its own nodes as ``d'(P) = to_new(P) + d(to_new(P)) - P``, so the stored chain keeps its
    shape (field, then the same coarse -> section affine).
    """
    if alignment.displacement is None:
        return replace(alignment, affine=to_new.then(alignment.affine))
    f = alignment.displacement
    ny, nx = f.vectors.shape[:2]
    nodes = f.nodes()
    moved = to_new.apply(nodes)
    vec = (moved + f.displacement(moved) - nodes).reshape(ny, nx, 2)
    return replace(alignment, displacement=DisplacementField(vec.astype(np.float32), f.origin, f.spacing))


def hold_alignments(old: dict[int, SectionAlignment], new: dict[int, SectionAlignment],
                    bboxes: dict[int, tuple], *, fit_on: set[int], movable: set[int],
                    tolerance: float) -> tuple[dict, dict]:
    """Return the alignments to keep after a re-solve, in the old aligned frame, and facts.

    Parameters
    ----------
    old : dict
        Section -> alignment before the update (sections without one are new).
    new : dict
        Section -> alignment from the re-solve (of the stack, or of a window of it).
    bboxes : dict
        Section -> section-frame extent ``(x0, y0, x1, y1)`` (where to compare the maps).
    fit_on : set of int
        Sections whose old and new alignments define the frame change (an affine, least squares).
    movable : set of int
        Sections with an old alignment that take the re-solved one when it moves one of their
        points by more than ``tolerance``; every other section with an old alignment keeps it.
        New sections (no old alignment) always take the re-solved one.
    tolerance : float
        Section pixels.

    Returns
    -------
    alignments : dict
        Section -> alignment to store (the old record object itself for held sections).
    facts : dict
        ``moved_px``: per section with an old alignment, how far the re-solve (in the old frame)
        would move it; ``realigned``: sections whose record changes; ``frame_rms_px``: residual of
        the frame-change fit.
    """
    anchors = [s for s in new if s in old and s in fit_on]
    to_new = Affine2D.identity()
    fit_rms = 0.0
    if anchors:
        src, dst = [], []
        for s in anchors:
            pts = bbox_grid(bboxes[s])
            src.append(old[s].section_to_aligned(pts))
            dst.append(new[s].section_to_aligned(pts))
        src, dst = np.concatenate(src), np.concatenate(dst)
        to_new = fit_affine(src, dst)
        fit_rms = float(np.sqrt(np.mean(np.sum((to_new.apply(src) - dst) ** 2, axis=1))))
    out, moved, realigned = {}, {}, []
    for s, rec in new.items():
        framed = reframe(rec, to_new)
        if s in old:
            pts = old[s].section_to_aligned(bbox_grid(bboxes[s]))
            dist = float(np.hypot(*(framed.aligned_to_section(pts) - old[s].aligned_to_section(pts)).T).max())
            moved[s] = dist
            if s not in movable or dist <= tolerance:
                out[s] = old[s]
                continue
        out[s] = framed
        realigned.append(s)
    return out, {"moved_px": moved, "realigned": sorted(realigned), "frame_rms_px": fit_rms}
