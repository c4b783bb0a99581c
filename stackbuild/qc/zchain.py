"""Per-section alignment error from block shifts between nearby planes: jitter apart from slow change.

A pure kernel (arrays in, arrays out). For one block (a fixed place of the
output grid) and every plane ``z`` the report measured shifts ``d(a, b)`` of
the content from plane ``a`` to plane ``b`` (``b - a`` = 1 or 2 sections).
Such a shift holds two things: the error of the two planes,
``e(b) - e(a)``, and the true change of the tissue along z (oblique
structure), which no image can tell from a steady error. The kernel

1. solves the chain ``d(a, b) = u(b) - u(a)`` for a position track ``u(z)`` per
   block (least squares; the links of span 2 make the system redundant, and
   their disagreement measures the matching noise); where refused matches cut
   a block's chain, each piece is known up to a constant of its own;
2. splits the track into a slow part (a robust local straight-line fit, equal
   weights, over ``window`` planes around each plane, one slant for all pieces,
   the plane itself down-weighted when it disagrees with its neighbours: where
   the neighbours put it) and the jitter ``j(z) = u(z) - slow(z)``;
3. returns the jitter with its noise variance and the factor by which the
   local fit shrinks white jitter, so :func:`plane_summary` can give an
   unbiased mean square.

Only the jitter is reported as alignment error: steady slants and slow bends
of the whole block are indistinguishable from oblique tissue (see the
alignment issue's identifiable residual, which removes the part linear in z).

References
----------
Local straight-line smoothing with robustness (bisquare) iterations: W. S. Cleveland,
"Robust locally weighted regression and smoothing scatterplots",
J. Am. Stat. Assoc. 74 (1979) 829-836, doi:10.1080/01621459.1979.10481038.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: bump when the estimate computed from the same stored shifts changes (stored run results are then solved again);
#: 2: shrink-weighted plane sums (:func:`weighted_sums`), outlier blocks replaced instead of every block
#: (:func:`stackbuild.qc.runs.replace_outliers`); 3: the matching noise taken off is the noise the jitter holds, through
#: the chain's covariance and the fit together (it was the track's variance times the fit's white-noise gain: 4x too
#: much on a 30-plane chain, tests/test_qc_metrics.py); 4: a block's track cut by missing links keeps every piece (each
#: with a constant of its own, one slant shared), not only its largest; 5: a stack within one window is fitted by its
#: plain least-squares line (no robust rounds); 6: a plane's mean square is pooled with its neighbours' within one
#: sigma of its own (:func:`pool_along_z`; the stored runs' sums are unchanged, the pooling is the driver's)
ESTIMATE_VERSION = 6

#: memory bound of :func:`block_jitter`'s per-block (planes x planes) arrays (the chain's covariance factor and the
#: fit's rows, float64), bytes: blocks are solved in batches that fit
BATCH_BYTES = 16 * 2 ** 20


@dataclass
class Jitter:
    """Result of :func:`block_jitter` for ``B`` blocks over ``Z`` planes.

    Attributes
    ----------
    jitter : ndarray, shape (Z, B, 2)
        ``(dx, dy)`` deviation of each plane from where its neighbours put it, level-0 px; NaN where
        the block was not measured on that plane.
    noise_var : ndarray, shape (Z, B)
        Matching noise in ``|jitter|^2`` (both components), px^2, divided by ``shrink`` as the
        estimate divides the jitter's square: ``shrink * noise_var`` is what the jitter holds of it.
    shrink : ndarray, shape (Z, B)
        Expected ``|jitter|^2`` over what a plain whole-stack line leaves of white jitter
        (see ``stack`` of :func:`block_jitter`); divide by it for an estimate on the
        identifiable residual's terms.
    sigma : float
        Matching noise, px per component (NaN when the links held no redundancy).
    """

    jitter: np.ndarray
    noise_var: np.ndarray
    shrink: np.ndarray
    sigma: float


def _parts(n: int, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Return each plane's connected part of the link graph, numbered from 0 (-1: a plane no link touches)."""
    parent = np.arange(n)

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    touched = np.zeros(n, bool)
    for i, j in zip(a, b):
        parent[find(i)] = find(j)
        touched[i] = touched[j] = True
    roots = np.array([find(i) for i in range(n)])
    _, label = np.unique(roots[touched], return_inverse=True)
    out = np.full(n, -1)
    out[touched] = label.reshape(-1)
    return out


def _chain(n: int, a: np.ndarray, b: np.ndarray, d: np.ndarray):
    """Return tracks ``u`` (n, K, 2), the tracks' noise covariance factor, RSS and dof per track, and each plane's part.

    ``d`` is ``(L, K, 2)``: the shifts of ``K`` blocks over the same links ``a -> b``, which share
    the design and its pseudo-inverse (one ``(L, 2)`` block is accepted too, giving ``u`` (n, 2)
    and scalars). Where missing links cut the chain into parts (:func:`_parts`), each part's track
    is known up to a constant of its own and is given with mean zero (NaN on planes no link
    touches). The covariance factor ``(n, n)`` is the pseudo-inverse laid out on the planes: a
    track's noise covariance per component is it times the links' noise variance. It is not
    diagonal: a chain's errors add up along z.
    """
    one = d.ndim == 2
    d = d[:, None, :] if one else d
    k = d.shape[1]
    part = _parts(n, a, b)
    u = np.full((n, k, 2), np.nan)
    cov = np.zeros((n, n))
    if not len(a):
        return (u[:, 0], cov, 0.0, 0, part) if one else (u, cov, np.zeros(k), 0, part)
    idx = np.flatnonzero(part >= 0)
    pos = np.full(n, -1)
    pos[idx] = np.arange(len(idx))
    m, parts = len(idx), int(part.max()) + 1
    design = np.zeros((len(a), m))
    design[np.arange(len(a)), pos[b]] = 1.0
    design[np.arange(len(a)), pos[a]] = -1.0
    normal = design.T @ design              # the link graph's Laplacian: singular along each part's constant
    # each part's track is known up to a constant: minimum-norm gauge, through the Laplacian's pseudo-inverse
    # inv(L + J) - J, J = sum over parts of 1 1^T / (its planes) (Gutman & Xiao, "Generalized inverse of the
    # Laplacian matrix and some applications", Bull. Acad. Serbe Sci. Math. 129 (2004) 15-23,
    # doi:10.2298/BMAT0429015G, for one part; the parts are independent), a plain inverse instead of numpy's
    # SVD-based pinv: 20x cheaper at 100 planes, equal to 1e-12
    member = (part[idx][:, None] == np.arange(parts)[None]).astype(float)      # (m, parts)
    gauge = (member / member.sum(axis=0)) @ member.T
    pinv = np.linalg.inv(normal + gauge) - gauge
    rhs = d.reshape(len(a), -1)             # (L, 2K)
    sol = pinv @ (design.T @ rhs)
    rss = ((design @ sol - rhs) ** 2).reshape(len(a), k, 2).sum(axis=(0, 2))
    dof = len(a) - (m - parts)
    sol = (sol - gauge @ sol).reshape(m, k, 2)
    u[idx] = sol
    cov[np.ix_(idx, idx)] = pinv
    if one:
        return u[:, 0], cov, float(rss[0]), max(dof, 0), part
    return u, cov, rss, max(dof, 0), part


def _chains(n: int, a: np.ndarray, b: np.ndarray, d: np.ndarray, keep: np.ndarray, with_cov: bool = True):
    """Return every block's track ``(n, B, 2)``, noise covariance factor ``(B, n, n)``, link residuals ``(L, B)``, RSS, dof and parts ``(n, B)``.

    ``keep`` ``(L, B)`` says which links each block uses; blocks using the same links are solved
    together (:func:`_chain`): one pseudo-inverse per set of links, not per block. Without
    ``with_cov`` the covariance factors are not kept (None: they grow with the square of the planes).
    """
    nb = d.shape[1]
    tracks = np.full((n, nb, 2), np.nan)
    covariances = np.zeros((nb, n, n)) if with_cov else None
    parts = np.full((n, nb), -1)
    residuals = np.full((len(a), nb), np.nan)
    rss_total, dof_total = 0.0, 0
    if not nb:
        return tracks, covariances, residuals, rss_total, dof_total, parts
    _, group = np.unique(keep.T, axis=0, return_inverse=True)
    for g in np.unique(group):
        cols = np.flatnonzero(group.reshape(-1) == g)
        good = keep[:, cols[0]]
        u, cov, rss, dof, part = _chain(n, a[good], b[good], d[good][:, cols])
        tracks[:, cols] = u
        if with_cov:
            covariances[cols] = cov
        parts[:, cols] = part[:, None]
        residuals[np.ix_(good, cols)] = np.hypot(*np.moveaxis(u[b[good]] - u[a[good]] - d[good][:, cols], -1, 0))
        rss_total += float(np.sum(rss))
        dof_total += dof * len(cols)
    return tracks, covariances, residuals, rss_total, dof_total, parts


def _robust_slow(z: np.ndarray, u: np.ndarray, window: int, noise: float, rounds: int = 3,
                 cov: np.ndarray | None = None, parts: np.ndarray | None = None):
    """Return the slow part of blocks' tracks, each plane's own weight ``h`` in its fit, its gain and noise factor.

    ``u`` is ``(Z, 2)`` (one block) or ``(Z, B, 2)`` (blocks side by side, each fitted on its own:
    the planes are the loop, the blocks are vectorised). The gain is the expected ``|u - slow|^2``
    of a plane under white jitter of unit variance. With ``cov`` ``(B, Z, Z)`` (the tracks' noise
    covariance per unit link variance, :func:`_chain`) the noise factor ``(Z, B)`` is the variance
    of ``u - slow`` per component and unit link variance, ``r^T cov r`` with ``r`` the plane's row
    of the operator ``u -> u - slow`` of the last round (NaN without ``cov``).

    ``parts`` ``(Z, B)`` numbers the pieces of a block's track that are each known up to a constant
    of their own (:func:`_chain`; default: one piece). The slow part is then one straight line per
    block with an offset per piece: the pieces share the block's slant, which is the tissue's
    (oblique structure runs on through a missing link), and only their constants are free.
    """
    one = u.ndim == 2
    u = u[:, None, :] if one else u
    n, nb = u.shape[:2]
    ok = np.isfinite(u[..., 0])                       # (Z, B)
    parts = np.where(ok, 0, -1) if parts is None else (parts[:, None] if one else parts)
    member = (np.where(ok, parts, -1)[:, None, :] == np.arange(max(int(parts.max()) + 1, 1))[None, :, None])
    u0 = np.where(ok[..., None], u, 0.0)
    rob = np.ones((n, nb))
    slow = np.full_like(u, np.nan, dtype=float)
    hat = np.full((n, nb), np.nan)
    gain = np.full((n, nb), np.nan)
    rows = np.zeros((nb, n, n)) if cov is not None else None   # per block, row i: the weights of plane i's fit
    half = max(1, window // 2)
    active = np.ones(nb, bool)                        # blocks still iterating (a block stops as the loop did)
    for _ in range(rounds):
        for i in range(n):
            fit = ok[i] & active
            if not fit.any():
                continue
            t = (z - z[i]).astype(float)[:, None]     # (Z, 1)
            # equal weights in the window: on a stack no longer than the window this is the straight
            # line over all planes, as the identifiable residual removes it (tricube weights would let
            # end planes pull their own fit)
            w = np.where(ok & (np.abs(t) <= half), rob, 0.0)[:, fit]
            mem = member[:, :, fit]                                   # (Z, P, F): the planes of each piece
            wp = np.einsum("zf,zpf->pf", w, mem)                      # each piece's weight in the window
            with np.errstate(divide="ignore", invalid="ignore"):
                tp = np.einsum("zf,zpf->pf", w * t, mem) / wp         # and its mean position
            tp = np.nan_to_num(tp)
            dt = t - np.einsum("zpf,pf->zf", mem, tp)                 # position within its piece
            sxx = (w * dt * dt).sum(axis=0)
            own = mem[i]                                              # (P, F): plane i's piece
            s0 = (own * wp).sum(axis=0)
            ti = (own * tp).sum(axis=0)
            flat = sxx <= 1e-9 * np.maximum((w * t * t).sum(axis=0), 1e-12)   # no slant to fit: a constant
            with np.errstate(divide="ignore", invalid="ignore"):
                # the piece's mean, carried to t = 0 along the slant shared by all pieces (least squares)
                coef = (np.einsum("zpf,pf->zf", mem, own) * w / s0
                        - np.where(flat, 0.0, ti / np.where(flat, 1.0, sxx)) * w * dt)
            fit_b = np.flatnonzero(fit)[s0 > 0]
            coef = coef[:, s0 > 0]
            slow[i, fit_b] = np.einsum("zb,zbc->bc", coef, u0[:, fit_b])
            own = coef[i]
            hat[i, fit_b] = own
            # white jitter of variance 1 leaves (1 - own)^2 + sum of the others' squared weights in
            # u - slow: 1 - h for a plain fit, more than 1 where the robust fit left the plane out
            gain[i, fit_b] = 1.0 - 2.0 * own + (coef ** 2).sum(axis=0)
            if rows is not None:
                rows[fit_b, i] = coef.T
        res = np.hypot(*np.moveaxis(u - slow, -1, 0))   # (Z, B)
        good = np.isfinite(res)
        stop = active & (good.sum(axis=0) < 3)
        active &= ~stop
        if not active.any():
            break
        med = np.array([np.median(res[good[:, k], k]) if active[k] else 0.0 for k in range(nb)])
        scale = np.maximum(np.maximum(6.0 * med, 3.0 * noise), 1e-6)  # bisquare, as Cleveland 1979
        new = np.maximum(np.where(good, np.clip(1 - (res / scale) ** 2, 0, 1) ** 2, 0.0), 1e-3)
        rob[:, active] = new[:, active]
    factor = np.full((n, nb), np.nan)
    if rows is not None:
        r = -rows
        r[:, np.arange(n), np.arange(n)] += 1.0    # u - slow = (I - C) u, per block
        factor = ((r @ cov) * r).sum(axis=2).T     # diag(R cov R^T), batched over blocks
        factor[~np.isfinite(hat)] = np.nan
    if one:
        return slow[:, 0], hat[:, 0], gain[:, 0], factor[:, 0]
    return slow, hat, gain, factor


def block_jitter(z: np.ndarray, a: np.ndarray, b: np.ndarray, shifts: np.ndarray, *,
                 window: int = 9, rejection_rounds: int = 3, min_outlier: float = 0.5,
                 stack: np.ndarray | None = None) -> Jitter:
    """Return each plane's jitter per block from shifts between nearby planes.

    Parameters
    ----------
    z : ndarray, shape (Z,)
        Section position of each plane (increasing; gaps where sections are lost).
    a, b : ndarray of int, shape (L,)
        Each link goes from plane index ``a`` to plane index ``b`` (indices into ``z``).
    shifts : ndarray, shape (L, B, 2)
        Content shift ``(dx, dy)`` from plane ``a`` to plane ``b`` of each block, level-0 px;
        NaN where the match was refused.
    window : int
        Planes of the local straight-line fit that defines the slow part.
    rejection_rounds : int
        Rounds of dropping links that disagree with the solved chain by more than four
        robust standard deviations (never less than ``min_outlier`` px).
    stack : ndarray, optional
        Section positions of every plane of the stack (default ``z``). The estimate is scaled
        to what is left of white jitter after a plain straight line over the whole stack is
        removed, as the identifiable residual removes it: by ``(1 - h_stack) / g``, with
        ``h_stack`` the plane's own weight (leverage) in that line and ``g`` the expected
        ``|jitter|^2`` per unit white jitter of the local robust fit. Where the robust fit
        leaves an end plane out, ``g`` exceeds 1 (the line is extrapolated to it) while the
        whole-stack line leaves less than 1: end planes were over-estimated 1.7x to 2.2x on
        the standard phantom (bench_qc.py --agreement) before this scaling.

    Returns
    -------
    Jitter
    """
    z = np.asarray(z, float)
    a, b = np.asarray(a, int), np.asarray(b, int)
    d = np.asarray(shifts, float)
    if d.ndim != 3 or d.shape[0] != len(a) or d.shape[2] != 2 or len(a) != len(b):
        raise ValueError(f"shifts must be (L, B, 2) with L = len(a) = len(b), got {d.shape}, {len(a)}, {len(b)}")
    if window < 3:
        raise ValueError(f"window must be >= 3 planes, got {window}")
    nz, nb = len(z), d.shape[1]
    keep = np.isfinite(d[..., 0])
    # blocks are solved and fitted each on their own: in batches, so that the per-block (planes x planes)
    # covariance and fit rows stay under BATCH_BYTES whatever the run's length (150 blocks x 104 planes
    # held 26 MB at once before); when every block fits one batch, the last rejection round's solve is it
    per = max(1, int(BATCH_BYTES // (2 * 8 * max(nz, 1) ** 2)))
    for _ in range(rejection_rounds + 1):
        used = keep.copy()                      # the links the tracks below are solved from
        solved = _chains(nz, a, b, d, keep, with_cov=per >= nb)
        res, rss_total, dof_total = solved[2:5]
        # a false match (repeated or fresh content) is an outlier of the chain: drop links that
        # disagree with the rest by more than 4 robust sigmas (common practice, no source)
        fin = res[np.isfinite(res)]
        if not fin.size:
            break
        limit = max(4.0 * 1.4826 * float(np.median(fin)), min_outlier)
        bad = np.isfinite(res) & (res > limit)
        if not bad.any():
            break
        keep &= ~bad
    sigma = float(np.sqrt(rss_total / (2 * dof_total))) if dof_total > 0 else float("nan")
    noise = sigma if np.isfinite(sigma) else 0.0
    jitter = np.full((nz, nb, 2), np.nan)
    noise_var = np.full((nz, nb), np.nan)
    shrink = np.full((nz, nb), np.nan)
    whole = _stack_leverage(z, z if stack is None else np.asarray(stack, float))
    if nb:
        # where every plane's window holds the whole stack, the slow part is the plain least-squares line, as the
        # identifiable residual takes it off: down-weighting the planes that stray from it (the robust rounds) and
        # scaling them back by the gain is unbiased only for white jitter; a chained alignment's error also
        # wanders (a random walk along z, largest at the stack's ends after the line), and the robust rounds read
        # it low there (realistic/long seeds 0-2 and 7-9: 78-97 % of sections within with one round, 67-94 % with 3)
        whole_stack = z.max() - z.min() <= max(1, window // 2) if nz else True
        for lo in range(0, nb, per):
            cols = slice(lo, lo + per)
            tracks, covariances, _, _, _, parts = solved if per >= nb else _chains(nz, a, b, d[:, cols], used[:, cols])
            slow, hat, gain, factor = _robust_slow(z, tracks, window, noise, rounds=1 if whole_stack else 3,
                                                   cov=covariances, parts=parts)
            jitter[:, cols] = tracks - slow
            shrink[:, cols] = np.clip(gain / (1.0 - whole)[:, None], 0.05, 4.0)
            # the noise that reaches the jitter, through the chain and the fit together, in the estimate's
            # units (divided by shrink, as the jitter is): a track's noise is not white (a chain's errors
            # add up along z), and the fit takes its slow part away with the track's slow change
            noise_var[:, cols] = 2.0 * noise ** 2 * factor / shrink[:, cols]
    return Jitter(jitter, noise_var, shrink, sigma)


def _stack_leverage(z: np.ndarray, stack: np.ndarray) -> np.ndarray:
    """Return each plane's own weight in a least-squares line over ``stack`` (``1/N + (z - mean)^2 / Sxx``)."""
    n = len(stack)
    if n < 3:
        return np.zeros(len(z))
    c = stack.mean()
    sxx = float(((stack - c) ** 2).sum())
    return np.clip(1.0 / n + (z - c) ** 2 / max(sxx, 1e-12), 0.0, 0.95)


def plane_summary(j: Jitter) -> dict[str, np.ndarray]:
    """Return per-plane sums over blocks: ``n``, ``sum_sq`` and ``sum_noise`` (shrink-weighted), ``max``, ``argmax``.

    Sums (not means) so that the summaries of several regions add up; see :func:`section_error`.
    """
    mag2 = (j.jitter ** 2).sum(axis=2)
    ok = np.isfinite(mag2)
    n, sum_sq, sum_noise = weighted_sums(mag2, j.shrink, j.noise_var, ok)
    mags = np.where(ok, np.sqrt(np.where(ok, mag2, 0.0)), -1.0)
    return {"n": n, "sum_sq": sum_sq, "sum_noise": sum_noise,
            "max": mags.max(axis=1, initial=-1.0), "argmax": mags.argmax(axis=1) if mags.size else
            np.zeros(mags.shape[0], int)}


def weighted_sums(mag2: np.ndarray, shrink: np.ndarray, noise_var: np.ndarray, ok: np.ndarray):
    """Return ``(n, sum_sq, sum_noise)`` over the last axis, each block weighted by its ``shrink``.

    A block's ``|jitter|^2`` is expected to be ``shrink`` times (error^2 + noise), so the mean
    square over blocks is ``sum(|j|^2) / sum(shrink)`` rather than the mean of ``|j|^2 / shrink``:
    a block whose track is a few planes long keeps little of its jitter (``shrink`` down to
    0.05), and dividing by it multiplied its noise twentyfold (realistic/long seed 0: one such
    block made a plane of 0.66 px true read 1.6 px). The sums are scaled back to ``n`` blocks,
    so ``sum_sq / n - sum_noise / n`` is that weighted mean.
    """
    w = np.where(ok, shrink, 0.0)
    n = ok.sum(axis=-1)
    scale = np.where(n > 0, n / np.maximum(w.sum(axis=-1), 1e-12), 0.0)
    sum_sq = np.where(ok, mag2, 0.0).sum(axis=-1) * scale
    sum_noise = np.where(ok, w * noise_var, 0.0).sum(axis=-1) * scale
    return n, sum_sq, sum_noise


#: planes on each side of a plane whose mean squares :func:`pool_along_z` pools with its own (triangular weights
#: ``radius + 1 - |dz|``); 0 turns the pooling off
POOL_RADIUS = 2
#: a plane whose mean square departs from its neighbours' by more than this many of the standard deviations it
#: would have if it shared their error keeps its own (three sigma: common practice, no source)
POOL_GATE = 3.0


def mean_square(n: float, sum_sq: float, sum_noise: float) -> tuple[float, float, float]:
    """Return a plane's ``(mean square, its sampling variance, noise share)`` from its sums (see :func:`section_error`)."""
    ms_raw = sum_sq / n
    noise = sum_noise / n
    ms = max(ms_raw - noise, 0.0)
    var_ms = (2.0 * ms_raw ** 2 / max(n, 1)) + noise ** 2 / max(n, 1)
    return ms, var_ms, noise


def pool_along_z(z: np.ndarray, ms: np.ndarray, var_ms: np.ndarray, n: np.ndarray, radius: int = POOL_RADIUS,
                 gate: float = POOL_GATE) -> np.ndarray:
    """Return each plane's mean square pooled with its neighbours', unless it stands out from them.

    A plane's estimate reads mostly what its own blocks happened to measure: on the realistic
    phantom's long stacks (36 sections, seeds 0-6) the per-plane estimates' departures from the truth
    are close to independent from plane to plane (lag-1 autocorrelation of the estimates 0.02-0.43),
    while the true error of a section is largely shared with its neighbours (lag-1 autocorrelation
    of the true per-section RMS 0.42-0.74): the elastic solve ties each section to the next two.
    So each plane's mean square is replaced by the triangular-weighted mean (weights
    ``radius + 1 - |dz|``, by section position, so a lost section's gap counts) of the planes within
    ``radius`` sections, limited to its own value plus or minus one standard deviation of its own
    sampling (``var_ms``), the "limited translation" compromise between a pooled and a plane's own
    estimate (B. Efron and C. Morris, "Limiting the risk of Bayes and empirical Bayes estimators -
    Part I: The Bayes case", J. Am. Stat. Assoc. 66 (1971) 807-815, doi:10.1080/01621459.1971.10482348,
    DOI from memory). A plane that departs from its neighbours' mean (itself left out) by more than
    ``gate`` standard deviations of the mean square it would have if it shared their error
    (``sqrt(2 / n)`` times their mean: a chi-square over ``2 n`` components) keeps its own value:
    a single bad section (one rotated or torn section) is a local event, not noise to average away.

    Parameters
    ----------
    z : ndarray, shape (P,)
        Section position of each plane (increasing).
    ms, var_ms : ndarray, shape (P,)
        Each plane's mean square (px^2, noise taken off) and its sampling variance (:func:`mean_square`).
    n : ndarray, shape (P,)
        Blocks measured on each plane.
    radius : int
        Sections on each side pooled (0: return ``ms``).
    gate : float
        Standard deviations beyond which a plane keeps its own mean square.

    Returns
    -------
    ndarray, shape (P,)
    """
    z = np.asarray(z, float)
    ms = np.asarray(ms, float)
    if radius < 1 or len(ms) < 2:
        return ms.copy()
    # banded: planes within ``radius`` sections are within ``radius`` places (positions increase), so the
    # sums run over offsets, never a planes x planes matrix
    num, den = np.zeros_like(ms), np.zeros_like(ms)
    for k in range(1, radius + 1):
        for lo, hi in ((slice(k, None), slice(None, -k)), (slice(None, -k), slice(k, None))):
            w = np.clip(radius + 1.0 - np.abs(z[lo] - z[hi]), 0.0, None)
            num[lo] += w * ms[hi]
            den[lo] += w
    own = radius + 1.0
    pooled = (num + own * ms) / (den + own)
    sd = np.sqrt(np.maximum(np.asarray(var_ms, float), 0.0))
    out = np.clip(pooled, ms - sd, ms + sd)
    have = den > 0
    others = np.where(have, num / np.where(have, den, 1.0), ms)
    spread = np.sqrt(2.0 / np.maximum(np.asarray(n, float), 1.0)) * others
    apart = ~have | (np.abs(ms - others) > gate * spread)
    return np.where(apart, ms, out)


def section_error(n: float, sum_sq: float, sum_noise: float) -> tuple[float | None, float | None]:
    """Return ``(error, uncertainty)``: RMS jitter length over a plane's blocks (px) and its 1-sigma.

    The mean square is corrected for the matching noise (its expected share
    is subtracted); the uncertainty combines that noise share with the
    sampling spread of a mean over ``n`` blocks (a chi-square with 2 n
    degrees of freedom; blocks are taken as independent, which makes it a
    lower bound when errors are smooth over the section).
    """
    if n <= 0:
        return None, None
    ms, var_ms, noise = mean_square(n, sum_sq, sum_noise)
    return _error_of(ms, var_ms, noise, sum_sq / n)


def _error_of(ms: float, var_ms: float, noise: float, ms_raw: float) -> tuple[float, float]:
    """Return ``(error, uncertainty)`` px of a mean square ``ms`` with sampling variance ``var_ms``."""
    est = float(np.sqrt(max(ms, 0.0)))
    unc = float(np.sqrt(var_ms) / (2.0 * max(est, np.sqrt(noise), 1e-3)))
    return est, min(unc, float(np.sqrt(ms_raw)))


def pooled_errors(planes: dict[int, dict], radius: int = POOL_RADIUS) -> dict[int, tuple[float, float]]:
    """Return ``{z: (error, uncertainty)}`` px of planes' sums ``{z: {"n", "sum_sq", "sum_noise"}}``, pooled along z.

    The error is the square root of :func:`pool_along_z`'s mean square; the uncertainty is the
    plane's own (:func:`section_error`), an upper bound for the pooled value. Planes without
    blocks are left out.
    """
    zs = sorted(z for z, p in planes.items() if p and p["n"] > 0)
    if not zs:
        return {}
    parts = [mean_square(planes[z]["n"], planes[z]["sum_sq"], planes[z]["sum_noise"]) for z in zs]
    ms = np.array([p[0] for p in parts])
    var = np.array([p[1] for p in parts])
    pooled = pool_along_z(np.asarray(zs, float), ms, var, np.array([planes[z]["n"] for z in zs], float), radius)
    return {z: _error_of(float(m), var[i], parts[i][2], planes[z]["sum_sq"] / planes[z]["n"])
            for i, (z, m) in enumerate(zip(zs, pooled))}
