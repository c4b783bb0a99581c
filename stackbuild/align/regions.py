"""Region tasks of the elastic step: one block of grid nodes x one run of consecutive sections.

The elastic grid (one grid in the aligned frame, shared by all sections) is
cut into square blocks of nodes; the present sections into runs ("windows")
of ``window`` sections plus the ``neighbours`` that follow, so that every
section link ``(a, b)`` with ``b - a <= neighbours`` lies in exactly one
window (the one whose first ``window`` sections hold ``a``). One task renders
each section of its window over its node block (plus the margin block
matching reads), at ``elastic_scale``, through the sampler the volume is
rendered with, and matches its links there. It holds ``window + neighbours``
images of one region, never a section; it writes its matches to one small
file in the scratch folder and returns only counts.

Production size (grid spacing 128 px, elastic scale 4, blocks of 16 x 16
nodes, match half size 12 and max shift 6 working px): a region is
``15 * 32 + 2 * 38 + 2`` = 558 working px square, 1.2 MB as float32; a window of
8 + 2 sections holds 10 of them plus the sampler's tile cache. The tiles under
a region are read by window when the process's cache does not hold them
(:func:`stackbuild.tiles.prepared_window`).
"""
from __future__ import annotations

import pickle
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from ..transforms.records import SectionAlignment
from ..transforms.types import DisplacementField
from .blockmatch import (block_contrast, block_reach, block_spectra, filter_vectors, grid_nodes, match_plan,
                         match_spectra)


@dataclass(frozen=True)
class Grid:
    """The elastic grid in the aligned frame: node ``[j, i]`` sits at ``origin + spacing * (i, j)``."""

    origin: tuple[float, float]
    spacing: float
    shape: tuple[int, int]
    scale: int
    reach: int

    def block_slices(self, size: int) -> list[tuple[slice, slice]]:
        """Return the ``(rows, cols)`` node slices of square blocks of ``size`` nodes covering the grid."""
        ny, nx = self.shape
        return [(slice(r, min(r + size, ny)), slice(c, min(c + size, nx)))
                for r in range(0, ny, size) for c in range(0, nx, size)]

    def region(self, rows: slice, cols: slice) -> tuple[int, int, int, int]:
        """Return ``(x0, y0, width, height)``: the working-pixel region a node block needs (``x0, y0`` full-res)."""
        s = self.scale
        half = (s - 1) / 2.0
        gx0 = self.origin[0] + self.spacing * cols.start
        gy0 = self.origin[1] + self.spacing * rows.start
        margin = s * (self.reach + 1)
        x0 = int(np.floor(gx0 - half - margin))
        y0 = int(np.floor(gy0 - half - margin))
        width = int(np.ceil((self.spacing * (cols.stop - cols.start - 1) + 2 * margin) / s)) + 2
        height = int(np.ceil((self.spacing * (rows.stop - rows.start - 1) + 2 * margin) / s)) + 2
        return x0, y0, width, height

    def node_pixels(self, rows: slice, cols: slice, x0: int, y0: int) -> np.ndarray:
        """Return the block's node positions ``(x, y)`` in working pixels of the region starting at ``(x0, y0)``."""
        half = (self.scale - 1) / 2.0
        o = (self.origin[0] + self.spacing * cols.start, self.origin[1] + self.spacing * rows.start)
        full = grid_nodes(o, self.spacing, (rows.stop - rows.start, cols.stop - cols.start))
        return (full - np.array([x0, y0]) - half) / self.scale


def make_grid(boxes: list[np.ndarray], settings) -> Grid:
    """Return the grid over the union of the sections' coarse footprints (``(4, 2)`` corner arrays)."""
    c = np.concatenate(boxes)
    s = settings.elastic_scale
    spacing = max(s, s * round(settings.grid_spacing / s))
    lo, hi = np.floor(c.min(0) + 0.5), np.ceil(c.max(0) - 0.5)
    shape = tuple(int(v) for v in np.maximum(1, np.floor((hi - lo) / spacing) + 1)[::-1])
    span = (np.array(shape[::-1]) - 1) * spacing
    origin = np.round(lo + ((hi - lo) - span) / 2.0)
    return Grid((float(origin[0]), float(origin[1])), float(spacing), shape, s,
                block_reach(settings.match_half_size, settings.match_max_shift))


def windows(sections: list[int], size: int, neighbours: int) -> list[tuple[list[int], list[int]]]:
    """Return ``(own, seen)`` section lists: runs of ``size`` sections and the ``neighbours`` after each."""
    return [(sections[i:i + size], sections[i:i + size + neighbours]) for i in range(0, len(sections), size)]


def window_links(own: list[int], seen: list[int], neighbours: int) -> list[tuple[int, int]]:
    """Return the links ``(a, b)``, ``a`` in ``own``, ``b`` in ``seen``, ``0 < b - a <= neighbours``."""
    present = set(seen)
    return [(a, a + k) for a in own for k in range(1, neighbours + 1) if a + k in present]


def crop_alignment(al: SectionAlignment, grid: Grid, rows: slice, cols: slice, halo: int = 2) -> SectionAlignment:
    """Return ``al`` with its field cut to the node block and ``halo`` nodes around it (small to pickle).

    Outside the cut the field is held at its edge nodes; the region a task
    renders lies within ``reach`` working pixels of the block, so the halo
    must cover that (``halo`` nodes of ``spacing``).
    """
    if al.displacement is None:
        return al
    d = al.displacement
    ny, nx = d.vectors.shape[:2]
    r0, r1 = max(0, rows.start - halo), min(ny, rows.stop + halo)
    c0, c1 = max(0, cols.start - halo), min(nx, cols.stop + halo)
    origin = (d.origin[0] + d.spacing * c0, d.origin[1] + d.spacing * r0)
    return replace(al, displacement=DisplacementField(d.vectors[r0:r1, c0:c1], origin, d.spacing))


@dataclass(frozen=True)
class RegionTask:
    """One node block x one window of sections (small and picklable)."""

    source: object
    grid: Grid
    block: int
    rows: slice
    cols: slice
    alignments: tuple
    links: tuple
    own: tuple
    settings: object
    out: str
    subpixel: bool = True       # the matcher's unbiased passes (False: one pass; see match_blocks)
    backwards: bool = False     # render the sections last to first (see _Plan.region_tasks)


def _match_links(task: RegionTask):
    """Yield ``(link, shifts (by, bx, 2) full-res px with NaN = untrusted, weights, tried, contrast)``.

    ``task.subpixel`` False takes the matcher's one-pass sub-pixel peak (see
    :func:`.blockmatch.match_blocks`), for statistics that need no more.
    Each section's blocks are transformed once and matched against all its
    links (as fixed and as moving); links go in order of their first
    section, so only the sections a later link still needs are kept.
    """
    s = task.settings
    g = task.grid
    x0, y0, w, h = g.region(task.rows, task.cols)
    order = task.alignments[::-1] if task.backwards else task.alignments
    images = {al.section: task.source.region(al.section, al, x0, y0, w, h, g.scale) for al in order}
    nodes = g.node_pixels(task.rows, task.cols, x0, y0)
    by, bx = task.rows.stop - task.rows.start, task.cols.stop - task.cols.start
    contrast = np.stack([block_contrast(images[z], nodes, s.match_half_size).reshape(by, bx)
                         for z in task.own]) if task.own else np.zeros((0, by, bx))
    plan = match_plan(s.match_half_size, s.match_max_shift, fine_sigma=s.match_blur / g.scale)
    xy = np.rint(nodes).astype(int)
    spectra = {}
    links = list(task.links)
    for i, (a, b) in enumerate(links):
        needed = {z for link in links[i:] for z in link}
        for z in [z for z in spectra if z not in needed]:
            del spectra[z]
        for z in (a, b):
            if z not in spectra:
                spectra[z] = block_spectra(images[z], xy, plan)
        res = match_spectra(spectra[a], spectra[b], images[b], plan, task.subpixel)
        sh = res.shifts.reshape(by, bx, 2) * g.scale
        conf = res.confidence.reshape(by, bx)
        ok = filter_vectors(sh, res.ncc.reshape(by, bx), s.min_block_ncc, s.max_neighbour_deviation)
        ok &= conf >= s.min_match_confidence
        yield (a, b), np.where(ok[..., None], sh, np.nan), np.where(ok, res.ncc.reshape(by, bx), 0.0), \
            int(np.isfinite(res.peak).sum()), contrast


def region_job(task: RegionTask) -> dict:
    """Render a window's sections over one node block, match its links, save them; return counts.

    The file ``task.out`` holds ``shifts`` ``(L, by, bx, 2)`` full-res px (NaN
    = untrusted), ``weights`` ``(L, by, bx)``, ``links`` ``(L, 2)``,
    ``contrast`` ``(S, by, bx)`` of the ``own`` sections, ``sections``.
    """
    by, bx = task.rows.stop - task.rows.start, task.cols.stop - task.cols.start
    shifts = np.full((len(task.links), by, bx, 2), np.nan, np.float32)
    weights = np.zeros((len(task.links), by, bx), np.float32)
    contrast = np.zeros((0, by, bx))
    counts = {}
    for k, (link, sh, wt, tried, contrast) in enumerate(_match_links(task)):
        shifts[k], weights[k] = sh, wt
        counts[link] = (tried, int(np.isfinite(sh[..., 0]).sum()))
    if not task.links and task.own:
        contrast = _contrast_only(task)
    save_matches(task.out, shifts=shifts, weights=weights, links=np.array(task.links, int).reshape(-1, 2),
                 contrast=np.asarray(contrast, np.float32), sections=np.array(task.own, int))
    return {"block": task.block, "counts": counts}


def _contrast_only(task: RegionTask) -> np.ndarray:
    """Return the block contrast of the ``own`` sections when a window has no links."""
    s, g = task.settings, task.grid
    x0, y0, w, h = g.region(task.rows, task.cols)
    nodes = g.node_pixels(task.rows, task.cols, x0, y0)
    by, bx = task.rows.stop - task.rows.start, task.cols.stop - task.cols.start
    al = {a.section: a for a in task.alignments}
    return np.stack([block_contrast(task.source.region(z, al[z], x0, y0, w, h, g.scale), nodes,
                                    s.match_half_size).reshape(by, bx) for z in task.own])


#: residual histograms: bin width and count (full-res px); lengths beyond the last bin land in it
_BIN = 0.02
_NBINS = 5000


def residual_job(task: RegionTask) -> dict:
    """Return ``{link: (histogram, sum of squares, max)}`` of the trusted block-match lengths of one region."""
    out = {}
    # statistics only (the stored residual of each section to the next): the one-pass estimate, whose
    # small pull toward zero (0.06-0.1 px RMS on camera translations, at 2 px shifts) does not matter here
    for link, sh, _, _, _ in _match_links(replace(task, own=(), subpixel=False)):
        out[link] = residual_histogram(sh)
    return out


def residual_histogram(vectors: np.ndarray) -> tuple[np.ndarray, float, float]:
    """Return ``(histogram, sum of squares, max)`` of the lengths of residual vectors ``(..., 2)`` (NaN = none)."""
    mag = np.hypot(vectors[..., 0], vectors[..., 1])
    mag = mag[np.isfinite(mag)]
    hist = np.bincount(np.minimum((mag / _BIN).astype(int), _NBINS - 1), minlength=_NBINS)
    return hist, float((mag ** 2).sum()), float(mag.max()) if mag.size else 0.0


def residual_stats(hist: np.ndarray, sumsq: float, largest: float) -> dict:
    """Return ``n``, ``rms``, ``p95`` (to the histogram's bin width) and ``max`` of merged residual lengths."""
    hist = np.asarray(hist)
    n = int(hist.sum())
    if not n:
        return {"n": 0, "rms": None, "p95": None, "max": None}
    k = int(np.searchsorted(np.cumsum(hist), 0.95 * n))
    return {"n": n, "rms": float(np.sqrt(sumsq / n)), "p95": float((k + 0.5) * _BIN), "max": float(largest)}


def save_matches(path: str | Path, **arrays: np.ndarray) -> None:
    """Write one region task's arrays to ``path`` in the scratch folder (read back by :func:`load_matches`).

    A pickle of the arrays, not an ``.npz``: each block's file is read by up to
    nine solve tasks (its own and its neighbours' halos), and reading the five
    members of an ``.npz`` took 1.6 ms against 0.08 ms (a quarter of the
    solve tasks' CPU on 7 x 7-tile sections). The files live only in this
    run's scratch folder and are read only by this run.
    """
    with open(path, "wb") as f:
        pickle.dump({k: np.ascontiguousarray(v) for k, v in arrays.items()}, f, protocol=5)


def load_matches(path: str | Path) -> dict[str, np.ndarray]:
    """Return the arrays :func:`save_matches` wrote to ``path``."""
    with open(path, "rb") as f:
        return pickle.load(f)


def load_block(scratch: Path, tag: str, block: int, n_windows: int):
    """Return ``(matches, contrast)`` of one node block from all windows' files.

    ``matches`` is ``{(a, b): (shifts, weights)}``, ``contrast`` ``{z: (by, bx)}``.
    """
    matches, contrast = {}, {}
    for wdw in range(n_windows):
        f = load_matches(Path(scratch) / f"{tag}_b{block}_w{wdw}.pkl")
        links, shifts, weights = f["links"], f["shifts"], f["weights"]
        sections, contrasts = f["sections"], f["contrast"]
        for k, (a, b) in enumerate(links):
            matches[(int(a), int(b))] = (shifts[k], weights[k])
        for k, z in enumerate(sections):
            contrast[int(z)] = contrasts[k]
    return matches, contrast
