"""What each stage's tasks hold and do, read off the stages' current code and settings.

For every kind of task a stage runs (one kind per task function), a model gives

* ``count``: how many such tasks the stage's graph has for a :class:`VolumeShape`;
* ``held``: the bytes of the arrays the task's code keeps at its peak, from the
  same sizes the stage uses (strips, coarse renders, shards, chunks, caches);
* ``work``: the quantity its CPU time is proportional to (usually megapixels).

Measured factors (:mod:`stackbuild.run.plan_rates`) turn ``held`` into memory and
``work`` into CPU seconds. Where a stage runs work in the driver, a kind named
``<stage>.driver`` models it. A model describes the code as it is: a kind whose
memory grows with the section says so through its ``held``, and the plan reports it.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from ..render.reduce import level_shapes
from .plan_shape import VolumeShape

MB = 1e6


@dataclass(frozen=True)
class Kind:
    """One kind of task of a stage: how many, what one holds, how much work one does."""

    name: str
    count: int
    held: float
    work: float
    reads: float = 0.0
    writes: float = 0.0
    driver: bool = False
    fixed: float = 0.0  # bytes held whatever the measured factor (a cache of known size)
    note: str = ""
    items: float = 0.0  # things a task handles at a cost each whatever their size (pairs of a section)


def _get(settings, name, default):
    return getattr(settings, name, default)


# ----------------------------------------------------------------------- stitch
def stitch_kinds(shape: VolumeShape, cfg) -> list[Kind]:
    """One task per section (``stitch/stage.py: _stitch_one``), tiles streamed (``stitch/stream.py``).

    A task holds the strips of the pairs whose second tile is not read yet (tiles are read
    in bands along the longer side, so about one band of tiles plus one), one tile with its
    float copies, the strips of the pair being registered, the illumination thumbnails
    of at most ``MAX_PROFILE_TILES`` tiles, and the raw tiles of those that fit in
    ``KEEP_PROFILE_BYTES`` (not read again); the others are read twice.
    """
    from ..stitch.stream import KEEP_PROFILE_BYTES, MAX_PROFILE_TILES

    st = cfg.stitch
    margin = math.ceil(2 * _get(st, "max_stage_error", 50.0))  # pairs are searched to twice the error
    th, tw, b = shape.tile_height, shape.tile_width, shape.itemsize
    strip_lr = min(tw, shape.overlap_x + 2 * margin) * min(th + 2 * margin, th)  # one side of a left-right pair
    strip_tb = min(th, shape.overlap_y + 2 * margin) * tw
    band = max(shape.rows, shape.cols) + 1
    pending = band * max(strip_lr, strip_tb) * b
    pairing = 2 * max(strip_lr, strip_tb) * 4 * 3          # both strips as float32 and their spectra
    step = max(1, int(_get(st, "illumination_step", 16)))
    thumbs = min(shape.tiles_per_section, MAX_PROFILE_TILES) * math.ceil(th / step) * math.ceil(tw / step) * 4 \
        if _get(st, "illumination", True) else 0
    one_tile = th * tw * (b + 4)
    tile_mpx = shape.tiles_per_section * th * tw / MB
    sampled = min(shape.tiles_per_section, MAX_PROFILE_TILES) if _get(st, "illumination", True) else 0
    kept = min(sampled, KEEP_PROFILE_BYTES // max(1, shape.tile_bytes))
    return [Kind("stitch.section", shape.imaged, pending + pairing + thumbs + one_tile + kept * shape.tile_bytes,
                 tile_mpx, reads=(shape.tiles_per_section + sampled - kept) * shape.tile_bytes,
                 writes=shape.tiles_per_section * 600,
                 note="holds one band of pending overlap strips", items=shape.pairs_per_section),
            Kind("stitch.driver", 1, shape.tiles * 1000.0, shape.tiles, driver=True,
                 note="the checked manifest and one job per section")]


# ------------------------------------------------------------------------ align
def _grid(shape: VolumeShape, a) -> tuple[int, int, int]:
    """Return (elastic grid nodes, pixels of the rendered grid region at elastic scale, scale)."""
    es = max(1, int(_get(a, "elastic_scale", 2)))
    spacing = max(es, es * round(_get(a, "grid_spacing", 128.0) / es))
    ny = int(shape.section_height // spacing) + 1
    nx = int(shape.section_width // spacing) + 1
    margin = es * (_get(a, "match_half_size", 24) + _get(a, "match_max_shift", 12) + 2)
    region = ((shape.section_height + 2 * margin) // es + 1) * ((shape.section_width + 2 * margin) // es + 1)
    return ny * nx, int(region), es


def align_kinds(shape: VolumeShape, cfg) -> list[Kind]:
    """The align stage's own model of its task graph (``align/budget.py``) when it has one, else :func:`_align_whole_sections`."""
    try:
        from ..align.budget import align_budget

        budget = align_budget(max(shape.section_height, shape.section_width), shape.imaged,
                              tile_px=max(shape.tile_height, shape.tile_width), tile_bytes=shape.itemsize,
                              settings=cfg.align, tile_cache_bytes=_cache_filled(shape))
        from ..align.budget import PROCESS_BYTES
    except (ImportError, TypeError, AttributeError):
        return _align_whole_sections(shape, cfg)
    a = cfg.align
    tile_mpx = shape.tiles_per_section * shape.tile_height * shape.tile_width / MB
    es = max(1, int(_get(a, "elastic_scale", 2)))
    held_images = int(_get(a, "region_sections", 8)) + int(_get(a, "neighbours", 2))
    spacing = max(es, es * round(_get(a, "grid_spacing", 128.0) / es))
    region_side = (int(_get(a, "region_nodes", 16)) - 1) * spacing  # level-0 px
    # Matching compares every feature of one section with every one of the other: work grows with the
    # square of the features kept, about one per 500 overview pixels up to max_features (on the
    # project's phantom; common practice puts SIFT at some hundreds to thousands per megapixel, no source).
    scale = max(int(_get(a, "work_scale", 4)), math.ceil(max(shape.section_height, shape.section_width)
                                                          / max(1, int(_get(a, "overview_size", 2048)))))
    feats = min(int(_get(a, "max_features", 4000)), shape.section_height * shape.section_width / scale ** 2 / 500)
    work = {"align.features": tile_mpx, "align.pair": feats ** 2 / MB,
            # the pixels a region task renders and matches: its images, clipped to the section
            "align.region": min(held_images, shape.imaged) * min(region_side, shape.section_height)
            * min(region_side, shape.section_width) / MB,
            "align.solve": (int(_get(a, "region_nodes", 16)) ** 2) * shape.imaged / MB}
    # A region task reads its sections' tiles under its region (plus the matcher's margin) by window
    # (tiles.prepared_window), unless its process's cache holds them; counted as read every time
    margin = es * (_get(a, "match_half_size", 24) + _get(a, "match_max_shift", 12) + 2)
    reads = {"align.features": shape.tiles_per_section * shape.tile_bytes,
             "align.region": min(held_images, shape.imaged) * min(region_side + 2 * margin, shape.section_height)
             * min(region_side + 2 * margin, shape.section_width) * shape.itemsize}
    links = sum(max(0, shape.imaged - k) for k in range(1, int(_get(a, "neighbours", 2)) + 1))
    count = {"align.pair": links}  # the pairs align/stage.py matches: (z, z + k) with both present
    rounds = int(_get(a, "elastic_rounds", 2)) if _get(a, "elastic", True) else 0
    kinds = []
    for t in budget["tasks"]:
        held = max(0.0, t.bytes_each - PROCESS_BYTES)
        n = count.get(t.name, t.count)
        if t.name == "align.region":
            # The budget counts rounds + 1 passes over the regions. With elastic rounds the residual
            # comes from the last round's own matches (align/stage.py: _elastic), so the extra pass
            # does not run; without them the one pass is the residual pass (residual_job).
            if not rounds:
                kinds.append(Kind("align.residual", n, held, work["align.region"], note="the residual pass"))
                continue
            n = n * rounds // (rounds + 1)
        kinds.append(Kind(t.name, n, held, work.get(t.name, 0.0), note=t.note, reads=reads.get(t.name, 0.0)))
    # The driver's CPU is bookkeeping per node block and section, every round: it crops each
    # section's alignment for every region task, stacks every section's prior field for every
    # block's solve and adds the blocks' steps back (align/stage.py: _Plan). So its work is counted
    # in thousands of block-section rounds (memory: every section's field on the grid).
    block_sections = budget.get("node_blocks", 1) * shape.imaged * max(1, rounds)
    kinds.append(Kind("align.driver", 1, max(0.0, budget["driver_bytes"] - PROCESS_BYTES),
                      block_sections / 1e3, driver=True, note="every section's field on the grid"))
    return kinds


def _align_whole_sections(shape: VolumeShape, cfg) -> list[Kind]:
    """Features per section, matching per pair, a render per section and round, block matching per link, the solve in the driver."""
    a = cfg.align
    ws = max(1, int(_get(a, "work_scale", 4)))
    sec_px = shape.section_height * shape.section_width
    tile_mpx = shape.tiles_per_section * shape.tile_height * shape.tile_width / MB
    sec_bytes = shape.tiles_per_section * shape.tile_bytes
    links = sum(max(0, shape.imaged - k) for k in range(1, int(_get(a, "neighbours", 2)) + 1))
    feats = int(_get(a, "max_features", 4000))
    kinds = [Kind("align.features", shape.imaged, sec_px / ws ** 2 * 8, tile_mpx, reads=sec_bytes,
                  writes=feats * 140, note="renders its whole section at work_scale"),
             Kind("align.pair", links, 2 * feats * 140, 1.0, reads=2 * feats * 140)]
    nodes, region, es = _grid(shape, a)
    rounds = int(_get(a, "elastic_rounds", 2)) if _get(a, "elastic", True) and shape.imaged >= 3 else 0
    renders = shape.imaged * (rounds + 1)
    block_links = links * rounds + max(0, shape.imaged - 1)
    kinds += [Kind("align.render", renders, region * 8, tile_mpx, reads=sec_bytes, writes=region * 4,
                   note="renders the whole grid region at elastic_scale"),
              Kind("align.blocks", block_links, region * 8, nodes / MB, reads=2 * region * 4,
                   note="loads two whole grid-region renders"),
              Kind("align.driver", 1, shape.imaged * nodes * 2 * 8, shape.imaged * nodes / MB, driver=True,
                   note="solves every section's field at once")]
    return kinds


# ----------------------------------------------------------------------- render
def tile_cache_bytes(shape: VolumeShape) -> int:
    """Return the per-process cache of prepared tiles the renderer will use for this tile size."""
    from .. import tiles

    return int(tiles.cache_bytes_for(shape.tile_height, shape.tile_width))


def _cache_filled(shape: VolumeShape) -> int:
    """Return the bytes the tile cache holds once a task has read a whole section: its bound, or all its tiles."""
    prepared = (shape.tile_height + 2) * (shape.tile_width + 2) * 4
    return min(tile_cache_bytes(shape), shape.tiles_per_section * prepared)


def _touching(n_out: int, block: int, step: float, size: int, n_tiles: int) -> list[int]:
    """Return, for each block ``[a, a+block)`` of an axis, how many tiles (at ``k*step``, ``size`` long) touch it."""
    out = []
    for a in range(0, n_out, block):
        b = min(a + block, n_out)
        lo = max(0, math.floor((a - 1 - size) / step) + 1)
        hi = min(n_tiles - 1, math.floor((b + 1) / step))
        out.append(max(0, hi - lo + 1))
    return out


#: Pixels a chunk's window of a tile reaches beyond the chunk on each side: the cubic
#: resampling's 2 px and the prepared tile's ring (from the sampler's code; measured 1.21x
#: reads on 160 px tiles in chunks of 64, 1.02x on 4096 px tiles in chunks of 1024).
WINDOW_MARGIN = 2.5


def _render_reads(shape: VolumeShape, block: int, per_shard: int, per_side: int = 1) -> tuple[float, float, str]:
    """Return (reads per tile, bytes of tile cache a shard task holds, note) of the level-0 render.

    As :func:`stackbuild.tiles.read_window` reads: an uncompressed tile by window, so each
    pixel about once plus the margins of the chunks' windows (:data:`WINDOW_MARGIN`; measured
    1.02 with ``bench_render.py --reads`` at 4096 px) and nothing cached. A compressed one by its decoded parts (strips, TIFF
    tiles, or the whole tile), cached raw within a process (``SEGMENT_TILES_KEPT`` tiles' worth),
    so a task decodes each part it needs once; a part under two shards is decoded by both when
    they run in different processes, so the reads are counted as if they always did (an upper
    bound: a part ``(a, b)`` px meets ``1 + a / block`` shard rows and ``1 + b / block`` shard
    columns on average; measured below it, e.g. strips of 64 rows of 4096 px tiles: 1.5 to 1.9
    against 2.0 planned).
    """
    from .. import tiles

    if shape.segment is None:
        # each chunk's window of a tile reaches WINDOW_MARGIN px beyond the chunk on every side
        chunk = block / max(1, per_side)
        reads = 1.0
        for size in (shape.tile_height, shape.tile_width):
            reads *= 1 + (size / chunk + 1) * 2 * WINDOW_MARGIN / size
        return reads, 0.0, f"tiles read by window (uncompressed): each {reads:.2f} times"
    a, b = min(shape.segment[0], shape.tile_height), min(shape.segment[1], shape.tile_width)
    reads = (1 + (a - 1) / block) * (1 + (b - 1) / block)
    raw = shape.tile_height * shape.tile_width * shape.itemsize
    kept = min(tiles.SEGMENT_TILES_KEPT, per_shard) * raw
    whole = (a, b) == (shape.tile_height, shape.tile_width)
    part = "whole tiles" if whole else f"parts of {a} x {b} px"
    return reads, float(kept), (f"compressed tiles decoded in {part}: each tile read at most {reads:.1f} times "
                                f"(decoded cache {kept / MB:.0f} MB)")


def render_kinds(shape: VolumeShape, cfg) -> list[Kind]:
    """One task per shard and level (``render/pyramid.py``), plus the contrast pass when it is on."""
    r = cfg.render
    chunk, per = int(r.chunk), int(r.shard)
    block = chunk * per
    h, w = shape.section_height, shape.section_width
    shapes = level_shapes(h, w, chunk)
    b = shape.itemsize
    n0 = math.ceil(h / block) * math.ceil(w / block)
    upper = sum(math.ceil(hh / block) * math.ceil(ww / block) for hh, ww in shapes[1:])
    sy, sx = shape.tile_height - shape.overlap_y, shape.tile_width - shape.overlap_x
    ty = _touching(h, block, sy, shape.tile_height, shape.rows)
    tx = _touching(w, block, sx, shape.tile_width, shape.cols)
    per_shard = max(ty) * max(tx)
    reads, kept, note = _render_reads(shape, block, per_shard, per)
    records = shape.tiles_per_section * 400 + _grid(shape, cfg.align)[0] * 2 * 8
    shard_px = min(block, h) * min(block, w)
    # the tile windows under one chunk while it is sampled: up to 2 x 2 tiles, each a window of at most
    # the chunk (or the tile) as float32 value, weight and the two remap coordinate maps
    windows = 4 * min(chunk, shape.tile_height) * min(chunk, shape.tile_width) * 4 * 4
    kinds = [Kind("render.shard", shape.imaged * n0,
                  shard_px * b * 1.25 + chunk * chunk * 4 * 4 + windows + records,
                  shard_px / MB, reads=reads * shape.tiles_per_section * shape.tile_bytes / max(1, n0),
                  fixed=kept, note=note),
             Kind("render.join", shape.imaged * upper, shard_px * b * 1.5, shard_px / MB / 4),
             Kind("render.driver", 1, 3000.0 * min(shape.imaged, max(1, 32 // max(1, n0))) * (n0 + upper),
                  shape.imaged * (n0 + upper) / 1e3, driver=True,
                  note="one graph per batch of planes; work in thousands of tasks")]
    if r.contrast:
        cs = max(1, int(r.contrast_scale))
        strip = 2 * 256 * (w / cs) * 4
        prepared = (shape.tile_height + 2) * (shape.tile_width + 2) * 4    # one prepared float32 tile
        kinds.append(Kind("render.contrast", shape.imaged, strip + (1 << 20) * 4 + prepared / cs ** 2 * shape.cols,
                          shape.tiles_per_section * shape.tile_height * shape.tile_width / MB,
                          reads=shape.tiles_per_section * shape.tile_bytes))
    return kinds


# ----------------------------------------------------------------------- report
def _probe_factor(q) -> int:
    """Return the pyramid factor the alignment-error probe reads (a power of two, 1 = level 0)."""
    try:
        from ..qc.metrics import measure_factor

        limit = float(measure_factor(q))
    except ImportError:
        limit = float(_get(q, "measure_scale", 2))
    f = 1
    while f * 2 <= limit:
        f *= 2
    return f


def report_kinds(shape: VolumeShape, cfg) -> list[Kind]:
    """Seams re-measured from raw tiles, one task per section (``qc/measure.py: seam_job``); the
    alignment-error probe as tasks of ``PAIRS_TASK`` planes x ``probe_task_regions`` regions
    (``qc/probe.py: probe_pair``, joined by ``merge_pair_parts``) and run tasks
    (``qc/runs.py: jitter_run``); the driver keeps one small summary per section."""
    q = cfg.report
    tile_px = shape.tile_height * shape.tile_width
    keep = 4  # measure_seams' keep_tiles default
    kinds = [Kind("report.seams", shape.imaged, (keep + 1) * tile_px * 4,
                  2 * shape.tiles_per_section * tile_px / MB, items=shape.pairs_per_section,
                  reads=2 * shape.tiles_per_section * shape.tile_bytes,
                  note=f"holds {keep} tiles as float32 and its seams' blocks"),
             # qc/metrics.py: collect keeps each section task's summary (qc/sections.py: _summary): about
             # 12 kB of counts and worst rows plus about 130 B per tile of mapped straightening points
             # (pickled sizes measured on a 5 x 5-tile build), about 3x that as Python objects. A section
             # whose tiles are all flagged adds up to 1000 flagged rows (about 0.4 MB) on top.
             Kind("report.driver", 1, 3 * shape.imaged * (12e3 + 130.0 * shape.tiles_per_section),
                  shape.imaged * shape.tiles_per_section / MB, driver=True,
                  note="keeps every section's summary (worst rows, straightening points)")]
    region = int(_get(q, "region_size", 0))
    if region > 0:
        from ..qc.probe import PAIRS_TASK

        f = _probe_factor(q)
        spans = int(_get(q, "probe_spans", 2))
        H, W = shape.section_height, shape.section_width
        # qc/probe.py: block_grid and probe_geometry. Blocks probe_spacing apart, wider on large planes
        # so that a plane holds about probe_blocks; regions of region_size px of that grid (at least
        # one block); tasks of a run of PAIRS_TASK planes x at most probe_task_regions regions.
        spacing = max(float(_get(q, "probe_spacing", 128)), math.sqrt(H * W / max(1, int(_get(q, "probe_blocks", 150)))))
        nx, ny = max(1, int(W // spacing)), max(1, int(H // spacing))
        step = max(1, round(region / spacing))
        regions = math.ceil(nx / step) * math.ceil(ny / step)
        shares = math.ceil(regions / max(1, int(_get(q, "probe_task_regions", 4))))
        runs = math.ceil(shape.imaged / PAIRS_TASK)
        margin = _get(q, "probe_half_size", 64) + _get(q, "probe_max_shift", 12) + _get(q, "probe_reach", 64) + 1
        # one region's window, level px: its blocks' centres and the margin the matcher reads around them
        side = (min((min(step, nx, ny) - 1) * spacing, H, W) + 2 * margin) / f
        per_task = min(regions, int(_get(q, "probe_task_regions", 4)))
        planes = min(shape.imaged, PAIRS_TASK) + spans  # its fixed planes and the ones they are matched with
        matches = min(shape.imaged, PAIRS_TASK) * spans * nx * ny / shares  # block matches of one task
        kinds.append(Kind("report.probe", runs * shares, (spans + 1) * side * side * 4 * 2, matches / MB,
                          reads=planes * per_task * side * side * shape.itemsize,
                          note=f"{PAIRS_TASK} planes x at most {per_task} regions per task, "
                               f"{spans + 1} region windows held"))
        if shares > 1:  # qc/probe.py: merge_pair_parts joins the tasks' part files of a run of planes
            kinds.append(Kind("report.merge", runs, PAIRS_TASK * spans * nx * ny * 4 * 8, PAIRS_TASK * spans * nx * ny / MB,
                              reads=PAIRS_TASK * spans * nx * ny * 4 * 8, note="joins a run's part files"))
        blocks = int(_get(q, "probe_blocks", 150))
        # qc/reuse.py: a run task reads the pairs of its planes and of slow_window // 2 + probe_spans
        # planes on each side (the planes its straight lines along z reach)
        around = int(_get(q, "slow_window", 73)) // 2 + spans
        held = min(shape.imaged, PAIRS_TASK + 2 * around)
        kinds.append(Kind("report.runs", runs, blocks * held * 2 * 8, blocks * held / MB,
                          reads=held * spans * blocks * 3 * 8,
                          note="solves a run of planes from the stored pair shifts"))
    return kinds


def manifest_kinds(shape: VolumeShape, cfg) -> list[Kind]:
    """The check of the tile manifest before the build starts: one header read per tile, in the driver."""
    return [Kind("manifest.driver", 1, shape.tiles * 1000.0, shape.tiles, driver=True,
                 reads=shape.tiles * 4096)]


STAGES = {"manifest": manifest_kinds, "stitch": stitch_kinds, "align": align_kinds,
          "render": render_kinds, "report": report_kinds}


def output_layout(shape: VolumeShape, cfg) -> dict:
    """Return pixel count, shard files and metadata files of the written EM pyramid (uncompressed bytes too)."""
    r = cfg.render
    block = int(r.chunk) * int(r.shard)
    shapes = level_shapes(shape.section_height, shape.section_width, int(r.chunk))
    shards = sum(math.ceil(h / block) * math.ceil(w / block) for h, w in shapes) * shape.planes
    px = sum(h * w for h, w in shapes) * shape.planes
    return {"levels": len(shapes), "level0": [shape.planes, *shapes[0]], "pixels": px,
            "raw_bytes": px * shape.itemsize, "shards": shards, "metadata_files": 2 + len(shapes),
            "shard_edge_px": block, "chunk_edge_px": int(r.chunk)}
