"""Section <-> aligned maps of a stored alignment: the inverse against SciPy's root finder, both grid directions."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from stackbuild.transforms import Affine2D, DisplacementField, SectionAlignment

# Invented: a smooth field of at most ~6 px on a 64 px grid and a small rotation (ground truth only).
RNG = np.random.default_rng(3)
FIELD = DisplacementField(RNG.uniform(-6, 6, (6, 7, 2)).astype(np.float32), (0.0, 0.0), 64.0)
ALIGN = SectionAlignment(0, Affine2D.similarity(1.01, 0.03, 12.0, -7.0), FIELD)


def test_section_to_aligned_matches_scipy_root_finding():
    q = RNG.uniform(20, 360, (25, 2))
    got = ALIGN.section_to_aligned(q, tol=1e-6)
    # Reference: scipy.optimize.fsolve on aligned_to_section(p) - q = 0, point by point.
    want = np.array([optimize.fsolve(lambda p: ALIGN.aligned_to_section(p[None])[0] - t, t, xtol=1e-10) for t in q])
    assert np.abs(got - want).max() < 1e-4


def test_grid_map_equals_the_point_map():
    xs, ys = np.arange(0.0, 300.0, 37.0), np.arange(5.0, 200.0, 41.0)
    sx, sy = ALIGN.aligned_to_section_grid(xs, ys)
    gx, gy = np.meshgrid(xs, ys)
    pts = ALIGN.aligned_to_section(np.column_stack([gx.ravel(), gy.ravel()]))
    assert np.allclose(sx.ravel(), pts[:, 0]) and np.allclose(sy.ravel(), pts[:, 1])


def test_a_field_too_steep_to_invert_is_refused():
    # d(x) = 2 (x - 4) between nodes 4 px apart (slope 2 > 1): the iteration p <- q - d(p) swings
    # between the clamped ends instead of converging (worked by hand: 5, 3, 7, -1, 13, -3, 13, ...).
    v = np.zeros((3, 3, 2), np.float32)
    v[:, :, 0] = [-8.0, 0.0, 8.0]
    steep = SectionAlignment(0, Affine2D.identity(), DisplacementField(v, (0.0, 0.0), 4.0))
    with pytest.raises(ValueError, match="too steep"):
        steep.section_to_aligned(np.array([[5.0, 3.0]]), max_iterations=20)
