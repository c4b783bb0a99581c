"""Local invariant features of a mosaic and ratio-test matching between two mosaics.

Pure functions of arrays. Keypoints are returned as ``(N, 2)`` ``(x, y)``
arrays in the pixel frame of the image they were found in (integer index =
pixel centre, the OpenCV keypoint convention).
"""
from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from .settings import DETECTORS  # one list, kept with the settings


@dataclass
class FeatureSet:
    """Keypoints and descriptors of one image.

    Attributes
    ----------
    xy : ndarray, shape (N, 2), float64
        Keypoint positions ``(x, y)``.
    descriptors : ndarray, shape (N, D)
        float32 for SIFT, uint8 (binary) for AKAZE and ORB.
    binary : bool
        True when the descriptors are compared by Hamming distance.
    """

    xy: np.ndarray
    descriptors: np.ndarray
    binary: bool

    def __len__(self) -> int:
        return int(self.xy.shape[0])


def to_uint8(image: np.ndarray, low: float = 0.5, high: float = 99.5) -> np.ndarray | None:
    """Return ``image`` stretched to uint8 between two percentiles, or None if it is flat.

    Non-finite pixels become 0. A flat image (no contrast at all) has no
    features, so the caller can report it instead of matching noise.
    """
    img = np.asarray(image, dtype=np.float32)
    finite = np.isfinite(img)
    if not finite.any():
        return None
    lo, hi = np.percentile(img[finite], [low, high])
    if not hi - lo > 1e-6 * max(1.0, abs(float(hi))):
        return None
    out = (np.where(finite, img, lo) - lo) * (255.0 / (hi - lo))
    return np.clip(out, 0, 255).astype(np.uint8)


def _detector(name: str, max_features: int):
    if name == "sift":
        return cv2.SIFT_create(nfeatures=max_features), False
    if name == "orb":
        return cv2.ORB_create(nfeatures=max_features), True
    if name == "akaze":
        return cv2.AKAZE_create(), True
    raise ValueError(f"detector must be one of {DETECTORS}, got {name!r}")


def detect_features(image: np.ndarray, detector: str = "sift", max_features: int = 4000) -> FeatureSet:
    """Return the local invariant features of a 2-D image.

    Parameters
    ----------
    image : ndarray, shape (H, W)
        Any real dtype; stretched to uint8 between the 0.5 and 99.5 percentiles.
    detector : {"sift", "akaze", "orb"}
        Feature type.
    max_features : int
        Keep at most this many of the strongest keypoints.

    Returns
    -------
    FeatureSet
        Empty (``len == 0``) for a flat or tiny image.

    References
    ----------
    .. [1] Lowe, D. G. "Distinctive image features from scale-invariant
           keypoints", IJCV 60:91-110 (2004). doi:10.1023/B:VISI.0000029664.99615.94
    .. [2] Rublee, E. et al. "ORB: an efficient alternative to SIFT or SURF",
           ICCV 2011. doi:10.1109/ICCV.2011.6126544
    .. [3] Alcantarilla, P. F. et al. "Fast explicit diffusion for accelerated
           features in nonlinear scale spaces", BMVC 2013. doi:10.5244/C.27.13
    """
    if image.ndim != 2:
        raise ValueError(f"image must be 2-D, got shape {image.shape}")
    det, binary = _detector(detector, max_features)
    empty = FeatureSet(np.zeros((0, 2)), np.zeros((0, 32 if binary else 128),
                                                  np.uint8 if binary else np.float32), binary)
    img8 = to_uint8(image)
    if img8 is None or min(img8.shape) < 16:
        return empty
    kps, desc = det.detectAndCompute(img8, None)
    if desc is None or len(kps) == 0:
        return empty
    if len(kps) > max_features:
        order = np.argsort([-k.response for k in kps])[:max_features]
        kps, desc = [kps[i] for i in order], desc[order]
    xy = np.array([k.pt for k in kps], dtype=np.float64)
    return FeatureSet(xy, desc, binary)


def match_features(a: FeatureSet, b: FeatureSet, ratio: float = 0.8) -> tuple[np.ndarray, np.ndarray]:
    """Return index arrays ``(ia, ib)`` of matches whose nearest / second-nearest distance ratio is low.

    A feature of ``a`` is matched to its nearest descriptor in ``b`` when that
    is closer than ``ratio`` times the second nearest ([1]_, section 7.1).
    Matches are made one-to-one by keeping, for every feature of ``b``, only
    its best match. Float descriptors (SIFT) are searched approximately with
    randomised k-d trees (FLANN, [2]_); binary ones exhaustively by Hamming
    distance.

    References
    ----------
    .. [1] Lowe, D. G. (2004), doi:10.1023/B:VISI.0000029664.99615.94
    .. [2] Muja, M. & Lowe, D. G. "Fast approximate nearest neighbors with
           automatic algorithm configuration", VISAPP 2009. doi:10.5220/0001787803310340
    """
    if not 0 < ratio <= 1:
        raise ValueError(f"ratio must be in (0, 1], got {ratio}")
    none = (np.zeros(0, int), np.zeros(0, int))
    if len(a) < 2 or len(b) < 2:
        return none
    if a.binary:
        matcher = cv2.BFMatcher(cv2.NORM_HAMMING)
    else:  # approximate nearest neighbours in k-d trees: far faster than brute force on SIFT
        matcher = cv2.FlannBasedMatcher({"algorithm": 1, "trees": 4}, {"checks": 64})
    knn = matcher.knnMatch(np.ascontiguousarray(a.descriptors, np.float32) if not a.binary else a.descriptors,
                           np.ascontiguousarray(b.descriptors, np.float32) if not b.binary else b.descriptors, k=2)
    ia, ib, dist = [], [], []
    for pair in knn:
        if len(pair) == 2 and pair[0].distance < ratio * pair[1].distance:
            ia.append(pair[0].queryIdx)
            ib.append(pair[0].trainIdx)
            dist.append(pair[0].distance)
    if not ia:
        return none
    ia, ib, dist = np.array(ia), np.array(ib), np.array(dist)
    order = np.lexsort((dist, ib))
    keep = order[np.r_[True, ib[order][1:] != ib[order][:-1]]]
    return ia[keep], ib[keep]
