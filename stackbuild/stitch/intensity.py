"""Intensity correction of one section: shared illumination profile, per-tile gain and offset.

Convention of the project (the renderer applies exactly this)::

    corrected = gain * raw / illumination(u, v) + offset

``illumination`` is the stored profile, shape ``(ceil(h / step), ceil(w /
step))``, float32, mean 1, brought to tile size by
:func:`illumination_at_tile_size`: ``cv2.resize(profile, (w, h),
interpolation=cv2.INTER_LINEAR)``, which maps the profile's extent onto the
tile's extent, pixel centre to pixel centre (OpenCV's half-pixel convention:
source coordinate ``(u + 0.5) * ws / w - 0.5``), clamping at the border.
"""
from __future__ import annotations

import math

import cv2
import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import connected_components

from ..tiles import illumination_at_tile_size  # noqa: F401  (defined with the tile reader)


def profile_shape(height: int, width: int, step: int) -> tuple[int, int]:
    """Return ``(ceil(height / step), ceil(width / step))``, the stored profile's shape."""
    if step < 1:
        raise ValueError(f"illumination step must be >= 1, got {step}")
    return math.ceil(height / step), math.ceil(width / step)


def tile_thumbnail(image: np.ndarray, step: int) -> np.ndarray:
    """Return the tile divided by its mean and block-averaged to :func:`profile_shape`, float32.

    Block averaging is ``cv2.resize(..., INTER_AREA)`` to the profile shape
    (exact block means when ``step`` divides the tile size).
    """
    img = np.asarray(image, dtype=np.float32)
    hs, ws = profile_shape(*img.shape, step)
    mean = float(img.mean())
    if mean <= 0:
        raise ValueError("tile mean must be > 0 to normalise it")
    # block means of the tile, then divided by its mean: the same as averaging the divided tile
    return cv2.resize(img, (ws, hs), interpolation=cv2.INTER_AREA) / np.float32(mean)


def _polynomial_fit(values: np.ndarray, degree: int) -> np.ndarray:
    """Return the least-squares 2-D polynomial of total degree ``degree`` through ``values``, at its samples."""
    hs, ws = values.shape
    yy, xx = np.mgrid[:hs, :ws]
    u = (2 * xx + 1) / ws - 1.0   # sample centres on [-1, 1]
    v = (2 * yy + 1) / hs - 1.0
    terms = [(i, j) for i in range(degree + 1) for j in range(degree + 1 - i)
             if i < ws and j < hs]
    basis = np.stack([(u ** i * v ** j).ravel() for i, j in terms], axis=1)
    coef = np.linalg.lstsq(basis, values.ravel().astype(np.float64), rcond=None)[0]
    return (basis @ coef).reshape(hs, ws).astype(np.float32)


def illumination_profile(thumbnails: np.ndarray, degree: int = 4) -> np.ndarray:
    """Return the section's illumination profile from mean-normalised tile thumbnails.

    Parameters
    ----------
    thumbnails : ndarray, shape (T, hs, ws)
        :func:`tile_thumbnail` of the tiles that show specimen (blank and
        saturated tiles left out).
    degree : int
        Total degree of the 2-D polynomial fitted to the per-pixel median
        (smooths it, and keeps its shape right up to the tile edges); a
        negative value keeps the raw median.

    Returns
    -------
    ndarray, shape (hs, ws), float32
        Normalised to mean 1.

    Notes
    -----
    The per-pixel median over many tiles keeps what all tiles share (the
    illumination and detector shading) and rejects the specimen, which
    differs from tile to tile; this is the retrospective flat-field idea of
    estimating shading from the images themselves (Peng et al., on
    retrospective background and shading correction of optical microscopy
    images, Nat. Commun. 8:14836 (2017), doi:10.1038/ncomms14836, use a
    low-rank model; the median with a low-order polynomial is the simplest
    robust version, common practice, no source).
    """
    t = np.asarray(thumbnails, dtype=np.float32)
    if t.ndim != 3 or len(t) == 0:
        raise ValueError(f"thumbnails must be a non-empty (T, hs, ws) stack, got {t.shape}")
    prof = np.median(t, axis=0).astype(np.float32)
    if degree >= 0:
        prof = _polynomial_fit(prof, degree)
    prof = np.maximum(prof, np.float32(1e-3))
    return (prof / prof.mean()).astype(np.float32)


def solve_gain_offset(pairs: np.ndarray, mean_a: np.ndarray, std_a: np.ndarray,
                      mean_b: np.ndarray, std_b: np.ndarray, n_tiles: int,
                      regularise: float = 1e-3, *, eligible: np.ndarray | None = None,
                      levels: np.ndarray | None = None,
                      max_gain_change: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Return per-tile ``gain`` and ``offset`` that make overlapping tiles agree.

    Parameters
    ----------
    pairs : ndarray of int, shape (K, 2)
        Tile indices ``(a, b)`` of accepted pairs.
    mean_a, std_a, mean_b, std_b : ndarray, shape (K,)
        Mean and standard deviation of the illumination-corrected intensities
        (``raw / illumination``) of the shared overlap, as seen in ``a`` and in ``b``.
    n_tiles : int
        Number of tiles.
    regularise : float
        Weight of the pull of every tile toward ``gain = 1, offset = 0`` (the
        section's typical tile), relative to one pair's equations.
    eligible : ndarray of bool, shape (n_tiles,), optional
        Tiles that may take part (default all). The others (blank, saturated,
        unplaced tiles) keep ``gain = 1, offset = 0`` and their pairs are left out,
        so they can never anchor the solve.
    levels : ndarray, shape (n_tiles,), optional
        Each tile's typical raw grey (its median). When given, each connected
        group's offsets are shifted so that, on average over its tiles, the
        correction leaves that level unchanged (``mean((g - 1) level + o) =
        0``): a group keeps its own raw intensity. Averaging the change, not
        matching a median of levels, keeps the other tiles' output steady when
        one tile drops out of the group (its level depends on the specimen,
        its change only on how it was imaged).
    max_gain_change : float, optional
        Gains are clipped to ``[1 / (1 + m), 1 + m]`` and offsets to ``m``
        times the section's typical grey.

    Returns
    -------
    gain, offset : ndarray, shape (n_tiles,)
        Within each group of tiles connected by pairs, ``mean(gain) = 1`` and
        (without ``levels``) ``mean(offset) = 0``; a tile in no pair keeps
        ``(1, 0)``.

    Notes
    -----
    For each pair, the corrected overlaps ``g * I + o`` should have equal
    spread and equal mean: ``g_a s_a = g_b s_b`` and ``g_a m_a + o_a = g_b m_b
    + o_b``. These equations are linear in ``(g, o)``; with the two gauge rows
    of each connected group they form one small sparse least-squares problem
    per group, solved by LSQR (Paige & Saunders, ACM TOMS 8(1):43-71 (1982),
    doi:10.1145/355984.355989). Spread rows are divided by the pair's mean
    spread and mean rows by the section's typical grey, so that every row is
    unitless and of order one. Solving each group on its own, with its own
    gauge, is what keeps groups that no accepted pair joins from being pushed
    apart by the pull of a few tiles.
    """
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    k = len(pairs)
    cols = [np.asarray(v, dtype=np.float64).reshape(-1) for v in (mean_a, std_a, mean_b, std_b)]
    if any(len(v) != k for v in cols):
        raise ValueError("mean and std arrays must have one entry per pair")
    n = int(n_tiles)
    ok = np.ones(n, bool) if eligible is None else np.asarray(eligible, bool).reshape(-1)
    if len(ok) != n:
        raise ValueError(f"eligible must have one entry per tile ({n}), got {len(ok)}")
    if levels is not None and len(np.asarray(levels).reshape(-1)) != n:
        raise ValueError(f"levels must have one entry per tile ({n})")
    use = ok[pairs[:, 0]] & ok[pairs[:, 1]] if k else np.zeros(0, bool)
    ma, sa, mb, sb = (v[use] for v in cols)
    pairs = pairs[use]
    scale = float(np.median(np.r_[ma, mb])) if len(pairs) else 1.0
    if levels is not None and ok.any():
        scale = float(np.median(np.asarray(levels, np.float64)[ok]))
    scale = scale if scale > 0 else 1.0
    gain, offset = np.ones(n), np.zeros(n)
    for members in _groups(n, pairs, ok):
        if len(members) < 2:
            continue
        inside = np.isin(pairs[:, 0], members)
        local = np.searchsorted(members, pairs[inside])
        g, o = _solve_group(local, ma[inside], sa[inside], mb[inside], sb[inside], len(members),
                            scale, regularise)
        gain[members], offset[members] = g, o
    if max_gain_change is not None:
        m = float(max_gain_change)
        gain = np.clip(gain, 1.0 / (1.0 + m), 1.0 + m)
    if levels is not None:
        lev = np.asarray(levels, np.float64).reshape(-1)
        for members in _groups(n, pairs, ok):
            offset[members] -= np.mean((gain[members] - 1.0) * lev[members] + offset[members])
    if max_gain_change is not None:
        offset = np.clip(offset, -max_gain_change * scale, max_gain_change * scale)
    offset[~ok] = 0.0
    gain[~ok] = 1.0
    return gain, offset


def _groups(n: int, pairs: np.ndarray, ok: np.ndarray) -> list[np.ndarray]:
    """Return the sorted tile indices of each group of eligible tiles connected by ``pairs``."""
    graph = sp.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    return [np.flatnonzero((label == c) & ok) for c in np.unique(label[ok])]


def _solve_group(pairs, ma, sa, mb, sb, n, scale, regularise):
    """Return gain and offset of one connected group (gauge: mean gain 1, mean offset 0)."""
    k = len(pairs)
    a, b = pairs[:, 0], pairs[:, 1]
    r = np.arange(k)
    spread = np.maximum(0.5 * (sa + sb), 1e-12)
    rows = [r, r, k + r, k + r, k + r, k + r]
    cidx = [a, b, a, b, n + a, n + b]
    vals = [sa / spread, -sb / spread, ma / scale, -mb / scale, np.full(k, 1 / scale), np.full(k, -1 / scale)]
    # Gauge rows (strong) and the pull of every tile toward (1, 0).
    gauge_w = 10.0 * math.sqrt(max(k, 1))
    rows += [np.full(n, 2 * k), np.full(n, 2 * k + 1), 2 * k + 2 + np.arange(2 * n)]
    cidx += [np.arange(n), n + np.arange(n), np.arange(2 * n)]
    vals += [np.full(n, gauge_w / n), np.full(n, gauge_w / (n * scale)),
             np.r_[np.full(n, regularise), np.full(n, regularise / scale)]]
    rhs = np.zeros(2 * k + 2 + 2 * n)
    rhs[2 * k] = gauge_w
    rhs[2 * k + 2:2 * k + 2 + n] = regularise
    mat = sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cidx))),
                        shape=(len(rhs), 2 * n))
    sol = spla.lsqr(mat, rhs, atol=1e-12, btol=1e-12, iter_lim=20 * (2 * n + 10))[0]
    return sol[:n], sol[n:]
