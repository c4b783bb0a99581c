"""Block matching by normalised cross-correlation on a regular grid.

A pure kernel used by the quality metrics to measure, independently of the
stitcher and the aligner, how far two images that should agree still disagree:
adjacent planes of the aligned volume, or the two sides of a tile seam.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np


@dataclass(frozen=True)
class BlockMatches:
    """Result of :func:`match_blocks`.

    Attributes
    ----------
    points : ndarray, shape (N, 2)
        ``(x, y)`` block centres in the fixed image's pixels.
    shifts : ndarray, shape (N, 2)
        ``(dx, dy)`` such that ``moving(p + d)`` matches ``fixed(p)``.
    ncc : ndarray, shape (N,)
        Peak normalised cross-correlation of each block.
    """

    points: np.ndarray
    shifts: np.ndarray
    ncc: np.ndarray

    @property
    def magnitudes(self) -> np.ndarray:
        """Return ``|d|`` of every block."""
        return np.hypot(self.shifts[:, 0], self.shifts[:, 1]) if len(self.shifts) else np.zeros(0)


def _parabola(lo: float, mid: float, hi: float) -> float:
    """Return the vertex offset in ``[-0.5, 0.5]`` of the parabola through three samples."""
    den = lo - 2.0 * mid + hi
    if not np.isfinite(den) or den >= 0:
        return 0.0
    return float(np.clip(0.5 * (lo - hi) / den, -0.5, 0.5))


def _peak(score: np.ndarray, exclude: int) -> tuple[float, float, float, float]:
    """Return sub-pixel ``(col, row)`` of the maximum of ``score``, the peak value and its margin.

    The margin is the peak minus the best score farther than ``exclude``
    pixels from it; ``-1`` when the peak lies on the border of the search
    window (the true optimum may lie outside).
    """
    r, c = np.unravel_index(int(np.argmax(score)), score.shape)
    rest = score.copy()
    rest[max(0, r - exclude):r + exclude + 1, max(0, c - exclude):c + exclude + 1] = -np.inf
    second = float(rest.max()) if np.isfinite(rest).any() else -1.0
    margin = float(score[r, c]) - second
    if r in (0, score.shape[0] - 1) or c in (0, score.shape[1] - 1):
        margin = -1.0
    dr = dc = 0.0
    if 0 < r < score.shape[0] - 1:
        dr = _parabola(score[r - 1, c], score[r, c], score[r + 1, c])
    if 0 < c < score.shape[1] - 1:
        dc = _parabola(score[r, c - 1], score[r, c], score[r, c + 1])
    return c + dc, r + dr, float(score[r, c]), margin


def grid_centres(shape: tuple[int, int], spacing: int, margin: int) -> np.ndarray:
    """Return ``(x, y)`` integer centres of a regular grid inside ``shape`` keeping ``margin`` free.

    The grid is centred in the image so that border effects are symmetric.
    """
    h, w = shape

    def axis(n: int) -> np.ndarray:
        span = n - 1 - 2 * margin
        if span < 0:
            return np.zeros(0, int)
        k = span // spacing
        start = margin + (span - k * spacing) // 2
        return start + spacing * np.arange(k + 1)

    xs, ys = np.meshgrid(axis(w), axis(h))
    return np.column_stack([xs.ravel(), ys.ravel()]).astype(int)


def match_blocks(fixed: np.ndarray, moving: np.ndarray, *, spacing: int, radius: int,
                 search: int, min_ncc: float = 0.3, min_margin: float = 0.05,
                 min_std: float = 1e-3, valid: np.ndarray | None = None) -> BlockMatches:
    """Return the local shifts of ``moving`` relative to ``fixed`` on a regular grid.

    Parameters
    ----------
    fixed, moving : ndarray, shape (H, W)
        Images on the same pixel grid (float32 is used internally).
    spacing : int
        Grid step between block centres, pixels.
    radius : int
        Template half size: templates are ``2 * radius + 1`` pixels square.
    search : int
        Largest shift searched in x and y, pixels.
    min_ncc : float
        Blocks whose correlation peak is lower are dropped.
    min_margin : float
        Blocks whose peak does not stand this far above the best score outside
        its neighbourhood (half the template radius) are dropped, as are
        peaks on the border of the search window: a smooth ramp or a
        repeating pattern matches everywhere and tells nothing.
    min_std : float
        Blocks whose template or search window is flatter than this (standard
        deviation, image units) are dropped: they carry no position information.
    valid : ndarray of bool, shape (H, W), optional
        Pixels that hold data in both images; blocks touching invalid pixels
        are dropped (e.g. the empty border of an aligned plane).

    Returns
    -------
    BlockMatches
        Only the blocks that passed the checks.

    Notes
    -----
    Each template is correlated over its search window with zero-mean
    normalised cross-correlation (OpenCV ``TM_CCOEFF_NORMED``, the measure of
    Lewis 1995); the integer peak is refined by fitting a parabola through the
    peak and its two neighbours, separately along x and y. Blocks with a weak
    or ambiguous peak are dropped (common practice, no single source).

    References
    ----------
    .. [1] J. P. Lewis, "Fast normalized cross-correlation", Vision Interface
       (1995) 120-123.
    """
    if fixed.shape != moving.shape or fixed.ndim != 2:
        raise ValueError(f"fixed and moving must be 2-D of equal shape, got {fixed.shape} and {moving.shape}")
    if spacing < 1 or radius < 1 or search < 1:
        raise ValueError("spacing, radius and search must be >= 1")
    f = np.ascontiguousarray(fixed, dtype=np.float32)
    m = np.ascontiguousarray(moving, dtype=np.float32)
    centres = grid_centres(f.shape, spacing, radius + search)
    pts, shifts, scores = [], [], []
    for x, y in centres:
        tpl = f[y - radius:y + radius + 1, x - radius:x + radius + 1]
        win = m[y - radius - search:y + radius + search + 1, x - radius - search:x + radius + search + 1]
        if valid is not None and not valid[y - radius - search:y + radius + search + 1,
                                           x - radius - search:x + radius + search + 1].all():
            continue
        # population standard deviations, as ndarray.std (OpenCV's is a few times cheaper per call)
        if cv2.meanStdDev(tpl)[1][0, 0] < min_std or cv2.meanStdDev(win)[1][0, 0] < min_std:
            continue
        score = cv2.matchTemplate(win, tpl, cv2.TM_CCOEFF_NORMED)
        cx, cy, peak, margin = _peak(score, max(2, radius // 2))
        if not np.isfinite(peak) or peak < min_ncc or margin < min_margin:
            continue
        pts.append((x, y))
        shifts.append((cx - search, cy - search))
        scores.append(peak)
    return BlockMatches(np.asarray(pts, np.float64).reshape(-1, 2),
                        np.asarray(shifts, np.float64).reshape(-1, 2),
                        np.asarray(scores, np.float64))


def summarize(values: np.ndarray) -> dict:
    """Return ``{"n", "rms", "median", "p95", "max"}`` of non-negative residuals (``None`` when empty)."""
    v = np.asarray(values, np.float64)
    if v.size == 0:
        return {"n": 0, "rms": None, "median": None, "p95": None, "max": None}
    if v.size == 1:  # a pair measured from the stitcher's offset (one point): every figure is that value
        x = float(v.reshape(-1)[0])
        return {"n": 1, "rms": math.sqrt(x * x), "median": x, "p95": x, "max": x}
    return {"n": int(v.size), "rms": float(np.sqrt(np.mean(v ** 2))), "median": float(np.median(v)),
            "p95": float(np.percentile(v, 95)), "max": float(v.max())}
