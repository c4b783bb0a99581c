"""Stitch one section: stream tiles and pairs, place tiles, correct intensity."""
from __future__ import annotations

import math
from collections import Counter

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from ..errors import InputError
from ..manifest import TileEntry
from ..transforms.records import PairMatch, SectionStitch, TilePlacement
from .inspect import flag_tiles
from .intensity import solve_gain_offset
from .overlaps import Overlap, find_overlaps, neighbours
from .pairs import PairResult
from .placement import solve_translations
from .settings import StitchSettings, check_settings
from .stream import read_tile, reading_order, sample_profile, stream_pairs, widen_search

__all__ = ["check_settings", "read_tile", "stitch_section"]

#: Tile flags that keep a tile out of the gain/offset solve (it keeps its raw intensity).
NO_INTENSITY_ANCHOR = frozenset({"blank", "saturated", "unplaced"})


#: Peak ratio from which a pair counts as fully distinct (ratios from 1 up to it ramp its weight).
CLEAR_PEAK_RATIO = 2.5


def pair_weights(results: list[PairResult]) -> np.ndarray:
    """Return each pair's weight: scored overlap area over the median area, times its peak confidence.

    The variance of a correlation shift estimate falls about as one over the
    number of pixels compared (common practice, no source), so area is the
    inverse-variance weight up to a constant. The confidence
    ``clip((ratio - 1) / (CLEAR_PEAK_RATIO - 1), 0.02, 1) ** 2`` makes a
    barely distinct peak (a periodic texture, a near-blank overlap) count
    little, so that in a loop of pairs that disagree the solve puts the
    disagreement on it and the outlier rejection drops it rather than a good
    pair (common practice, no source).
    """
    area = np.array([max(r.area, 0) for r in results], dtype=np.float64)
    ref = float(np.median(area[area > 0])) if (area > 0).any() else 1.0
    ratio = np.array([r.peak_ratio for r in results], dtype=np.float64)
    confidence = np.clip((ratio - 1.0) / (CLEAR_PEAK_RATIO - 1.0), 0.02, 1.0) ** 2
    return np.maximum(area / ref * confidence, 1e-4)


def _place_unplaced(pos, stage, placed, near):
    """Put tiles no accepted pair reaches at their stage position plus their placed neighbours' mean offset."""
    off = pos - stage
    fallback = np.median(off[placed], axis=0) if placed.any() else np.zeros(2)
    for i in np.flatnonzero(~placed):
        nb = [j for j in near[i] if placed[j]]
        pos[i] = stage[i] + (off[nb].mean(axis=0) if nb else fallback)
    return pos


def count_groups(n, pairs, nodes) -> int:
    """Return how many groups the tiles ``nodes`` form, linked by ``pairs`` (``scipy.sparse.csgraph``)."""
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    graph = sp.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    return len({int(labels[i]) for i in nodes})


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
    Tiles are streamed (:mod:`stackbuild.stitch.stream`): each is read once
    for the pairs (plus at most ``MAX_PROFILE_TILES`` once more for the
    illumination profile, fewer when they fit in ``KEEP_PROFILE_BYTES``), each pair is registered as soon as its second
    tile is read and its strips dropped, so a task's memory does not grow
    with the number of tiles in the section. When the registered pairs show
    stage errors reaching the outer half of the search, pairs lost to its
    edge are searched again twice as far (:func:`~stackbuild.stitch.stream.widen_search`;
    ``stats["pairs_widened"]`` counts those found). ``stats["stage_error_p95"]``
    is the measured stage error: the 95th percentile of the placed tiles'
    distance (each axis, common shift removed) from their stage positions.
    Tiles stored with lossy compression are flagged ``lossy_compression``
    (section flag ``lossy_tiles``).
    """
    if not tiles:
        raise InputError("section has no tiles", section=section)
    check_settings(settings)
    stage = np.array([(t.x, t.y) for t in tiles], dtype=np.float64)
    sizes = np.array([(t.width, t.height) for t in tiles], dtype=np.int64)
    overlaps = find_overlaps(stage, sizes, settings.min_overlap, math.ceil(2 * settings.max_stage_error))
    order = reading_order(stage, sizes)
    cache: dict = {}
    kept: dict = {}
    profile, sec_flags = sample_profile(tiles, order, settings, section, cache, kept)
    results, stats, lossy = stream_pairs(tiles, overlaps, order, profile, settings, section, cache, kept)
    widened = widen_search(tiles, overlaps, results, profile, settings, section)
    flags = flag_tiles(stats, settings.blank_contrast_to_noise, settings.focus_min, settings.saturated_max)
    for f, name in zip(flags, lossy):
        if name:
            f.append("lossy_compression")
    if any(lossy):
        sec_flags = [*sec_flags, "lossy_tiles"]
    rec = _assemble(tiles, section, settings, stage, overlaps, results, stats, flags, profile, sec_flags)
    rec.stats["pairs_widened"] = widened
    return rec


def _place(tiles, settings, stage, overlaps: list[Overlap], results: list[PairResult], flags):
    """Return positions, kept-pair mask, pair residuals, placed-tile mask, weights and solve rounds."""
    n = len(tiles)
    pairs = np.array([(ov.a, ov.b) for ov in overlaps], dtype=np.int64).reshape(-1, 2)
    shifts = np.array([(r.dx, r.dy) for r in results], dtype=np.float64).reshape(-1, 2)
    good = np.array([r.reason == "" for r in results], dtype=bool)
    weights = pair_weights(results)
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
        eligible = np.array([not NO_INTENSITY_ANCHOR & set(f) for f in flags], bool)
        noise = np.array([st["noise"] for st in stats])
        kp = pairs[kept]
        gain, offset = solve_gain_offset(
            kp, [r.mean_a for r in kr], structure_spread([r.std_a for r in kr], noise[kp[:, 0]]),
            [r.mean_b for r in kr], structure_spread([r.std_b for r in kr], noise[kp[:, 1]]),
            n, settings.intensity_pull, eligible=eligible,
            levels=np.array([st["median"] for st in stats]), max_gain_change=settings.max_gain_change)
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
    if n > 1 and count_groups(n, pairs[kept], specimen) > 1:
        sec_flags.append("disconnected")
    if n > 1 and not placed.all():
        sec_flags.append("unplaced_tiles")
    return SectionStitch(
        section=section, dtype=tiles[0].dtype, tiles=placements, pairs=matches,
        illumination=profile, illumination_step=settings.illumination_step,
        flags=sec_flags, stats={**_section_stats(residual[kept], results, kept, flags, rounds),
                                "stage_error_p95": _stage_error_p95(pos, stage, placed)})


def structure_spread(std, noise) -> np.ndarray:
    """Return the spread of the specimen in an overlap: its pixel spread with the tile's noise taken out.

    Noise adds in quadrature to the specimen's spread and does not scale
    with a tile's gain, so the raw spread would pull the gains of noisy
    tiles (``sqrt(std^2 - noise^2)``, floored at a tenth of ``std``).
    """
    std = np.asarray(std, np.float64)
    noise = np.asarray(noise, np.float64)
    return np.sqrt(np.maximum(std ** 2 - noise ** 2, (0.1 * std) ** 2))


def seam_residual_stats(res) -> dict:
    """Return the RMS, 95th percentile and maximum of the accepted pairs' residuals (px; None when there are none)."""
    res = np.asarray(res, np.float64)
    return {
        "seam_residual_rms": float(np.sqrt(np.mean(res ** 2))) if res.size else None,
        "seam_residual_p95": float(np.percentile(res, 95)) if res.size else None,
        "seam_residual_max": float(res.max()) if res.size else None,
    }


def _section_stats(res: np.ndarray, results, kept, flags, rounds) -> dict:
    """Return the section's summary: seam residuals over accepted pairs, counts by reason and flag."""
    return {
        **seam_residual_stats(res),
        "tiles": len(flags),
        "pairs": len(results),
        "pairs_accepted": int(kept.sum()),
        "pairs_rejected": dict(Counter(r.reason for r in results if r.reason)),
        "tiles_flagged": dict(Counter(f for fl in flags for f in fl)),
        "solve_rounds": int(rounds),
    }


def _stage_error_p95(pos: np.ndarray, stage: np.ndarray, placed: np.ndarray) -> float | None:
    """Return the 95th percentile of the placed tiles' distance from their stage positions (common shift removed)."""
    if placed.sum() < 2:
        return None
    off = pos[placed] - stage[placed]
    off -= np.median(off, axis=0)
    return float(np.percentile(np.max(np.abs(off), axis=1), 95))
