"""Per-tile statistics and quality flags: blank, saturated, out of focus."""
from __future__ import annotations

import cv2
import numpy as np

#: Block size (pixels) used to average noise away before measuring contrast.
CONTRAST_BLOCK = 8
#: Sigma (in blocks) of the blur whose difference removes shading from the contrast.
CONTRAST_SHADING_SIGMA = 4.0


def _scale_to_8bit(dtype: np.dtype) -> float:
    """Return the factor that brings grey levels of ``dtype`` to the 0..255 scale."""
    dtype = np.dtype(dtype)
    return 255.0 / np.iinfo(dtype).max if dtype.kind == "u" else 1.0


def robust_contrast(image: np.ndarray) -> float:
    """Return the structure contrast of a tile: robust std of its band-passed block means.

    Notes
    -----
    The tile is averaged over ``CONTRAST_BLOCK``-pixel blocks (pixel noise
    drops by that factor), then a Gaussian blur of ``CONTRAST_SHADING_SIGMA``
    blocks is subtracted (illumination shading goes), and the spread is
    ``1.4826 * MAD`` (the median absolute deviation scaled to a Gaussian
    standard deviation; Hampel, J. Am. Stat. Assoc. 69:383 (1974),
    doi:10.1080/01621459.1974.10482962). A tile of empty resin or a blanked
    beam keeps noise and shading but loses this measure.
    """
    img = np.asarray(image, dtype=np.float32)
    h, w = img.shape
    small = cv2.resize(img, (max(1, w // CONTRAST_BLOCK), max(1, h // CONTRAST_BLOCK)),
                       interpolation=cv2.INTER_AREA)
    band = small - cv2.GaussianBlur(small, (0, 0), CONTRAST_SHADING_SIGMA, borderType=cv2.BORDER_REFLECT)
    return float(1.4826 * np.median(np.abs(band - np.median(band))))


def focus_measure(image: np.ndarray) -> float:
    """Return the variance of the Laplacian of a tile (higher = sharper).

    References
    ----------
    .. [1] J. L. Pech-Pacheco, G. Cristobal, J. Chamorro-Martinez and J.
       Fernandez-Valdivia, "Diatom autofocusing in brightfield microscopy: a
       comparative study", Proc. ICPR 2000, vol. 3, 314-317.
       doi:10.1109/ICPR.2000.903548
    """
    img = np.asarray(image, dtype=np.float32)
    return float(cv2.Laplacian(img, cv2.CV_32F, ksize=1).var())


def tile_stats(image: np.ndarray) -> dict:
    """Return the statistics of one raw tile, on the 8-bit grey scale where they are grey levels.

    Returns
    -------
    dict
        ``mean``, ``std`` (grey levels scaled to 0..255), ``contrast``
        (:func:`robust_contrast`, same scale), ``saturated_fraction`` (pixels at
        the dtype's maximum), ``zero_fraction`` (pixels at 0), ``focus``
        (:func:`focus_measure` on the 8-bit scale).
    """
    image = np.asarray(image)
    if image.ndim != 2:
        raise ValueError(f"tile must be 2-D, got shape {image.shape}")
    scale = _scale_to_8bit(image.dtype)
    top = np.iinfo(image.dtype).max if image.dtype.kind == "u" else np.inf
    img = image.astype(np.float32)
    return {
        "mean": float(img.mean() * scale),
        "std": float(img.std() * scale),
        "contrast": robust_contrast(img) * scale,
        "saturated_fraction": float(np.count_nonzero(image >= top) / image.size),
        "zero_fraction": float(np.count_nonzero(image == 0) / image.size),
        "focus": focus_measure(img) * scale * scale,
    }


def flag_tiles(stats: list[dict], blank_std: float, focus_min: float,
               saturated_max: float) -> list[list[str]]:
    """Return the quality flags of every tile of a section from :func:`tile_stats` results.

    Parameters
    ----------
    stats : list of dict
        One :func:`tile_stats` result per tile.
    blank_std : float
        Tiles whose ``contrast`` is below this (8-bit grey levels) are ``"blank"``.
    focus_min : float
        Non-blank tiles whose ``focus`` is below this fraction of the median
        focus of the section's non-blank tiles are ``"out_of_focus"``.
    saturated_max : float
        Tiles with more than this fraction of pixels at the maximum (or at
        zero) are ``"saturated"``.

    Returns
    -------
    list of list of str
    """
    flags: list[list[str]] = [[] for _ in stats]
    for f, s in zip(flags, stats):
        if s["contrast"] < blank_std:
            f.append("blank")
        if max(s["saturated_fraction"], s["zero_fraction"]) > saturated_max:
            f.append("saturated")
    focus = [s["focus"] for s, f in zip(stats, flags) if "blank" not in f]
    if len(focus) >= 2:
        ref = float(np.median(focus))
        for f, s in zip(flags, stats):
            if "blank" not in f and ref > 0 and s["focus"] < focus_min * ref:
                f.append("out_of_focus")
    return flags
