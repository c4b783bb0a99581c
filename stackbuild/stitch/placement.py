"""Tile translations of one section from pairwise shifts: one sparse weighted least-squares solve."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla


@dataclass
class Placement:
    """Result of :func:`solve_translations`.

    Attributes
    ----------
    positions : ndarray, shape (N, 2)
        Solved ``(x, y)`` of each tile, section pixels.
    kept : ndarray of bool, shape (K,)
        Pairs still used after the residual rejection.
    residuals : ndarray, shape (K,)
        ``|p_b - p_a - d|`` of every pair (kept or not) under the final solve.
    rounds : int
        Number of solves.
    """

    positions: np.ndarray
    kept: np.ndarray
    residuals: np.ndarray
    rounds: int


def _solve(pairs, shifts, weights, stage, prior_weight):
    n = len(stage)
    k = len(pairs)
    rows = np.repeat(np.arange(k), 2)
    cols = pairs.reshape(-1)
    vals = np.tile([-1.0, 1.0], k)
    a = sp.csr_matrix((vals, (rows, cols)), shape=(k, n))
    w = sp.diags(weights)
    normal = (a.T @ w @ a + prior_weight * sp.identity(n)).tocsc()
    rhs = a.T @ (weights[:, None] * shifts) + prior_weight * stage
    sol = spla.spsolve(normal, rhs)
    return np.asarray(sol, dtype=np.float64).reshape(n, 2)


def solve_translations(pairs: np.ndarray, shifts: np.ndarray, weights: np.ndarray,
                       stage: np.ndarray, prior_weight: float = 1e-3,
                       max_residual: float = 1.5, max_rounds: int | None = None) -> Placement:
    """Return tile positions that best agree with the pair shifts, rejecting pairs that disagree.

    Parameters
    ----------
    pairs : ndarray of int, shape (K, 2)
        Tile indices ``(a, b)`` of each measured pair.
    shifts : ndarray, shape (K, 2)
        Measured ``(dx, dy)`` = position of ``b`` minus position of ``a``.
    weights : ndarray, shape (K,)
        Confidence of each pair (> 0).
    stage : ndarray, shape (N, 2)
        Stage positions ``(x, y)``; each tile is pulled toward its own with
        weight ``prior_weight`` (this also fixes the common translation and
        places tiles that no pair reaches).
    prior_weight : float
        Weight of the stage prior relative to a pair of weight 1 (> 0).
    max_residual : float
        After each solve, the pair with the largest residual is dropped if
        that residual exceeds this (pixels), and the solve is repeated.
    max_rounds : int, optional
        Upper bound on the number of solves (default: one per pair, plus one).

    Returns
    -------
    Placement

    Notes
    -----
    Minimises ``sum_k w_k |p_b - p_a - d_k|^2 + lambda sum_i |p_i - s_i|^2``
    for x and y together: the normal matrix ``A^T W A + lambda I`` (``A`` the
    signed pair-tile incidence matrix, a weighted graph Laplacian plus a
    ridge) is sparse, symmetric positive definite, and solved directly with
    ``scipy.sparse.linalg.spsolve`` for both coordinates at once. Dropping
    the worst pair and solving again is the usual iterative outlier
    rejection (common practice, no source); one pair per round, because one
    wrong pair in a loop of pairs spreads part of its error onto the good
    ones, and dropping all pairs near the worst would drop those too.
    """
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    shifts = np.asarray(shifts, dtype=np.float64).reshape(-1, 2)
    weights = np.asarray(weights, dtype=np.float64).reshape(-1)
    stage = np.asarray(stage, dtype=np.float64).reshape(-1, 2)
    if not (len(pairs) == len(shifts) == len(weights)):
        raise ValueError("pairs, shifts and weights must have one row per pair")
    if len(pairs) and (pairs.min() < 0 or pairs.max() >= len(stage)):
        raise ValueError("pair indices must refer to tiles in stage")
    if np.any(weights <= 0):
        raise ValueError("pair weights must be > 0")
    if prior_weight <= 0:
        raise ValueError(f"prior_weight must be > 0, got {prior_weight}")
    kept = np.ones(len(pairs), dtype=bool)
    rounds = 0
    max_rounds = len(pairs) + 1 if max_rounds is None else max_rounds
    while True:
        rounds += 1
        pos = _solve(pairs[kept], shifts[kept], weights[kept], stage, prior_weight)
        res = np.hypot(*(pos[pairs[:, 1]] - pos[pairs[:, 0]] - shifts).T) if len(pairs) else np.zeros(0)
        if not kept.any() or rounds >= max_rounds:
            break
        worst = int(np.flatnonzero(kept)[np.argmax(res[kept])])
        if res[worst] <= max_residual:
            break
        kept[worst] = False
    return Placement(pos, kept, res, rounds)
