"""Feature images that an EM section and a marker image share, for multimodal registration.

At a marker's resolution (tens of nm per pixel) an area-averaged EM image has
lost its thin dark membranes and small vesicles, and labelled and unlabelled
cells look alike, so raw intensities share little information with the
marker. Instead both images are turned into maps of structure they have in
common, computed for the EM at a finer level (``fine`` EM pixels per feature
pixel, a divisor of the channel's render scale) and then reduced to the
channel grid:

* ``"edges"`` (a marker that fills some cells): EM dark-line strength
  (membranes) against the marker's gradient magnitude, which is high where a
  labelled cell meets an unlabelled one;
* ``"density"`` (a punctate marker): EM dark-blob density at vesicle size
  (smallest Hessian eigenvalue, positive only where the image curves upward
  in every direction, so lines and large objects give little) against the
  marker intensity.

The feature images are then registered by normalised mutual information
(:func:`register_mutual_information`); registering derived structure images
instead of raw intensities is the idea of gradient-based MI [1]_ and of
modality-independent descriptors [2]_.

References
----------
.. [1] J. P. W. Pluim, J. B. A. Maintz and M. A. Viergever, "Image
   registration by maximization of combined mutual information and gradient
   information", IEEE Transactions on Medical Imaging 19(8):809-814, 2000.
   doi:10.1109/42.876307
.. [2] M. P. Heinrich et al., "MIND: Modality independent neighbourhood
   descriptor for multi-modal deformable registration", Medical Image
   Analysis 16(7):1423-1435, 2012. doi:10.1016/j.media.2012.05.008
.. [3] T. Lindeberg, "Feature detection with automatic scale selection",
   International Journal of Computer Vision 30(2):79-116, 1998.
   doi:10.1023/A:1008045108935
"""
from __future__ import annotations

import cv2
import numpy as np

from .settings import KINDS  # one list, kept with the settings


def whole_block_mean(img: np.ndarray, factor: int) -> np.ndarray:
    """Return means of ``factor x factor`` blocks (trailing partial blocks dropped), float32."""
    img = np.asarray(img, np.float32)
    if factor == 1:
        return img
    h, w = (img.shape[0] // factor) * factor, (img.shape[1] // factor) * factor
    return img[:h, :w].reshape(h // factor, factor, w // factor, factor).mean(axis=(1, 3))


def _fill_uncovered(img: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Return ``img`` with pixels outside ``mask`` set to the covered mean (no false edges at the rim)."""
    out = np.asarray(img, np.float32).copy()
    if mask is not None and not mask.all() and mask.any():
        out[~mask] = out[mask].mean()
    return out


def dark_lines(em: np.ndarray, sigma: float, mask: np.ndarray | None = None) -> np.ndarray:
    """Return the strength of thin dark structures: ``max(0, local mean - image)``.

    Parameters
    ----------
    em : ndarray
        EM image (dark membranes on bright cytoplasm).
    sigma : float
        Gaussian sigma (pixels) of the local mean, a few membrane widths.
    mask : ndarray of bool, optional
        Covered pixels; the rest is filled with the covered mean first.
    """
    img = _fill_uncovered(em, mask)
    local = cv2.GaussianBlur(img, (0, 0), sigma)
    return np.maximum(local - img, 0.0)


def dark_blobs(em: np.ndarray, sigma: float, mask: np.ndarray | None = None) -> np.ndarray:
    """Return dark-blob strength at scale ``sigma``: the scale-normalised smallest Hessian eigenvalue, clipped at 0.

    A dark blob of radius about ``sigma * sqrt(2)`` curves upward in every
    direction, so both Hessian eigenvalues are positive there; along a dark
    line one is near zero, so the smaller eigenvalue suppresses lines [3]_.
    """
    img = cv2.GaussianBlur(_fill_uncovered(em, mask), (0, 0), sigma)
    dxx = cv2.Sobel(img, cv2.CV_32F, 2, 0, ksize=3, scale=0.25)
    dyy = cv2.Sobel(img, cv2.CV_32F, 0, 2, ksize=3, scale=0.25)
    dxy = cv2.Sobel(img, cv2.CV_32F, 1, 1, ksize=3, scale=0.25)
    half_trace = 0.5 * (dxx + dyy)
    root = np.sqrt(0.25 * (dxx - dyy) ** 2 + dxy ** 2)
    return np.maximum(half_trace - root, 0.0) * np.float32(sigma ** 2)


def gradient_magnitude(img: np.ndarray, sigma: float) -> np.ndarray:
    """Return the Gaussian-derivative gradient magnitude of ``img`` at scale ``sigma`` (pixels)."""
    g = cv2.GaussianBlur(np.asarray(img, np.float32), (0, 0), sigma)
    gx = cv2.Sobel(g, cv2.CV_32F, 1, 0, ksize=3, scale=0.125)
    gy = cv2.Sobel(g, cv2.CV_32F, 0, 1, ksize=3, scale=0.125)
    return np.sqrt(gx * gx + gy * gy)


def em_feature(em_fine: np.ndarray, mask_fine: np.ndarray, kind: str, fine: int, k: int,
               structure_px: float, spread_px: float = 0.0) -> np.ndarray:
    """Return the EM feature image on the channel grid (``fine``-level image reduced by ``k // fine``).

    Parameters
    ----------
    em_fine, mask_fine : ndarray
        The section rendered at scale ``fine`` and its coverage.
    kind : str
        ``"edges"``, ``"density"`` or ``"intensity"`` (see the module docstring).
    fine, k : int
        Render scale of ``em_fine`` and of the channel grid (``fine`` divides ``k``).
    structure_px : float
        Size of the structure detected, in full-resolution EM pixels: membrane
        width for ``"edges"``, vesicle radius for ``"density"``.
    spread_px : float
        Gaussian sigma (full-resolution EM pixels) applied to the detector
        response before reduction: the size of a vesicle cluster for
        ``"density"``, so the map estimates local vesicle density.
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")
    if k % fine:
        raise ValueError(f"fine scale {fine} must divide the channel scale {k}")
    if kind == "intensity":
        return whole_block_mean(em_fine, k // fine)
    size = max(structure_px / fine, 0.5)
    if kind == "edges":
        feat = dark_lines(em_fine, 3.0 * size, mask_fine)
    else:
        feat = dark_blobs(em_fine, max(size / np.sqrt(2.0), 0.7), mask_fine)
    if spread_px > 0:
        feat = cv2.GaussianBlur(feat, (0, 0), spread_px / fine)
    return whole_block_mean(feat, k // fine)


def marker_feature(marker: np.ndarray, kind: str, sigma: float = 1.0) -> np.ndarray:
    """Return the marker feature image on its own grid.

    ``"edges"``: gradient magnitude at scale ``sigma`` (marker pixels);
    ``"density"``: the intensity smoothed with a Gaussian of ``sigma``
    (against the sensor noise); ``"intensity"``: the intensity as is.
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")
    img = np.asarray(marker, np.float32)
    if kind == "edges":
        return gradient_magnitude(img, sigma)
    if kind == "density" and sigma > 0:
        return cv2.GaussianBlur(img, (0, 0), sigma)
    return img
