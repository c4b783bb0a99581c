"""Elastic refinement: one smooth displacement field per section, solved for the whole stack.

Every section ``z`` gets a field ``u_z`` on one common grid of nodes (the
aligned frame): aligned point ``p`` shows coarse point ``p + u_z(p)``. Block
matching between the coarse-aligned images of sections ``a < b`` measures
``v_ab(p)`` (content of ``a`` at ``p`` is found in ``b`` at ``p + v_ab``),
which to first order is ``u_b(p) - u_a(p)``.

The data term is posed on **second differences along z**: for a section
``z`` with measured neighbours ``z - g1`` and ``z + g2`` (gaps 1 or 2, so a
lost or damaged neighbour is skipped),

    (g2 * u_{z-g1} - (g1 + g2) * u_z + g1 * u_{z+g2}) / (g1 + g2)
        = (g1 * v_{z,z+g2} - g2 * v_{z-g1,z}) / (g1 + g2),

i.e. each section should sit at the (distance-weighted) average of its
neighbours. A field that changes linearly with z satisfies this with zero
cost, so structures that slant steadily through the block keep their slant;
a first-difference chain (``u_b - u_a = v_ab``) would straighten them. Random
per-section distortions are not linear in z and are removed. The linear-in-z
part, which the data cannot see, is fixed by a weak pull of every field
toward zero. In-plane smoothness is a membrane term (first differences
between neighbouring nodes, weight ``smoothness_weight``).

The straight-line-in-z part of *random* warps is invisible to second
differences too, and is left in the result (about 1 px RMS on 20 sections
with warps of up to 8 px). A weak first-difference term (``chain``) sees it:
its weight sets how much of a straight-line change along z is read as warp
(removed) rather than slant (kept) -- a trade-off no weight escapes, since
the two look alike in the data. Measured on the align tests' invented
stacks, 20 sections (random warps: residual RMS; pure slant: change over
the block; ``python tests/benchmarks/bench_align.py --tradeoff``): chain 0 ->
1.25 / 0.19 px, 0.01 -> 1.01 / 0.34, 0.02 -> 0.89 / 0.52, 0.03 -> 0.82 /
0.68, 0.1 -> 0.63 / 1.34. An optional first-difference
term on the affine part only (``affine_chain``) does the same for the
affine part, which the coarse stage already treats that way.
"""
from __future__ import annotations

import functools

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.linalg import solveh_banded
from scipy.sparse.csgraph import reverse_cuthill_mckee


def _triplets(sections: list[int], matches: dict, max_gap: int):
    """Yield ``(lo, z, hi, weight)`` for every second-difference constraint that has data."""
    present = set(sections)
    for z in sections:
        for g1 in range(1, max_gap + 1):
            for g2 in range(1, max_gap + 1):
                lo, hi = z - g1, z + g2
                if lo in present and hi in present and (lo, z) in matches and (z, hi) in matches:
                    # the closest neighbours carry the most weight (common practice, no source)
                    yield lo, z, hi, 1.0 / (g1 * g2)


def _membrane(ny: int, nx: int) -> sp.csr_matrix:
    """Return the first-difference operator between 4-connected nodes of one grid."""
    def diff(n):
        return sp.diags([-np.ones(n - 1), np.ones(n - 1)], [0, 1], shape=(n - 1, n))
    dx = sp.kron(sp.identity(ny), diff(nx)) if nx > 1 else sp.csr_matrix((0, ny * nx))
    dy = sp.kron(diff(ny), sp.identity(nx)) if ny > 1 else sp.csr_matrix((0, ny * nx))
    return sp.vstack([dx, dy]).tocsr()


def _bending(ny: int, nx: int) -> sp.csr_matrix:
    """Return the in-plane second-difference operator (along rows and along columns) of one grid."""
    def diff2(n):
        return sp.diags([np.ones(n - 2), -2 * np.ones(n - 2), np.ones(n - 2)], [0, 1, 2], shape=(n - 2, n))
    parts = []
    if nx > 2:
        parts.append(sp.kron(sp.identity(ny), diff2(nx)))
    if ny > 2:
        parts.append(sp.kron(diff2(ny), sp.identity(nx)))
    return sp.vstack(parts).tocsr() if parts else sp.csr_matrix((0, ny * nx))


@functools.lru_cache(maxsize=64)
def _in_plane(ny: int, nx: int) -> tuple[sp.spmatrix, sp.csr_matrix, sp.csr_matrix]:
    """Return ``(G'G, B, pattern of B)`` of one grid: the membrane's normal matrix, the second-difference
    operator and which nodes each of its rows involves (1.0), made once per grid shape (not to be modified)."""
    memb, bend = _membrane(ny, nx), _bending(ny, nx)
    return memb.T @ memb, bend, abs(bend).astype(bool).astype(np.float64)


def _touching(pattern: sp.csr_matrix, nodes: np.ndarray) -> np.ndarray:
    """Return which rows of an operator involve any of ``nodes`` (bool over the grid's nodes), from its ``pattern``."""
    return (pattern @ nodes.astype(np.float64)) > 0


def _regulariser(shape: tuple[int, int], uncovered: list[np.ndarray], smoothness_weight: float,
                 pull: float, continuation: float) -> sp.csr_matrix:
    """Return the in-plane smoothness and pull terms of all sections (normal-equation form).

    ``uncovered[i]`` (``ny * nx`` bool) marks the nodes where section ``i`` has
    no second-difference data. Everywhere the membrane and the pull act as
    the module docstring says; around a node without data, in-plane second
    differences (weight ``continuation * smoothness_weight``) continue the
    slope of the field from its neighbours, and the pull there is a
    hundredth, so such a node no longer sinks toward zero; see
    :func:`solve_fields`, Notes. All sections' blocks are made by a few
    products of block-diagonal matrices, not section by section.
    """
    ny, nx = shape
    n = len(uncovered)
    mtm, bend, pattern = _in_plane(ny, nx)
    eye = sp.identity(n, format="csr")
    reg = sp.kron(eye, smoothness_weight * mtm, format="csr")
    if continuation > 0:
        miss = np.concatenate(uncovered)
        # the rows of every section's second-difference operator that involve one of its nodes without data
        touch = np.concatenate([_touching(pattern, m) for m in uncovered]).astype(np.float64)
        cont = sp.diags(touch) @ sp.kron(eye, bend, format="csr")
        reg = reg + continuation * smoothness_weight * (cont.T @ cont) + pull * sp.diags(np.where(miss, 0.01, 1.0))
    else:
        reg = reg + pull * sp.identity(n * ny * nx)
    return reg.tocsr()


def _data_terms(index: dict, nn: int, rows: list) -> tuple[sp.csr_matrix, np.ndarray]:
    """Return ``(D'WD, D'W m)`` of data rows ``(sections, coefficients, weights (nn,), rhs (nn, 2))``.

    Each entry stands for ``nn`` rows (one per node) ``sum_k c_k u_{s_k} = m``
    with weights ``w``; every row involves one node of a few sections, so
    the normal matrix is assembled entry by entry (one sparse matrix, its
    duplicates summed), without forming ``D``.
    """
    n = len(index)
    node = np.arange(nn)
    ii, jj, vv = [np.zeros(0, int)], [np.zeros(0, int)], [np.zeros(0)]     # no rows: a zero matrix
    b = np.zeros((n * nn, 2))
    for secs, coef, w, m in rows:
        start = [index[z] * nn for z in secs]
        for s0, c0 in zip(start, coef):
            b[s0:s0 + nn] += (c0 * w)[:, None] * m
            for s1, c1 in zip(start, coef):
                ii.append(s0 + node)
                jj.append(s1 + node)
                vv.append(c0 * c1 * w)
    normal = sp.csr_matrix((np.concatenate(vv), (np.concatenate(ii), np.concatenate(jj))), shape=(n * nn, n * nn))
    return normal, b


def _chain_rows(matches, index, chain) -> list:
    """Return the first-difference data rows ``u_b - u_a = v_ab`` (weight ``chain / gap``; see :func:`_data_terms`)."""
    out = []
    for (a, b), (shifts, weights) in sorted(matches.items()):
        if a not in index or b not in index:
            continue
        w = np.asarray(weights, np.float64).ravel() * (chain / (b - a))
        if (w > 0).any():
            out.append(((a, b), (-1.0, 1.0), w, np.nan_to_num(shifts).reshape(-1, 2).astype(np.float64)))
    return out


def _affine_chain_rows(sections, shape, matches, index, weight, blocks, rhs, wts) -> None:
    """Append, per pair, 3 rows ``L (u_b - u_a) = L v_ab`` with ``L = (X'WX)^(-1/2) X'W``.

    ``X`` holds the affine basis ``(x, y, 1)`` of the grid nodes and ``W`` the
    match weights, so ``||L r||^2`` is the weighted squared norm of the
    weighted-least-squares affine part of ``r`` (the rest of ``r`` costs nothing).
    """
    ny, nx = shape
    nn = ny * nx
    ys, xs = np.mgrid[0:ny, 0:nx].astype(np.float64)
    x = np.column_stack([(xs.ravel() - xs.mean()) / max(1.0, nx), (ys.ravel() - ys.mean()) / max(1.0, ny),
                         np.ones(nn)])
    n = len(sections)
    for (a, b), (shifts, weights) in sorted(matches.items()):
        if a not in index or b not in index:
            continue
        w = np.asarray(weights, np.float64).ravel()
        g = x.T @ (w[:, None] * x)
        if (w > 0).sum() < 6 or np.linalg.cond(g) > 1e8:
            continue
        ev, evec = np.linalg.eigh(g)
        ell = (evec @ np.diag(ev ** -0.5) @ evec.T) @ (x.T * w)          # (3, nn)
        cols = np.concatenate([index[a] * nn + np.arange(nn), index[b] * nn + np.arange(nn)])
        vals = np.concatenate([-ell, ell], axis=1)
        rows = np.repeat(np.arange(3), 2 * nn)
        blocks.append(sp.csr_matrix((vals.ravel(), (rows, np.tile(cols, 3))), shape=(3, n * nn)))
        rhs.append(ell @ np.nan_to_num(shifts).reshape(nn, 2))
        wts.append(np.full(3, weight / (b - a)))


#: the band's entries up to which the Cholesky of the band is used (16 MB of float64), past which SuperLU
_BAND_ENTRIES = 2_000_000


def _banded_solve(a: sp.spmatrix, b: np.ndarray) -> np.ndarray | None:
    """Return ``a^-1 b`` by Cholesky of the band of ``a`` in reverse Cuthill-McKee order [1]_, or None.

    The unknowns of a node block (its nodes x sections) couple only within a
    few grid rows, so in that order the matrix is a narrow band (about 130 to
    300 entries on either side of the diagonal for 2,000 unknowns), and
    LAPACK's banded Cholesky (``scipy.linalg.solveh_banded``) factors it two
    to five times faster than SuperLU's sparse LU. None when the band is too
    wide (:data:`_BAND_ENTRIES`) or the matrix is not positive definite.

    References
    ----------
    .. [1] Cuthill, E. & McKee, J. "Reducing the bandwidth of sparse
           symmetric matrices", Proc. 24th ACM National Conference (1969)
           157-172. doi:10.1145/800195.805928
    """
    n = a.shape[0]
    csr = a.tocsr()
    perm = reverse_cuthill_mckee(csr, symmetric_mode=True)
    p = csr[perm][:, perm].tocoo()
    low = p.row >= p.col
    band = int((p.row - p.col)[low].max(initial=0))
    if (band + 1) * n > _BAND_ENTRIES:
        return None
    ab = np.zeros((band + 1, n))
    ab[(p.row - p.col)[low], p.col[low]] = p.data[low]
    try:
        x = solveh_banded(ab, b[perm], lower=True, check_finite=False)
    except np.linalg.LinAlgError:
        return None
    out = np.empty_like(x)
    out[perm] = x
    return out


def _solve_spd(a: sp.csc_matrix, b: np.ndarray, nn: int, direct_limit: int = 4000) -> np.ndarray:
    """Solve the SPD system ``a x = b`` (two right-hand sides).

    Small systems: Cholesky of the band (:func:`_banded_solve`), else sparse
    LU. Large ones: conjugate gradients preconditioned
    by the exact solve of every grid node's own column through z (the matrix
    without its in-plane couplings, which are weak), so a few dozen
    iterations suffice whatever the number of sections.
    """
    if a.shape[0] <= direct_limit:
        x = _banded_solve(a, b)
        return spla.splu(a).solve(b) if x is None else x
    coo = a.tocoo()
    keep = (coo.row % nn) == (coo.col % nn)
    own = sp.csc_matrix((coo.data[keep], (coo.row[keep], coo.col[keep])), shape=a.shape)
    lu = spla.splu(own)
    pre = spla.LinearOperator(a.shape, matvec=lu.solve, dtype=np.float64)
    out = np.empty_like(b)
    for k in range(b.shape[1]):
        x, info = spla.cg(a, b[:, k], rtol=1e-9, maxiter=2000, M=pre)
        if info != 0:
            x = spla.splu(a).solve(b[:, k])
        out[:, k] = x
    return out


def solve_fields(sections: list[int], shape: tuple[int, int], matches: dict, *,
                 smoothness_weight: float = 1.0, pull: float = 1e-3, max_gap: int = 2,
                 prior: dict[int, np.ndarray] | None = None,
                 chain: float = 0.0, affine_chain: float = 0.0,
                 continuation: float = 3.0) -> dict[int, np.ndarray]:
    """Return the displacement field ``u_z`` (shape ``(ny, nx, 2)``, pixels) of every section.

    Parameters
    ----------
    sections : list of int
        Present sections (lost ones simply absent).
    shape : (int, int)
        Grid nodes ``(ny, nx)``, shared by all sections.
    matches : dict
        ``{(a, b): (shifts, weights)}`` for ``a < b``: ``shifts`` ``(ny, nx, 2)``
        in full-resolution pixels, ``weights`` ``(ny, nx)`` >= 0 (0 = no data;
        NaN shifts must have weight 0).
    smoothness_weight : float
        Weight of the in-plane membrane term relative to the data term.
    pull : float
        Weight of the pull of every field toward zero; small, it only fixes
        what the data leave free (fields linear in z).
    max_gap : int
        Largest z gap between a section and a neighbour used in a constraint.
    chain : float
        Weight of a first-difference data term ``u_b - u_a = v_ab`` beside the
        second differences (0 = none). It sees the straight-line-in-z part of
        the fields, so it trades keeping a steady slant against removing the
        straight-line part of random warps; see Notes.
    affine_chain : float
        Weight of a first-difference term on the affine part only (over the
        grid, weighted like the data) of ``u_b - u_a - v_ab`` (0 = none).
        The coarse stage already removes the steady change of the affine part
        along z (see :mod:`stackbuild.align.solve`); this term does the same
        with the denser, sub-pixel block matches, so the random-walk error of
        the coarse chain does not survive as a straight line in z.
    continuation : float
        Weight, relative to ``smoothness_weight``, of in-plane second
        differences around the nodes where a section has no second-difference
        data (near its edge, or where its matches failed): there its field
        continues with the slope of its neighbours instead of flattening
        toward them (the membrane alone) and toward zero (the pull), which
        left the coarse stage's error at the edge of the area every section
        covers (see Notes). 0 = none.
    prior : dict, optional
        Fields already applied when ``matches`` were measured (a refinement
        round): the answer is then the *increment* to add to them, while the
        membrane and pull terms still act on the total field.

    Returns
    -------
    dict[int, ndarray]
        ``u_z`` for every section, float32.

    Notes
    -----
    All sections, both components, one sparse least-squares problem
    ``min ||W (D u - m)||^2 + smoothness_weight ||G u||^2 + pull ||u||^2`` (``D``
    stacks the second differences and, when asked, the first-difference
    rows), solved
    through its normal equations (the Cholesky of their band for small
    stacks, SuperLU where the band is wide, preconditioned conjugate
    gradients for large ones; :func:`_solve_spd`); x and y share the matrix. With fewer than three sections there is no
    second difference and every field is zero.

    A node where a section has no second-difference data (its matching
    window reaches past the section's edge, or its matches were dropped)
    still carries the field: blocks between it and its neighbours inside
    the section are interpolated from it. With the membrane and the pull
    alone its value sinks between its neighbours' and zero, so the coarse
    stage's error (an affine per section that wanders along z) stays in the
    blocks at the edge of the area every section covers. Around such nodes
    in-plane second differences (``continuation``) carry the slope of the
    field on, and the pull there is a hundredth. Measured (identifiable
    residual RMS / p95 on the sections' aligned extent, realistic long
    stacks of 36 sections of 2 x 2 tiles, seeds 0-2,
    ``tests/benchmarks/bench_align.py --accuracy realistic/long``):
    without the term 0.94 / 1.77, 1.07 / 2.15, 1.05 / 2.08 px; with it
    0.88 / 1.63, 0.99 / 1.91, 0.97 / 1.89 px (seed 1's two worst corner
    blocks 1.81 and 1.95 px RMS over z before, 1.58 and 1.89 after; the
    interior 0.4-0.7 px both). What is left at the edge is mostly a slow
    bow along z of the sections' affine part that the data barely see.

    References
    ----------
    .. [1] Saalfeld, S. et al. "Elastic volume reconstruction from series of
           ultra-thin microscopy sections", Nature Methods 9:717-720 (2012).
           doi:10.1038/nmeth.2072 (the spirit: a joint elastic solve of the
           whole series rather than section-by-section chaining).
    """
    if smoothness_weight < 0 or pull <= 0:
        raise ValueError(f"smoothness_weight must be >= 0 and pull > 0, got {smoothness_weight}, {pull}")
    sections = sorted(int(z) for z in sections)
    ny, nx = shape
    nn = ny * nx
    index = {z: i for i, z in enumerate(sections)}
    zero = {z: np.zeros((ny, nx, 2), np.float32) for z in sections}
    rows = []
    covered = {z: np.zeros(nn, bool) for z in sections}
    for lo, z, hi, tw in _triplets(sections, matches, max_gap):
        g1, g2 = z - lo, hi - z
        s1, w1 = matches[(lo, z)]
        s2, w2 = matches[(z, hi)]
        w = np.minimum(w1, w2).ravel().astype(np.float64) * tw
        if not (w > 0).any():
            continue
        for s_ in (lo, z, hi):
            covered[s_] |= w > 0
        m = (g1 * np.nan_to_num(s2).astype(np.float64) - g2 * np.nan_to_num(s1)) / (g1 + g2)
        rows.append(((lo, z, hi), (g2 / (g1 + g2), -1.0, g1 / (g1 + g2)), w, m.reshape(nn, 2)))
    if chain > 0:
        rows += _chain_rows(matches, index, chain)
    blocks, rhs, wts = [], [], []
    if affine_chain > 0:
        _affine_chain_rows(sections, (ny, nx), matches, index, affine_chain, blocks, rhs, wts)
    if not rows and not blocks:
        return zero
    normal, b = _data_terms(index, nn, rows)
    if blocks:
        d = sp.vstack(blocks).tocsr()
        w = sp.diags(np.concatenate(wts))
        normal = normal + d.T @ w @ d
        b = b + d.T @ (w @ np.concatenate(rhs))
    reg = _regulariser((ny, nx), [~covered[z] for z in sections], smoothness_weight, pull,
                       continuation if smoothness_weight > 0 else 0.0)
    normal = (normal + reg).tocsc()
    if prior is not None:
        u0 = np.concatenate([np.asarray(prior[z], np.float64).reshape(nn, 2) for z in sections])
        b = b - reg @ u0
    u = _solve_spd(normal, np.ascontiguousarray(b), nn)
    return {z: u[index[z] * nn:(index[z] + 1) * nn].reshape(ny, nx, 2).astype(np.float32)
            for z in sections}
