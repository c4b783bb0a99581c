"""Sub-pixel block shifts without peak locking: NCC for the whole-pixel peak, then Lucas-Kanade.

A pure kernel of the error estimate (:mod:`stackbuild.qc.zchain`): it measures
how far the content of one plane has moved in the next, block by block, on
band-passed images so that only structure that persists between sections
(membranes, organelles) drives the match.

Conventions: points and shifts are ``(x, y)``; a shift ``d`` at ``p`` means the
content of ``fixed`` around ``p`` is found in ``moving`` around ``p + d``.
"""
from __future__ import annotations

import cv2
import numpy as np


def bandpass(image: np.ndarray, fine_sigma: float, coarse_sigma: float) -> np.ndarray:
    """Return ``image`` band-passed by a difference of Gaussians (float32).

    ``fine_sigma`` (pixels) removes what is smaller than membranes and organelles
    (noise, vesicle-sized dots, cytoplasm texture); ``coarse_sigma`` removes
    shading. Either may be 0 to skip that side.
    """
    img = np.asarray(image, np.float32)
    fine = cv2.GaussianBlur(img, (0, 0), fine_sigma) if fine_sigma > 0 else img
    if coarse_sigma <= 0:
        return fine - float(fine.mean())
    h, w = img.shape
    if coarse_sigma >= 8 and min(h, w) >= 32:
        # the shading is smooth: blur a 4x reduced copy and enlarge it (16x less work, same result
        # to under a grey level on skimage.data.camera for sigma 16 px)
        small = cv2.resize(img, (w // 4, h // 4), interpolation=cv2.INTER_AREA)
        shade = cv2.resize(cv2.GaussianBlur(small, (0, 0), coarse_sigma / 4), (w, h), interpolation=cv2.INTER_LINEAR)
        return fine - shade
    return fine - cv2.GaussianBlur(img, (0, 0), coarse_sigma)


def _shifted(window: np.ndarray, centre: np.ndarray, half: int, d: np.ndarray) -> np.ndarray:
    """Return the ``(2 half + 1)^2`` patch of ``window`` centred at ``centre + d`` (bicubic)."""
    xs = np.arange(-half, half + 1, dtype=np.float32) + np.float32(centre[0] + d[0])
    ys = np.arange(-half, half + 1, dtype=np.float32) + np.float32(centre[1] + d[1])
    mx, my = np.meshgrid(xs, ys)
    return cv2.remap(window, mx, my, cv2.INTER_CUBIC, borderMode=cv2.BORDER_REFLECT)


def _normalised(p: np.ndarray) -> np.ndarray:
    p = p - p.mean()
    s = float(np.sqrt((p * p).mean()))
    return p / s if s > 0 else p


def refine_shift(template: np.ndarray, window: np.ndarray, start: tuple[float, float],
                 iterations: int = 5, tol: float = 5e-3) -> tuple[np.ndarray, float]:
    """Return the sub-pixel shift of ``template`` inside ``window`` and the NCC there.

    Parameters
    ----------
    template : ndarray, shape (2h+1, 2h+1)
        The fixed block.
    window : ndarray, shape (2(h+s)+1, 2(h+s)+1)
        The moving search window, centred on the template's centre.
    start : (float, float)
        ``(dx, dy)`` to start from (the whole-pixel NCC peak).

    Notes
    -----
    Inverse-free Gauss-Newton on the sum of squared differences of the
    gain- and offset-normalised patches (Lucas and Kanade [1]_), with the
    gradient averaged over both patches (the symmetric form, which removes
    the first-order bias of the one-sided estimator, Brox et al. [2]_ discuss
    it for optical flow). The moving patch is resampled by bicubic
    interpolation at each step; no parabola or peak fit is involved, so there
    is no pull towards whole pixels (peak locking, Westerweel [3]_).

    References
    ----------
    .. [1] B. D. Lucas and T. Kanade, "An iterative image registration technique with
       an application to stereo vision", Proc. IJCAI (1981) 674-679.
    .. [2] T. Brox, A. Bruhn, N. Papenberg and J. Weickert, "High accuracy optical flow
       estimation based on a theory for warping", ECCV (2004), doi:10.1007/978-3-540-24673-2_3.
    .. [3] J. Westerweel, "Fundamentals of digital particle image velocimetry",
       Meas. Sci. Technol. 8 (1997) 1379, doi:10.1088/0957-0233/8/12/002.
    """
    t = np.asarray(template, np.float32)
    w = np.asarray(window, np.float32)
    half = t.shape[0] // 2
    c = np.array([(w.shape[1] - 1) / 2.0, (w.shape[0] - 1) / 2.0])
    tn = _normalised(t)
    gty, gtx = np.gradient(tn)
    d = np.asarray(start, np.float64).copy()
    limit = (w.shape[0] - t.shape[0]) / 2.0
    for _ in range(iterations):
        m = _normalised(_shifted(w, c, half, d))
        gmy, gmx = np.gradient(m)
        gx, gy = 0.5 * (gtx + gmx), 0.5 * (gty + gmy)
        r = (m - tn)[1:-1, 1:-1]
        gx, gy = gx[1:-1, 1:-1], gy[1:-1, 1:-1]
        a = np.array([[np.sum(gx * gx), np.sum(gx * gy)], [np.sum(gx * gy), np.sum(gy * gy)]], np.float64)
        b = -np.array([np.sum(gx * r), np.sum(gy * r)], np.float64)
        if np.linalg.cond(a) > 1e6:
            break
        step = np.linalg.solve(a, b)
        d = d + step
        if np.abs(d).max() > limit or not np.isfinite(d).all():
            return np.array([np.nan, np.nan]), float("nan")
        if np.abs(step).max() < tol:
            break
    m = _normalised(_shifted(w, c, half, d))
    return d, float((m * tn).mean())


def match_points(fixed: np.ndarray, moving: np.ndarray, points: np.ndarray, *, half: int, search: int,
                 min_ncc: float = 0.5, min_std: float = 1e-3,
                 offsets: np.ndarray | None = None, refine: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Return the shift and match confidence of every point (NaN where no trustworthy match).

    Parameters
    ----------
    fixed, moving : ndarray, shape (H, W)
        Band-passed images on one pixel grid. NaN marks pixels without data.
    points : ndarray, shape (N, 2)
        Integer ``(x, y)`` block centres; a block needs ``half + search + 2`` pixels
        of data around it in both images.
    half : int
        Templates are ``2 half + 1`` pixels square.
    search : int
        Whole-pixel shifts up to this are searched (NCC, OpenCV ``TM_CCOEFF_NORMED``,
        Lewis 1995); a peak on the edge of the search range is refused (the true
        shift may lie beyond it).
    min_ncc : float
        The confidence of a match is the NCC of the refined, resampled block; weaker
        ones are refused.
    offsets : ndarray of int, shape (N, 2), optional
        Whole-pixel ``(dx, dy)`` around which to search each block (from a coarser pass);
        the returned shifts include them.
    refine : bool
        False returns the whole-pixel NCC peak and its score (a coarse pass needs no more).

    Returns
    -------
    shifts : ndarray, shape (N, 2)
        ``(dx, dy)``, NaN where refused.
    confidence : ndarray, shape (N,)
        NCC after refinement (NaN where not measured); below ``min_ncc`` counts as refused.
        ``-inf`` marks a block whose best whole-pixel match lay on the edge of the search range
        (the shift is probably larger than ``search``).
    """
    if fixed.shape != moving.shape or fixed.ndim != 2:
        raise ValueError(f"fixed and moving must be 2-D of one shape, got {fixed.shape} and {moving.shape}")
    if half < 2 or search < 1:
        raise ValueError(f"half must be >= 2 and search >= 1, got {half} and {search}")
    pts = np.asarray(points, int).reshape(-1, 2)
    off = np.zeros_like(pts) if offsets is None else np.asarray(offsets, int).reshape(-1, 2)
    shifts = np.full((len(pts), 2), np.nan)
    conf = np.full(len(pts), np.nan)
    h, w = fixed.shape
    reach = half + search + 2
    for i, (x, y) in enumerate(pts):
        mx, my = x + off[i, 0], y + off[i, 1]
        if min(x - half, y - half, mx - reach, my - reach) < 0 or max(x + half, mx + reach) >= w \
                or max(y + half, my + reach) >= h:
            continue
        tpl = fixed[y - half:y + half + 1, x - half:x + half + 1]
        win = moving[my - reach:my + reach + 1, mx - reach:mx + reach + 1]
        if not (np.isfinite(tpl).all() and np.isfinite(win).all()):
            continue
        if tpl.std() < min_std or win.std() < min_std:
            continue
        inner = win[2:-2, 2:-2]
        score = cv2.matchTemplate(np.ascontiguousarray(inner), np.ascontiguousarray(tpl), cv2.TM_CCOEFF_NORMED)
        r, c = np.unravel_index(int(np.argmax(score)), score.shape)
        if r in (0, score.shape[0] - 1) or c in (0, score.shape[1] - 1):
            if float(score.max()) >= min_ncc:
                conf[i] = -np.inf
            continue
        if not refine:
            if score[r, c] >= min_ncc:
                shifts[i] = (c - search + off[i, 0], r - search + off[i, 1])
            conf[i] = float(score[r, c])
            continue
        d, ncc = refine_shift(tpl, win, (c - search, r - search))
        conf[i] = ncc
        if np.isfinite(ncc) and ncc >= min_ncc:
            shifts[i] = d + off[i]
    return shifts, conf
