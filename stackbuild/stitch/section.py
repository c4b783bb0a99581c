"""Stitch one section: read tiles once, register overlapping pairs, place tiles, correct intensity."""
from __future__ import annotations

import math
from collections import Counter

import numpy as np

from ..errors import InputError
from ..manifest import TileEntry
from ..tiles import read_tile as read_raw_tile
from ..transforms.records import PairMatch, SectionStitch, TilePlacement
from .inspect import flag_tiles, tile_stats
from .intensity import (illumination_at_tile_size, illumination_profile, solve_gain_offset,
                        tile_thumbnail)
from .overlaps import Overlap, find_overlaps, neighbours
from .pairs import PairResult, register_pair
from .placement import solve_translations
from .settings import StitchSettings, check_settings

#: Fewest specimen tiles from which an illumination profile is estimated.
MIN_ILLUMINATION_TILES = 3


def read_tile(entry: TileEntry, section: int) -> np.ndarray:
    """Return the pixels of one tile, checked against the shape and type its manifest header gave."""
    where = f" (manifest line {entry.row})" if entry.row else ""
    return read_raw_tile(entry.path, entry.height, entry.width, section, dtype=entry.dtype,
                         what=f"tile {entry.tile!r}{where}", source="header")


def _slice(box):
    x0, y0, x1, y1 = box
    return np.s_[y0:y1, x0:x1]


def _read_all(tiles, overlaps, settings, section):
    """Read each tile once; keep its stats, its thumbnail and the strips its pairs need."""
    wanted: list[list[tuple[int, int]]] = [[] for _ in tiles]
    for k, ov in enumerate(overlaps):
        wanted[ov.a].append((k, 0))
        wanted[ov.b].append((k, 1))
    stats, thumbs, strips = [], [], {}
    for i, t in enumerate(tiles):
        img = read_tile(t, section)
        stats.append(tile_stats(img))
        thumbs.append(tile_thumbnail(img, settings.illumination_step)
                      if settings.illumination and img.any() else None)
        for k, side in wanted[i]:
            pad = overlaps[k].pad_a if side == 0 else overlaps[k].pad_b
            strips[k, side] = img[_slice(pad)].copy()
    return stats, thumbs, strips


def _profile(tiles, thumbs, flags, settings):
    """Return the illumination profile (or None) and the section flags it raises."""
    if not settings.illumination:
        return None, []
    shape = (tiles[0].height, tiles[0].width)
    use = [th for t, th, f in zip(tiles, thumbs, flags)
           if th is not None and (t.height, t.width) == shape and not {"blank", "saturated"} & set(f)]
    if len(use) < MIN_ILLUMINATION_TILES:
        return None, ["illumination_too_few_tiles"]
    return illumination_profile(np.stack(use)), []


def _register(tiles, overlaps, strips, flags, profile, settings) -> list[PairResult]:
    illum: dict[tuple[int, int], np.ndarray] = {}

    def corrected(k: int, side: int) -> np.ndarray:
        ov = overlaps[k]
        t = tiles[ov.a if side == 0 else ov.b]
        raw = strips.pop((k, side)).astype(np.float32)
        if profile is None:
            return raw
        if (t.height, t.width) not in illum:
            illum[t.height, t.width] = illumination_at_tile_size(profile, t.height, t.width)
        return raw / illum[t.height, t.width][_slice(ov.pad_a if side == 0 else ov.pad_b)]

    out = []
    for k, ov in enumerate(overlaps):
        a, b = tiles[ov.a], tiles[ov.b]
        if "blank" in flags[ov.a] or "blank" in flags[ov.b]:
            strips.pop((k, 0)), strips.pop((k, 1))
            out.append(PairResult(b.x - a.x, b.y - a.y, 0.0, 0.0, "blank_tile"))
            continue
        nominal = (ov.box_a[0] - ov.box_b[0], ov.box_a[1] - ov.box_b[1])
        out.append(register_pair(corrected(k, 0), corrected(k, 1), ov, (a.width, a.height),
                                 (b.width, b.height), nominal, settings.max_stage_error,
                                 settings.upsample, settings.min_ncc, settings.min_peak_margin,
                                 settings.spectral_exponent, settings.spectrum_sigma))
    return out


def _pair_weights(results: list[PairResult]) -> np.ndarray:
    """Return each pair's weight: its scored overlap area over the median area of scored pairs.

    The variance of a correlation shift estimate falls about as one over the
    number of pixels compared (common practice, no source), so area is the
    inverse-variance weight up to a constant.
    """
    area = np.array([max(r.area, 0) for r in results], dtype=np.float64)
    ref = float(np.median(area[area > 0])) if (area > 0).any() else 1.0
    return np.maximum(area / ref, 1e-3)


def _place_unplaced(pos, stage, placed, near):
    """Put tiles no accepted pair reaches at their stage position plus their placed neighbours' mean offset."""
    off = pos - stage
    fallback = np.median(off[placed], axis=0) if placed.any() else np.zeros(2)
    for i in np.flatnonzero(~placed):
        nb = [j for j in near[i] if placed[j]]
        pos[i] = stage[i] + (off[nb].mean(axis=0) if nb else fallback)
    return pos


def _components(n, pairs, nodes) -> int:
    parent = list(range(n))

    def root(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for a, b in pairs:
        parent[root(a)] = root(b)
    return len({root(i) for i in nodes})


def stitch_section(tiles: list[TileEntry], settings: StitchSettings, section: int) -> SectionStitch:
    """Return the stitching record of one section: tile placements, pair matches, intensity correction.

    Parameters
    ----------
    tiles : list of TileEntry
        The section's tiles (from :func:`stackbuild.manifest.read_tile_manifest`).
    settings : StitchSettings
        Thresholds and switches of the stage.
    section : int
        The section number (for messages and the record).

    Returns
    -------
    SectionStitch
        Every tile's solved ``tile -> section`` translation, gain, offset,
        flags and statistics; every registered pair with its measured shift,
        confidence, acceptance, reason and residual; the illumination profile;
        section statistics and flags.

    Raises
    ------
    InputError
        If the section has no tiles, or a tile's pixels cannot be read.

    Notes
    -----
    Each tile is read once; only its statistics, a thumbnail and the
    overlap strips its pairs need are kept, so memory is about the strips of
    one section, not its tiles.
    """
    if not tiles:
        raise InputError("section has no tiles", section=section)
    check_settings(settings)
    stage = np.array([(t.x, t.y) for t in tiles], dtype=np.float64)
    sizes = np.array([(t.width, t.height) for t in tiles], dtype=np.int64)
    overlaps = find_overlaps(stage, sizes, settings.min_overlap, math.ceil(settings.max_stage_error))
    stats, thumbs, strips = _read_all(tiles, overlaps, settings, section)
    flags = flag_tiles(stats, settings.blank_std, settings.focus_min, settings.saturated_max)
    profile, sec_flags = _profile(tiles, thumbs, flags, settings)
    results = _register(tiles, overlaps, strips, flags, profile, settings)
    return _assemble(tiles, section, settings, stage, overlaps, results, stats, flags, profile, sec_flags)


def _place(tiles, settings, stage, overlaps: list[Overlap], results: list[PairResult], flags):
    """Return positions, kept-pair mask, pair residuals, placed-tile mask, weights and solve rounds."""
    n = len(tiles)
    pairs = np.array([(ov.a, ov.b) for ov in overlaps], dtype=np.int64).reshape(-1, 2)
    shifts = np.array([(r.dx, r.dy) for r in results], dtype=np.float64).reshape(-1, 2)
    good = np.array([r.reason == "" for r in results], dtype=bool)
    weights = _pair_weights(results)
    sol = solve_translations(pairs[good], shifts[good], weights[good], stage,
                             settings.prior_weight, settings.max_residual)
    pos = sol.positions
    kept = np.zeros(len(results), dtype=bool)
    kept[np.flatnonzero(good)[sol.kept]] = True
    for k in np.flatnonzero(good & ~kept):
        results[k].reason = "residual"
    residual = np.hypot(*(pos[pairs[:, 1]] - pos[pairs[:, 0]] - shifts).T) if len(pairs) else np.zeros(0)
    placed = np.zeros(n, dtype=bool)
    placed[pairs[kept].reshape(-1)] = True
    if n > 1:
        pos = _place_unplaced(pos, stage, placed, neighbours(overlaps, n))
        for i in np.flatnonzero(~placed):
            flags[i].append("unplaced")
    return pairs, pos, kept, residual, placed, weights, sol.rounds


def _assemble(tiles, section, settings, stage, overlaps: list[Overlap], results: list[PairResult],
              stats, flags, profile, sec_flags) -> SectionStitch:
    """Solve placement and intensity from the pair results and build the record."""
    n = len(tiles)
    pairs, pos, kept, residual, placed, weights, rounds = _place(
        tiles, settings, stage, overlaps, results, flags)
    gain, offset = np.ones(n), np.zeros(n)
    if settings.intensity and kept.any():
        kr = [results[k] for k in np.flatnonzero(kept)]
        gain, offset = solve_gain_offset(pairs[kept], [r.mean_a for r in kr], [r.std_a for r in kr],
                                         [r.mean_b for r in kr], [r.std_b for r in kr], n)
    placements = []
    for i, t in enumerate(tiles):
        mine = kept & ((pairs[:, 0] == i) | (pairs[:, 1] == i)) if len(pairs) else np.zeros(0, bool)
        placements.append(TilePlacement(
            tile=t.tile, path=str(t.path), width=t.width, height=t.height,
            stage_x=float(t.x), stage_y=float(t.y), x=float(pos[i, 0]), y=float(pos[i, 1]),
            gain=float(gain[i]), offset=float(offset[i]), flags=flags[i], stats=stats[i],
            residual=float(np.sqrt(np.mean(residual[mine] ** 2))) if mine.any() else None))
    matches = [PairMatch(
        a=tiles[ov.a].tile, b=tiles[ov.b].tile, dx=float(r.dx), dy=float(r.dy),
        stage_dx=float(stage[ov.b, 0] - stage[ov.a, 0]), stage_dy=float(stage[ov.b, 1] - stage[ov.a, 1]),
        ncc=float(r.ncc), peak_ratio=float(r.peak_ratio), accepted=bool(kept[k]), reason=r.reason,
        weight=float(weights[k]), residual=None if r.reason == "blank_tile" else float(residual[k]))
        for k, (ov, r) in enumerate(zip(overlaps, results))]
    sec_flags = list(sec_flags)
    specimen = [i for i in range(n) if "blank" not in flags[i]]
    if n > 1 and not overlaps:
        sec_flags.append("no_overlaps")
    if n > 1 and _components(n, pairs[kept], specimen) > 1:
        sec_flags.append("disconnected")
    if n > 1 and not placed.all():
        sec_flags.append("unplaced_tiles")
    return SectionStitch(
        section=section, dtype=tiles[0].dtype, tiles=placements, pairs=matches,
        illumination=profile, illumination_step=settings.illumination_step,
        flags=sec_flags, stats=_section_stats(residual[kept], results, kept, flags, rounds))


def _section_stats(res: np.ndarray, results, kept, flags, rounds) -> dict:
    """Return the section's summary: seam residuals over accepted pairs, counts by reason and flag."""
    return {
        "seam_residual_rms": float(np.sqrt(np.mean(res ** 2))) if res.size else None,
        "seam_residual_p95": float(np.percentile(res, 95)) if res.size else None,
        "seam_residual_max": float(res.max()) if res.size else None,
        "tiles": len(flags),
        "pairs": len(results),
        "pairs_accepted": int(kept.sum()),
        "pairs_rejected": dict(Counter(r.reason for r in results if r.reason)),
        "tiles_flagged": dict(Counter(f for fl in flags for f in fl)),
        "solve_rounds": int(rounds),
    }
