"""Mutual information of two images, and registration by maximising it.

The measure compares a marker image with the EM only through the joint
histogram of their intensities, so it needs no intensity relation between the
two modalities, only that the same structures co-occur.

Conventions follow :mod:`stackbuild.transforms`: points are ``(x, y)``, integer
indices are pixel centres, and the registration returns the map
``moving pixel -> fixed pixel``.

References
----------
.. [1] P. Viola and W. M. Wells III, "Alignment by maximization of mutual
   information", International Journal of Computer Vision 24(2):137-154, 1997.
   doi:10.1023/A:1007958904918
.. [2] F. Maes, A. Collignon, D. Vandermeulen, G. Marchal and P. Suetens,
   "Multimodality image registration by maximization of mutual information",
   IEEE Transactions on Medical Imaging 16(2):187-198, 1997. doi:10.1109/42.563664
.. [3] C. Studholme, D. L. G. Hill and D. J. Hawkes, "An overlap invariant
   entropy measure of 3D medical image alignment", Pattern Recognition
   32(1):71-86, 1999. doi:10.1016/S0031-3203(98)00091-0
"""
from __future__ import annotations

import math

import cv2
import numpy as np
from scipy import optimize

from ..transforms.types import Affine2D

from .settings import MODELS  # one list, kept with the settings
MIN_OVERLAP = 0.5  # fraction of the smaller image that must overlap (common practice, no source)
SEARCH_BUDGET = 4e7  # pixel visits allowed for the exhaustive start search (about a second)
EVAL_OVERHEAD = 1500  # fixed cost of one evaluation, in pixel visits (measured, this machine)
MAX_STRETCH = 0.1  # largest scale change or shear searched, relative


def _bin_index(values: np.ndarray, lo: float, hi: float, bins: int) -> np.ndarray:
    """Return the bin of each value on ``bins`` equal bins spanning ``[lo, hi]`` (as ``numpy.histogramdd``)."""
    if hi <= lo:
        return np.zeros(values.shape, np.intp)
    edges = np.linspace(lo, hi, bins + 1)
    idx = np.searchsorted(edges, values, side="right") - 1
    return np.clip(idx, 0, bins - 1)


def _entropies(joint: np.ndarray) -> tuple[float, float, float]:
    """Return ``H(A), H(B), H(A, B)`` (nats) of a joint count table."""
    total = joint.sum()
    if total <= 0:
        return 0.0, 0.0, 0.0
    p = joint / total

    def h(q):
        q = q[q > 0]
        return float(-(q * np.log(q)).sum())

    return h(p.sum(axis=1)), h(p.sum(axis=0)), h(p.ravel())


def _measure(joint: np.ndarray, normalized: bool) -> float:
    ha, hb, hab = _entropies(joint)
    if normalized:
        return (ha + hb) / hab if hab > 0 else 2.0
    return ha + hb - hab


def mutual_information(image0: np.ndarray, image1: np.ndarray, bins: int = 32,
                       mask: np.ndarray | None = None, normalized: bool = True) -> float:
    """Return the (normalised) mutual information of two images of the same shape.

    Parameters
    ----------
    image0, image1 : ndarray
        Images of the same shape, any real dtype.
    bins : int
        Number of equal-width intensity bins per image, spanning each image's
        range (over ``mask`` when given).
    mask : ndarray of bool, optional
        Pixels to include; all by default.
    normalized : bool
        True returns ``(H(A) + H(B)) / H(A, B)`` (1 for independent images, 2
        for images that determine each other) [3]_; False returns
        ``H(A) + H(B) - H(A, B)`` in nats [1]_ [2]_.

    Returns
    -------
    float

    Notes
    -----
    With no mask the bins equal those of ``numpy.histogramdd(..., bins=bins)``,
    so the normalised value equals
    ``skimage.metrics.normalized_mutual_information(image0, image1, bins=bins)``.

    References
    ----------
    .. [1] Viola & Wells 1997, doi:10.1023/A:1007958904918
    .. [2] Maes et al. 1997, doi:10.1109/42.563664
    .. [3] Studholme et al. 1999, doi:10.1016/S0031-3203(98)00091-0
    """
    a = np.asarray(image0)
    b = np.asarray(image1)
    if a.shape != b.shape:
        raise ValueError(f"images must have the same shape, got {a.shape} and {b.shape}")
    if bins < 2:
        raise ValueError(f"bins must be >= 2, got {bins}")
    if mask is not None:
        m = np.asarray(mask, bool)
        if m.shape != a.shape:
            raise ValueError(f"mask must have the image shape {a.shape}, got {m.shape}")
        a, b = a[m], b[m]
    a = a.ravel().astype(np.float64)
    b = b.ravel().astype(np.float64)
    if a.size == 0:
        return 0.0
    ia = _bin_index(a, a.min(), a.max(), bins)
    ib = _bin_index(b, b.min(), b.max(), bins)
    joint = np.bincount(ia * bins + ib, minlength=bins * bins).reshape(bins, bins).astype(np.float64)
    return _measure(joint, normalized)


# ----------------------------------------------------------------------------- registration
class _Level:
    """One resolution level: quantised fixed image, moving image, masks and level <-> full maps."""

    def __init__(self, fixed, fmask, moving, mmask, factor, bins, f_range, m_range):
        self.factor = factor
        self.bins = bins
        self.fixed_bin = _bin_index(fixed, *f_range, bins)
        self.fmask = fmask
        self.moving = moving.astype(np.float32)
        # Soft bin coordinate of the moving image, so the measure varies smoothly with the map.
        lo, hi = m_range
        span = max(hi - lo, 1e-12)
        self.m_lo, self.m_scale = lo, bins / span
        self.mmask = mmask.astype(np.float32)
        self.n_moving, self.n_fixed = int(mmask.sum()), int(fmask.sum())
        s = float(factor)
        # full-resolution index = s * level index + (s - 1) / 2 (block-mean pixel centres)
        self.to_full = Affine2D(np.array([[s, 0, (s - 1) / 2], [0, s, (s - 1) / 2]]))

    def measure(self, full_map: Affine2D, normalized: bool = True) -> float:
        """Return the measure with the moving image mapped into the fixed frame by ``full_map``."""
        t = self.to_full.then(full_map).then(self.to_full.inverse())
        inv = t.inverse().matrix.astype(np.float64)
        h, w = self.fixed_bin.shape
        flags = cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP
        val = cv2.warpAffine(self.moving, inv, (w, h), flags=flags, borderMode=cv2.BORDER_REPLICATE)
        ok = cv2.warpAffine(self.mmask, inv, (w, h), flags=flags, borderMode=cv2.BORDER_CONSTANT,
                            borderValue=0.0)
        sel = (ok > 0.999) & self.fmask
        # Too small an overlap can score high by chance: require half of the smaller image.
        if sel.sum() < max(16, MIN_OVERLAP * min(self.n_moving, self.n_fixed)):
            return 0.0
        u = np.clip((val[sel].astype(np.float64) - self.m_lo) * self.m_scale - 0.5, 0, self.bins - 1)
        k0 = np.floor(u).astype(np.intp)
        frac = u - k0
        k1 = np.minimum(k0 + 1, self.bins - 1)
        fb = self.fixed_bin[sel] * self.bins
        n = self.bins * self.bins
        joint = (np.bincount(fb + k0, weights=1.0 - frac, minlength=n)
                 + np.bincount(fb + k1, weights=frac, minlength=n))
        return _measure(joint.reshape(self.bins, self.bins), normalized)


def _reduce(img: np.ndarray, factor: int) -> np.ndarray:
    """Return block means of ``factor x factor`` blocks (trailing partial blocks dropped)."""
    if factor == 1:
        return img.astype(np.float32)
    h, w = (img.shape[0] // factor) * factor, (img.shape[1] // factor) * factor
    b = img[:h, :w].astype(np.float32).reshape(h // factor, factor, w // factor, factor)
    return b.mean(axis=(1, 3))


def _levels(fixed, fmask, moving, mmask, bins, n_levels):
    f_range = (float(fixed[fmask].min()), float(fixed[fmask].max()))
    m_range = (float(moving[mmask].min()), float(moving[mmask].max()))
    out = []
    for n in range(n_levels):
        s = 2 ** n
        fm = _reduce(fmask.astype(np.float32), s) > 0.999
        mm = _reduce(mmask.astype(np.float32), s) > 0.999
        out.append(_Level(_reduce(fixed, s), fm, _reduce(moving, s), mm, s, bins, f_range, m_range))
    return out


def _param_map(model: str, centre: np.ndarray, radius: float):
    """Return ``theta -> correction`` (an Affine2D about ``centre``) with every parameter in ~pixels."""
    def make(theta):
        tx, ty = theta[0], theta[1]
        if model == "affine":
            a = np.eye(2) + np.array([[theta[2], theta[3]], [theta[4], theta[5]]]) / radius
        else:
            ang = theta[2] / radius
            sc = math.exp(theta[3] / radius) if model == "similarity" else 1.0
            a = sc * np.array([[math.cos(ang), -math.sin(ang)], [math.sin(ang), math.cos(ang)]])
        t = centre - a @ centre + np.array([tx, ty])
        return Affine2D(np.column_stack([a, t]))
    n = {"rigid": 3, "similarity": 4, "affine": 6}[model]
    return make, n


def _search_level(pyr: list, max_offset: float, max_rotation: float) -> "_Level":
    """Return the finest level whose exhaustive grid costs at most :data:`SEARCH_BUDGET` pixel visits."""
    n_rot = max(1, 2 * int(math.ceil(max_rotation / 1.5)) + 1)
    for level in pyr:
        n_shift = (2 * math.ceil(max_offset / level.factor) + 1) ** 2
        if n_shift * n_rot * (level.fixed_bin.size + EVAL_OVERHEAD) <= SEARCH_BUDGET:
            return level
    return pyr[-1]


def _coarse_search(level: _Level, make, n_par, initial, max_offset, max_rotation, radius):
    """Return the best few ``theta`` of a grid over translation and rotation at the coarsest level."""
    step = float(level.factor)  # one coarse pixel, in full-resolution pixels
    half = max(0, int(math.ceil(max_offset / step)))
    shifts = np.arange(-half, half + 1) * step
    n_rot = max(1, 2 * int(math.ceil(max_rotation / 1.5)) + 1)
    angles = np.linspace(-max_rotation, max_rotation, n_rot) if max_rotation > 0 else np.zeros(1)
    scored = []
    for ang in angles:
        for ty in shifts:
            for tx in shifts:
                theta = np.zeros(n_par)
                theta[:2] = tx, ty
                theta[2:3] = math.radians(ang) * radius if n_par != 6 else 0.0
                if n_par == 6:
                    c, s = math.cos(math.radians(ang)) - 1, math.sin(math.radians(ang))
                    theta[2:6] = np.array([c, -s, s, c]) * radius
                scored.append((level.measure(initial.then(make(theta))), theta))
    scored.sort(key=lambda p: -p[0])
    values = np.array([v for v, _ in scored])
    med = np.median(values)
    mad = 1.4826 * np.median(np.abs(values - med))
    distinct = float((values[0] - med) / mad) if mad > 0 else 0.0
    gain = float(values[0] - med)
    return [t for _, t in scored[:3]], shifts[-1] if len(shifts) else 0.0, distinct, gain


def register_mutual_information(fixed: np.ndarray, moving: np.ndarray, initial: Affine2D | None = None,
                                model: str = "similarity", *, bins: int = 32, max_offset: float = 20.0,
                                max_rotation: float = 4.0, fixed_mask: np.ndarray | None = None,
                                moving_mask: np.ndarray | None = None, levels: int | None = None):
    """Return the ``moving pixel -> fixed pixel`` map that maximises normalised mutual information.

    Parameters
    ----------
    fixed, moving : ndarray, 2-D
        The two images (any real dtype; different modalities are fine).
    initial : Affine2D, optional
        Starting map ``moving -> fixed`` (identity by default).
    model : str
        ``"rigid"``, ``"similarity"`` or ``"affine"``: the correction applied after ``initial``.
    bins : int
        Histogram bins per image.
    max_offset : float
        Translations up to this many fixed pixels (each axis) from ``initial``
        are searched exhaustively at the coarsest level.
    max_rotation : float
        Rotations up to this many degrees are searched at the coarsest level.
    fixed_mask, moving_mask : ndarray of bool, optional
        Valid pixels; pixels outside either image or mask are left out of the histogram.
    levels : int, optional
        Number of resolution levels (factor 2 each); chosen from the image size by default.

    Returns
    -------
    (Affine2D, dict)
        The map, and ``{"before", "after"}`` normalised MI at the initial and
        final maps (full resolution, hard bins as :func:`mutual_information`),
        ``"shift"`` the translation of the moving centre relative to
        ``initial`` (fixed pixels), ``"at_limit"`` (True if the grid
        optimum or the result lies at the edge of the search range) and
        ``"distinctness"``: how far the best grid value stands above the
        others, ``(max - median) / (1.4826 MAD)`` (a robust z-score; a
        unique, well-defined optimum scores high, a flat landscape low);
        ``"gain"``: how much the best grid value exceeds the median of the
        grid, ``max - median`` in normalised-MI units (the information the
        best placement shares beyond a chance placement of the same images;
        each pair's own chance level is subtracted, so gains of different
        feature images can be compared, while distinctness scales with each
        landscape's own spread and cannot).

    Notes
    -----
    An exhaustive grid (one level pixel in translation, about 1.5 degrees in
    rotation) at the finest level it can afford (about ``SEARCH_BUDGET`` pixel
    visits) finds the capture range; coarser levels are not used, as they can
    smooth away the structure the two modalities share. The three best grid
    points are refined with Powell's method
    (``scipy.optimize.minimize(method="Powell")``, bounded to the search range)
    at that level, and the best of them level by level down to full
    resolution. During the search the moving image's intensity is binned with linear weights between the two
    nearest bins (partial-volume-like soft binning) so the measure is a
    continuous function of the map, as suggested in [2]_.

    References
    ----------
    .. [1] Viola & Wells 1997, doi:10.1023/A:1007958904918
    .. [2] Maes et al. 1997, doi:10.1109/42.563664
    .. [3] Studholme et al. 1999, doi:10.1016/S0031-3203(98)00091-0
    """
    fixed = np.asarray(fixed)
    moving = np.asarray(moving)
    if fixed.ndim != 2 or moving.ndim != 2 or min(fixed.shape + moving.shape) < 8:
        raise ValueError(f"images must be 2-D and at least 8 x 8, got {fixed.shape} and {moving.shape}")
    if model not in MODELS:
        raise ValueError(f"model must be one of {MODELS}, got {model!r}")
    if max_offset < 0 or max_rotation < 0:
        raise ValueError("max_offset and max_rotation must be >= 0")
    initial = Affine2D.identity() if initial is None else initial
    fmask = np.ones(fixed.shape, bool) if fixed_mask is None else np.asarray(fixed_mask, bool)
    mmask = np.ones(moving.shape, bool) if moving_mask is None else np.asarray(moving_mask, bool)
    if not fmask.any() or not mmask.any():
        raise ValueError("masks must keep at least one pixel")
    if levels is None:
        levels = max(1, min(4, int(math.log2(max(1.0, min(fixed.shape + moving.shape) / 24.0))) + 1))
    pyr = _levels(fixed, fmask, moving, mmask, bins, levels)
    h, w = moving.shape
    centre = initial.apply([[(w - 1) / 2, (h - 1) / 2]])[0]
    radius = 0.5 * math.hypot(*fixed.shape)
    make, n_par = _param_map(model, centre, radius)
    coarse = _search_level(pyr, max_offset, max_rotation)
    pyr = pyr[:pyr.index(coarse) + 1]
    starts, edge, distinct, gain = _coarse_search(coarse, make, n_par, initial, max_offset, max_rotation, radius)
    bounds = _bounds(n_par, max_offset, max_rotation, radius, margin=2.0 * coarse.factor)
    refined = [_refine(coarse, make, initial, t, float(coarse.factor), bounds) for t in starts]
    best_theta = max(refined, key=lambda t: coarse.measure(initial.then(make(t))))
    for level in reversed(pyr[:-1]):
        best_theta = _refine(level, make, initial, best_theta, float(level.factor), bounds)
    result = initial.then(make(best_theta))
    before = _hard_measure(fixed, fmask, moving, mmask, initial, bins)
    after = _hard_measure(fixed, fmask, moving, mmask, result, bins)
    shift = result.apply([[(w - 1) / 2, (h - 1) / 2]])[0] - centre
    limit = edge > 0 and (bool(np.any(np.abs(shift) >= max_offset + 0.5 * pyr[-1].factor))
                          or bool(np.any(np.abs(starts[0][:2]) >= edge)))
    return result, {"before": before, "after": after, "shift": [float(shift[0]), float(shift[1])],
                    "at_limit": limit, "distinctness": distinct, "gain": gain}


def _bounds(n_par: int, max_offset: float, max_rotation: float, radius: float, margin: float):
    """Return Powell bounds on ``theta``: the search range plus a margin, in parameter units."""
    t = max_offset + margin
    rot = math.radians(max_rotation + 1.0) * radius
    out = [(-t, t), (-t, t)]
    if n_par == 6:
        lim = (math.sin(math.radians(max_rotation + 1.0)) + MAX_STRETCH) * radius
        return out + [(-lim, lim)] * 4
    out.append((-rot, rot))
    if n_par == 4:
        out.append((-MAX_STRETCH * radius, MAX_STRETCH * radius))
    return out


def _refine(level: _Level, make, initial: Affine2D, theta: np.ndarray, step: float, bounds) -> np.ndarray:
    """Return ``theta`` improved by Powell's method at one level (steps of about one level pixel)."""
    def cost(th):
        return -level.measure(initial.then(make(th)))

    # Powell's bounded line searches span the whole box; keep them local (two level pixels) so a
    # far, spurious peak along a search line cannot capture the result.
    lo, hi = np.array(bounds).T
    theta = np.clip(theta, lo, hi)
    local = list(zip(np.maximum(lo, theta - 2 * step), np.minimum(hi, theta + 2 * step)))
    res = optimize.minimize(cost, theta, method="Powell", bounds=local,
                            options={"xtol": 0.02 * step, "ftol": 1e-5, "direc": np.eye(len(theta)) * step,
                                     "maxfev": 400 * len(theta)})
    return res.x if res.fun <= cost(theta) else theta


def _hard_measure(fixed, fmask, moving, mmask, full_map: Affine2D, bins: int) -> float:
    """Return normalised MI (hard bins) over the overlap of ``fixed`` and ``moving`` mapped by ``full_map``."""
    h, w = fixed.shape
    inv = full_map.inverse().matrix
    flags = cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP
    val = cv2.warpAffine(moving.astype(np.float32), inv, (w, h), flags=flags, borderMode=cv2.BORDER_REPLICATE)
    ok = cv2.warpAffine(mmask.astype(np.float32), inv, (w, h), flags=flags, borderMode=cv2.BORDER_CONSTANT)
    sel = (ok > 0.999) & fmask
    if sel.sum() < 16:
        return 0.0
    return mutual_information(fixed, val, bins=bins, mask=sel)
