"""What the align stage's tasks hold, for a volume of a given size (a model of the real task graph).

The counts follow the tasks :mod:`stackbuild.align.stage` builds (features,
pairs, region tasks per node block x section window and round, block solves,
and one more pass of region tasks, counted with them: the final residual pass,
which runs only when no elastic round did, an upper bound); the bytes add up the arrays each task holds, from
the same settings. Constants that are not a plain array size (the feature
detector's scale space, the sampler's working copies, the solver's sparse
matrices) are per-pixel or per-unknown factors measured on this code with
``python tests/benchmarks/bench_align.py --memory`` (values in the comments).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from ..tiles import cache_bytes_for
from .blockmatch import block_reach
from .settings import AlignSettings

#: resident size of a worker process before it holds any data (numpy, OpenCV, SciPy loaded)
PROCESS_BYTES = 250e6
#: SIFT's scale space per overview pixel: first octave doubled, ~11 float32 images (from
#: OpenCV's documented pyramid layout) plus the overview and its uint8 copy
FEATURE_BYTES_PER_PX = 190.0
#: sampler working copies per rendered output pixel with an elastic field (value+weight
#: accumulators, float64 section coordinates, float32 maps)
RENDER_BYTES_PER_PX = 48.0
#: sparse normal equations + preconditioner per unknown of a block solve (measured ~400-700)
SOLVE_BYTES_PER_UNKNOWN = 800.0
#: tasks a mapper keeps on the cluster at once (the bound of stackbuild/run/cluster.py: IN_FLIGHT)
IN_FLIGHT_TASKS = 10_000


@dataclass
class TaskKind:
    """One kind of align task: how many there are and what one holds."""

    name: str
    count: int
    bytes_each: float
    note: str


def align_budget(section_px: int, n_sections: int, tile_px: int = 4096, tile_bytes: int = 2,
                 settings: AlignSettings | None = None, tile_cache_bytes: float | None = None) -> dict:
    """Return the align stage's task kinds and the driver's memory for a volume.

    Parameters
    ----------
    section_px : int
        Side of a (square) section, full-resolution pixels.
    n_sections : int
        Sections in the volume.
    tile_px, tile_bytes : int
        Tile side (pixels) and bytes per pixel (2 for 16-bit).
    settings : AlignSettings, optional
        Defaults if not given.
    tile_cache_bytes : float, optional
        The sampler's per-process cache of prepared tiles; its bound for tiles of ``tile_px`` if not
        given (:func:`stackbuild.tiles.cache_bytes_for`: the same bytes at every scale, so a region
        task at ``elastic_scale`` 2 keeps four times as many reduced tiles as a render task keeps
        full-resolution ones).

    Returns
    -------
    dict
        ``tasks`` (list of :class:`TaskKind`), ``driver_bytes``, ``largest_task_bytes``.
    """
    s = settings or AlignSettings()
    tile = float(tile_px) ** 2 * tile_bytes
    cache = cache_bytes_for(tile_px, tile_px) if tile_cache_bytes is None else tile_cache_bytes
    scale = max(s.work_scale, math.ceil(section_px / s.overview_size))
    ov = (section_px / scale) ** 2
    links = n_sections * s.neighbours
    spacing = max(s.elastic_scale, s.elastic_scale * round(s.grid_spacing / s.elastic_scale))
    nodes = int(section_px // spacing) + 1
    blocks = math.ceil(nodes / s.region_nodes) ** 2
    windows = math.ceil(n_sections / s.region_sections)
    reach = block_reach(s.match_half_size, s.match_max_shift)
    # a region holds region_nodes nodes a side, fewer on a section smaller than one region
    region_side_nodes = min(s.region_nodes, nodes)
    side = (region_side_nodes - 1) * spacing / s.elastic_scale + 2 * (reach + 1) + 2
    held = min(s.region_sections + s.neighbours, n_sections)
    p = 2 * (s.match_half_size + s.match_max_shift) + 2
    # one batch of at most 256 blocks (one per node): ~12 float32/complex64 arrays of p x p per block (FFT work)
    match = min(256, region_side_nodes ** 2) * p * p * 12 * 8
    # ... and the block spectra of the sections its next links still need (neighbours + 1 of them),
    # each kept twice: as transformed and whitened (blockmatch.block_spectra)
    match += 2 * (s.neighbours + 1) * region_side_nodes ** 2 * p * (p // 2 + 1) * 8
    reduced_tile = 2 * (tile_px / s.elastic_scale) ** 2 * 4
    # the overview task's cache holds its section's tiles reduced by the overview scale, up to its bound
    ov_cache = min(cache, math.ceil(section_px / tile_px) ** 2 * 4 * (tile_px / scale + 2) ** 2)
    region = held * side ** 2 * 4 + side ** 2 * RENDER_BYTES_PER_PX + match + cache + tile + reduced_tile
    unknowns = (s.region_nodes + 2 * s.solve_halo) ** 2 * n_sections
    prior = unknowns * 2 * 4
    solve = unknowns * SOLVE_BYTES_PER_UNKNOWN + prior * 3
    rounds = s.elastic_rounds if s.elastic else 0
    tasks = [
        TaskKind("align.features", n_sections, PROCESS_BYTES + ov * FEATURE_BYTES_PER_PX + ov_cache + tile,
                 f"overview {section_px / scale:.0f} px square (scale {scale})"),
        TaskKind("align.pair", links, PROCESS_BYTES + 2 * s.max_features * 140 * 4,
                 "two sections' stored features"),
        TaskKind("align.region", blocks * windows * (rounds + 1), PROCESS_BYTES + region,
                 f"{held} images of {side:.0f} px square at scale {s.elastic_scale}"),
        TaskKind("align.solve", blocks * rounds, PROCESS_BYTES + solve,
                 f"{unknowns} unknowns per component ({s.region_nodes}+2x{s.solve_halo} nodes square x sections)"),
    ]
    # the driver: every section's field on the grid (float32 x 2), the coarse inliers, and the region
    # tasks in flight (made one by one as the mapper submits them, at most IN_FLIGHT_TASKS on the
    # cluster, each pickled with its seen sections' fields cut to the block and halo) plus each one's
    # bookkeeping in the client (some kB; rule of thumb, no source)
    fields = n_sections * nodes * nodes * 2 * 4
    inliers = links * 4000 * 2 * 2 * 8
    task_bytes = held * (min(s.region_nodes, nodes) + 2 * s.solve_halo) ** 2 * 2 * 4 + 4000
    driver = PROCESS_BYTES + fields + inliers + min(blocks * windows, IN_FLIGHT_TASKS) * task_bytes
    return {"tasks": tasks, "driver_bytes": driver, "largest_task_bytes": max(t.bytes_each for t in tasks),
            "grid_nodes": nodes, "node_blocks": blocks, "windows": windows}
