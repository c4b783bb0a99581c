"""The align stage: coarse features + RANSAC per pair, one global affine solve, elastic refinement.

Per-section and per-pair work goes through ``mapper(fn, items)``; every
``fn`` is a module-level function of one small picklable item (a source that
knows its build path, section numbers, settings, a scratch folder).
Intermediate arrays (features, coarse-aligned images) are passed through
``DIR/scratch/align/``, removed at the end. The global solves run here.
"""
from __future__ import annotations

import shutil
import tempfile
from dataclasses import replace
from pathlib import Path

import cv2
import numpy as np

from ..errors import InputError
from ..folder import BuildFolder
from ..transforms.records import SectionAlignment
from ..transforms.types import Affine2D, DisplacementField
from .fields import SolveTask, solve_block_job
from .regions import (Grid, RegionTask, crop_alignment, load_block, make_grid, region_job, residual_job,
                      residual_stats, window_links, windows)
from .coarse import PairResult, match_pair, pair_from_points
from .blockmatch import block_reach
from .correlate import correlate_overviews
from .features import FeatureSet, detect_features
from .settings import AlignSettings, check_settings
from .solve import solve_affines
from .sources import BuildSource


# ----------------------------------------------------------------- workers
def _origin(bbox) -> tuple[int, int]:
    """Return the first full-resolution pixel centre inside a bbox of pixel edges."""
    return int(np.ceil(bbox[0] + 0.5)), int(np.ceil(bbox[1] + 0.5))


def overview_scale(bbox, settings: AlignSettings, rough: bool = False) -> int:
    """Return the reduction factor of a section's overview: at least ``work_scale``, and fine enough
    that the overview's longer side is at most ``overview_size`` pixels.

    The overview is what features are detected on, so its size bounds the
    feature task's memory whatever the section's size (a 130k px section at
    2048 px: scale 64), while a small section is never reduced below
    ``work_scale`` (a 1024 px section keeps its 512 px at scale 2).
    ``rough`` (the section affines come from the elastic grid, see
    :func:`_grid_affines`): never finer than the early elastic rounds, which
    measure what the overview leaves; their renders then take the tiles the
    overview prepared from the tile cache instead of reading them again.
    """
    side = max(bbox[2] - bbox[0], bbox[3] - bbox[1])
    s = max(int(settings.work_scale), int(np.ceil(side / settings.overview_size)))
    return max(s, settings.elastic_scale * settings.early_round_coarsening) if rough else s


def _structured_blocks(img: np.ndarray, size: int = 16) -> int:
    """Return how many ``size`` px blocks of an overview hold data with some contrast (a blank section: 0)."""
    h, w = (img.shape[0] // size) * size, (img.shape[1] // size) * size
    if not h or not w:
        return 0
    blocks = img[:h, :w].reshape(h // size, size, w // size, size)
    with np.errstate(invalid="ignore"):
        sd = blocks.std(axis=(1, 3))
        mean = np.abs(blocks.mean(axis=(1, 3)))
    return int((np.isfinite(sd) & (sd > 1e-6 * (mean + 1.0))).sum())


def features_job(item) -> dict:
    """Render one section's overview; save its features (or, for ``correlation``, the overview) to scratch.

    Feature positions are stored in full-resolution section pixels.
    """
    source, z, settings, scratch, rough = item
    bbox = source.bbox(z)
    x0, y0 = _origin(bbox)
    s = overview_scale(bbox, settings, rough)
    w = int((bbox[2] - 0.5 - x0) // s) + 1
    h = int((bbox[3] - 0.5 - y0) // s) + 1
    img = source.region(z, None, x0, y0, w, h, s)
    if settings.detector == "correlation":
        np.save(Path(scratch) / f"overview_{z}.npy", img)
        return {"section": z, "features": _structured_blocks(img), "bbox": bbox, "scale": s,
                "offset": (x0, y0)}
    fs = detect_features(img, settings.detector, settings.max_features)
    xy = fs.xy * s + np.array([x0, y0]) + (s - 1) / 2.0
    np.savez(Path(scratch) / f"features_{z}.npz", xy=xy, desc=fs.descriptors, binary=fs.binary, scale=s)
    return {"section": z, "features": len(fs), "bbox": bbox, "scale": s}


def _load_features(scratch, z):
    with np.load(Path(scratch) / f"features_{z}.npz") as f:
        return FeatureSet(f["xy"], f["desc"], bool(f["binary"])), int(f["scale"])


def _overview_at(scratch, fact, scale):
    """Return a section's stored overview resampled to ``scale`` (block means), and its full-res offset."""
    img = np.load(Path(scratch) / f"overview_{fact['section']}.npy")
    if fact["scale"] != scale:
        f = fact["scale"] / scale
        img = cv2.resize(img, (max(1, round(img.shape[1] * f)), max(1, round(img.shape[0] * f))),
                         interpolation=cv2.INTER_AREA)
    return img, np.asarray(fact["offset"], float)


#: correlation of overviews: the levels coarser than the overview only have to bring the next level
#: within the blocks' search, so they hold fewer blocks and take the matcher's one pass (its pull
#: toward the model so far, a few per cent of what is left, is measured again by the next level);
#: the overview itself keeps the unbiased passes: with the one pass there too, the coarse stage alone
#: drifted 1 px over 50 sections (tests/test_align_stack.py), a slow drift the elastic step's second
#: differences cannot see. Rule of thumb, checked on the realistic long and small stacks (3 seeds)
_COARSE_BLOCKS = 120
#: ... and the overview level about 200 blocks: an affine from 200 sub-pixel matches is as good as from
#: 400 (coarse-only drift over 50 sections 0.06 / 0.12 px with either, 0.14 / 0.17 with 120). 100 blocks
#: (tried with early_round_coarsening 2) passed seeds 0-2 but not held-out seeds of the realistic long
#: stack: seed 7 RMS 0.89 -> 1.11 px, p95 1.65 -> 2.09; seed 8 last section 1.31 -> 1.52 px (bench_accuracy)
_OVERVIEW_BLOCKS = 200


def pair_job(item) -> PairResult:
    """Match sections ``a`` and ``b`` (stored features, or overviews by correlation) and fit the coarse model.

    ``item`` is ``(scratch, facts of a, facts of b, settings, prior, finest)``; ``prior`` (an
    :class:`Affine2D` ``b`` -> ``a`` in section pixels, or None) is the model chained through the
    sections between, from which correlation starts at the overview itself (see :func:`_chained`);
    ``finest`` False stops correlation at the coarsest level that gives a model (see
    :func:`_grid_affines`).
    """
    scratch, fa_, fb_, settings, prior, finest = item
    a, b = fa_["section"], fb_["section"]
    if settings.detector != "correlation":
        fa, sa = _load_features(scratch, a)
        fb, sb = _load_features(scratch, b)
        return match_pair(fa, fb, a, b, model=settings.model, ratio=settings.ratio,
                          threshold=settings.ransac_threshold * max(sa, sb), min_inliers=settings.min_inliers)
    s = max(fa_["scale"], fb_["scale"])
    stats = {"features_a": fa_["features"], "features_b": fb_["features"], "matches": 0, "inliers": 0,
             "inlier_ratio": 0.0, "residual_rms": None, "residual_max": None}
    empty = np.zeros((0, 2))
    if min(fa_["features"], fb_["features"]) < settings.min_inliers:
        return PairResult(a, b, empty, empty, None, stats, "few_features")
    (ia, oa), (ib, ob) = _overview_at(scratch, fa_, s), _overview_at(scratch, fb_, s)
    # overview pixel j has its centre at section pixel offset + (j + 0.5) * s - 0.5 (block means)
    to_a, to_b = (Affine2D(np.array([[s, 0.0, o[0] + 0.5 * s - 0.5], [0.0, s, o[1] + 0.5 * s - 0.5]])) for o in (oa, ob))
    # overview pixel of a -> section pixel of a -> section pixel of b -> overview pixel of b
    start = None if prior is None else to_a.then(prior.inverse()).then(to_b.inverse()).matrix
    pa, pb, facts = correlate_overviews(ia, ib, threshold=settings.ransac_threshold,
                                        min_confidence=settings.min_match_confidence,
                                        blocks=_OVERVIEW_BLOCKS, coarse_blocks=_COARSE_BLOCKS,
                                        coarse_unbiased=False, prior=start, finest=finest)
    pa, pb = to_a.apply(pa), to_b.apply(pb)
    # the threshold in pixels of the level the points come from (2 ** level overview pixels each)
    s_level = s * 2 ** facts.get("level", 0)
    return pair_from_points(pa, pb, a, b, model=settings.model, threshold=settings.ransac_threshold * s_level,
                            min_inliers=settings.min_inliers, stats={**stats, "matches": facts["matches"]})


# ------------------------------------------------------------------ stages
def _pairs(sections: list[int], neighbours: int) -> list[tuple[int, int]]:
    present = set(sections)
    return [(z, z + k) for z in sections for k in range(1, neighbours + 1) if z + k in present]


def _chained(chain: list[int], known: dict) -> Affine2D | None:
    """Return the model ``chain[-1]`` -> ``chain[0]`` composed of the usable pairs of consecutive
    sections along ``chain``, or None (a pair of consecutive sections, or a link missing or unusable).

    Correlation from it skips the coarser levels of the overview pyramid, whose only job is to bring
    the overview's blocks within their search: the chained model already does (its error is the two
    pairs' errors, a fraction of a pixel, against a search of several). The overview's blocks keep the
    unbiased passes: with the one pass their pull toward the chained model ties the z+2 pair to the
    z+1 pairs it was chained from, and the plain residual of test_random_distortions_are_removed
    (linear-in-z part included; the last elastic round with one pass too) rose from 0.99 / 1.82 px
    (RMS / p95) to 1.09 / 2.02 px.
    """
    if len(chain) < 3:
        return None
    out = Affine2D.identity()
    for a, b in zip(chain[:-1], chain[1:]):
        r = known.get((a, b))
        if r is None or not r.usable:
            return None
        out = r.model.then(out)     # b -> a, then a -> chain[0]
    return out


def _coarse(source, sections, settings, scratch, mapper, tick, rough=False):
    """Return per-section feature facts, the matched pairs (in :func:`_pairs` order) and the affine solve.

    Sections are taken in windows of ``max(region_sections, 4 * neighbours)``: their overviews are
    made, the pairs ending in the window matched, and then the overviews (and feature files) of the
    sections no later section can pair with are deleted, so scratch holds about a window of
    overviews at a time, not one per section of the stack.

    ``rough``: the affines only have to bring the block matches of :func:`_grid_affines` within their
    search. Pairs of consecutive present sections stop at the coarsest level of the overviews'
    pyramid; a pair farther apart is matched only where the model chained through the sections
    between is missing (a link failed), so a failed link still has its way round.
    """
    every = _pairs(sections, settings.neighbours)
    order = {p: i for i, p in enumerate(every)}
    window = max(settings.region_sections, 4 * settings.neighbours)
    facts, pairs = {}, []
    for i in range(0, len(sections), window):
        new = sections[i:i + window]
        for f in mapper(features_job, [(source, z, settings, scratch, rough) for z in new]):
            facts[f["section"]] = f
        tick(len(new))
        ready = [(a, b) for a, b in every if b in set(new)]
        # pairs of consecutive present sections first; a pair farther apart then starts from the
        # model chained through the sections between (the overview's blocks need no coarser levels)
        hops = {p: [z for z in sections if p[0] <= z <= p[1]] for p in ready}
        for batch in ([p for p in ready if len(hops[p]) == 2], [p for p in ready if len(hops[p]) > 2]):
            known = {(r.a, r.b): r for r in pairs}
            items = [(scratch, facts[a], facts[b], settings, _chained(hops[(a, b)], known),
                      not rough or len(hops[(a, b)]) > 2) for a, b in batch]
            if rough:   # the block matches measure a pair farther apart from the chained model
                items = [it for it in items if it[4] is None]
            pairs += mapper(pair_job, items)
        tick(len(ready))
        for z in facts:
            if z + settings.neighbours <= new[-1]:  # every pair of z is matched
                for name in (f"overview_{z}.npy", f"features_{z}.npz"):
                    (Path(scratch) / name).unlink(missing_ok=True)
    pairs.sort(key=lambda p: order[(p.a, p.b)])
    solved = solve_affines(sections, pairs, settings.model,
                           outlier_floor=settings.ransac_threshold * max(f["scale"] for f in facts.values()))
    return facts, pairs, solved


#: the section affines come from the elastic grid's block matches (:func:`_grid_affines`) when the
#: median section holds at least this many grid nodes inside the early rounds' reach, else from the
#: overviews alone. The overview's affine takes 200 blocks (fewer failed on held-out seeds, see
#: _OVERVIEW_BLOCKS); the grid's matches each cover a larger block (96 full-resolution px against
#: 64) but are fewer and lie farther from the section's edge. Measured (identifiable residual RMS,
#: held-out seeds 7-9, true tile positions, bench_accuracy-style canvas grid): realistic/base
#: sections (1380 px, about 100 such nodes, 78 trusted matches per link) 0.520 / 0.503 / 0.512 ->
#: 0.514 / 0.512 / 0.509 px; realistic/long sections (950 px, 36 nodes, 31 matches per link; with
#: round 0 matched again through the new affines) 0.903 / 0.935 / 0.887 -> 0.956 / 0.978 / 0.835 px
#: and the last section 1.37 / 1.33 / 1.05 -> 1.46 / 1.47 / 1.07 px: too few there. A rule of thumb
#: between the two, no source
_GRID_AFFINE_NODES = 64


def _use_grid_affines(source, sections, settings: AlignSettings) -> bool:
    """Return True when the median section holds at least :data:`_GRID_AFFINE_NODES` grid nodes inside
    the early elastic rounds' reach (see :func:`_grid_affines`)."""
    if (not settings.elastic or settings.elastic_rounds < 2 or len(sections) < 3
            or settings.detector != "correlation"):
        return False
    c = settings.early_round_coarsening
    reach = block_reach(settings.match_half_size // c, -(-settings.match_max_shift // c)) \
        * settings.elastic_scale * c
    e = settings.elastic_scale
    spacing = max(e, e * round(settings.grid_spacing / e))      # as make_grid
    counts = []
    for z in sections:
        x0, y0, x1, y1 = source.bbox(z)
        n = [max(0, int((side - 2 * reach) // spacing) + 1) for side in (x1 - x0, y1 - y0)]
        counts.append(n[0] * n[1])
    return float(np.median(counts)) >= _GRID_AFFINE_NODES


#: at most about this many grid nodes per link go into the affine solve (a sub-lattice of the grid):
#: as many as the solve weighs fully (solve_affines' max_points_per_pair), bounded at any section size
_GRID_AFFINE_POINTS = 400


def _grid_affines(source, sections, facts, pairs, solved, settings, scratch, mapper, tick):
    """Return the pairs and the affine solve made again from block matches on the elastic grid.

    Each section is rendered through its rough affine (:func:`_coarse` with ``rough``) over the
    elastic grid's node blocks, at the early rounds' scale, and every link to the next
    ``neighbours`` sections is block-matched there, as an elastic round does (region tasks through
    ``mapper``). A link's trusted matches become its correspondences (aligned node ``p`` of ``a``:
    section pixel ``A_a p``; of ``b``: ``A_b (p + v)``), RANSAC fits its model, and the affines are
    solved again from them. Where a section is as fine as the grid (the overview's scale is the
    elastic scale's) this replaces the overview correlation's finest level, which measured the same
    pairs again with blocks of its own; at production size the grid has far more nodes than the
    overview's 200 blocks, at a finer scale. A link with no usable model keeps its overview pair.
    The driver reads the tasks' files one node block at a time and keeps the matches of a
    sub-lattice of nodes, at most about :data:`_GRID_AFFINE_POINTS` per link.
    """
    affines = solved.affines
    plan = _Plan(source, _grid(source, affines, settings), sections, settings, scratch)
    aligns = {z: SectionAlignment(z, affines[z], None) for z in sections}
    c = settings.early_round_coarsening
    tasks, n_windows = plan.region_tasks(aligns, "round0", settings.neighbours, subpixel=False, coarsening=c)
    list(mapper(region_job, tasks))
    tick(len(_pairs(sections, settings.neighbours)))
    grid = plan.grid
    step = max(1, int(np.ceil(np.sqrt(grid.shape[0] * grid.shape[1] / _GRID_AFFINE_POINTS))))
    found: dict = {}
    for b, (rows, cols) in enumerate(plan.blocks):
        matches, _ = load_block(plan.scratch, "round0", b, n_windows)
        jj, ii = np.mgrid[rows, cols]
        keep = (jj % step == 0) & (ii % step == 0)
        nodes = np.stack([grid.origin[0] + grid.spacing * ii, grid.origin[1] + grid.spacing * jj], -1)
        for key, (sh, wt) in matches.items():
            ok = keep & np.isfinite(sh[..., 0]) & (wt > 0)
            got = found.setdefault(key, ([], []))
            got[0].append(nodes[ok])
            got[1].append(nodes[ok] + sh[ok])
    by_link = {(p.a, p.b): p for p in pairs}
    out = []
    for key in _pairs(sections, settings.neighbours):
        a, b = key
        pa, pb = (np.concatenate(v) for v in found.get(key, ([np.zeros((0, 2))], [np.zeros((0, 2))])))
        res = None
        if len(pa) >= settings.min_inliers:
            # the threshold in pixels of the rounds that matched (elastic_scale x coarsening)
            res = pair_from_points(affines[a].apply(pa), affines[b].apply(pb), a, b, model=settings.model,
                                   threshold=settings.ransac_threshold * settings.elastic_scale * c,
                                   min_inliers=settings.min_inliers,
                                   stats={"features_a": len(pa), "features_b": len(pb), "matches": len(pa),
                                          "inliers": 0, "inlier_ratio": 0.0, "residual_rms": None,
                                          "residual_max": None})
        if res is None or not res.usable:
            res = by_link.get(key, res)
        if res is not None:
            out.append(res)
    floor = settings.ransac_threshold * max(f["scale"] for f in facts.values())     # as in _coarse
    new = solve_affines(sections, out, settings.model, outlier_floor=floor)
    moved = {z: new.affines[z].then(affines[z].inverse()).matrix for z in sections}
    return out, new, (plan, n_windows, moved)


def _grid(source, affines: dict[int, Affine2D], settings: AlignSettings) -> Grid:
    """Return the elastic grid over the union of all sections' coarse footprints."""
    boxes = []
    for z, aff in affines.items():
        x0, y0, x1, y1 = source.bbox(z)
        boxes.append(aff.inverse().apply(np.array([[x0, y0], [x1, y0], [x0, y1], [x1, y1]])))
    return make_grid(boxes, settings)


class _Plan:
    """The node blocks and section windows of one align run, and the tasks built from them."""

    def __init__(self, source, grid: Grid, sections, settings, scratch):
        self.source, self.grid, self.sections, self.settings = source, grid, sections, settings
        self.scratch = Path(scratch)
        self.blocks = grid.block_slices(settings.region_nodes)
        self.halo = max(2, settings.solve_halo)

    def region_tasks(self, aligns, tag, neighbours, consecutive=False, subpixel=True, coarsening=1):
        """Return a generator of one :class:`RegionTask` per node block x window, and the number of windows.

        ``coarsening``: the tasks render and match at ``elastic_scale`` times
        this, with blocks and search of the same size in full-resolution pixels.
        """
        s, grid = self.settings, self.grid
        if coarsening > 1:
            s = replace(s, match_half_size=s.match_half_size // coarsening,
                        match_max_shift=-(-s.match_max_shift // coarsening))   # the search no shorter
            grid = replace(grid, scale=grid.scale * coarsening,
                           reach=block_reach(s.match_half_size, s.match_max_shift))
        wins = windows(self.sections, s.region_sections, neighbours)
        # Blocks go row by row, so the next task usually meets tiles of the one before. A task can read
        # more tiles than the tile cache keeps (4 sections of a 7 x 7-tile stack: 36 at scale 2, 31 kept),
        # and the cache drops the least recently used first, the first section's; so with one window
        # every other block renders its sections last to first, starting where the one before ended.
        # (With several windows a window's first sections are the last ones of the window before it.)
        # The order changes no result: 7x7 tiles, 4 sections, last round 429 -> 376 tile preparations.

        def tasks():
            # made as the mapper submits them: a production round has about 180,000 (each some 50 kB
            # pickled, every seen section's field cut to the block), too many to hold at once
            for b, (rows, cols) in enumerate(self.blocks):
                for w, (own, seen) in enumerate(wins):
                    if consecutive:   # each section with the next present one, across lost ones
                        links = [(a, seen[i + 1]) for i, a in enumerate(seen[:-1]) if a in own]
                    else:
                        links = window_links(own, seen, neighbours)
                    als = tuple(crop_alignment(aligns[z], self.grid, rows, cols, self.halo) for z in seen)
                    yield RegionTask(self.source, grid, b, rows, cols, als, tuple(links), tuple(own),
                                     s, str(self.scratch / f"{tag}_b{b}_w{w}.pkl"), subpixel,
                                     backwards=len(wins) == 1 and b % 2 == 1)
        return tasks(), len(wins)

    def solve_tasks(self, tag, n_windows, fields, moved=None):
        """Return one :class:`SolveTask` per node block; writes each block's prior fields to scratch.

        ``moved``: ``{z: (2, 3) matrix}`` (see :attr:`.fields.SolveTask.moved`) or None.
        """
        ny, nx = self.grid.shape
        h = self.halo
        tasks = []
        for b, (rows, cols) in enumerate(self.blocks):
            hr = slice(max(0, rows.start - h), min(ny, rows.stop + h))
            hc = slice(max(0, cols.start - h), min(nx, cols.stop + h))
            meets = tuple((i, r, c) for i, (r, c) in enumerate(self.blocks)
                          if r.start < hr.stop and r.stop > hr.start and c.start < hc.stop and c.stop > hc.start)
            prior = None
            if fields is not None:
                prior = str(self.scratch / f"{tag}_prior_b{b}.npy")
                np.save(prior, np.stack([fields[z][hr, hc] for z in self.sections]))
            tasks.append(SolveTask(str(self.scratch), tag, b, rows, cols, meets, n_windows,
                                   tuple(self.sections), prior, self.settings, hr, hc,
                                   None if moved is None else (self.grid.origin, self.grid.spacing, moved)))
        return tasks

    def add_steps(self, tag, fields: dict | None) -> dict:
        """Return ``fields`` (zeros if None) plus the blocks' increments, added in place (one copy in memory)."""
        ny, nx = self.grid.shape
        if fields is None:
            fields = {z: np.zeros((ny, nx, 2), np.float32) for z in self.sections}
        for b, (rows, cols) in enumerate(self.blocks):
            arr = np.load(self.scratch / f"{tag}_step_b{b}.npy")
            for k, z in enumerate(self.sections):
                fields[z][rows, cols] += arr[k]
        return fields

    def clean(self, tag):
        for p in self.scratch.glob(f"{tag}_*"):
            p.unlink(missing_ok=True)


def _elastic(source, sections, affines, settings, scratch, mapper, tick, first=None):
    """Return the grid, the plan, every section's field, the last round's match counts and low-contrast
    shares, and its residual histograms of each section to the next present one.

    Each round renders the sections through the current fields, region by
    region, measures what is left by block matching, and solves for an
    increment block by block; later rounds remove the error of the
    first-order relation ``v_ab ~ u_b - u_a``. ``first``, from :func:`_grid_affines`: round 0's
    plan, windows and matches are already made, through the affines before their second solve
    (the solve tasks read them as made through ``affines``, see :attr:`.fields.SolveTask.moved`).
    """
    if first is None:
        grid = _grid(source, affines, settings)
        plan = _Plan(source, grid, sections, settings, scratch)
    else:
        plan, first_windows, first_moved = first
        grid = plan.grid
    fields = None
    found, share = {}, {}
    for rnd in range(settings.elastic_rounds):
        tag = f"round{rnd}"
        aligns = {z: SectionAlignment(z, affines[z], None if fields is None else
                                      DisplacementField(fields[z], grid.origin, grid.spacing))
                  for z in sections}
        # every round measures with the matcher's one pass (every round but the last at a coarser
        # scale): its small pull toward zero is a few per cent of the shift it measures, and a round
        # measures only what the rounds before it left, so in the last round (shifts of a fraction of a
        # pixel) it is a few hundredths of a pixel. The unbiased passes there cost a quarter of the
        # round for no change: identifiable residual on held-out seeds 7-9 of realistic base and long
        # and standard base within 0.01 px RMS of them (bench_align --accuracy, true tile positions).
        # A single round measures the whole shift, and keeps the unbiased passes
        last = rnd == settings.elastic_rounds - 1
        moved = None
        if rnd == 0 and first is not None:
            # round 0's matches were made by _grid_affines through the affines before its solve
            counts, n_windows, moved = [], first_windows, first_moved
        else:
            tasks, n_windows = plan.region_tasks(aligns, tag, settings.neighbours,
                                                 subpixel=settings.elastic_rounds == 1,
                                                 coarsening=1 if last else settings.early_round_coarsening)
            counts = list(mapper(region_job, tasks))
            tick(len(_pairs(sections, settings.neighbours)))
        solved = list(mapper(solve_block_job, plan.solve_tasks(tag, n_windows, fields, moved)))
        if last:
            # the damage statistics come from the finest round: an early round at a coarser scale
            # keeps fewer blocks near a section's edge, and an end section, with links on one side
            # only, then fell below the stack's share (realistic small, 6 sections of 2 x 2 tiles)
            for c in counts:
                for key, (tried, ok) in c["counts"].items():
                    t0, o0 = found.get(key, (0, 0))
                    found[key] = (t0 + tried, o0 + ok)
            low = {z: [0, 0] for z in sections}
            for r in solved:
                for z, (n_low, n) in r["low"].items():
                    low[z][0] += n_low
                    low[z][1] += n
            share = {z: low[z][0] / max(1, low[z][1]) for z in sections}
        fields = plan.add_steps(tag, fields)
        plan.clean(tag)
    return grid, plan, fields, found, share, _merged([r["residual"] for r in solved])


def _merged(parts) -> dict:
    """Return ``{(a, b): stats}`` of per-region residual histograms ``{(a, b): (hist, sumsq, max)}``."""
    hist = {}
    for res in parts:
        for key, (h, sq, mx) in res.items():
            h0, sq0, mx0 = hist.get(key, (0, 0.0, 0.0))
            hist[key] = (h0 + h, sq0 + sq, max(mx0, mx))
    return {key: residual_stats(*v) for key, v in hist.items()}


def _final_residuals(plan, aligns, mapper) -> dict:
    """Return ``{(a, b): stats}`` of the block matches left between each section and the next present one.

    Renders and matches again; used when no elastic round ran (an elastic
    round's solve gives them from its own matches, see :func:`_elastic`).
    """
    tasks, _ = plan.region_tasks(aligns, "final", 1, consecutive=True)
    return _merged(mapper(residual_job, (replace(t, out="") for t in tasks)))


def _flags(sections, facts, solved, found, share, settings) -> dict[int, list[str]]:
    flags = {z: list(solved.flags.get(z, [])) for z in sections}
    present, lo, hi = set(sections), min(sections), max(sections)
    areas = {z: (b[2] - b[0]) * (b[3] - b[1]) for z, b in ((z, facts[z]["bbox"]) for z in sections)}
    med_area = float(np.median(list(areas.values())))
    for z in sections:
        if facts[z]["features"] < settings.min_inliers:
            flags[z].append("few_features")
        if any(n not in present and lo <= n <= hi for n in (z - 1, z + 1)):
            flags[z].append("lost_neighbour")
        if not 0.5 <= areas[z] / med_area <= 2.0:
            flags[z].append("odd_size")
    if found:
        frac = {}
        for z in sections:
            tried = sum(v[0] for k, v in found.items() if z in k)
            ok = sum(v[1] for k, v in found.items() if z in k)
            frac[z] = ok / tried if tried else None
        known = [f for f in frac.values() if f is not None]
        med = float(np.median(known)) if known else 0.0
        for z in sections:
            weak = med > 0 and frac[z] is not None and frac[z] < settings.damaged_fraction * med
            # a tenth of the area at low contrast marks a damaged section (common practice, no source)
            faded = share.get(z, 0.0) >= 0.1
            if weak or faded:
                flags[z].append("damaged")
    return flags


def _coarse_stats(z, facts, pairs, solved) -> dict:
    out = {"features": facts[z]["features"], "pairs": {}}
    for p in pairs:
        if z not in (p.a, p.b):
            continue
        other = p.b if p.a == z else p.a
        used = p.usable and (p.a, p.b) in solved.pair_rms
        out["pairs"][str(other)] = {
            "inliers": p.stats.get("inliers", 0), "inlier_ratio": p.stats.get("inlier_ratio", 0.0),
            "ransac_rms": p.stats.get("residual_rms"), "solve_rms": solved.pair_rms.get((p.a, p.b)),
            "used": bool(used), "reason": p.reason or ("outlier" if not used else "")}
    return out


def align_sections(source, settings: AlignSettings, *, mapper=map, progress=None,
                   scratch: str | Path | None = None) -> dict[int, SectionAlignment]:
    """Return the alignment of every section of ``source`` (nothing is written).

    Parameters
    ----------
    source : BuildSource or ArraySource
        Where section pixels come from (see :mod:`stackbuild.align.sources`).
    settings : AlignSettings
    mapper : callable
        ``mapper(fn, items)``, like the builtin ``map``.
    progress : callable, optional
        ``progress(done, total)``.
    scratch : path, optional
        Folder for intermediate arrays (a temporary folder if not given).
    """
    check_settings(settings)
    sections = sorted(source.sections())
    if not sections:
        raise InputError("no stitched sections to align; run the stitch stage first")
    if len(sections) == 1:
        z = sections[0]
        return {z: SectionAlignment(z, Affine2D.identity(), None, ["single_section"], {})}
    n_links = len(_pairs(sections, settings.neighbours))
    grid_affines = _use_grid_affines(source, sections, settings)
    total = len(sections) + n_links * (1 + settings.elastic * settings.elastic_rounds) + len(sections) - 1
    done = [0]

    def tick(n):
        done[0] += n
        if progress:
            progress(min(done[0], total), total)

    own = scratch is None
    scratch = Path(tempfile.mkdtemp(prefix="align-")) if own else Path(scratch)
    scratch.mkdir(parents=True, exist_ok=True)
    try:
        facts, pairs, solved = _coarse(source, sections, settings, scratch, mapper, tick, rough=grid_affines)
        first = None
        if grid_affines:
            pairs, solved, first = _grid_affines(source, sections, facts, pairs, solved, settings, scratch, mapper,
                                          tick)
        fields, found, grid, share, final = {}, {}, None, {}, None
        if settings.elastic and len(sections) >= 3:
            grid, plan, fields, found, share, final = _elastic(source, sections, solved.affines, settings,
                                                               scratch, mapper, tick, first)
        else:
            grid = _grid(source, solved.affines, settings)
            plan = _Plan(source, grid, sections, settings, scratch)
        flags = _flags(sections, facts, solved, found, share, settings)
        aligns = {}
        for z in sections:
            disp = None
            if fields:
                disp = DisplacementField(fields[z], grid.origin, grid.spacing)
            stats = {"coarse": _coarse_stats(z, facts, pairs, solved)}
            if disp is not None:
                stats["elastic"] = disp.magnitude_stats()
                stats["elastic"]["low_contrast_fraction"] = share[z]
            aligns[z] = SectionAlignment(z, solved.affines[z], disp, flags[z], stats)
        if final is None:
            final = _final_residuals(plan, aligns, mapper)
        tick(len(sections) - 1)
        for (a, b), st in final.items():
            aligns[a].stats["residual_next"] = {"section": b, **st}
            aligns[b].stats["residual_previous"] = {"section": a, **st}
        return aligns
    finally:
        if own:
            shutil.rmtree(scratch, ignore_errors=True)
        else:
            for p in [*scratch.glob("*.np[yz]"), *scratch.glob("*.pkl")]:
                p.unlink(missing_ok=True)


def run(folder, settings: AlignSettings, *, mapper, progress=None) -> dict[int, SectionAlignment]:
    """Return the alignment of every stitched section of ``folder``, also stored there (the align stage).

    Reads stitch records from the folder's transform store, works through
    ``mapper``, keeps its temporary files in ``folder.scratch_dir("align")``
    (removed at the end), writes ``SectionAlignment`` records with
    ``TransformStore.save_alignment`` and returns them. Lost sections (gaps
    in the numbering) get no record.
    """
    source = BuildSource(folder.root)
    scratch = folder.scratch_dir("align")
    try:
        aligns = align_sections(source, settings, mapper=mapper, progress=progress, scratch=scratch)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    store = source.store
    for rec in aligns.values():
        store.save_alignment(rec)
    return aligns


def run_align(build_dir, settings: AlignSettings, *, mapper=map,
              progress=None) -> dict[int, SectionAlignment]:
    """Return :func:`run` on the build folder at ``build_dir``."""
    return run(BuildFolder(build_dir), settings, mapper=mapper, progress=progress)
