"""Smooth fields over a section: Gaussian bumps on a regular grid (a pure kernel, layer 1)."""
from __future__ import annotations

import numpy as np


def bump_basis(points: np.ndarray, n: int = 4) -> np.ndarray:
    """Return ``(G, n*n)`` Gaussian bumps on an ``n x n`` grid over the points' bounding box.

    Centres sit at ``(i + 0.5) / n`` of the box in x and y; each bump's sigma is the centre
    spacing along that axis. Points are ``(x, y)``. Used to fit the spatially smooth part of a
    displacement field (by the identifiable residual of the synthetic ground truth and by the
    quality report's straightening term).
    """
    p = np.asarray(points, np.float64).reshape(-1, 2)
    lo, hi = p.min(0), p.max(0)
    span = np.maximum(hi - lo, 1.0)
    t = (np.arange(n) + 0.5) / n
    cx, cy = np.meshgrid(lo[0] + t * span[0], lo[1] + t * span[1])
    sx, sy = span / n
    dx = (p[:, :1] - cx.ravel()[None, :]) / sx
    dy = (p[:, 1:] - cy.ravel()[None, :]) / sy
    return np.exp(-0.5 * (dx ** 2 + dy ** 2))
