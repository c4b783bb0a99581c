"""Block matching between two coarse-aligned images on a regular grid.

Pure functions of arrays. Grid nodes and shifts are ``(x, y)`` in the
images' (working) pixels; a shift ``v`` at node ``p`` means the content of
``fixed`` around ``p`` is found in ``moving`` around ``p + v``.
"""
from __future__ import annotations

import warnings

import cv2
import numpy as np


def _parabola(lo: float, mid: float, hi: float) -> float:
    den = lo - 2.0 * mid + hi
    return 0.0 if den >= 0 else float(np.clip(0.5 * (lo - hi) / den, -0.5, 0.5))


def block_match(fixed: np.ndarray, moving: np.ndarray, nodes: np.ndarray, half_size: int,
                max_shift: int, min_std: float = 1e-3) -> tuple[np.ndarray, np.ndarray]:
    """Return the shift and correlation peak of every grid node.

    Parameters
    ----------
    fixed, moving : ndarray, shape (H, W)
        Images of the same frame and size. NaN marks pixels without data.
    nodes : ndarray, shape (N, 2)
        Node positions ``(x, y)``; rounded to the nearest pixel.
    half_size : int
        The template is ``2 * half_size + 1`` pixels square.
    max_shift : int
        Shifts up to this many pixels in x and y are searched.
    min_std : float
        Templates whose standard deviation (relative to the image's) is below
        this are left unmatched (blank areas).

    Returns
    -------
    shifts : ndarray, shape (N, 2), float64
        ``(dx, dy)``; NaN where no match was made.
    peaks : ndarray, shape (N,), float64
        The normalised cross-correlation at the peak; NaN where unmatched.

    Notes
    -----
    The score is OpenCV's ``TM_CCOEFF_NORMED`` (zero-mean normalised
    cross-correlation, [1]_). The integer peak is refined to sub-pixel
    precision by a parabola through the peak and its two neighbours, per
    axis (common practice, no source). Peaks on the edge of the search
    window are rejected, since the true shift may lie beyond it.

    References
    ----------
    .. [1] Lewis, J. P. "Fast normalized cross-correlation", Vision Interface
           (1995) 120-123.
    """
    if fixed.shape != moving.shape or fixed.ndim != 2:
        raise ValueError(f"fixed and moving must be 2-D of one shape, got {fixed.shape}, {moving.shape}")
    br, sr = int(half_size), int(max_shift)
    if br < 2 or sr < 1:
        raise ValueError(f"half_size must be >= 2 and max_shift >= 1, got {br}, {sr}")
    f = np.asarray(fixed, np.float32)
    m = np.asarray(moving, np.float32)
    scale = float(np.nanstd(f)) or 1.0
    n = len(nodes)
    shifts = np.full((n, 2), np.nan)
    peaks = np.full(n, np.nan)
    h, w = f.shape
    for i, (x, y) in enumerate(np.rint(np.asarray(nodes, float)).astype(int)):
        if x - br - sr < 0 or y - br - sr < 0 or x + br + sr >= w or y + br + sr >= h:
            continue
        tpl = f[y - br:y + br + 1, x - br:x + br + 1]
        win = m[y - br - sr:y + br + sr + 1, x - br - sr:x + br + sr + 1]
        if not (np.isfinite(tpl).all() and np.isfinite(win).all()) or tpl.std() < min_std * scale:
            continue
        score = cv2.matchTemplate(win, tpl, cv2.TM_CCOEFF_NORMED)
        r, c = np.unravel_index(int(np.argmax(score)), score.shape)
        if r in (0, 2 * sr) or c in (0, 2 * sr) or not np.isfinite(score[r, c]):
            continue
        dx = c - sr + _parabola(score[r, c - 1], score[r, c], score[r, c + 1])
        dy = r - sr + _parabola(score[r - 1, c], score[r, c], score[r + 1, c])
        shifts[i] = dx, dy
        peaks[i] = score[r, c]
    return shifts, peaks


def filter_vectors(shifts: np.ndarray, peaks: np.ndarray, min_ncc: float,
                   max_deviation: float) -> np.ndarray:
    """Return a mask of the block matches that are trusted.

    Parameters
    ----------
    shifts : ndarray, shape (ny, nx, 2)
        Shifts on the grid (NaN = unmatched).
    peaks : ndarray, shape (ny, nx)
        Correlation peaks.
    min_ncc : float
        Matches with a lower peak are dropped.
    max_deviation : float
        Matches farther than this (pixels) from the median of their valid
        3 x 3 neighbours are dropped; a match with no valid neighbour at all
        is dropped too (a lone match is not evidence).

    Returns
    -------
    ndarray of bool, shape (ny, nx)

    Notes
    -----
    The median-of-neighbours test is the normalised-median idea of
    Westerweel & Scarano, "Universal outlier detection for PIV data",
    Exp. Fluids 39:1096-1100 (2005), doi:10.1007/s00348-005-0016-6, used
    here with an absolute threshold.
    """
    ok = np.isfinite(peaks) & (np.nan_to_num(peaks, nan=-1.0) >= min_ncc)
    ok &= np.isfinite(shifts).all(axis=2)
    if not ok.any():
        return ok
    keep = ok.copy()
    for comp in range(2):
        v = np.where(ok, shifts[..., comp], np.nan)
        padded = np.pad(v, 1, constant_values=np.nan)
        stack = [padded[1 + dy:1 + dy + v.shape[0], 1 + dx:1 + dx + v.shape[1]]
                 for dy in (-1, 0, 1) for dx in (-1, 0, 1) if (dy, dx) != (0, 0)]
        stack = np.stack(stack)
        count = np.isfinite(stack).sum(axis=0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)   # all-NaN neighbourhoods
            med = np.nanmedian(stack, axis=0)
        keep &= (count > 0) & ~(np.abs(v - med) > max_deviation)
    return keep


def grid_nodes(origin: tuple[float, float], spacing: float, shape: tuple[int, int]) -> np.ndarray:
    """Return the ``(ny * nx, 2)`` ``(x, y)`` positions of a regular grid, row by row."""
    ny, nx = shape
    xs = origin[0] + spacing * np.arange(nx)
    ys = origin[1] + spacing * np.arange(ny)
    gx, gy = np.meshgrid(xs, ys)
    return np.column_stack([gx.ravel(), gy.ravel()])


def block_contrast(image: np.ndarray, nodes: np.ndarray, half_size: int) -> np.ndarray:
    """Return the standard deviation of ``image`` in the block around each node (NaN if incomplete).

    Used to find damaged regions (folds, stains, smears): there the local
    contrast falls well below that of the same place in other sections.
    """
    img = np.asarray(image, np.float32)
    h, w = img.shape
    br = int(half_size)
    out = np.full(len(nodes), np.nan)
    for i, (x, y) in enumerate(np.rint(np.asarray(nodes, float)).astype(int)):
        if x - br < 0 or y - br < 0 or x + br >= w or y + br >= h:
            continue
        blk = img[y - br:y + br + 1, x - br:x + br + 1]
        if np.isfinite(blk).all():
            out[i] = float(blk.std())
    return out
