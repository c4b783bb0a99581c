"""Re-stitch a section after some of its tiles were imaged again: only the pairs of the new tiles.

A section's stored stitch record keeps every registered pair (measured shift,
confidence, acceptance). When some tiles are imaged again, a pair of two
untouched tiles measures the same pixels as before, so its stored result is
the result a new registration would give; only the pairs that involve a
replaced or added tile are registered again (their tiles, and only those, are
read). The untouched tiles keep their placement, intensity correction, flags
and statistics and the section its illumination profile; the new tiles are
placed by least squares on their measured pairs with the untouched tiles as
fixed anchors (:func:`stackbuild.transforms.hold.hold_tiles`) and take the gain
and offset that make their overlaps agree with the anchors' corrected
intensities.

How far the untouched tiles are held: a free re-solve of all accepted pairs
(stored and new, :func:`stackbuild.stitch.placement.solve_translations`; no
pixels) would move them by ``held_moved_px`` after the common shift is
removed; the update reports it.

What one task holds: the strips of the pairs of the replaced tiles and one
tile at a time (the stitch stage's streaming reader), and the section's
records (a few numbers per tile and pair). :func:`stitch_step` is the update's
stitch step: one task per re-imaged section; appended sections are stitched
whole by the stitch stage.
"""
from __future__ import annotations

import math
from collections import Counter
from dataclasses import replace

import numpy as np

from ..manifest import TileEntry
from ..transforms.records import PairMatch, SectionStitch, TilePlacement

#: Flags of a section that depend on its pairs and are worked out again here.
_PAIR_FLAGS = ("disconnected", "unplaced_tiles")


def _key(a: str, b: str) -> frozenset:
    return frozenset((a, b))


def _gain_offset(name: str, matches: list[tuple[PairMatch, object, bool]], placed: dict, noise: dict,
                 typical: tuple[float, float], grey: float, max_change: float) -> tuple[float, float]:
    """Return the gain and offset of new tile ``name`` that make its overlaps agree with the held tiles.

    ``matches``: (pair, its PairResult, whether ``name`` is its tile ``a``) of accepted pairs with a held tile.
    Each overlap gives ``g_c s_c = g_h s_h`` and ``g_c m_c + o_c = g_h m_h + o_h`` (``s`` the specimen
    spread, ``m`` the mean of ``raw / illumination``; the renderer's convention,
    :mod:`stackbuild.stitch.intensity`); the overlaps are combined by their area. As in the stitch
    stage's solve, the gain stays within ``[1 / (1 + m), 1 + m]`` of the section's typical tile
    (``typical``: the held tiles' median gain and offset) and the offset within ``m`` times the
    section's median grey; a tile with no such overlap takes the typical correction.
    """
    from ..stitch.section import structure_spread

    rows = []
    for p, r, mine_a in matches:
        other = p.b if mine_a else p.a
        h = placed[other]
        m_c, s_c, m_h, s_h = (r.mean_a, r.std_a, r.mean_b, r.std_b) if mine_a else \
            (r.mean_b, r.std_b, r.mean_a, r.std_a)
        sc, sh = float(structure_spread(s_c, noise[name])), float(structure_spread(s_h, noise[other]))
        if sc > 0 and r.area > 0:
            rows.append((h.gain * sh / sc, h.gain * m_h + h.offset, m_c, float(r.area)))
    if not rows:
        return typical
    g_k, target, m_c, w = (np.array(v) for v in zip(*rows))
    g0 = typical[0]
    gain = float(np.clip(np.average(g_k, weights=w), g0 / (1.0 + max_change), g0 * (1.0 + max_change)))
    offset = float(np.average(target - gain * m_c, weights=w))
    return gain, float(np.clip(offset, typical[1] - max_change * grey, typical[1] + max_change * grey))


def _free_moved(tiles: list[TilePlacement], pairs: list[PairMatch], held: set[str], settings) -> float | None:
    """Return how far a free re-solve of the accepted pairs would move a held tile (common shift removed)."""
    from ..stitch.placement import solve_translations

    index = {t.tile: k for k, t in enumerate(tiles)}
    good = [p for p in pairs if p.accepted]
    if not good or not held:
        return None
    sol = solve_translations(np.array([(index[p.a], index[p.b]) for p in good], np.int64),
                             np.array([(p.dx, p.dy) for p in good]), np.array([max(p.weight, 1e-4) for p in good]),
                             np.array([(t.stage_x, t.stage_y) for t in tiles]), settings.prior_weight,
                             settings.max_residual)
    k = [index[n] for n in held]
    old = np.array([(tiles[i].x, tiles[i].y) for i in k])
    off = sol.positions[k] - old
    off -= np.median(off, axis=0)
    return float(np.hypot(*off.T).max())


def restitch_section(old: SectionStitch, tiles: list[TileEntry], changed: set[str], settings,
                     section: int) -> tuple[SectionStitch, dict]:
    """Return a section's stitch record with only the pairs of ``changed`` tiles registered again, and facts.

    Parameters
    ----------
    old : SectionStitch
        The section's record before the update.
    tiles : list of TileEntry
        The section's tiles after the update (the merged manifest).
    changed : set of str
        Tiles replaced or added.
    settings : StitchSettings
        The stitch stage's settings.
    section : int
        The section number.

    Returns
    -------
    stitch : SectionStitch
        Untouched tiles exactly as in ``old``; changed tiles placed and corrected against them;
        stored pairs of two untouched tiles kept, the others measured again.
    facts : dict
        ``pairs`` (registered again), ``pairs_kept`` (stored results used), ``tiles_read``,
        ``held``, ``placed`` and ``held_moved_px`` (see the module docstring).
    """
    from ..stitch.overlaps import find_overlaps
    from ..stitch.inspect import flag_tiles
    from ..stitch.section import pair_weights
    from ..stitch.stream import reading_order, stream_pairs, widen_search

    before = {t.tile: t for t in old.tiles}
    if all(t.tile in changed or t.tile not in before for t in tiles):
        # Every tile is new: nothing to hold, the section is stitched whole.
        from ..stitch.section import stitch_section

        rec = stitch_section(list(tiles), settings, section)
        return rec, {"pairs": len(rec.pairs), "pairs_kept": 0, "tiles_read": len(tiles), "held": 0,
                     "placed": len(tiles), "held_moved_px": None}
    stored = {_key(p.a, p.b): p for p in old.pairs}
    stage = np.array([(t.x, t.y) for t in tiles], dtype=np.float64)
    sizes = np.array([(t.width, t.height) for t in tiles], dtype=np.int64)
    overlaps = find_overlaps(stage, sizes, settings.min_overlap, math.ceil(2 * settings.max_stage_error))
    fresh = {t.tile for t in tiles if t.tile in changed or t.tile not in before}
    redo = [ov for ov in overlaps if tiles[ov.a].tile in fresh or tiles[ov.b].tile in fresh
            or _key(tiles[ov.a].tile, tiles[ov.b].tile) not in stored]
    # Register the pairs to redo on the tiles they need, indexed afresh (the reader streams these only).
    need = sorted({i for ov in redo for i in (ov.a, ov.b)} | {i for i, t in enumerate(tiles) if t.tile in fresh})
    sub_index = {i: k for k, i in enumerate(need)}
    sub_tiles = [tiles[i] for i in need]
    sub_ov = [replace(ov, a=sub_index[ov.a], b=sub_index[ov.b]) for ov in redo]
    order = reading_order(stage[need], sizes[need])
    results, stats, _ = stream_pairs(sub_tiles, sub_ov, order, old.illumination, settings, section)
    widen_search(sub_tiles, sub_ov, results, old.illumination, settings, section)
    weights = pair_weights(results) if results else np.zeros(0)
    new_stats = {sub_tiles[k].tile: stats[k] for k in range(len(sub_tiles))}
    # Flags of the new tiles are judged among the section's tiles (focus is relative to the section's median).
    all_stats = [new_stats[t.tile] if t.tile in fresh else before[t.tile].stats for t in tiles]
    flags = dict(zip((t.tile for t in tiles), flag_tiles(all_stats, settings.blank_contrast_to_noise,
                                                          settings.focus_min, settings.saturated_max)))
    measured = {}
    for ov, r, w in zip(redo, results, weights):
        a, b = tiles[ov.a], tiles[ov.b]
        measured[_key(a.tile, b.tile)] = (PairMatch(
            a=a.tile, b=b.tile, dx=float(r.dx), dy=float(r.dy), stage_dx=float(b.x - a.x), stage_dy=float(b.y - a.y),
            ncc=float(r.ncc), peak_ratio=float(r.peak_ratio), accepted=r.reason == "", reason=r.reason,
            weight=float(w), residual=None), r)
    pairs = [measured[_key(tiles[ov.a].tile, tiles[ov.b].tile)][0] if _key(tiles[ov.a].tile, tiles[ov.b].tile)
             in measured else stored[_key(tiles[ov.a].tile, tiles[ov.b].tile)] for ov in overlaps]
    held = {t.tile for t in tiles if t.tile not in fresh}
    noise = {t.tile: float((new_stats[t.tile] if t.tile in fresh else before[t.tile].stats).get("noise", 0.0))
             for t in tiles}
    rec, facts = _place(old, tiles, fresh, held, pairs, measured, flags, new_stats, noise, settings, section)
    rec_facts = {"pairs": len(redo), "pairs_kept": len(overlaps) - len(redo), "tiles_read": len(need),
                 "held": facts["held"], "placed": facts["placed"],
                 "held_moved_px": _free_moved(rec.tiles, rec.pairs, held, settings)}
    return rec, rec_facts


def _place(old, tiles, fresh, held, pairs, measured, flags, new_stats, noise, settings, section):
    """Place and correct the new tiles against the held ones; drop new pairs that disagree (one per round)."""
    from ..transforms.hold import hold_tiles

    before = {t.tile: t for t in old.tiles}
    offs = np.array([(before[n].x - before[n].stage_x, before[n].y - before[n].stage_y) for n in held]) \
        if held else np.zeros((1, 2))
    shift = np.median(offs, axis=0)
    gains = [before[n].gain for n in held] or [1.0]
    offsets = [before[n].offset for n in held] or [0.0]
    typical = (float(np.median(gains)), float(np.median(offsets)))
    grey = float(np.median([before[n].stats.get("median", 0.0) for n in held] or [0.0]))
    while True:
        placed = {}
        for t in tiles:
            if t.tile in held:
                placed[t.tile] = before[t.tile]
                continue
            placed[t.tile] = TilePlacement(tile=t.tile, path=str(t.path), width=t.width, height=t.height,
                                           stage_x=float(t.x), stage_y=float(t.y), x=float(t.x + shift[0]),
                                           y=float(t.y + shift[1]), flags=list(flags[t.tile]),
                                           stats=new_stats[t.tile])
        for name in fresh:
            links = [(p, r, p.a == name) for p, r in measured.values()
                     if p.accepted and name in (p.a, p.b) and (p.b if p.a == name else p.a) in held]
            # Blank, saturated and unplaced tiles keep their raw intensity (as in the stitch stage).
            raw = not settings.intensity or not links or bool({"blank", "saturated"} & set(flags[name]))
            g, o = (1.0, 0.0) if raw else _gain_offset(name, links, placed, noise, typical, grey,
                                                       settings.max_gain_change)
            placed[name] = replace(placed[name], gain=g, offset=o)
        guess = SectionStitch(section, old.dtype, [placed[t.tile] for t in tiles], pairs, old.illumination,
                              old.illumination_step, list(old.flags), dict(old.stats))
        rec, facts = hold_tiles(old, guess, set(fresh))
        pos = {t.tile: (t.x, t.y) for t in rec.tiles}
        worst, worst_res = None, settings.max_residual
        for p, _ in measured.values():
            if p.accepted:
                res = math.hypot(pos[p.b][0] - pos[p.a][0] - p.dx, pos[p.b][1] - pos[p.a][1] - p.dy)
                if res > worst_res:
                    worst, worst_res = p, res
        if worst is None:
            break
        worst.accepted, worst.reason = False, "residual"
    return _finish(rec, pos, fresh), facts


def _finish(rec: SectionStitch, pos: dict, fresh: set) -> SectionStitch:
    """Fill in pair and tile residuals, the seam statistics and the pair-dependent flags."""
    from ..stitch.section import count_groups, seam_residual_stats

    pairs = []
    res_of: dict[str, list[float]] = {}
    for p in rec.pairs:
        res = None if p.reason == "blank_tile" else \
            float(math.hypot(pos[p.b][0] - pos[p.a][0] - p.dx, pos[p.b][1] - pos[p.a][1] - p.dy))
        pairs.append(replace(p, residual=res))
        if p.accepted and res is not None:
            res_of.setdefault(p.a, []).append(res)
            res_of.setdefault(p.b, []).append(res)
    touched = {n for p in pairs if fresh & {p.a, p.b} for n in (p.a, p.b)}
    tiles = []
    for t in rec.tiles:
        if t.tile in touched:
            r = res_of.get(t.tile)
            flags = [f for f in t.flags if f != "unplaced"] + ([] if r else ["unplaced"])
            t = replace(t, residual=float(np.sqrt(np.mean(np.square(r)))) if r else None, flags=flags)
        tiles.append(t)
    acc = [p.residual for p in pairs if p.accepted and p.residual is not None]
    stats = dict(rec.stats)
    stats.update({**seam_residual_stats(acc),
                  "pairs": len(pairs), "pairs_accepted": int(sum(p.accepted for p in pairs)),
                  "pairs_rejected": dict(Counter(p.reason for p in pairs if p.reason)),
                  "tiles_flagged": dict(Counter(f for t in tiles for f in t.flags))})
    index = {t.tile: k for k, t in enumerate(tiles)}
    links = [(index[p.a], index[p.b]) for p in pairs if p.accepted]
    flags = [f for f in rec.flags if f not in _PAIR_FLAGS]
    n = len(tiles)
    if n > 1:
        if count_groups(n, links, [index[t.tile] for t in tiles if "blank" not in t.flags]) > 1:
            flags.append("disconnected")
        if any("unplaced" in t.flags for t in tiles):
            flags.append("unplaced_tiles")
    return replace(rec, tiles=tiles, pairs=pairs, flags=flags, stats=stats)


def restitch_task(job: tuple) -> dict:
    """One section of an update (runs on a worker): re-stitch it from its kept record and store the result."""
    from ..folder import BuildFolder
    from ..transforms.store import TransformStore

    root, before_root, section, tiles, changed, settings = job
    old = TransformStore(before_root).load_stitch(section)
    rec, facts = restitch_section(old, list(tiles), set(changed), settings, section)
    BuildFolder(root).store.save_stitch(rec)
    return {"section": section, **facts}


def stitch_step(build, plan, mappers) -> None:
    """Stitch appended sections whole; in re-imaged ones register only the pairs of their new tiles.

    The pairs of two untouched tiles keep their stored results and the untouched tiles their
    placement (:func:`restitch_section`); what each section's task found goes to ``plan.facts["stitch"]``.
    """
    from . import stages
    from .update_plan import before_store

    before, store = before_store(build.root, plan), build.store
    manifest = build.tile_manifest()
    whole = [s for s in plan.sections if before.load_stitch(s) is None]
    if whole:
        stages.stitch_stage(build, mappers("stitch"), sections=whole)
    jobs = [(str(build.root), str(before.root), int(key), tuple(manifest.section_tiles(int(key))), tuple(names),
             build.config.stitch) for key, names in sorted(plan.replaced.items(), key=lambda kv: int(kv[0]))
            if int(key) not in whole]
    held = {str(f["section"]): f for f in mappers("stitch")(restitch_task, jobs)}
    plan.facts["stitch"] = {"held": held, "pairs": sum(f["pairs"] for f in held.values()) +
                            sum(len(store.load_stitch(s).pairs) for s in whole),
                            "pairs_kept": sum(f["pairs_kept"] for f in held.values())}
