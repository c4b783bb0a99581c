"""Block matches measured through one set of section affines, read through another (``fields._moved``).

The grid-affine path (``align.stage._grid_affines``) measures elastic round 0 through rough affines
``A_z`` (aligned frame -> section pixels), solves the affines again (``A'_z``) and then solves round
0's matches as if they had been measured through ``A'_z``, instead of matching again. The check is
analytic, outside the project's matcher: for sections related by a known affine ``M`` (section ``a``
pixel ``x`` shows what section ``b`` shows at ``M x``), the match at aligned node ``p`` is exactly
``v(p) = A_b^-1 M A_a p - p`` through ``A`` and ``v'(p) = A'_b^-1 M A'_a p - p`` through ``A'``; the
first-order reading ``v + d_a - d_b`` with ``d_z(p) = A_z^-1 A'_z p - p`` must agree with ``v'`` to
second order in the change of the affines.
"""
from __future__ import annotations

import numpy as np

from stackbuild.align.fields import SolveTask, _moved
from stackbuild.transforms.types import Affine2D


def _match(m: Affine2D, a: Affine2D, b: Affine2D, p: np.ndarray) -> np.ndarray:
    """Return the exact match field ``b^-1 M a p - p`` at aligned points ``p`` ``(..., 2)``."""
    flat = p.reshape(-1, 2)
    return (a.then(m).then(b.inverse()).apply(flat) - flat).reshape(p.shape)


def test_matches_read_through_new_affines_agree_with_matching_through_them():
    origin, spacing, shape = (40.0, 60.0), 128.0, (9, 11)
    rows, cols = slice(0, shape[0]), slice(0, shape[1])
    jj, ii = np.mgrid[rows, cols]
    p = np.stack([origin[0] + spacing * ii, origin[1] + spacing * jj], -1).astype(np.float64)
    # the true relation of the two sections: a rotation of 1.5 degrees, 1 % scale, a shift of tens of px
    m = Affine2D.similarity(1.01, np.deg2rad(1.5), 35.0, -22.0, center=(700.0, 600.0))
    # rough affines, a few px off the truth, and better ones (what the grid-affine solve returns)
    old = {0: Affine2D.identity(), 1: Affine2D.similarity(1.006, np.deg2rad(1.2), 30.0, -18.0, center=(700.0, 600.0))}
    new = {0: Affine2D.similarity(1.0005, np.deg2rad(0.05), 0.8, -0.6), 1: m.then(Affine2D.similarity(
        1.0002, np.deg2rad(-0.03), 0.4, 0.3))}
    v_old = _match(m, old[0], old[1], p).astype(np.float32)
    v_new = _match(m, new[0], new[1], p)
    maps = {z: new[z].then(old[z].inverse()).matrix for z in (0, 1)}       # as align.stage._grid_affines
    task = SolveTask("", "round0", 0, rows, cols, (), 1, (0, 1), None, None, rows, cols,
                     (origin, spacing, maps))
    weights = np.ones(shape, np.float32)
    moved, w = _moved({(0, 1): (v_old, weights)}, task)[(0, 1)]
    assert w is weights
    # the old matches are several px from the new ones; the first-order reading lands within 0.05 px
    assert np.abs(v_old - v_new).max() > 3.0
    np.testing.assert_allclose(moved, v_new, atol=0.05)
