"""Read a section's tiles one at a time and register each pair as soon as both of its tiles are read.

What one stitch task holds, whatever the number of tiles in its section: one
tile (and its float32 copies while its statistics are measured), the
illumination profile at tile size, the overlap strips of tiles whose
partner has not been read yet, and at most ``KEEP_PROFILE_BYTES`` of the
tiles the illumination pass read (so a small section is read once, not twice). Tiles are read band by band across the
section's shorter side, so those waiting strips are about one band's worth
(a column of tiles in a wide section), never the whole section's. Per tile
only a few numbers (statistics, flags) are kept.
"""
from __future__ import annotations

import numpy as np

from ..manifest import TileEntry, lossy_compression
from ..tiles import read_tile as read_raw_tile
from .inspect import tile_stats
from .intensity import illumination_at_tile_size, illumination_profile, tile_thumbnail
from .overlaps import Overlap, find_overlaps
from .pairs import PairResult, register_pair
from .settings import StitchSettings

#: Fewest specimen tiles from which an illumination profile is estimated.
MIN_ILLUMINATION_TILES = 3
#: Most tiles read for the illumination profile (spread evenly over the section): a
#: per-pixel median over a few dozen tiles is stable (common practice, no source),
#: and it keeps the first pass short for sections of a thousand tiles.
MAX_PROFILE_TILES = 32
#: Most bytes of raw tiles the illumination pass keeps for the pairs pass, so that those tiles
#: are not read twice: all 25 tiles of a 5 x 5 section of 1024 px 8-bit tiles, two 4096 px
#: 16-bit tiles of a production section (which reads 32 of its 1000 tiles twice either way).
KEEP_PROFILE_BYTES = 64 << 20
#: Below this many tiles the profile is a quadratic, from it on a quartic.
FEW_PROFILE_TILES = 16
#: Pairs lost to the edge of the search are searched again, twice as far, when the
#: section's registered pairs already sit this far out in the search (95th percentile).
WIDEN_WHEN = 0.5
#: Rejections a too narrow search gives: the peak at its edge, or the best peak inside it, a wrong one.
RETRY_REASONS = frozenset({"far_from_stage", "weak_peak", "low_ncc", "small_overlap"})


def read_tile(entry: TileEntry, section: int) -> np.ndarray:
    """Return the pixels of one tile, checked against the shape and type its manifest header gave."""
    where = f" (manifest line {entry.row})" if entry.row else ""
    return read_raw_tile(entry.path, entry.height, entry.width, section, dtype=entry.dtype,
                         what=f"tile {entry.tile!r}{where}", source="header")


def reading_order(stage: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """Return tile indices in bands across the section's shorter side (columns of a wide section).

    Bands are half a tile wide along the longer side; within a band tiles
    go along the shorter side. A pair's first strip waits only until the
    band next to it is read.
    """
    stage = np.asarray(stage, np.float64).reshape(-1, 2)
    sizes = np.asarray(sizes, np.float64).reshape(-1, 2)
    if len(stage) == 0:
        return np.zeros(0, np.int64)
    extent = (stage + sizes).max(axis=0) - stage.min(axis=0)
    along = 0 if extent[0] >= extent[1] else 1  # bands follow the longer side
    width = max(0.5 * float(np.median(sizes[:, along])), 1.0)
    band = np.floor((stage[:, along] - stage[:, along].min()) / width)
    return np.lexsort((stage[:, 1 - along], band)).astype(np.int64)


def _is_blank(stats: dict, settings: StitchSettings) -> bool:
    return stats["contrast_to_noise"] < settings.blank_contrast_to_noise


def _unusable_for_profile(stats: dict, settings: StitchSettings) -> bool:
    return _is_blank(stats, settings) or max(stats["saturated_fraction"],
                                             stats["zero_fraction"]) > settings.saturated_max


def sample_profile(tiles: list[TileEntry], order: np.ndarray, settings: StitchSettings,
                   section: int, stats_cache: dict, kept: dict | None = None) -> tuple[np.ndarray | None, list[str]]:
    """Return the illumination profile from at most ``MAX_PROFILE_TILES`` tiles, and section flags.

    The tiles are spread evenly over the reading order; blank and saturated
    ones, and tiles of another size than the first, are left out. Their
    statistics go into ``stats_cache`` (tile index -> dict) so the main pass
    need not measure them again, and, while they fit in ``KEEP_PROFILE_BYTES``,
    their pixels into ``kept`` (tile index -> array) so it need not read them again.
    """
    if not settings.illumination:
        return None, []
    n = len(order)
    pick = order[np.unique(np.linspace(0, n - 1, min(n, MAX_PROFILE_TILES)).round().astype(np.int64))]
    shape = (tiles[0].height, tiles[0].width)
    thumbs = []
    for i in pick:
        t = tiles[int(i)]
        if (t.height, t.width) != shape:
            continue
        img = read_tile(t, section)
        stats_cache[int(i)] = st = tile_stats(img)
        if kept is not None and img.nbytes * (len(kept) + 1) <= KEEP_PROFILE_BYTES:
            kept[int(i)] = img
        if not _unusable_for_profile(st, settings) and st["mean"] > 0:
            thumbs.append(tile_thumbnail(img, settings.illumination_step))
    if len(thumbs) < MIN_ILLUMINATION_TILES:
        return None, ["illumination_too_few_tiles"]
    # A median over few tiles still carries specimen; a quadratic (the shape of a
    # vignetting bowl) follows it less than a quartic (common practice, no source).
    degree = 2 if len(thumbs) < FEW_PROFILE_TILES else 4
    return illumination_profile(np.stack(thumbs), degree), []


def _slice(box):
    x0, y0, x1, y1 = box
    return np.s_[y0:y1, x0:x1]


class _Corrector:
    """Divides strips by the illumination profile brought to their tile's size (cached per size)."""

    def __init__(self, profile: np.ndarray | None):
        self.profile = profile
        self.full: dict[tuple[int, int], np.ndarray] = {}

    def __call__(self, strip: np.ndarray, pad, tile: TileEntry) -> np.ndarray:
        if self.profile is None:
            return strip.astype(np.float32)
        key = (tile.height, tile.width)
        if key not in self.full:
            self.full[key] = illumination_at_tile_size(self.profile, tile.height, tile.width)
        # 8- and 16-bit pixels are exact in float32: divided as they are, without a float copy first
        return np.divide(strip, self.full[key][_slice(pad)], dtype=np.float32)


def stream_pairs(tiles: list[TileEntry], overlaps: list[Overlap], order: np.ndarray,
                 profile: np.ndarray | None, settings: StitchSettings, section: int,
                 stats_cache: dict | None = None, kept: dict | None = None):
    """Return each pair's :class:`PairResult`, each tile's statistics and its lossy compression (or None).

    Each tile is read once, in ``order`` (or taken, and dropped, from ``kept``); a pair is registered when its
    second tile is read, and its strips dropped. Pairs with a blank tile are
    not registered (reason ``"blank_tile"``).
    """
    n = len(tiles)
    cache = stats_cache if stats_cache is not None else {}
    kept = kept if kept is not None else {}
    by_tile: list[list[int]] = [[] for _ in range(n)]
    for k, ov in enumerate(overlaps):
        by_tile[ov.a].append(k)
        by_tile[ov.b].append(k)
    rank = np.empty(n, np.int64)
    rank[order] = np.arange(n)
    correct = _Corrector(profile)
    search = 2.0 * settings.max_stage_error
    pending: dict[tuple[int, int], np.ndarray] = {}
    results: list[PairResult | None] = [None] * len(overlaps)
    stats: list[dict | None] = [None] * n
    lossy: list[str | None] = [None] * n
    blank = np.zeros(n, bool)
    for i in (int(v) for v in order):
        t = tiles[i]
        img = kept.pop(i, None)
        if img is None:
            img = read_tile(t, section)
        stats[i] = cache.pop(i, None) or tile_stats(img)
        blank[i] = _is_blank(stats[i], settings)
        lossy[i] = lossy_compression(t.path)
        for k in by_tile[i]:
            ov = overlaps[k]
            side = 0 if ov.a == i else 1
            other = ov.b if side == 0 else ov.a
            strip = img[_slice(ov.pad_a if side == 0 else ov.pad_b)]
            if rank[other] > rank[i]:
                pending[k, side] = strip.copy()  # a copy, so the tile itself can go
                continue
            theirs = pending.pop((k, 1 - side))
            sa, sb = (strip, theirs) if side == 0 else (theirs, strip)
            a, b = tiles[ov.a], tiles[ov.b]
            if blank[ov.a] or blank[ov.b]:
                results[k] = PairResult(b.x - a.x, b.y - a.y, 0.0, 0.0, "blank_tile")
                continue
            nominal = (ov.box_a[0] - ov.box_b[0], ov.box_a[1] - ov.box_b[1])
            results[k] = register_pair(
                correct(sa, ov.pad_a, a), correct(sb, ov.pad_b, b), ov, (a.width, a.height),
                (b.width, b.height), nominal, search, settings.upsample, settings.min_ncc,
                settings.min_peak_margin, settings.spectral_exponent, settings.spectrum_sigma)
        del img
    return results, stats, lossy


def widen_search(tiles: list[TileEntry], overlaps: list[Overlap], results: list[PairResult],
                 profile: np.ndarray | None, settings: StitchSettings, section: int) -> int:
    """Register again, searching two and then four times as far, pairs the search may have been too narrow for.

    Returns how many of them now match.

    Only when the section's registered pairs show that stage errors reach
    into the outer part of the search (their 95th-percentile distance from
    the nominal offset above ``WIDEN_WHEN`` of it): then a pair rejected
    for a reason a too narrow search gives (``RETRY_REASONS``) is likely a
    real overlap the stage put too far off, not a pair of featureless strips. Both tiles of each such
    pair are read again (one pair at a time), with strips grown to the wider
    search. ``results`` is updated in place; a pair that still fails keeps
    its first result. Four times is the limit: beyond it, a larger
    ``max_stage_error`` is the honest setting.
    """
    search = 2.0 * settings.max_stage_error
    dev = [max(abs(r.dx - (tiles[ov.b].x - tiles[ov.a].x)), abs(r.dy - (tiles[ov.b].y - tiles[ov.a].y)))
           for ov, r in zip(overlaps, results) if r.reason == ""]
    if not dev or float(np.percentile(dev, 95)) <= WIDEN_WHEN * search:
        return 0
    found = 0
    correct = _Corrector(profile)
    todo = [(k, wide) for wide in (2 * search, 4 * search)
            for k, r in enumerate(results) if r.reason in RETRY_REASONS]
    for k, wide in todo:
        ov = overlaps[k]
        if results[k].reason not in RETRY_REASONS:
            continue
        a, b = tiles[ov.a], tiles[ov.b]
        grown = find_overlaps(np.array([(a.x, a.y), (b.x, b.y)]), np.array([(a.width, a.height),
                              (b.width, b.height)]), settings.min_overlap, int(np.ceil(wide)))
        if not grown:
            continue
        g = grown[0]
        sa = read_tile(a, section)[_slice(g.pad_a)]
        sb = read_tile(b, section)[_slice(g.pad_b)]
        again = register_pair(
            correct(sa, g.pad_a, a), correct(sb, g.pad_b, b), g, (a.width, a.height), (b.width, b.height),
            (g.box_a[0] - g.box_b[0], g.box_a[1] - g.box_b[1]), wide, settings.upsample, settings.min_ncc,
            settings.min_peak_margin, settings.spectral_exponent, settings.spectrum_sigma)
        if again.reason == "":
            results[k] = again
            found += 1
    return found
