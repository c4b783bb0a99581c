"""Straightened oblique structure: the error images cannot show, read from the aligner's own transforms.

When an elastic aligner follows each cell from section to section it
straightens structure that truly runs obliquely: the output looks perfectly
continuous, so no comparison of output planes can see the error. It does show
in the stored transforms, as a deformation at the scale of cells that grows
steadily with z. True section distortions (compression, warps) are smooth over
a section and independent from section to section, so this module

1. maps a grid of output points of every plane to its section frame through
   the stored transforms (what the aligner did);
2. removes from each plane the part an affine map plus smooth fields
   (``bumps x bumps`` Gaussian bumps over the plane) explain: true distortions
   and their corrections;
3. fits, per grid point, a straight line in z to what is left; its slope
   times ``z - mean z`` is the straightening, reported per plane as an RMS length.

Step 2 follows the smooth fields of the alignment issue's identifiable
residual (4 x 4 Gaussian bumps), which treats smooth z-linear fields as
unknowable; what is finer than them and linear in z is what this module
reports. The assumption is stated in the report: true section distortions are
smooth at that scale.
"""
from __future__ import annotations

import numpy as np

from ..transforms.bumps import bump_basis


def bumps_and_affine(points: np.ndarray, n: int = 4) -> np.ndarray:
    """Return ``(G, n*n + 3)``: Gaussian bumps on an ``n x n`` grid over the points' box, then ``x, y, 1``."""
    p = np.asarray(points, np.float64).reshape(-1, 2)
    lo, hi = p.min(0), p.max(0)
    span = np.maximum(hi - lo, 1.0)
    return np.column_stack([bump_basis(p, n), (p - lo) / span, np.ones(len(p))])


def straightening(points: np.ndarray, mapped: np.ndarray, z: np.ndarray, bumps: int = 4) -> np.ndarray:
    """Return ``(Z,)``: RMS over the grid of the cell-scale deformation growing linearly in z, per plane (px).

    Parameters
    ----------
    points : ndarray, shape (G, 2)
        Output ``(x, y)`` grid points (level-0 px), the same in every plane.
    mapped : ndarray, shape (Z, G, 2)
        Section-frame ``(x, y)`` each plane shows at each point (NaN where a plane has no data).
    z : ndarray, shape (Z,)
        Section position of each plane.
    bumps : int
        Smooth fields per side removed from each plane (step 2 of the module docstring).
    """
    g = np.asarray(points, np.float64)
    m = np.asarray(mapped, np.float64)
    z = np.asarray(z, np.float64)
    if m.shape != (len(z), len(g), 2):
        raise ValueError(f"mapped must be (Z, G, 2) = ({len(z)}, {len(g)}, 2), got {m.shape}")
    out = np.full(len(z), np.nan)
    basis = bumps_and_affine(g, bumps)
    if len(z) < 3 or len(g) <= basis.shape[1]:
        return out
    fine = np.full_like(m, np.nan)
    for i in range(len(z)):
        ok = np.isfinite(m[i, :, 0])
        if ok.sum() <= basis.shape[1]:
            continue
        coef = np.linalg.lstsq(basis[ok], m[i, ok], rcond=None)[0]
        fine[i, ok] = m[i, ok] - basis[ok] @ coef
    have = np.isfinite(fine[..., 0])
    for k in range(len(g)):
        zs = have[:, k]
        if zs.sum() < 3:
            continue
        zc = z[zs] - z[zs].mean()
        slope = (zc[:, None] * fine[zs, k]).sum(0) / (zc ** 2).sum()
        fine[zs, k] = zc[:, None] * slope[None]
        fine[~zs, k] = np.nan
    mag2 = (fine ** 2).sum(axis=2)
    for i in range(len(z)):
        row = mag2[i][np.isfinite(mag2[i])]
        if row.size:
            out[i] = float(np.sqrt(row.mean()))
    return out


def section_positions(alignment, canvas, points: np.ndarray) -> np.ndarray:
    """Return section-frame ``(x, y)`` of output level-0 points through a stored alignment (aligned -> section)."""
    p = np.asarray(points, np.float64) + (np.array([canvas.origin_x, canvas.origin_y]) if canvas else 0.0)
    if alignment is None:
        return p
    if alignment.displacement is not None:
        p = p + alignment.displacement.displacement(p)
    return alignment.affine.apply(p)
