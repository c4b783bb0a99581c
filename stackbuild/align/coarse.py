"""Coarse alignment of one section pair: feature matches, RANSAC, a refined model.

Pure functions of arrays. All point arrays are ``(N, 2)`` ``(x, y)``.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np

from ..transforms.types import Affine2D
from .features import FeatureSet, match_features

from .settings import MODELS  # one list, kept with the settings


@dataclass
class PairResult:
    """What coarse matching found between sections ``a`` and ``b``.

    Attributes
    ----------
    a, b : int
        Section numbers.
    pts_a, pts_b : ndarray, shape (N, 2)
        RANSAC inliers as corresponding points, full-resolution section pixels
        of ``a`` and of ``b``.
    model : Affine2D or None
        The refined model mapping ``b`` section pixels to ``a`` section pixels.
    stats : dict
        ``features_a``, ``features_b``, ``matches``, ``inliers``,
        ``inlier_ratio``, ``residual_rms``, ``residual_max`` (full-res pixels).
    reason : str
        Empty when the pair is usable; otherwise why not.
    """

    a: int
    b: int
    pts_a: np.ndarray
    pts_b: np.ndarray
    model: Affine2D | None
    stats: dict = field(default_factory=dict)
    reason: str = ""

    @property
    def usable(self) -> bool:
        """True when the pair gave a model from enough inliers."""
        return not self.reason


def fit_model(src: np.ndarray, dst: np.ndarray, model: str = "affine") -> Affine2D:
    """Return the least-squares model mapping ``src`` points onto ``dst`` points.

    ``"affine"`` is the linear least-squares solution of the six parameters;
    ``"similarity"`` and ``"rigid"`` follow Umeyama's closed form (rigid: no
    scale).

    References
    ----------
    .. [1] Umeyama, S. "Least-squares estimation of transformation parameters
           between two point patterns", IEEE TPAMI 13:376-380 (1991).
           doi:10.1109/34.88573
    """
    src, dst = np.asarray(src, np.float64), np.asarray(dst, np.float64)
    if src.shape != dst.shape or src.ndim != 2 or src.shape[1] != 2:
        raise ValueError(f"src and dst must both be (N, 2), got {src.shape} and {dst.shape}")
    need = 3 if model == "affine" else 2
    if model not in MODELS:
        raise ValueError(f"model must be one of {MODELS}, got {model!r}")
    if len(src) < need:
        raise ValueError(f"a {model} model needs at least {need} points, got {len(src)}")
    if model == "affine":
        design = np.column_stack([src, np.ones(len(src))])
        sol, *_ = np.linalg.lstsq(design, dst, rcond=None)
        return Affine2D(sol.T)
    ms, md = src.mean(0), dst.mean(0)
    s0, d0 = src - ms, dst - md
    cov = d0.T @ s0 / len(src)
    u, sv, vt = np.linalg.svd(cov)
    sign = np.diag([1.0, np.sign(np.linalg.det(u @ vt)) or 1.0])
    rot = u @ sign @ vt
    scale = 1.0
    if model == "similarity":
        var = np.mean(np.sum(s0 ** 2, axis=1))
        scale = float(np.sum(sv * np.diag(sign)) / var) if var > 0 else 1.0
    lin = scale * rot
    return Affine2D(np.column_stack([lin, md - lin @ ms]))


def estimate_model(src: np.ndarray, dst: np.ndarray, model: str = "affine", threshold: float = 3.0,
                   max_iters: int = 5000, confidence: float = 0.999) -> tuple[Affine2D | None, np.ndarray]:
    """Return a RANSAC model ``src -> dst`` refined on its inliers, and the inlier mask.

    RANSAC [1]_ runs in OpenCV (``cv2.estimateAffine2D`` for affine,
    ``cv2.estimateAffinePartial2D`` for similarity and rigid); the model is
    then refitted by least squares (:func:`fit_model`) on the inliers, and
    inliers are re-selected once with the refitted model.

    Returns
    -------
    model : Affine2D or None
        None if RANSAC found no model.
    inliers : ndarray of bool, shape (N,)

    References
    ----------
    .. [1] Fischler, M. A. & Bolles, R. C. "Random sample consensus",
           CACM 24:381-395 (1981). doi:10.1145/358669.358692
    """
    src, dst = np.asarray(src, np.float64), np.asarray(dst, np.float64)
    n = len(src)
    none = (None, np.zeros(n, bool))
    if n < 3:
        return none
    fn = cv2.estimateAffine2D if model == "affine" else cv2.estimateAffinePartial2D
    # OpenCV draws RANSAC samples from a per-thread generator whose state depends on every
    # earlier call; seeding it makes each pair's answer independent of what ran before
    cv2.setRNGSeed(0)
    mat, mask = fn(src.astype(np.float32), dst.astype(np.float32), method=cv2.RANSAC,
                   ransacReprojThreshold=float(threshold), maxIters=int(max_iters),
                   confidence=float(confidence), refineIters=10)
    if mat is None or mask is None or not np.all(np.isfinite(mat)):
        return none
    inl = mask.ravel().astype(bool)
    for _ in range(2):
        if inl.sum() < 3:
            return none
        fitted = fit_model(src[inl], dst[inl], model)
        err = np.linalg.norm(fitted.apply(src) - dst, axis=1)
        inl = err <= threshold
    if inl.sum() < 3:
        return none
    return fit_model(src[inl], dst[inl], model), inl


def match_pair(fa: FeatureSet, fb: FeatureSet, a: int, b: int, *, model: str, ratio: float,
               threshold: float, min_inliers: int, scale: float = 1.0,
               offset_a=(0.0, 0.0), offset_b=(0.0, 0.0)) -> PairResult:
    """Return the coarse correspondences of two sections from their features.

    Parameters
    ----------
    fa, fb : FeatureSet
        Features of sections ``a`` and ``b`` in working pixels.
    model, ratio, threshold, min_inliers
        As in :class:`~stackbuild.align.settings.AlignSettings` (``threshold``
        in working pixels).
    scale : float
        Working pixels per full-resolution pixel inverse: working pixel ``i``
        has its centre at section pixel ``offset + i * scale + (scale - 1) / 2``.
    offset_a, offset_b : (float, float)
        Section pixel of working pixel (0, 0)'s first level-0 pixel, per section.

    Returns
    -------
    PairResult
        Inliers and statistics in full-resolution pixels.
    """
    stats = {"features_a": len(fa), "features_b": len(fb), "matches": 0, "inliers": 0,
             "inlier_ratio": 0.0, "residual_rms": None, "residual_max": None}
    empty = np.zeros((0, 2))

    def fail(reason):
        return PairResult(a, b, empty, empty, None, stats, reason)

    if min(len(fa), len(fb)) < min_inliers:
        return fail("few_features")
    ia, ib = match_features(fa, fb, ratio)
    stats["matches"] = int(len(ia))
    if len(ia) < min_inliers:
        return fail("few_matches")
    half = (scale - 1) / 2.0
    pa = fa.xy[ia] * scale + np.asarray(offset_a, float) + half
    pb = fb.xy[ib] * scale + np.asarray(offset_b, float) + half
    return pair_from_points(pa, pb, a, b, model=model, threshold=threshold * scale,
                            min_inliers=min_inliers, stats=stats)


def pair_from_points(pa: np.ndarray, pb: np.ndarray, a: int, b: int, *, model: str, threshold: float,
                     min_inliers: int, stats: dict) -> PairResult:
    """Return the pair's RANSAC model ``b -> a`` and inliers from candidate correspondences (full-res px)."""
    empty = np.zeros((0, 2))
    fitted, inl = estimate_model(pb, pa, model, threshold)
    stats["inliers"] = int(inl.sum())
    stats["inlier_ratio"] = float(inl.sum() / max(1, len(pa)))
    if fitted is None or inl.sum() < min_inliers:
        return PairResult(a, b, empty, empty, None, stats, "few_inliers")
    err = np.linalg.norm(fitted.apply(pb[inl]) - pa[inl], axis=1)
    stats["residual_rms"] = float(np.sqrt(np.mean(err ** 2)))
    stats["residual_max"] = float(err.max())
    return PairResult(a, b, pa[inl], pb[inl], fitted, stats)
