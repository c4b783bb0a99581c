"""The elastic solve by overlapping node blocks: one bounded task per block, all sections.

Every node block is solved on its own, together with a halo of ``halo``
nodes around it, for all sections at once, by :func:`.elastic.solve_fields`
(the same least-squares problem as one global solve, restricted to those
nodes); only the block's own nodes are kept. This is a one-level overlapping
domain decomposition (restricted additive Schwarz without iterations, [1]_):
the blocks couple only through the in-plane smoothness term, which is weak
next to the block-match data, so its influence across a cut fades within a
few nodes and the halo absorbs it. Memory per task: ``(block + 2 * halo)^2``
nodes x sections x 2 unknowns, e.g. 24^2 x 400 x 2 = 460k unknowns, a few
hundred MB with the sparse normal equations; nothing is factorised over the
whole stack.

References
----------
.. [1] Cai, X.-C. & Sarkis, M. "A restricted additive Schwarz preconditioner
       for general sparse linear systems", SIAM J. Sci. Comput. 21:792-797
       (1999). doi:10.1137/S106482759732678X
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .elastic import solve_fields
from .regions import load_block, residual_histogram


@dataclass(frozen=True)
class SolveTask:
    """One node block's solve (small and picklable)."""

    scratch: str
    tag: str
    block: int
    rows: slice
    cols: slice
    blocks: tuple          # ((index, rows, cols), ...) of the blocks the halo meets
    n_windows: int
    sections: tuple
    prior: str | None      # file of the fields so far over the halo region, or None
    settings: object
    halo_rows: slice
    halo_cols: slice
    #: ``(origin, spacing, {z: (2, 3) matrix})`` or None: the matches were measured through other
    #: section affines, ``A_z``, than the ones now solved for, ``A'_z``; the matrix is
    #: ``D_z = A_z^-1 A'_z`` (aligned frame to aligned frame). To first order a match ``v_ab(p)``
    #: measured through the old affines reads ``v_ab(p) + d_a(p) - d_b(p)`` through the new ones,
    #: ``d_z(p) = D_z p - p``, at node ``p = origin + spacing * (i, j)``
    moved: tuple | None = None


def _gather(task: SolveTask):
    """Return matches and contrast over the halo region, assembled from the blocks' files."""
    hr, hc = task.halo_rows, task.halo_cols
    ny, nx = hr.stop - hr.start, hc.stop - hc.start
    matches, contrast = {}, {}
    for idx, rows, cols in task.blocks:
        m, c = load_block(Path(task.scratch), task.tag, idx, task.n_windows)
        r0, r1 = max(rows.start, hr.start), min(rows.stop, hr.stop)
        c0, c1 = max(cols.start, hc.start), min(cols.stop, hc.stop)
        if r0 >= r1 or c0 >= c1:
            continue
        src = np.s_[r0 - rows.start:r1 - rows.start, c0 - cols.start:c1 - cols.start]
        dst = np.s_[r0 - hr.start:r1 - hr.start, c0 - hc.start:c1 - hc.start]
        for key, (sh, wt) in m.items():
            if key not in matches:
                matches[key] = (np.full((ny, nx, 2), np.nan, np.float32), np.zeros((ny, nx), np.float32))
            matches[key][0][dst] = sh[src]
            matches[key][1][dst] = wt[src]
        for z, v in c.items():
            contrast.setdefault(z, np.full((ny, nx), np.nan, np.float32))[dst] = v[src]
    return matches, contrast


def solve_by_blocks(sections, shape, matches: dict, block: int, halo: int, **kw) -> dict:
    """Return :func:`.elastic.solve_fields` solved block by block with a halo (in memory; see module notes).

    ``matches`` are over the whole grid, as for ``solve_fields``; every block
    of ``block`` x ``block`` nodes is solved with ``halo`` nodes around it and
    keeps its own nodes. ``prior`` in ``kw`` (whole-grid fields) is cut too.
    """
    ny, nx = shape
    out = {z: np.zeros((ny, nx, 2), np.float32) for z in sections}
    prior = kw.pop("prior", None)
    for r in range(0, ny, block):
        for c in range(0, nx, block):
            hr = slice(max(0, r - halo), min(ny, r + block + halo))
            hc = slice(max(0, c - halo), min(nx, c + block + halo))
            sub = {k: (v[0][hr, hc], v[1][hr, hc]) for k, v in matches.items()}
            pr = None if prior is None else {z: prior[z][hr, hc] for z in sections}
            step = solve_fields(sections, (hr.stop - hr.start, hc.stop - hc.start), sub, prior=pr, **kw)
            own = np.s_[r - hr.start:min(r + block, ny) - hr.start, c - hc.start:min(c + block, nx) - hc.start]
            for z in sections:
                out[z][r:r + block, c:c + block] = step[z][own]
    return out


def low_contrast(contrast: dict, fraction: float) -> dict:
    """Return, per section, the nodes whose contrast is below ``fraction`` of the stack's median there."""
    stack = np.stack([contrast[z] for z in sorted(contrast)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # all-NaN nodes outside every section
        med = np.nanmedian(stack, axis=0)
    return {z: np.nan_to_num(contrast[z], nan=np.inf) < fraction * med for z in contrast}


def _moved(matches: dict, task: SolveTask) -> dict:
    """Return ``matches`` as measured through the new affines (see :attr:`SolveTask.moved`)."""
    origin, spacing, maps = task.moved
    jj, ii = np.mgrid[task.halo_rows, task.halo_cols]
    p = np.stack([origin[0] + spacing * ii, origin[1] + spacing * jj], -1).astype(np.float64)

    def d(z):
        m = np.asarray(maps[z], np.float64)
        return p @ m[:, :2].T + m[:, 2] - p

    return {(a, b): ((sh + (d(a) - d(b))).astype(np.float32), wt) for (a, b), (sh, wt) in matches.items()}


def solve_block_job(task: SolveTask) -> dict:
    """Solve one node block with its halo; save the block's own field increments; return per-section counts.

    Writes ``{tag}_step_b{block}.npy``, shape ``(S, by, bx, 2)`` in the order of
    ``task.sections``, and returns ``{"block", "low": {z: (low, measured)},
    "residual": {(a, b): (histogram, sum of squares, max)}}`` counted over the
    block's own nodes: damaged-looking places, and the lengths of what the
    trusted matches of each section and the next present one leave once the
    increments are applied (:func:`.regions.residual_histogram`).
    """
    s = task.settings
    matches, contrast = _gather(task)
    zs = list(task.sections)
    ny, nx = task.halo_rows.stop - task.halo_rows.start, task.halo_cols.stop - task.halo_cols.start
    if task.moved is not None:
        matches = _moved(matches, task)
    for z in zs:
        contrast.setdefault(z, np.full((ny, nx), np.nan, np.float32))
    low = low_contrast(contrast, s.damaged_contrast)
    # damaged regions keep a tenth of their say (common practice, no source)
    matches = {(a, b): (v[0], v[1] * np.where(low[a] | low[b], 0.1, 1.0)) for (a, b), v in matches.items()}
    prior = None
    if task.prior is not None:
        arr = np.load(task.prior)
        prior = {z: arr[k] for k, z in enumerate(zs)}
    step = solve_fields(zs, (ny, nx), matches, smoothness_weight=s.smoothness_weight, pull=s.elastic_pull,
                        max_gap=s.neighbours, prior=prior, chain=s.elastic_chain,
                        affine_chain=s.elastic_affine_chain)
    own = np.s_[task.rows.start - task.halo_rows.start:task.rows.stop - task.halo_rows.start,
                task.cols.start - task.halo_cols.start:task.cols.stop - task.halo_cols.start]
    np.save(Path(task.scratch) / f"{task.tag}_step_b{task.block}.npy",
            np.stack([step[z][own] for z in zs]).astype(np.float32))
    counts = {z: (int(low[z][own].sum()), int(np.isfinite(contrast[z][own]).sum())) for z in zs}
    # what this round's trusted matches between each section and the next present one still
    # disagree with once the increments are applied (first order: v_ab - (du_b - du_a))
    left = {(a, b): residual_histogram(matches[(a, b)][0][own] - (step[b][own] - step[a][own]))
            for a, b in zip(zs, zs[1:]) if (a, b) in matches}
    return {"block": task.block, "low": counts, "residual": left}
