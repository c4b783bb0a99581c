"""The identifiable residual: how far a build's planes are from the truth, once the unknowable is removed.

Some motion of a stack can never be recovered from its images: a whole-stack
affine trend linear in z (steady drift, shear or change of scale of the block),
a displacement field shared by all sections, and the part of independent smooth
warps that grows linearly with z (indistinguishable from a steady slant). The
identifiable residual removes exactly these from the true displacement of every
output plane and measures what is left:

1. per output plane ``z``, the affine ``A(z)`` mapping output pixels onto the
   true undistorted section is fitted; the line ``A0 + z A1`` is fitted to
   those by least squares, and each plane is mapped by the line;
2. displacements of each mapped plane against its truth are taken on a regular
   grid of blocks (128 px by default), each the mean over 4 x 4 samples of the
   block;
3. each block's mean over z is subtracted;
4. the least-squares fit of z-centred, spatially smooth fields linear in z
   (4 x 4 Gaussian bumps over the section, each times ``z - mean z``) is
   subtracted; the affine fields (x, y, 1) join the bumps in this fit, so a
   bump field is removed whole although step 1 already took its affine part.

The displacements come from the transforms, not from image matching, so the
measure is exact: an output pixel is carried through the build's stored
transforms (canvas -> aligned -> section frame -> tile, with the tile
placements blended by the renderer's feather weights) and then through the
truth's tile positions and section distortion into the true frame.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from ..errors import InputError
from ..transforms import TransformStore
from ..transforms.bumps import bump_basis
from .truth import Truth, load_truth

_SAMPLES = 4  # samples per block side


@dataclass
class ResidualReport:
    """The identifiable residual of one build (level-0 pixels of the true frame).

    Attributes
    ----------
    rms, p95, max : float
        Statistics of the residual length over every block of every measured
        section (``measured``); NaN when nothing was measured.
    per_section : dict
        ``section -> {"rms", "p95", "max", "measured"}``; sections left out of
        the fits (damaged ones) are listed with ``measured`` False, their
        residual taken against the fits of the others.
    sections : list of int
        Planes with a residual, in order; ``vectors[i]`` belongs to ``sections[i]``.
    points : ndarray
        ``(G, 2)`` block centres, ``(x, y)`` output pixels of level 0.
    vectors : ndarray
        ``(Z, G, 2)`` residual ``(dx, dy)`` per section and block.
    excluded : dict
        ``section -> reason`` for sections of the truth with no residual.
    flags : dict
        ``section -> list of str``: the build's alignment flags.
    """

    rms: float
    p95: float
    max: float
    per_section: dict[int, dict]
    sections: list[int]
    points: np.ndarray
    vectors: np.ndarray
    excluded: dict[int, str] = field(default_factory=dict)
    flags: dict[int, list[str]] = field(default_factory=dict)

    def to_json(self) -> dict:
        """Return the statistics (not the vectors) as a JSON-ready dict."""
        return {"rms": self.rms, "p95": self.p95, "max": self.max, "blocks": int(self.points.shape[0]),
                "per_section": {str(k): v for k, v in self.per_section.items()},
                "excluded": {str(k): v for k, v in self.excluded.items()},
                "flags": {str(k): v for k, v in self.flags.items()}}


# -- the pure kernel -----------------------------------------------------------------

def identifiable_vectors(points, mapped, zs, fit=None, bumps: int = 4) -> np.ndarray:
    """Return the identifiable residual ``(Z, G, 2)`` of true-frame positions of output blocks.

    Parameters
    ----------
    points : array_like
        ``(G, 2)`` output-plane ``(x, y)`` positions of the blocks (the same in every plane).
    mapped : array_like
        ``(Z, G, 2)`` true-frame ``(x, y)`` that each plane shows at each block.
    zs : array_like
        ``(Z,)`` depth of each plane (section numbers; gaps allowed).
    fit : array_like of bool, optional
        ``(Z,)`` planes that take part in the fits (default all); the others get
        a residual against the fits.
    bumps : int
        Gaussian bumps per side of the smooth z-linear fields (step 4); 0 skips the step.

    Returns
    -------
    ndarray
        float64 ``(Z, G, 2)``: displacement left after steps 1, 3 and 4 of the
        module docstring.

    Raises
    ------
    ValueError
        If the shapes disagree, fewer than 3 blocks are given or no plane is fitted.
    """
    g = np.asarray(points, np.float64)
    m = np.asarray(mapped, np.float64)
    z = np.asarray(zs, np.float64)
    fit = np.ones(len(z), bool) if fit is None else np.asarray(fit, bool)
    if g.ndim != 2 or g.shape[1] != 2 or g.shape[0] < 3:
        raise ValueError(f"points must be (G, 2) with G >= 3, got {g.shape}")
    if m.shape != (len(z), g.shape[0], 2) or fit.shape != z.shape:
        raise ValueError(f"mapped must be (Z, G, 2) = ({len(z)}, {g.shape[0]}, 2) and fit (Z,), "
                         f"got {m.shape} and {fit.shape}")
    if not fit.any():
        raise ValueError("no plane takes part in the fits")
    design = np.column_stack([g, np.ones(len(g))])                       # (G, 3)
    # step 1: per-plane affines (3 x 2 each), then the line through them over the fitted planes
    per_plane = np.linalg.lstsq(design, m.transpose(1, 0, 2).reshape(len(g), -1), rcond=None)[0]
    per_plane = per_plane.reshape(3, len(z), 2).transpose(1, 0, 2)      # (Z, 3, 2)
    zf = z[fit]
    trend = np.column_stack([np.ones(len(zf)), zf - zf.mean()]) if len(zf) > 1 else np.ones((1, 1))
    coef = np.linalg.lstsq(trend, per_plane[fit].reshape(len(zf), -1), rcond=None)[0]
    at = np.column_stack([np.ones(len(z)), z - zf.mean()])[:, :trend.shape[1]] @ coef
    d = m - np.einsum("gk,zkc->zgc", design, at.reshape(len(z), 3, 2))
    # step 3: a field common to all sections
    d -= d[fit].mean(axis=0, keepdims=True)
    # step 4: smooth fields linear in z; every plane shares the points, so the normal equations
    # reduce to one fit of the basis to sum_z zc d_z / sum_z zc^2
    zc = z - zf.mean()
    norm = float((zc[fit] ** 2).sum())
    if bumps > 0 and norm > 0:
        # the affine fields join the bumps: step 1 took the affine part off every z-linear field, so a
        # bump alone would no longer fit what is left of itself
        basis = np.column_stack([bump_basis(g, bumps), design])
        target = np.einsum("z,zgc->gc", zc[fit], d[fit]) / norm
        c = np.linalg.lstsq(basis, target, rcond=None)[0]
        d -= zc[:, None, None] * (basis @ c)[None]
    return d


def _stats(lengths: np.ndarray) -> dict:
    if lengths.size == 0:
        return {"rms": float("nan"), "p95": float("nan"), "max": float("nan")}
    return {"rms": float(np.sqrt(np.mean(lengths ** 2))), "p95": float(np.percentile(lengths, 95)),
            "max": float(lengths.max())}


# -- reading a build ---------------------------------------------------------------------

def _block_samples(canvas, block: int):
    """Return (block centres (B, 2), samples (B, S, 2)) in output pixels, a regular grid centred on the canvas."""
    nbx, nby = canvas.width // block, canvas.height // block
    if nbx < 1 or nby < 1:
        raise InputError(f"the output plane ({canvas.width} x {canvas.height} px) is smaller than one "
                         f"{block} px block; choose a smaller block")
    x0, y0 = (canvas.width - nbx * block) / 2.0, (canvas.height - nby * block) / 2.0
    sub = (np.arange(_SAMPLES) + 0.5) * block / _SAMPLES - 0.5
    bx, by = np.meshgrid(np.arange(nbx) * block, np.arange(nby) * block)
    sx, sy = np.meshgrid(sub, sub)
    xs = x0 + bx.reshape(-1, 1) + sx.reshape(1, -1)
    ys = y0 + by.reshape(-1, 1) + sy.reshape(1, -1)
    samples = np.stack([xs, ys], -1)
    return samples.mean(1), samples


def _section_to_truth_section(stitch, truth_pos, q):
    """Return (true section points, covered) for build section points ``q`` (N, 2), tiles blended by feather weight."""
    num = np.zeros_like(q)
    den = np.zeros(len(q))
    for t in stitch.tiles:
        if t.tile not in truth_pos:
            raise InputError(f"tile {t.tile!r} of the build is not in the ground truth", section=stitch.section)
        u = q - [t.x, t.y]
        wgt = np.minimum.reduce([u[:, 0] + 0.5, t.width - 0.5 - u[:, 0], u[:, 1] + 0.5, t.height - 0.5 - u[:, 1]])
        wgt = np.clip(wgt, 0.0, None)
        num += wgt[:, None] * (np.asarray(truth_pos[t.tile]) - [t.x, t.y])
        den += wgt
    covered = den >= 1.0
    return q + num / np.maximum(den, 1e-12)[:, None], covered


def _aligned_extent(store, sections):
    """Return a stand-in canvas (``width, height, origin_x, origin_y``) for a build not yet rendered.

    It is the union of the sections' tile rectangles carried into the aligned
    frame by the inverse of each section's affine (the field is ignored: only
    the grid's placement depends on it, and uncovered blocks are dropped anyway).
    """
    corners = []
    for s in sections:
        x0, y0, x1, y1 = store.load_stitch(s).bbox()
        box = np.array([[x0, y0], [x1, y0], [x0, y1], [x1, y1]])
        corners.append(store.load_alignment(s).affine.inverse().apply(box))
    c = np.vstack(corners)
    lo, hi = np.floor(c.min(0)), np.ceil(c.max(0))
    return SimpleNamespace(width=int(hi[0] - lo[0]), height=int(hi[1] - lo[1]),
                           origin_x=float(lo[0]), origin_y=float(lo[1]))


def plane_positions(build_dir, truth: Truth, block: int = 128):
    """Return what each output plane of a build shows, in the true frame, on a grid of blocks.

    Returns
    -------
    points : ndarray
        ``(G, 2)`` block centres (output pixels) covered by tiles in every plane returned.
    sections : list of int
    mapped : ndarray
        ``(Z, G, 2)`` true-frame position each plane shows at each block (mean over the block's samples).
    excluded : dict
        ``section -> reason`` for truth sections left out.
    flags : dict
        ``section -> alignment flags``.
    """
    store = TransformStore(Path(build_dir) / "transforms")
    aligned = set(store.sections_with("align"))
    excluded = {s: "lost" for s in truth.lost_sections}
    sections = []
    for s in truth.sections:
        if s not in aligned or store.load_stitch(s) is None:
            excluded[s] = "not aligned in the build"
        else:
            sections.append(s)
    if not sections:
        raise InputError("no section of the ground truth is aligned in the build", file=Path(build_dir))
    canvas = store.load_canvas() or _aligned_extent(store, sections)
    centres, samples = _block_samples(canvas, block)
    flat = samples.reshape(-1, 2) + [canvas.origin_x, canvas.origin_y]
    mapped = np.empty((len(sections),) + samples.shape)
    keep = np.ones(len(centres), bool)
    flags = {}
    for i, s in enumerate(sections):
        rec = store.load_alignment(s)
        flags[s] = list(rec.flags)
        q = rec.aligned_to_section(flat)
        q_true, covered = _section_to_truth_section(store.load_stitch(s), truth.tile_positions(s), q)
        mapped[i] = truth.section_to_true(s, q_true).reshape(samples.shape)
        keep &= covered.reshape(samples.shape[:2]).all(1)
    if keep.sum() < 3:
        raise InputError(f"fewer than 3 blocks of {block} px are covered in every plane", file=Path(build_dir))
    return centres[keep], sections, mapped[:, keep].mean(2), excluded, flags


def identifiable_residual(build_dir, truth_dir, *, block: int = 128, bumps: int = 4,
                          include_damaged: bool = False) -> ResidualReport:
    """Return the identifiable residual of a finished build against the ground truth of its synthetic input.

    Parameters
    ----------
    build_dir : str or Path
        The build folder (``--out DIR``); needs its stitch and align records. The grid
        lies on the output canvas when render has run, else on the union of the
        sections' extents in the aligned frame (same origin convention).
    truth_dir : str, Path or Truth
        The synthetic sample folder (holding ``truth/``), or its loaded :class:`Truth`.
    block : int
        Block size in output pixels (level 0).
    bumps : int
        Gaussian bumps per side for the smooth z-linear fields.
    include_damaged : bool
        Let the truth's damaged (folded) sections take part in the fits and totals;
        by default they get a residual against the others' fits but are not counted.

    Returns
    -------
    ResidualReport

    Raises
    ------
    InputError
        If the truth or the build records are missing, or no block is covered in every plane.
    """
    truth = truth_dir if isinstance(truth_dir, Truth) else load_truth(truth_dir)
    points, sections, mapped, excluded, flags = plane_positions(build_dir, truth, block)
    damaged = {int(s) for s in truth.defects.get("damaged_sections", {})}
    fit = np.array([include_damaged or s not in damaged for s in sections])
    if not fit.any():
        fit[:] = True
    vectors = identifiable_vectors(points, mapped, np.asarray(sections, float), fit, bumps)
    lengths = np.sqrt((vectors ** 2).sum(-1))
    per = {s: {**_stats(lengths[i]), "measured": bool(fit[i])} for i, s in enumerate(sections)}
    total = _stats(lengths[fit])
    return ResidualReport(total["rms"], total["p95"], total["max"], per, sections, points, vectors,
                          excluded, flags)
