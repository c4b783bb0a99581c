"""Coarse correspondences of two section overviews by correlation, coarse to fine (no local features).

Pure functions of arrays. Where local feature descriptors fail (content that
repeats itself, such as packed cell profiles whose junctions all look alike,
and dots that are new in every section), correlation of whole blocks still
finds the structure that persists. The overviews are reduced 2x at a time
until the coarsest is about ``coarsest`` pixels across (or a further halving
would hold too few blocks to fit an affine); there the whole-image
phase correlation gives the shift, and at the coarsest level, every second
level below it and the overview itself, blocks on a grid are matched through
the model so far (:func:`.blockmatch.match_blocks`), and RANSAC fits a new
model to the trusted matches. The answer is the last level's inlier
correspondences.
"""
from __future__ import annotations

import cv2
import numpy as np
from scipy import fft as sfft

from .blockmatch import block_reach, match_blocks
from .coarse import estimate_model


def _filled(img: np.ndarray) -> np.ndarray:
    """Return ``img`` with NaN set to the mean of the rest (0 if all NaN)."""
    ok = np.isfinite(img)
    return np.where(ok, img, float(img[ok].mean()) if ok.any() else 0.0).astype(np.float32)


def _halve(img: np.ndarray) -> np.ndarray:
    """Return the 2x2 block mean of ``img`` (NaN where any of the four is NaN; odd edge dropped)."""
    h, w = img.shape[0] // 2 * 2, img.shape[1] // 2 * 2
    x = img[:h, :w]
    return 0.25 * (x[0::2, 0::2] + x[1::2, 0::2] + x[0::2, 1::2] + x[1::2, 1::2])


def global_shift(a: np.ndarray, b: np.ndarray, blur: float = 1.0) -> tuple[np.ndarray, float]:
    """Return ``(dx, dy)`` such that ``b(p + d) ~ a(p)``, and the phase-correlation peak height.

    Both images are filled (NaN -> mean), tapered at their edges, zero-padded
    to a common size, and phase-correlated with a Gaussian low-pass of sigma
    ``blur`` pixels [1]_.

    References
    ----------
    .. [1] Kuglin, C. D. & Hines, D. C. "The phase correlation image
           alignment method", Proc. IEEE Int. Conf. on Cybernetics and
           Society (1975) 163-165.
    """
    # at least twice the larger image (no wrap-around within it), rounded up to a size fast for the FFT
    h = sfft.next_fast_len(max(a.shape[0], b.shape[0]) * 2, real=True)
    w = sfft.next_fast_len(max(a.shape[1], b.shape[1]) * 2, real=True)

    def prep(x):
        x = _filled(x)
        x = x - x.mean()
        wy = np.hanning(x.shape[0]).astype(np.float32)[:, None]
        wx = np.hanning(x.shape[1]).astype(np.float32)[None, :]
        out = np.zeros((h, w), np.float32)
        out[:x.shape[0], :x.shape[1]] = x * wy * wx
        return sfft.rfft2(out)

    fa, fb = prep(a), prep(b)
    cross = np.conj(fa) * fb
    cross /= np.maximum(np.abs(cross), 1e-12 * np.abs(cross).max() + 1e-30)
    ky = sfft.fftfreq(h)[:, None]
    kx = sfft.rfftfreq(w)[None, :]
    low = np.exp(-2 * np.pi ** 2 * blur ** 2 * (kx ** 2 + ky ** 2)).astype(np.float32)
    surf = sfft.irfft2(cross * low, s=(h, w))
    r, c = np.unravel_index(int(np.argmax(surf)), surf.shape)
    dy = r if r < h // 2 else r - h
    dx = c if c < w // 2 else c - w
    norm = float(sfft.irfft2(low, s=(h, w))[0, 0])
    return np.array([dx, dy], float), float(surf[r, c] / norm)


def _grid(shape, spacing, reach):
    h, w = shape
    xs = np.arange(reach, w - reach, spacing, dtype=float)
    ys = np.arange(reach, h - reach, spacing, dtype=float)
    gx, gy = np.meshgrid(xs, ys)
    return np.column_stack([gx.ravel(), gy.ravel()])


def correlate_overviews(a: np.ndarray, b: np.ndarray, *, half_size: int = 16, max_shift: int = 8,
                        coarsest: int = 192, threshold: float = 2.0, min_confidence: float = 0.15,
                        blur: float = 1.0, blocks: int = 400, coarse_blocks: int = 400,
                        unbiased: bool = True, coarse_unbiased: bool = True,
                        prior: np.ndarray | None = None, finest: bool = True) -> tuple[np.ndarray, np.ndarray, dict]:
    """Return corresponding points ``(pa, pb)`` (overview pixels ``(x, y)``) of two overviews, and facts.

    Parameters
    ----------
    a, b : ndarray
        Overviews of two sections at the same scale (NaN outside the sections).
    half_size, max_shift : int
        Block matching at every level (pixels of that level).
    coarsest : int
        The coarsest level is the first whose longer side is at most this.
    threshold : float
        RANSAC inlier threshold, pixels of each level.
    min_confidence : float
        Block matches below this confidence are not used.
    blur : float
        Low-pass of the correlations (sigma, pixels of each level).
    blocks : int
        About this many blocks are matched at the finest level (the node
        spacing grows with the level's size).
    coarse_blocks : int
        ... and at each coarser level, which only has to bring the next
        level within ``max_shift``.
    unbiased : bool
        Blocks of the finest level (the overviews) take the matcher's
        unbiased passes (:func:`.blockmatch.match_blocks` ``subpixel``);
        False reads the sub-pixel peak off the first surface, about half the
        cost.
    coarse_unbiased : bool
        The same for the coarser levels. Each level measures what the model
        so far has left, so the one-pass estimate's pull toward that model
        (a few per cent of what is left) is measured again by the next level.
    prior : ndarray, shape (2, 3), optional
        A model ``a`` px -> ``b`` px already known to within the blocks'
        search (e.g. chained through the section between): the overviews are
        matched through it at once, with no coarser levels; if that gives
        no model, or one farther from it than ``max_shift``, the levels are
        run as without it.
    finest : bool
        False stops at the first level that gives a model (the coarsest,
        unless it fails) and returns its correspondences in overview pixels:
        a model to within about a pixel of that level, for a caller that
        measures the rest itself (the align stage's grid affines).

    Returns
    -------
    pa, pb : ndarray, shape (N, 2)
        Inlier correspondences of the finest level (``b`` shows at ``pb``
        what ``a`` shows at ``pa``); empty when no level gave a model.
    facts : dict
        ``levels``, ``shift_peak`` (global phase-correlation peak), ``matches``
        and ``inliers`` of the finest level reached; with ``finest`` False
        also ``level``, the level of the answer (0 = the overviews).
    """
    reach = block_reach(half_size, max_shift)
    if prior is not None:
        facts = {"levels": 1, "shift_peak": None, "matches": 0, "inliers": 0}
        fit = _fit_level(np.asarray(a, np.float32), np.asarray(b, np.float32), np.asarray(prior, float),
                         half_size, max_shift, reach, blocks, unbiased, blur, threshold, min_confidence, facts)
        # a fit that strays from the prior by more than the search is not what the prior vouched for
        corners = np.array([[0, 0, 1], [a.shape[1], 0, 1], [0, a.shape[0], 1], [a.shape[1], a.shape[0], 1]], float)
        if fit is not None and np.abs(corners @ (fit[0] - prior).T).max() <= max_shift:
            return fit[1], fit[2], facts
    # a level must hold a few blocks across (4 x 4 at the closest spacing) to fit an affine; a smaller
    # one only costs time (and its whole-image shift is coarser than the next level's)
    smallest = 2 * reach + 3 * half_size
    pyr_a, pyr_b = [np.asarray(a, np.float32)], [np.asarray(b, np.float32)]
    while max(pyr_a[-1].shape) > coarsest and min(*pyr_a[-1].shape, *pyr_b[-1].shape) // 2 >= smallest:
        pyr_a.append(_halve(pyr_a[-1]))
        pyr_b.append(_halve(pyr_b[-1]))
    shift, peak = global_shift(pyr_a[-1], pyr_b[-1], blur)
    model = np.array([[1.0, 0.0, shift[0]], [0.0, 1.0, shift[1]]])      # a-level px -> b-level px
    facts = {"levels": len(pyr_a), "shift_peak": peak, "matches": 0, "inliers": 0, "level": 0}
    empty = np.zeros((0, 2))
    pa = pb = empty
    top = len(pyr_a) - 1
    for lvl in range(top, -1, -1):
        last = lvl == 0
        if not last and (top - lvl) % 2:
            # every second level between the coarsest and the overview is passed over: a model
            # fitted two levels coarser (4x) already brings the blocks within their search
            model = _finer(model)
            continue
        fit = _fit_level(pyr_a[lvl], pyr_b[lvl], model, half_size, max_shift, reach,
                         blocks if last else coarse_blocks, unbiased if last else coarse_unbiased,
                         blur, threshold, min_confidence, facts)
        pa = pb = empty
        if fit is not None:
            model, pa, pb = fit
            if not finest and lvl:
                # level pixel p has its centre at overview pixel f p + (f - 1) / 2 (f = 2 ** lvl)
                f = 2.0 ** lvl
                return pa * f + (f - 1) / 2.0, pb * f + (f - 1) / 2.0, {**facts, "level": lvl}
        if lvl:
            # also when this level gave no fit: the whole-image shift, or the model of a coarser
            # level, must be carried down
            model = _finer(model)
    return pa, pb, facts


def _finer(model: np.ndarray) -> np.ndarray:
    """Return the same map one level finer: ``p' = 2 p + 0.5`` on both sides."""
    model = model.copy()
    model[:, 2] *= 2.0
    model[:, 2] += 0.5 * (1.0 - model[:, :2].sum(axis=1))
    return model


def _fit_level(la, lb, model, half_size, max_shift, reach, blocks, unbiased, blur, threshold,
               min_confidence, facts):
    """Return ``(model, pa, pb)`` refined on one level (``model``: a-level px -> b-level px), or None.

    Blocks on a grid of about ``blocks`` nodes are matched between ``la`` and
    ``lb`` seen through ``model``; RANSAC fits an affine to the trusted
    matches. ``facts`` gets this level's ``matches`` and ``inliers``.
    """
    # b seen through the model in a's frame: warped(p) = b(model p)
    warped = cv2.warpAffine(lb, model.astype(np.float64), (la.shape[1], la.shape[0]),
                            flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP, borderMode=cv2.BORDER_CONSTANT,
                            borderValue=float("nan"))
    # a few hundred blocks per level are plenty for an affine; more only cost time
    nodes = _grid(la.shape, max(half_size, int(np.sqrt(la.size / float(blocks)))), reach)
    if not len(nodes):
        return None
    res = match_blocks(la, warped, nodes, half_size, max_shift, fine_sigma=blur, subpixel=unbiased)
    ok = res.confidence >= min_confidence
    facts["matches"] = int(ok.sum())
    if ok.sum() < 6:
        return None
    p = nodes[ok]
    q = (p + res.shifts[ok]) @ model[:, :2].T + model[:, 2]
    fitted, inl = estimate_model(p, q, "affine", threshold)
    if fitted is None or inl.sum() < 6:
        return None
    facts["inliers"] = int(inl.sum())
    return fitted.matrix.copy(), p[inl], q[inl]
