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
    return cv2.resize(img / mean, (ws, hs), interpolation=cv2.INTER_AREA)


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


def illumination_at_tile_size(profile: np.ndarray, height: int, width: int) -> np.ndarray:
    """Return the illumination profile upsampled to a ``height x width`` tile, float32.

    Exactly ``cv2.resize(profile, (width, height), interpolation=cv2.INTER_LINEAR)``
    (see the module docstring for the sampling convention).
    """
    prof = np.asarray(profile, dtype=np.float32)
    if prof.ndim != 2:
        raise ValueError(f"profile must be 2-D, got shape {prof.shape}")
    return cv2.resize(prof, (int(width), int(height)), interpolation=cv2.INTER_LINEAR)


def solve_gain_offset(pairs: np.ndarray, mean_a: np.ndarray, std_a: np.ndarray,
                      mean_b: np.ndarray, std_b: np.ndarray, n_tiles: int,
                      regularise: float = 1e-3) -> tuple[np.ndarray, np.ndarray]:
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
        Weight of a weak pull toward ``gain = 1, offset = 0`` that fixes tiles
        no pair reaches (and each disconnected group's scale).

    Returns
    -------
    gain, offset : ndarray, shape (n_tiles,)
        With the gauge ``mean(gain) = 1``, ``mean(offset) = 0``.

    Notes
    -----
    For each pair, the corrected overlaps ``g * I + o`` should have equal
    spread and equal mean: ``g_a s_a = g_b s_b`` and ``g_a m_a + o_a = g_b m_b
    + o_b``. These equations are linear in ``(g, o)``; with the two gauge rows
    they form one small sparse least-squares problem per section, solved by
    LSQR (Paige & Saunders, ACM TOMS 8(1):43-71 (1982), doi:10.1145/355984.355989).
    Rows are divided by the section's typical mean so that all are unitless.
    """
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    k = len(pairs)
    cols = [np.asarray(v, dtype=np.float64).reshape(-1) for v in (mean_a, std_a, mean_b, std_b)]
    if any(len(v) != k for v in cols):
        raise ValueError("mean and std arrays must have one entry per pair")
    ma, sa, mb, sb = cols
    n = int(n_tiles)
    scale = float(np.mean(np.r_[ma, mb])) if k else 1.0
    scale = scale if scale > 0 else 1.0
    a, b = pairs[:, 0], pairs[:, 1]
    r = np.arange(k)
    g_of, o_of = (lambda i: i), (lambda i: n + i)
    rows = [r, r, k + r, k + r, k + r, k + r]
    cidx = [g_of(a), g_of(b), g_of(a), g_of(b), o_of(a), o_of(b)]
    vals = [sa / scale, -sb / scale, ma / scale, -mb / scale, np.full(k, 1 / scale), np.full(k, -1 / scale)]
    # Gauge rows (strong) and the weak pull of every tile toward (1, 0).
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
