"""Seam residuals: how well two placed tiles agree inside their overlap.

A pure kernel: given two tile images and their solved positions in the
section frame, cut the common area out of both and measure what shift is
still left between them. A correct placement leaves none.
"""
from __future__ import annotations

import cv2
import numpy as np

from .blockmatch import BlockMatches, match_blocks


def overlap_box(pos_a, shape_a, pos_b, shape_b) -> tuple[float, float, float, float] | None:
    """Return ``(x0, y0, x1, y1)`` of the overlap of two placed tiles (section pixels), or None.

    ``pos`` is the ``(x, y)`` of a tile's pixel (0, 0) centre; ``shape`` is ``(height, width)``.
    """
    x0 = max(pos_a[0], pos_b[0])
    y0 = max(pos_a[1], pos_b[1])
    x1 = min(pos_a[0] + shape_a[1], pos_b[0] + shape_b[1])
    y1 = min(pos_a[1] + shape_a[0], pos_b[1] + shape_b[0])
    if x1 - x0 < 1 or y1 - y0 < 1:
        return None
    return x0, y0, x1, y1


def seam_residual(img_a: np.ndarray, pos_a, img_b: np.ndarray, pos_b, *, radius: int = 12,
                  search: int = 6, spacing: int = 24, min_ncc: float = 0.3, smooth: float = 0.0) -> BlockMatches:
    """Return block residuals of tile ``b`` against tile ``a`` over their overlap.

    Parameters
    ----------
    img_a, img_b : ndarray, shape (H, W)
        The two tiles (raw pixels; gain and offset do not matter to NCC).
    pos_a, pos_b : (float, float)
        Solved ``(x, y)`` positions of the tiles' pixel (0, 0) in the section frame.
    radius, search, spacing : int
        Block half size, search half range and grid step (pixels),
        see :func:`stackbuild.qc.blockmatch.match_blocks`.
    min_ncc : float
        Blocks with a weaker correlation peak are dropped.
    smooth : float
        Gaussian sigma (pixels) applied to both crops first (0: none). Two
        exposures carry independent noise; smoothing lowers the spread of the
        block shifts without biasing them (a symmetric filter moves no edge).

    Returns
    -------
    BlockMatches
        ``points`` in section pixels; ``shifts`` are the residual misplacement
        of ``b`` relative to ``a`` (zero when the placement is right).
        Empty when the overlap is too small to hold a block.
    """
    box = overlap_box(pos_a, img_a.shape, pos_b, img_b.shape)
    empty = BlockMatches(np.zeros((0, 2)), np.zeros((0, 2)), np.zeros(0))
    if box is None:
        return empty
    x0, y0, x1, y1 = box
    # Integer crops; the sub-pixel part of the placement difference is the
    # shift a perfect placement would show between the crops.
    ia = np.array([np.ceil(x0 - pos_a[0]), np.ceil(y0 - pos_a[1])]).astype(int)
    ib = np.array([np.ceil(x0 - pos_b[0]), np.ceil(y0 - pos_b[1])]).astype(int)
    w = int(min(img_a.shape[1] - ia[0], img_b.shape[1] - ib[0], np.floor(x1 - x0)))
    h = int(min(img_a.shape[0] - ia[1], img_b.shape[0] - ib[1], np.floor(y1 - y0)))
    if min(w, h) < 2 * (radius + search) + 1:
        return empty
    ca = np.asarray(img_a[ia[1]:ia[1] + h, ia[0]:ia[0] + w], np.float32)
    cb = np.asarray(img_b[ib[1]:ib[1] + h, ib[0]:ib[0] + w], np.float32)
    if smooth > 0:
        ca = cv2.GaussianBlur(ca, (0, 0), smooth)
        cb = cv2.GaussianBlur(cb, (0, 0), smooth)
    m = match_blocks(ca, cb, spacing=spacing, radius=radius, search=search, min_ncc=min_ncc)
    # crop-a pixel k lies at section pos_a + ia + k; crop-b pixel k at pos_b + ib + k.
    expected = (np.asarray(pos_a, float) + ia) - (np.asarray(pos_b, float) + ib)
    return BlockMatches(m.points + np.asarray(pos_a, float) + ia, m.shifts - expected, m.ncc)
