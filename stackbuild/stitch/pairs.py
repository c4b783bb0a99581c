"""Registration of one tile pair from its overlap strips: coarse, re-cut, refine, score."""
from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np
import scipy.fft

from .overlaps import Overlap
from .phasecorr import phase_correlate, taper_window

#: Overlaps narrower than this (pixels) after re-cutting cannot be scored.
MIN_SCORED = 8
#: Width (pixels) of the cosine ramp at the edges of the coarse-pass strips.
COARSE_TAPER = 4
#: Search radius (pixels) per bin of the coarse pass, and the largest binning.
COARSE_PIXELS_PER_BIN = 24
MAX_COARSE_BIN = 4


@dataclass
class PairResult:
    """What :func:`register_pair` found for one pair.

    ``dx, dy`` is the position of ``b`` minus the position of ``a`` (section
    pixels). ``reason`` is empty for an accepted pair. ``mean_*``, ``std_*``
    describe the shared overlap in each tile (for the gain/offset solve);
    ``area`` is its size in pixels.
    """

    dx: float
    dy: float
    ncc: float
    peak_ratio: float
    reason: str = ""
    mean_a: float = 0.0
    std_a: float = 0.0
    mean_b: float = 0.0
    std_b: float = 0.0
    area: int = 0


def fast_len_below(n: int) -> int:
    """Return the largest ``m <= n`` whose only prime factors are 2, 3 and 5 (fast FFT sizes)."""
    for m in range(int(n), 0, -1):
        k = m
        for p in (2, 3, 5):
            while k % p == 0:
                k //= p
        if k == 1:
            return m
    return 1


def _cut(strip: np.ndarray, pad: tuple, box: tuple) -> np.ndarray:
    """Return ``box`` (tile pixels) out of ``strip`` (which holds tile pixels ``pad``), cropped to fast FFT sizes."""
    x0, y0, x1, y1 = box
    w, h = x1 - x0, y1 - y0
    fw, fh = fast_len_below(w), fast_len_below(h)
    x0 += (w - fw) // 2
    y0 += (h - fh) // 2
    return strip[y0 - pad[1]:y0 - pad[1] + fh, x0 - pad[0]:x0 - pad[0] + fw]


def ncc_after_shift(fixed: np.ndarray, moving: np.ndarray, shift_xy: tuple[float, float]
                    ) -> tuple[float, np.ndarray, np.ndarray]:
    """Return the normalised cross-correlation of ``fixed`` and ``moving`` moved back by ``shift_xy``.

    ``moving`` is resampled bilinearly (``cv2.warpAffine``) at ``q + shift``
    so that it lines up with ``fixed`` (see :func:`phase_correlate` for the
    shift convention); a border of ``ceil(|shift|) + 1`` pixels is left out.
    Also returns the two compared interiors.
    """
    dx, dy = shift_xy
    m = np.array([[1.0, 0.0, dx], [0.0, 1.0, dy]], dtype=np.float64)
    h, w = fixed.shape
    warped = cv2.warpAffine(np.ascontiguousarray(moving, dtype=np.float32), m, (w, h),
                            flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP, borderMode=cv2.BORDER_REPLICATE)
    bx, by = math.ceil(abs(dx)) + 1, math.ceil(abs(dy)) + 1
    fa = np.asarray(fixed[by:h - by, bx:w - bx], np.float32)
    fb = warped[by:h - by, bx:w - bx]
    if fa.size < 4:
        return 0.0, fa, fb
    za, zb = fa - fa.mean(), fb - fb.mean()
    den = float(np.sqrt((za * za).sum() * (zb * zb).sum()))
    return (float((za * zb).sum()) / den if den > 0 else 0.0), fa, fb


def coarse_bin(search: float) -> int:
    """Return the binning of the coarse pass for a search radius of ``search`` pixels.

    The coarse pass only needs the whole-pixel offset to within a few
    pixels (the re-cut pass measures the rest at full resolution), so wide
    searches run on binned strips: one bin per ``COARSE_PIXELS_PER_BIN``
    pixels of search radius, at most ``MAX_COARSE_BIN``.
    """
    return int(max(1, min(MAX_COARSE_BIN, search // COARSE_PIXELS_PER_BIN)))


def _coarse_canvases(strip_a, strip_b, ov: Overlap, nominal, binning: int = 1,
                     reach: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Return both kept strips, tapered, on one zero canvas laid out in tile-a pixels, binned by ``binning``.

    Each strip reaches ``margin`` pixels into its own tile beyond the
    nominal overlap, so whatever the stage error (up to the margin), the
    whole true overlap is on both canvases. Binning averages ``binning``
    x ``binning`` blocks (``cv2.resize`` with ``INTER_AREA``, exact block
    means since the canvas is a whole number of blocks). The canvas extends
    ``reach`` pixels beyond the strips, so that a circular correlation
    cannot alias a shift of up to ``reach`` onto the opposite sign.
    """
    nx, ny = nominal
    pa, pb = ov.pad_a, (ov.pad_b[0] + nx, ov.pad_b[1] + ny, ov.pad_b[2] + nx, ov.pad_b[3] + ny)
    ux0, uy0 = min(pa[0], pb[0]), min(pa[1], pb[1])
    # Room for the whole search beyond the strips, so that no shift within it wraps around.
    w = binning * scipy.fft.next_fast_len(-(-(max(pa[2], pb[2]) - ux0 + reach) // binning), real=True)
    h = binning * scipy.fft.next_fast_len(-(-(max(pa[3], pb[3]) - uy0 + reach) // binning), real=True)
    out = []
    for strip, p in ((strip_a, pa), (strip_b, pb)):
        c = np.zeros((h // binning, w // binning), np.float32)
        s = np.asarray(strip, np.float32)
        # Each strip is binned on its own, laid on the bin grid of the canvas (zero rows and columns in
        # front up to the bin boundary), which gives the same block means as binning the whole canvas.
        ox, oy = p[0] - ux0, p[1] - uy0
        lx, ly = ox % binning, oy % binning
        bw, bh = -(-(lx + s.shape[1]) // binning), -(-(ly + s.shape[0]) // binning)
        buf = np.zeros((bh * binning, bw * binning), np.float32) if binning > 1 else c[oy:oy + bh, ox:ox + bw]
        view = buf[ly:ly + s.shape[0], lx:lx + s.shape[1]]
        np.subtract(s, np.float32(s.mean()), out=view)
        view *= taper_window(*s.shape, COARSE_TAPER)
        if binning > 1:
            c[oy // binning:oy // binning + bh, ox // binning:ox // binning + bw] = cv2.resize(
                buf, (bw, bh), interpolation=cv2.INTER_AREA)
        out.append(c)
    return out[0], out[1]


def _true_box(d: np.ndarray, size_a: tuple[int, int], size_b: tuple[int, int], ov: Overlap):
    """Return the overlap in tile-a pixels for integer offset ``d`` of b, within both kept strips."""
    dx, dy = int(d[0]), int(d[1])
    pa, pb = ov.pad_a, ov.pad_b
    x0 = max(0, dx, pa[0], pb[0] + dx)
    y0 = max(0, dy, pa[1], pb[1] + dy)
    x1 = min(size_a[0], dx + size_b[0], pa[2], pb[2] + dx)
    y1 = min(size_a[1], dy + size_b[1], pa[3], pb[3] + dy)
    return x0, y0, x1, y1


def register_pair(strip_a: np.ndarray, strip_b: np.ndarray, ov: Overlap,
                  size_a: tuple[int, int], size_b: tuple[int, int], nominal: tuple[int, int],
                  search: float, upsample: int, min_ncc: float,
                  min_peak_margin: float, spectral_exponent: float = 1.0,
                  spectrum_sigma: float = 0.0) -> PairResult:
    """Return the measured offset of tile ``b`` relative to tile ``a`` and its confidence.

    Parameters
    ----------
    strip_a, strip_b : ndarray
        Pixels ``ov.pad_a`` of tile ``a`` and ``ov.pad_b`` of tile ``b``
        (illumination-corrected, float32).
    ov : Overlap
        The pair's boxes.
    size_a, size_b : (int, int)
        ``(width, height)`` of the two tiles.
    nominal : (int, int)
        Integer stage offset of ``b`` relative to ``a`` (``box_a - box_b``).
    search : float
        Largest difference (pixels, each axis) between the measured and the
        nominal offset: twice the largest stage error, since both tiles may be
        off, in opposite directions.
    upsample, min_ncc, min_peak_margin, spectral_exponent, spectrum_sigma
        As in :class:`~stackbuild.stitch.settings.StitchSettings`.

    Returns
    -------
    PairResult
        With ``reason`` one of ``""``, ``"far_from_stage"``, ``"small_overlap"``,
        ``"weak_peak"``, ``"low_ncc"``.

    Notes
    -----
    Pass 1 correlates the two kept strips, each tapered and laid on a zero
    canvas and binned by :func:`coarse_bin` (search bounded by ``search``;
    the binned peak refined to a quarter of a full-resolution pixel). The
    strips are then re-cut at the overlap implied by that estimate, so that
    both hold the same specimen area, and correlated again at full
    resolution; the residual shift is now small (within a pixel, else the
    strips are re-cut once more), where the Hann window's bias is
    negligible. The peak ratio and NCC of the final pass decide acceptance.
    """
    nom = np.asarray(nominal, dtype=np.float64)
    search = float(search)
    spectral = dict(spectral_exponent=spectral_exponent,
                    lowpass=spectrum_sigma if spectrum_sigma > 0 else None)
    b = coarse_bin(search)
    # Two bins of slack: a shift just inside the search must not fall on the coarse edge.
    limit = search + 2 * b
    fa, fb = _coarse_canvases(strip_a, strip_b, ov, nominal, b, int(math.ceil(limit)))
    # Low-pass on the binned canvases would cut b times more of the band; the bins already average noise.
    # The binned peak refined to a quarter of a full-resolution pixel, so that the first cut at full
    # resolution is usually within a pixel of the final one and needs no cut more.
    (sx, sy), ratio = phase_correlate(fa, fb, upsample=4 * b if b > 1 else 1, max_shift=limit / b,
                                      window=False, spectral_exponent=spectral_exponent)
    d = nom - b * np.array([sx, sy])
    if max(abs(sx), abs(sy)) >= limit / b - 1:
        return PairResult(float(d[0]), float(d[1]), 0.0, ratio, "far_from_stage")
    for _ in range(4):
        di = np.round(d)
        x0, y0, x1, y1 = _true_box(di, size_a, size_b, ov)
        if min(x1 - x0, y1 - y0) < MIN_SCORED:
            return PairResult(float(d[0]), float(d[1]), 0.0, ratio, "small_overlap")
        box_b = (x0 - int(di[0]), y0 - int(di[1]), x1 - int(di[0]), y1 - int(di[1]))
        ca, cb = _cut(strip_a, ov.pad_a, (x0, y0, x1, y1)), _cut(strip_b, ov.pad_b, box_b)
        (sx, sy), ratio = phase_correlate(ca, cb, upsample=upsample, max_shift=2 * b + 2, **spectral)
        d = di - np.array([sx, sy])
        if max(abs(sx), abs(sy)) <= 1.0:
            break
    if np.max(np.abs(d - nom)) > limit:
        return PairResult(float(d[0]), float(d[1]), 0.0, ratio, "far_from_stage")
    ncc, _, _ = ncc_after_shift(ca, cb, (sx, sy))
    reason = "weak_peak" if ratio < min_peak_margin else ("low_ncc" if ncc < min_ncc else "")
    # Intensity statistics from the two cuts as they are (the same area to within a pixel):
    # the resampled one is smoothed by the interpolation, which would bias its spread low.
    return PairResult(float(d[0]), float(d[1]), ncc, ratio, reason,
                      float(ca.mean()), float(ca.std()), float(cb.mean()), float(cb.std()), int(ca.size))
