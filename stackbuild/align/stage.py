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
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..folder import BuildFolder
from ..transforms.records import SectionAlignment
from ..transforms.types import Affine2D, DisplacementField
from .blockmatch import block_contrast, block_match, filter_vectors, grid_nodes
from .coarse import MODELS, PairResult, match_pair
from .elastic import solve_fields
from .features import DETECTORS, FeatureSet, detect_features
from .settings import AlignSettings, check_settings
from .solve import solve_affines
from .sources import BuildSource


@dataclass(frozen=True)
class Grid:
    """The elastic grid in the aligned frame, and the region rendered around it."""

    origin: tuple[float, float]
    spacing: float
    shape: tuple[int, int]
    x0: int
    y0: int
    width: int
    height: int
    scale: int

    def node_pixels(self) -> np.ndarray:
        """Return node positions ``(x, y)`` in working pixels of the rendered region."""
        half = (self.scale - 1) / 2.0
        full = grid_nodes(self.origin, self.spacing, self.shape)
        return (full - np.array([self.x0, self.y0]) - half) / self.scale


# ----------------------------------------------------------------- workers
def _origin(bbox) -> tuple[int, int]:
    """Return the first full-resolution pixel centre inside a bbox of pixel edges."""
    return int(np.ceil(bbox[0] + 0.5)), int(np.ceil(bbox[1] + 0.5))


def features_job(item) -> dict:
    """Detect one section's features at ``work_scale`` and save them to the scratch folder."""
    source, z, settings, scratch = item
    bbox = source.bbox(z)
    x0, y0 = _origin(bbox)
    s = settings.work_scale
    w = int((bbox[2] - 0.5 - x0) // s) + 1
    h = int((bbox[3] - 0.5 - y0) // s) + 1
    img = source.region(z, None, x0, y0, w, h, s)
    fs = detect_features(img, settings.detector, settings.max_features)
    np.savez(Path(scratch) / f"features_{z}.npz", xy=fs.xy, desc=fs.descriptors,
             binary=fs.binary, offset=(x0, y0))
    return {"section": z, "features": len(fs), "bbox": bbox}


def _load_features(scratch, z):
    with np.load(Path(scratch) / f"features_{z}.npz") as f:
        return FeatureSet(f["xy"], f["desc"], bool(f["binary"])), tuple(f["offset"])


def pair_job(item) -> PairResult:
    """Match the stored features of sections ``a`` and ``b`` and fit the coarse model."""
    scratch, a, b, settings = item
    fa, oa = _load_features(scratch, a)
    fb, ob = _load_features(scratch, b)
    return match_pair(fa, fb, a, b, model=settings.model, ratio=settings.ratio,
                      threshold=settings.ransac_threshold, min_inliers=settings.min_inliers,
                      scale=settings.work_scale, offset_a=oa, offset_b=ob)


def render_job(item) -> np.ndarray:
    """Render one section over the grid region through ``alignment``, save it, return its block contrast."""
    source, alignment, grid, scratch, tag, radius = item
    img = source.region(alignment.section, alignment, grid.x0, grid.y0, grid.width,
                        grid.height, grid.scale)
    np.save(Path(scratch) / f"{tag}_{alignment.section}.npy", img)
    return block_contrast(img, grid.node_pixels(), radius).reshape(grid.shape)


def block_job(item) -> tuple:
    """Block-match two rendered sections on the grid; return full-res shifts, weights, peaks."""
    scratch, a, b, grid, settings, tag = item
    fa = np.load(Path(scratch) / f"{tag}_{a}.npy")
    fb = np.load(Path(scratch) / f"{tag}_{b}.npy")
    shifts, peaks = block_match(fa, fb, grid.node_pixels(), settings.match_half_size,
                                settings.match_max_shift)
    ny, nx = grid.shape
    shifts = shifts.reshape(ny, nx, 2) * grid.scale
    peaks = peaks.reshape(ny, nx)
    ok = filter_vectors(shifts, peaks, settings.min_block_ncc, settings.max_neighbour_deviation)
    tried = np.isfinite(peaks)
    weights = np.where(ok, np.nan_to_num(peaks), 0.0)
    return np.where(ok[..., None], shifts, np.nan), weights, int(tried.sum()), int(ok.sum())


# ------------------------------------------------------------------ stages
def _pairs(sections: list[int], neighbours: int) -> list[tuple[int, int]]:
    present = set(sections)
    return [(z, z + k) for z in sections for k in range(1, neighbours + 1) if z + k in present]


def _coarse(source, sections, settings, scratch, mapper, tick):
    facts = list(mapper(features_job, [(source, z, settings, scratch) for z in sections]))
    tick(len(sections))
    pairs = list(mapper(pair_job, [(scratch, a, b, settings) for a, b in _pairs(sections, settings.neighbours)]))
    tick(len(pairs))
    solved = solve_affines(sections, pairs, settings.model,
                           outlier_floor=settings.ransac_threshold * settings.work_scale)
    return {f["section"]: f for f in facts}, pairs, solved


def _make_grid(source, affines: dict[int, Affine2D], settings: AlignSettings) -> Grid:
    """Return the grid over the union of all sections' coarse footprints."""
    corners = []
    for z, aff in affines.items():
        x0, y0, x1, y1 = source.bbox(z)
        box = np.array([[x0, y0], [x1, y0], [x0, y1], [x1, y1]])
        corners.append(aff.inverse().apply(box))
    c = np.concatenate(corners)
    s = settings.elastic_scale
    spacing = max(s, s * round(settings.grid_spacing / s))
    lo, hi = np.floor(c.min(0) + 0.5), np.ceil(c.max(0) - 0.5)
    shape = tuple(int(v) for v in np.maximum(1, np.floor((hi - lo) / spacing) + 1)[::-1])
    span = (np.array(shape[::-1]) - 1) * spacing
    origin = lo + ((hi - lo) - span) / 2.0
    origin = np.round(origin)
    margin = s * (settings.match_half_size + settings.match_max_shift + 2)
    x0, y0 = int(origin[0] - (s - 1) / 2.0 - margin), int(origin[1] - (s - 1) / 2.0 - margin)
    origin = (x0 + margin + (s - 1) / 2.0, y0 + margin + (s - 1) / 2.0)
    width = int((span[0] + 2 * margin) // s) + 1
    height = int((span[1] + 2 * margin) // s) + 1
    return Grid(origin, float(spacing), shape, x0, y0, width, height, s)


def _measure(source, aligns, grid, settings, scratch, mapper, tag, links):
    zs = sorted(aligns)
    items = [(source, aligns[z], grid, scratch, tag, settings.match_half_size) for z in zs]
    contrast = dict(zip(zs, mapper(render_job, items)))
    out = list(mapper(block_job, [(scratch, a, b, grid, settings, tag) for a, b in links]))
    for z in zs:   # a round's images are not needed again; keep the scratch folder small
        (Path(scratch) / f"{tag}_{z}.npy").unlink(missing_ok=True)
    return dict(zip(links, out)), contrast


def _low_contrast(contrast: dict, settings: AlignSettings) -> dict[int, np.ndarray]:
    """Return, per section, the grid nodes whose contrast is far below the stack's at that place."""
    import warnings
    stack = np.stack([contrast[z] for z in sorted(contrast)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # all-NaN nodes outside every section
        med = np.nanmedian(stack, axis=0)
    return {z: np.nan_to_num(contrast[z], nan=np.inf) < settings.damaged_contrast * med
            for z in contrast}


def _elastic(source, sections, affines, settings, scratch, mapper, tick):
    """Return the grid, every section's field, and the first round's block matches.

    Each round renders the sections through the current fields, measures what
    is left by block matching, and solves for an increment; later rounds
    remove the error of the first-order relation ``v_ab ~ u_b - u_a``.
    """
    grid = _make_grid(source, affines, settings)
    links = _pairs(sections, settings.neighbours)
    fields = None
    first, low, share = {}, {}, {}
    for rnd in range(settings.elastic_rounds):
        aligns = {z: SectionAlignment(z, affines[z], None if fields is None else
                                      DisplacementField(fields[z], grid.origin, grid.spacing))
                  for z in sections}
        found, contrast = _measure(source, aligns, grid, settings, scratch, mapper, f"round{rnd}", links)
        tick(len(links))
        if not first:
            first, low = found, _low_contrast(contrast, settings)
            share = {z: float(low[z].sum() / max(1, np.isfinite(contrast[z]).sum())) for z in sections}
        # damaged regions keep a tenth of their say (common practice, no source)
        matches = {(a, b): (v[0], v[1] * np.where(low[a] | low[b], 0.1, 1.0)) for (a, b), v in found.items()}
        step = solve_fields(sections, grid.shape, matches, smoothness_weight=settings.smoothness_weight,
                            pull=settings.elastic_pull, max_gap=settings.neighbours, prior=fields,
                            chain=settings.elastic_chain,
                            affine_chain=settings.elastic_affine_chain)
        fields = step if fields is None else {z: fields[z] + step[z] for z in sections}
    return grid, fields, first, low, share


def _residual_stats(shifts: np.ndarray) -> dict:
    mag = np.hypot(shifts[..., 0], shifts[..., 1])
    mag = mag[np.isfinite(mag)]
    if not mag.size:
        return {"n": 0, "rms": None, "p95": None, "max": None}
    return {"n": int(mag.size), "rms": float(np.sqrt(np.mean(mag ** 2))),
            "p95": float(np.percentile(mag, 95)), "max": float(mag.max())}


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
            tried = sum(v[2] for k, v in found.items() if z in k)
            ok = sum(v[3] for k, v in found.items() if z in k)
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
        facts, pairs, solved = _coarse(source, sections, settings, scratch, mapper, tick)
        fields, found, grid, share = {}, {}, None, {}
        if settings.elastic and len(sections) >= 3:
            grid, fields, found, _, share = _elastic(source, sections, solved.affines, settings, scratch,
                                           mapper, tick)
        flags = _flags(sections, facts, solved, found, share, settings)
        aligns = {}
        for z in sections:
            disp = None
            if grid is not None:
                disp = DisplacementField(fields[z], grid.origin, grid.spacing)
            stats = {"coarse": _coarse_stats(z, facts, pairs, solved)}
            if disp is not None:
                stats["elastic"] = disp.magnitude_stats()
                stats["elastic"]["low_contrast_fraction"] = share[z]
            aligns[z] = SectionAlignment(z, solved.affines[z], disp, flags[z], stats)
        if grid is None:
            grid = _make_grid(source, solved.affines, settings)
        links = list(zip(sections[:-1], sections[1:]))
        final, _ = _measure(source, aligns, grid, settings, scratch, mapper, "final", links)
        tick(len(links))
        for (a, b), v in final.items():
            aligns[a].stats["residual_next"] = {"section": b, **_residual_stats(v[0])}
            aligns[b].stats["residual_previous"] = {"section": a, **_residual_stats(v[0])}
        return aligns
    finally:
        if own:
            shutil.rmtree(scratch, ignore_errors=True)
        else:
            for p in scratch.glob("*.np[yz]"):
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
