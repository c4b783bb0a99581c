"""Global, template-free solve of all section affines from pairwise correspondences.

Every section ``z`` gets a map ``B_z : section -> coarse``. Each coarse
correspondence ``(p_a, p_b)`` between sections ``a`` and ``b`` asks that both
land on the same coarse point, ``B_a p_a - B_b p_b = 0``: a first-difference
chain along z. That is linear in the parameters of all ``B_z`` at once, so the
whole stack is one sparse linear least-squares problem. No section is the
reference: the gauge is fixed by asking the mean of the ``B_z`` of each
connected group of sections to be the identity (a hard linear constraint,
solved with its Lagrange multipliers). The stored transform is
``A_z = B_z^{-1} : coarse -> section``.

Why first differences here: random per-section offsets of ~100 px and
rotations of a few degrees cannot be told apart from a slow drift of the
specimen, so the coarse stage removes any steady change of the affine part
along z; only the elastic stage (second differences) keeps slow change.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import connected_components

from ..transforms.types import Affine2D
from .coarse import MODELS, PairResult

_IDENTITY6 = np.array([1.0, 0.0, 0.0, 0.0, 1.0, 0.0])  # a, b, tx, c, d, ty


@dataclass
class SolveResult:
    """The global solve's answer.

    Attributes
    ----------
    affines : dict[int, Affine2D]
        ``coarse -> section`` map of every section.
    flags : dict[int, list[str]]
        ``"interpolated"`` for sections with no usable pair, ``"single_section"``.
    pair_rms : dict[tuple[int, int], float]
        RMS distance (full-res pixels) between the two sides of each used
        pair's correspondences after the solve.
    dropped : list[tuple[int, int]]
        Pairs left out as outliers by the robust loop.
    """

    affines: dict[int, Affine2D]
    flags: dict[int, list[str]] = field(default_factory=dict)
    pair_rms: dict[tuple[int, int], float] = field(default_factory=dict)
    dropped: list[tuple[int, int]] = field(default_factory=list)


def _param_map(model: str) -> np.ndarray:
    """Return P (6 x k): the 6 affine parameters as a linear function of the model's k."""
    if model == "affine":
        return np.eye(6)
    # similarity [[p, -q, tx], [q, p, ty]] with unknowns (p, q, tx, ty); rigid is projected later
    p = np.zeros((6, 4))
    p[0, 0] = p[4, 0] = 1.0
    p[1, 1], p[3, 1] = -1.0, 1.0
    p[2, 2] = p[5, 3] = 1.0
    return p


def _components(sections: list[int], pairs: list[PairResult]) -> list[list[int]]:
    """Return ``sections`` in groups that ``pairs`` link, each group and the groups in section order.

    Connected components of the pair graph (``scipy.sparse.csgraph.connected_components``).
    """
    index = {z: i for i, z in enumerate(sections)}
    a = [index[pr.a] for pr in pairs]
    b = [index[pr.b] for pr in pairs]
    graph = sp.coo_matrix((np.ones(len(a)), (a, b)), shape=(len(sections), len(sections)))
    _, labels = connected_components(graph, directed=False)
    groups: dict[int, list[int]] = {}
    for z, label in zip(sections, labels):
        groups.setdefault(int(label), []).append(z)
    return list(groups.values())


def _rows(pairs: list[PairResult], index: dict[int, int], norm: float, cap: int):
    """Return the sparse design matrix (2 rows per correspondence) and row weights."""
    rows, cols, vals, wts = [], [], [], []
    r0 = 0
    for pr in pairs:
        n = len(pr.pts_a)
        w = np.sqrt(min(1.0, cap / n))
        for pts, sign, z in ((pr.pts_a, 1.0, pr.a), (pr.pts_b, -1.0, pr.b)):
            h = np.column_stack([pts / norm, np.ones(n)]) * sign
            base = 6 * index[z]
            for comp in range(2):
                rr = r0 + 2 * np.arange(n) + comp
                for k in range(3):
                    rows.append(rr)
                    cols.append(np.full(n, base + 3 * comp + k))
                    vals.append(h[:, k])
        wts.append(np.full(2 * n, w))
        r0 += 2 * n
    j = sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                      shape=(r0, 6 * len(index)))
    return j, np.concatenate(wts)


def _solve_once(sections, pairs, groups, model, norm, cap) -> dict[int, np.ndarray]:
    index = {z: i for i, z in enumerate(sections)}
    pm = _param_map(model)
    k = pm.shape[1]
    expand = sp.kron(sp.identity(len(sections)), sp.csr_matrix(pm), format="csr")
    j, w = _rows(pairs, index, norm, cap)
    jk = sp.diags(w) @ j @ expand
    h = (jk.T @ jk).tocsc()
    # gauge: the mean of each group's maps is the identity (in the model's parameters)
    target = np.linalg.lstsq(pm, _IDENTITY6, rcond=None)[0]
    crow, ccol, cval, rhs = [], [], [], []
    for g, group in enumerate(groups):
        for q in range(k):
            for z in group:
                crow.append(g * k + q)
                ccol.append(index[z] * k + q)
                cval.append(1.0 / len(group))
            rhs.append(target[q])
    c = sp.csr_matrix((cval, (crow, ccol)), shape=(len(groups) * k, h.shape[0]))
    kkt = sp.bmat([[h, c.T], [c, None]], format="csc")
    b = np.concatenate([np.zeros(h.shape[0]), rhs])
    x = spla.spsolve(kkt, b)[:h.shape[0]]
    params = (expand @ x).reshape(len(sections), 6)
    return {z: params[index[z]] for z in sections}


def _pair_rms(pr: PairResult, params: dict, norm: float) -> float:
    ba = params[pr.a].reshape(2, 3)
    bb = params[pr.b].reshape(2, 3)
    qa = pr.pts_a / norm @ ba[:, :2].T + ba[:, 2]
    qb = pr.pts_b / norm @ bb[:, :2].T + bb[:, 2]
    return float(np.sqrt(np.mean(np.sum((qa - qb) ** 2, axis=1))) * norm)


def _to_affine(p: np.ndarray, norm: float, model: str) -> Affine2D:
    """Return ``A = B^{-1}`` (coarse -> section) from normalised parameters of ``B``."""
    m = p.reshape(2, 3).copy()
    m[:, 2] *= norm
    if model == "rigid":
        u, _, vt = np.linalg.svd(m[:, :2])
        m[:, :2] = u @ vt
    return Affine2D(m).inverse()


def _interpolate(z: int, solved: dict[int, np.ndarray]) -> np.ndarray:
    below = [s for s in solved if s < z]
    above = [s for s in solved if s > z]
    if below and above:
        lo, hi = max(below), min(above)
        f = (z - lo) / (hi - lo)
        return (1 - f) * solved[lo] + f * solved[hi]
    return solved[max(below)] if below else solved[min(above)]


def solve_affines(sections: list[int], pairs: list[PairResult], model: str = "affine", *,
                  outlier_factor: float = 3.0, outlier_floor: float = 4.0, max_rounds: int = 4,
                  max_points_per_pair: int = 400) -> SolveResult:
    """Return the ``coarse -> section`` affine of every section from all pair correspondences.

    Parameters
    ----------
    sections : list of int
        The present sections.
    pairs : list of PairResult
        Coarse matches; pairs that are not ``usable`` are ignored.
    model : {"rigid", "similarity", "affine"}
        Section model; rigid is solved as a similarity and projected onto the
        nearest rotation (common practice, no source).
    outlier_factor, outlier_floor : float
        After each solve, pairs whose RMS (full-res pixels) exceeds both
        ``outlier_floor`` and ``outlier_factor`` times the median pair RMS are
        dropped and the stack is solved again, up to ``max_rounds`` times.
    max_points_per_pair : int
        Pairs with more correspondences are down-weighted to this many, so a
        feature-rich pair does not outvote its neighbours.

    Returns
    -------
    SolveResult

    Notes
    -----
    The problem is posed on ``B_z = A_z^{-1}`` because ``B_a p_a = B_b p_b`` is
    linear in the unknowns; see the module docstring for the gauge. Sections
    without a usable pair get the linear interpolation (in z) of the
    parameters of the nearest solved sections and are flagged
    ``"interpolated"``. Coordinates are divided by the typical extent of the
    points before solving to keep the system well conditioned.

    References
    ----------
    .. [1] Saalfeld, S. et al. "Elastic volume reconstruction from series of
           ultra-thin microscopy sections", Nature Methods 9:717-720 (2012).
           doi:10.1038/nmeth.2072 (the global, template-free spirit).
    """
    if model not in MODELS:
        raise ValueError(f"model must be one of {MODELS}, got {model!r}")
    sections = sorted(set(int(z) for z in sections))
    if not sections:
        raise ValueError("no sections to solve")
    present = set(sections)
    usable = [p for p in pairs if p.usable and p.a in present and p.b in present and p.a != p.b]
    flags: dict[int, list[str]] = {z: [] for z in sections}
    if len(sections) == 1:
        flags[sections[0]].append("single_section")
        return SolveResult({sections[0]: Affine2D.identity()}, flags)
    pts = [p.pts_a for p in usable] + [p.pts_b for p in usable]
    norm = float(np.max(np.abs(np.concatenate(pts)))) if pts else 1.0
    norm = max(norm, 1.0)
    dropped: list[tuple[int, int]] = []
    params: dict[int, np.ndarray] = {}
    rms: dict[tuple[int, int], float] = {}
    for _ in range(max_rounds):
        linked = sorted({z for p in usable for z in (p.a, p.b)})
        if not linked:
            break
        groups = _components(linked, usable)
        params = _solve_once(linked, usable, groups, model, norm, max_points_per_pair)
        rms = {(p.a, p.b): _pair_rms(p, params, norm) for p in usable}
        limit = max(outlier_floor, outlier_factor * float(np.median(list(rms.values()))))
        bad = [p for p in usable if rms[(p.a, p.b)] > limit]
        if not bad:
            break
        dropped += [(p.a, p.b) for p in bad]
        usable = [p for p in usable if rms[(p.a, p.b)] <= limit]
    rms = {k: v for k, v in rms.items() if k not in set(dropped)}
    if not params:
        params = {sections[0]: _IDENTITY6 / [1, 1, norm, 1, 1, norm]}
        flags[sections[0]].append("interpolated")
    for z in sections:
        if z not in params:
            flags[z].append("interpolated")
    solved = dict(params)
    for z in sections:
        if z not in solved:
            params[z] = _interpolate(z, solved)
    affines = {z: _to_affine(params[z], norm, model) for z in sections}
    return SolveResult(affines, flags, rms, dropped)
