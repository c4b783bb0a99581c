"""Block matching between two coarse-aligned images on a regular grid, with sub-pixel shifts.

Pure functions of arrays. Grid nodes and shifts are ``(x, y)`` in the
images' (working) pixels; a shift ``v`` at node ``p`` means the content of
``fixed`` around ``p`` is found in ``moving`` around ``p + v``.

All blocks of one call are matched at once: patches are cut out as one
``(N, P, P)`` stack and every Fourier transform, peak search and sub-pixel
refinement is a batched array operation (in slices of a few hundred blocks,
so memory stays bounded).
"""
from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft

#: blocks handled per batch; bounds the working memory of one call (common practice, no source)
_BATCH = 256
#: ... and block matching takes as many blocks per batch as hold this many pixels (256 blocks of
#: 75 px; smaller blocks come in larger batches, so the per-batch overhead does not dominate)
_BATCH_PIXELS = 256 * 75 * 75
#: sub-pixel refinement: upsampling factor and half-width (pixels) of the refined neighbourhood
_UPSAMPLE = 16
_REFINE_HALF = 0.75
#: nodes keep at least this many pixels more than the matcher reads between them and an image's edge
_RIM = 8


def _side(half_size: int, max_shift: int) -> int:
    """Return the block side: the next size whose prime factors are 2, 3 and 5 (fast for the FFT; a side
    of 74 = 2 x 37 costs about 1.4x one of 75)."""
    return sfft.next_fast_len(2 * (int(half_size) + int(max_shift)) + 2, real=True)


@dataclass
class BlockMatches:
    """What block matching found at every node.

    Attributes
    ----------
    shifts : ndarray, shape (N, 2)
        ``(dx, dy)`` working pixels; NaN where no match was made.
    peak : ndarray, shape (N,)
        Height of the band-limited phase-correlation peak, relative to a
        perfect match (1): the share of the band's structure that moved
        together. NaN where unmatched.
    ncc : ndarray, shape (N,)
        Normalised cross-correlation of the band-passed blocks at the match
        (in [-1, 1]); NaN where unmatched.
    margin : ndarray, shape (N,)
        ``1 - second / best``: how far the best correlation peak stands above
        the best other local peak in the search window (0 = an equal rival, a
        match that repeating or fresh texture could have made). NaN where
        unmatched.

    isotropy : ndarray, shape (N,)
        Smaller over larger eigenvalue of the template's gradient structure
        tensor (0 = a straight edge or stripes, whose shift along the edge
        the block cannot tell; 1 = structure in every direction). NaN where
        unmatched.
    """

    shifts: np.ndarray
    peak: np.ndarray
    ncc: np.ndarray
    margin: np.ndarray
    isotropy: np.ndarray

    @property
    def confidence(self) -> np.ndarray:
        """Return ``peak * margin * sqrt(isotropy)`` in [0, 1] (0 where unmatched).

        High only for a strong, unrivalled phase-correlation peak of a block
        with structure in more than one direction: most of the band's
        structure moved together, nothing else in the search window looked
        alike, and the block is not a lone straight edge.
        """
        c = np.clip(self.peak, 0, 1) * np.clip(self.margin, 0, 1) * np.sqrt(np.clip(self.isotropy, 0, 1))
        return np.nan_to_num(c)


def _taper(n: int, flat: float, radius: float, centre: np.ndarray | None = None) -> np.ndarray:
    """Return a 1-D window of length ``n`` about its centre: 1 within ``flat``, cosine to 0 at ``radius``.

    ``centre``: ``(m,)`` offsets of the window from the middle (pixels, any
    fraction); then ``m`` windows, ``(m, n)``.
    """
    x = np.arange(n) - (n - 1) / 2.0
    x = np.abs(x if centre is None else x[None, :] - np.asarray(centre, float)[:, None])
    ramp = np.clip((x - flat) / max(radius - flat, 1e-6), 0, 1)
    return (0.5 * (1 + np.cos(np.pi * ramp))).astype(np.float32)


def _patches(img: np.ndarray, xs: np.ndarray, ys: np.ndarray, p: int, rows: np.ndarray | None = None) -> np.ndarray:
    """Return the ``(N, p, p)`` patches whose top-left pixels are ``(xs, ys)`` (a copy).

    ``img`` is one image, or a stack ``(M, H, W)`` of which patch ``i`` is cut
    from image ``rows[i]``.
    """
    if rows is None:
        return np.lib.stride_tricks.sliding_window_view(img, (p, p))[ys, xs]
    return np.lib.stride_tricks.sliding_window_view(img, (p, p), axis=(1, 2))[rows, ys, xs]


def _upsampled(spec: np.ndarray, p: int) -> np.ndarray:
    """Return the inverse real FFT of ``spec`` (``(n, p, p // 2 + 1)``) on a fine grid about shift 0.

    The signal is evaluated exactly, as the trigonometric sum of its
    spectrum: ``(n, k, k)`` samples ``1 / _UPSAMPLE`` pixel apart over
    ``+- _REFINE_HALF`` (the matrix-multiply DFT of Guizar-Sicairos et al.
    2008), as two matrix products over the whole batch.
    """
    n, _, q = spec.shape
    k = int(round(2 * _REFINE_HALF * _UPSAMPLE)) + 1
    off = (np.arange(k) - (k - 1) / 2.0) / _UPSAMPLE
    wx = np.full(q, 2.0)                           # the Hermitian half stands for both halves
    wx[0] = 1.0
    if p % 2 == 0:
        wx[-1] = 1.0
    ey = np.exp(2j * np.pi / p * np.outer(off, sfft.fftfreq(p) * p)).astype(np.complex64)               # (k, p)
    ex = (np.exp(2j * np.pi / p * np.outer(off, sfft.rfftfreq(p) * p)) * wx / (p * p)).astype(np.complex64)
    rows = ey @ spec.astype(np.complex64).transpose(1, 0, 2).reshape(p, n * q)   # (k, n * q)
    rows = rows.reshape(k, n, q).transpose(1, 0, 2).reshape(n * k, q)
    return np.real(rows @ ex.T).reshape(n, k, k)


def _refine(cross: np.ndarray, p: int) -> tuple[np.ndarray, np.ndarray]:
    """Return the ``(n, 2)`` ``(dy, dx)`` maxima near shift 0 of the inverse FFT of ``cross``, and their heights.

    The surface is sampled on the upsampled grid (:func:`_upsampled`); a
    parabola through the best sample and its neighbours, per axis, places
    the peak between samples (1/16 pixel apart, so what is left of the
    parabola's own bias is negligible).
    """
    n = len(cross)
    k = int(round(2 * _REFINE_HALF * _UPSAMPLE)) + 1
    off = (np.arange(k) - (k - 1) / 2.0) / _UPSAMPLE
    up = _upsampled(cross, p)
    r, c = np.divmod(up.reshape(n, -1).argmax(1), k)
    r, c = np.clip(r, 1, k - 2), np.clip(c, 1, k - 2)
    f = _parabola_peak(up, r, c)
    pos = np.column_stack([off[r] + f[:, 0] / _UPSAMPLE, off[c] + f[:, 1] / _UPSAMPLE])
    return pos, up[np.arange(n), r, c]


def _vertex(lo: np.ndarray, mid: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Return the offset in [-1, 1] of the top of the parabola through three equally spaced samples (0 if none)."""
    den = lo - 2 * mid + hi
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(den < 0, 0.5 * (lo - hi) / den, 0.0)
    return np.clip(t, -1.0, 1.0)


def _parabola_peak(surf: np.ndarray, r: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Return the ``(n, 2)`` ``(dy, dx)`` offsets of each surface's top from the inner sample ``(r, c)``, per axis."""
    idx = np.arange(len(surf))
    return np.column_stack([_vertex(surf[idx, r - 1, c], surf[idx, r, c], surf[idx, r + 1, c]),
                            _vertex(surf[idx, r, c - 1], surf[idx, r, c], surf[idx, r, c + 1])])


def _rival(score: np.ndarray, r: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Return, per block, the highest local maximum of ``score`` other than the peak at ``(r, c)``.

    A local maximum is a sample at least as high as its 8 neighbours, inside
    the window's rim; a smooth hill with no second top has no rival (0).
    """
    n, k, _ = score.shape
    s = np.nan_to_num(score, nan=-2.0)
    pad = np.pad(s, ((0, 0), (1, 1), (1, 1)), constant_values=-2.0)
    top = np.ones_like(s, dtype=bool)
    for dy in (-1, 0, 1):
        for dx in (-1, 0, 1):
            if dy or dx:
                top &= s >= pad[:, 1 + dy:1 + dy + k, 1 + dx:1 + dx + k]
    top[:, [0, -1], :] = False
    top[:, :, [0, -1]] = False
    yy, xx = np.mgrid[0:k, 0:k]
    near = (np.abs(yy[None] - r[:, None, None]) <= 1) & (np.abs(xx[None] - c[:, None, None]) <= 1)
    return np.where(top & ~near, s, 0.0).reshape(n, -1).max(1)


def _half_weights(p: int, q: int) -> np.ndarray:
    """Return the ``(q,)`` weights of a real FFT's columns: the Hermitian half stands for both halves."""
    w = np.full(q, 2.0, np.float32)
    w[0] = 1.0
    if p % 2 == 0:
        w[-1] = 1.0
    return w


def _ramped_dot(f_spec: np.ndarray, m_spec: np.ndarray, band: np.ndarray, ey: np.ndarray,
                ex: np.ndarray) -> np.ndarray:
    """Return ``sum(x * y)`` of the real blocks whose real FFTs are ``f_spec * band`` and
    ``m_spec * band * ey * ex`` (ramps of :func:`_ramps`; Parseval, up to a common factor).

    ``Re sum(conj(f) m band^2 ey ex)`` over both Hermitian halves, with the
    column ramp and the halves' weights taken by one batched matrix product.
    """
    n, p, q = f_spec.shape
    g = np.conj(f_spec)
    g *= m_spec
    g *= (band * band * _half_weights(p, q)).astype(np.float32)
    rows = np.matmul(g, ex.reshape(n, q, 1))[..., 0]           # (n, p)
    return np.real((rows * ey.reshape(n, p)).sum(axis=1)).astype(np.float64)


def _power(spec: np.ndarray) -> np.ndarray:
    """Return ``|spec| ** 2`` (float32 for complex64)."""
    power = spec.real * spec.real
    power += spec.imag * spec.imag
    return power


def _sums_of_power(power: np.ndarray, band: np.ndarray | None = None) -> np.ndarray:
    """Return ``(n, 4)``: each block's energy and its gradient structure tensor ``jxx, jyy, jxy``.

    From the power spectra ``|S|^2`` ``(n, p, q)`` of the blocks' real FFTs (times ``band ** 2``
    if given). By Parseval's theorem all four are weighted sums of the power spectrum (the
    gradient is a product with ``2 pi i k``, up to a common factor), so they come out of one
    matrix product.
    """
    n, p, q = power.shape
    if band is not None:
        power = power * (band * band)
    return power.reshape(n, -1).astype(np.float64) @ _sum_weights(p, q)


@functools.lru_cache(maxsize=8)
def _sum_weights(p: int, q: int) -> np.ndarray:
    """Return the ``(p * q, 4)`` weights of :func:`_sums_of_power`: Hermitian halves, ``kx^2``, ``ky^2``, ``kx ky``."""
    ky = sfft.fftfreq(p)[:, None]
    kx = sfft.rfftfreq(p)[None, :]
    w = _half_weights(p, q)[None, :].astype(np.float64)
    weights = np.stack([np.broadcast_to(x, (p, q)) for x in (w, kx * kx * w, ky * ky * w, kx * ky * w)], axis=-1)
    weights = weights.reshape(-1, 4)
    weights.setflags(write=False)
    return weights


def _isotropy(sums: np.ndarray) -> np.ndarray:
    """Return ``lambda_min / lambda_max`` of the gradient structure tensor of each block (from :func:`_sums_of_power`).

    The structure tensor (Harris & Stephens, "A combined corner and edge
    detector", Alvey Vision Conference 1988, doi:10.5244/C.2.23) sums the
    outer products of the gradient; a small ratio means a straight edge,
    along which a block cannot be placed. The sums are taken in the Fourier
    domain (Parseval), where the gradient is a product with ``2 pi i k``.
    """
    jxx, jyy, jxy = sums[:, 1], sums[:, 2], sums[:, 3]
    tr, det = jxx + jyy, jxx * jyy - jxy * jxy
    disc = np.sqrt(np.maximum(tr * tr / 4 - det, 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.nan_to_num((tr / 2 - disc) / (tr / 2 + disc))


def _band(p: int, fine_sigma: float, coarse_sigma: float) -> np.ndarray:
    """Return ``(p, p // 2 + 1)`` real-FFT weights: Gaussian low-pass (``fine_sigma``) times Gaussian high-pass."""
    k2 = sfft.fftfreq(p)[:, None] ** 2 + sfft.rfftfreq(p)[None, :] ** 2
    g = np.exp(-2 * np.pi ** 2 * fine_sigma ** 2 * k2)
    if coarse_sigma > 0:
        g = g * (1 - np.exp(-2 * np.pi ** 2 * coarse_sigma ** 2 * k2))
    return g.astype(np.float32)


def _normalise_spectrum(x: np.ndarray, power: float, weights: np.ndarray | float = 1.0,
                        mag: np.ndarray | None = None) -> np.ndarray:
    """Return ``weights * x / |x| ** power`` (0 where ``x`` is 0), per block.

    One multiplication of ``x`` by a real array (a complex division, or two
    multiplications, cost about twice as much). ``mag``: ``|x|`` if known
    (overwritten).
    """
    mag = np.abs(x) if mag is None else mag
    floor = 1e-9 * mag.reshape(len(x), -1).max(1)[:, None, None] + 1e-30
    np.maximum(mag, floor, out=mag)
    if power != 1.0:
        mag **= power
    np.divide(weights, mag, out=mag)
    x *= mag
    return x


def _filled(x: np.ndarray) -> np.ndarray:
    """Return blocks ``x`` with NaN pixels set to their block's mean of the rest (0 if none)."""
    bad = ~np.isfinite(x)
    rows = np.flatnonzero(bad.any(axis=(1, 2)))
    if not rows.size:
        return x
    out = np.array(x, np.float32)
    sub = out[rows]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nan_to_num(np.nanmean(sub, axis=(1, 2)))
    out[rows] = np.where(bad[rows], mean[:, None, None], sub)
    return out


def _ramps(shift: np.ndarray, q: int) -> tuple[np.ndarray, np.ndarray]:
    """Return the separable Fourier phase ramps ``(n, q, 1)`` and ``(n, 1, q // 2 + 1)`` of ``shift`` ``(n, 2)`` ``(dy, dx)``.

    Their product times a block's real FFT is the spectrum of the block
    resampled at ``p + shift`` (circularly); one complex exponential per row
    and per column instead of one per frequency.
    """
    ey = np.exp(2j * np.pi * sfft.fftfreq(q)[None, :] * shift[:, 0, None]).astype(np.complex64)
    ex = np.exp(2j * np.pi * sfft.rfftfreq(q)[None, :] * shift[:, 1, None]).astype(np.complex64)
    return ey[:, :, None], ex[:, None, :]


@dataclass(frozen=True)
class MatchPlan:
    """What matching blocks of one size needs, made once (:func:`match_plan`).

    Attributes
    ----------
    half_size, max_shift : int
        As in :func:`match_blocks`.
    p : int
        Block side.
    reach : int
        How far from a node matching reads (:func:`block_reach`).
    band : ndarray, shape (p, p // 2 + 1)
        Band-pass weights of the real FFT.
    win : ndarray, shape (p, p)
        The window, flat out to ``half_size``.
    batch : int
        Blocks matched per batch.
    power : float
        Spectral normalisation (see :func:`match_blocks`).
    norm : float
        Peak height of a perfect match: the band's own inverse transform at 0.
    root_band : ndarray, shape (p, p // 2 + 1)
        The square root of ``band``: each side of a match carries half of it
        (:meth:`whiten`), so their product carries the band.
    """

    half_size: int
    max_shift: int
    p: int
    reach: int
    band: np.ndarray
    win: np.ndarray
    batch: int
    power: float
    norm: float
    root_band: np.ndarray

    def spectrum(self, x: np.ndarray) -> np.ndarray:
        """Return the real FFTs of blocks ``x`` ``(n, p, p)`` less their means, under the window."""
        return sfft.rfft2((x - x.mean(axis=(1, 2), keepdims=True)) * self.win)

    def moved_spectrum(self, x: np.ndarray, shift: np.ndarray) -> np.ndarray:
        """Return :meth:`spectrum` of blocks ``x`` with the window moved by ``shift`` ``(n, 2)`` ``(dy, dx)``."""
        p = self.p
        wy = _taper(p, self.half_size, p / 2.0, shift[:, 0])
        wx = _taper(p, self.half_size, p / 2.0, shift[:, 1])
        return sfft.rfft2((x - x.mean(axis=(1, 2), keepdims=True)) * wy[:, :, None] * wx[:, None, :])

    def whiten(self, spec: np.ndarray, power: np.ndarray | None = None) -> np.ndarray:
        """Return ``root_band * spec / |spec| ** power`` (a new array): one side of :meth:`cross`.

        ``|conj(f) m| = |f| |m|``, so the normalised cross-power spectrum
        factors into the two blocks' own whitened spectra: a block's is made
        once and serves every block it is matched with (differs from
        normalising the product only where a bin is below 1e-9 of its
        block's largest, where both are 0 to float32 precision). ``power``:
        ``|spec| ** 2`` if known.
        """
        mag = None if power is None else np.sqrt(power)
        return _normalise_spectrum(np.array(spec, np.complex64), self.power, self.root_band, mag)

    def cross(self, f_white: np.ndarray, m_white: np.ndarray) -> np.ndarray:
        """Return the band-limited, normalised cross-power spectra of blocks from their :meth:`whiten` spectra."""
        out = np.conj(f_white)
        out *= m_white
        return out


def match_plan(half_size: int, max_shift: int, *, fine_sigma: float = 1.0, coarse_sigma: float | None = None,
               power: float = 1.0) -> MatchPlan:
    """Return the :class:`MatchPlan` of blocks of ``half_size`` searched to ``max_shift`` (see :func:`match_blocks`)."""
    hs, ms = int(half_size), int(max_shift)
    if hs < 2 or ms < 1:
        raise ValueError(f"half_size must be >= 2 and max_shift >= 1, got {hs}, {ms}")
    p = _side(hs, ms)
    band = _band(p, float(fine_sigma), float(hs if coarse_sigma is None else coarse_sigma))
    taper = _taper(p, hs, p / 2.0)
    norm = float(sfft.irfft2(band, s=(p, p))[0, 0])
    return MatchPlan(hs, ms, p, block_reach(hs, ms), band, np.outer(taper, taper),
                     max(16, _BATCH_PIXELS // (p * p)), float(power), norm, np.sqrt(band))


@dataclass
class BlockSpectra:
    """The windowed spectra of one image's blocks at integer nodes: made once, matched against many images.

    Attributes
    ----------
    xy : ndarray of int, shape (N, 2)
        The nodes ``(x, y)``.
    usable : ndarray of bool, shape (N,)
        The node lies inside the image by the plan's reach and the window's
        flat centre holds data.
    spec : ndarray of complex64, shape (N, p, p // 2 + 1)
        The real FFT of each block (missing pixels at the block's mean), less
        its mean, under the window; 0 where not usable.
    sums : ndarray, shape (N, 4)
        :func:`_sums_of_power` of the band-passed spectra.
    white : ndarray of complex64, shape (N, p, p // 2 + 1), optional
        :meth:`MatchPlan.whiten` of ``spec`` (made by :func:`match_spectra` when None).
    """

    xy: np.ndarray
    usable: np.ndarray
    spec: np.ndarray
    sums: np.ndarray
    white: np.ndarray | None = None


def block_spectra(image: np.ndarray, xy: np.ndarray, plan: MatchPlan, rows: np.ndarray | None = None) -> BlockSpectra:
    """Return the :class:`BlockSpectra` of ``image`` at integer nodes ``xy`` (``(N, 2)`` ``(x, y)``).

    With ``rows``, ``image`` is a stack ``(M, H, W)`` and block ``i`` lies in image ``rows[i]``.
    """
    xy = np.asarray(xy, int).reshape(-1, 2)
    n, p, reach, hs = len(xy), plan.p, plan.reach, plan.half_size
    half = p // 2
    h, w = image.shape[-2:]
    usable = (xy[:, 0] >= reach) & (xy[:, 1] >= reach) & (xy[:, 0] + reach < w) & (xy[:, 1] + reach < h)
    idx = np.flatnonzero(usable)
    parts = None
    if idx.size:
        x = _patches(image, xy[idx, 0] - half, xy[idx, 1] - half, p, None if rows is None else rows[idx])
        # the window's flat centre must hold data; beyond it, missing pixels (a section's edge) take
        # the block's mean, which the taper then fades out
        core = np.isfinite(x[:, half - hs:half + hs + 1, half - hs:half + hs + 1]).all(axis=(1, 2))
        usable[idx[~core]] = False
        idx = idx[core]
        if idx.size:
            x = x if core.all() else x[core]
            sp = plan.spectrum(_filled(x))
            pw = _power(sp)
            parts = (sp, _sums_of_power(pw, plan.band), plan.whiten(sp, pw))
            if idx.size == n:           # every block usable: no zero-filled copies
                return BlockSpectra(xy, usable, parts[0], parts[1], parts[2])
    spec = np.zeros((n, p, p // 2 + 1), np.complex64)
    white = np.zeros_like(spec)
    sums = np.zeros((n, 4))
    if parts is not None:
        spec[idx], sums[idx], white[idx] = parts
    return BlockSpectra(xy, usable, spec, sums, white)


def match_spectra(fixed: BlockSpectra, moving: BlockSpectra, moving_image: np.ndarray, plan: MatchPlan,
                  subpixel: bool = True, rows: np.ndarray | None = None) -> BlockMatches:
    """Return the :class:`BlockMatches` of two images' blocks at the same nodes (see :func:`match_blocks`).

    ``moving`` holds the blocks of ``moving_image`` (cut again there at the
    match by the second pass); ``rows`` as in :func:`block_spectra`.
    A section's blocks are transformed once and matched against each of
    its neighbours, on either side.
    """
    n = len(fixed.xy)
    out = BlockMatches(np.full((n, 2), np.nan), *(np.full(n, np.nan) for _ in range(4)))
    good = np.flatnonzero(fixed.usable & moving.usable)
    if not good.size:
        return out
    sel = slice(None) if good.size == n else good          # a view when every block is matched

    def white(sp):
        return sp.white[sel] if sp.white is not None else plan.whiten(sp.spec[sel])

    s, pk, c, g, i = _match_core(fixed.spec[sel], white(fixed), fixed.sums[sel], moving.spec[sel],
                                 white(moving), moving.sums[sel], moving_image, fixed.xy[sel], plan, subpixel,
                                 None if rows is None else rows[sel])
    out.shifts[good], out.peak[good], out.ncc[good], out.margin[good], out.isotropy[good] = s, pk, c, g, i
    return out


def _match_core(f_spec, f_white, f_sums, m_spec, m_white, m_sums, m_img, xy, plan, subpixel, rows):
    """Match usable blocks by their spectra; return shifts (dx, dy), peak, ncc, margin, isotropy."""
    n, p, ms = len(xy), plan.p, plan.max_shift
    half = p // 2
    out = [np.full((n, 2), np.nan)] + [np.full(n, np.nan) for _ in range(4)]
    # pass 1: whole-pixel peak of the band-limited phase correlation within +- max_shift
    cross = plan.cross(f_white, m_white)
    k = 2 * ms + 1
    wrap = (np.arange(k) - ms) % p                  # shifts -ms..ms of the circular surface
    surf = sfft.irfft2(cross, s=(p, p))[:, wrap][:, :, wrap]
    surf /= plan.norm
    r, c = np.divmod(surf.reshape(n, -1).argmax(1), k)
    top = surf.reshape(n, -1).max(1)
    rival = _rival(surf, r, c)
    ok = (r > 0) & (r < k - 1) & (c > 0) & (c < k - 1)                 # an edge peak may lie beyond
    whole = np.column_stack([r - ms, c - ms]).astype(float)          # (dy, dx)
    if subpixel:
        # a first sub-pixel guess from a parabola through the peak and its neighbours (biased toward
        # whole pixels by up to about a third of a pixel; the second pass measures what it leaves)
        sub = _parabola_peak(surf, np.clip(r, 1, k - 2), np.clip(c, 1, k - 2))
        est = whole + sub
        # pass 2: cut the moving block again at that shift, so the window (the same on both sides)
        # sees nearly the same content, and measure what is left: the window's pull toward no shift,
        # removed. Whole pixels by the cut; the rest by moving the window instead of the content
        # (the taper is a formula, evaluated between pixels), so the block's content stays put and
        # the peak is read about the fraction
        cut = np.rint(est).astype(int)
        frac = est - cut
        m2 = _patches(m_img, xy[:, 0] - half + cut[:, 1], xy[:, 1] - half + cut[:, 0], p, rows)
        m2_spec = plan.moved_spectrum(_filled(m2), frac)
        ey, ex = _ramps(frac, p)
        cross = plan.cross(f_white, plan.whiten(m2_spec))
        cross *= ey
        cross *= ex
        rest, height = _refine(cross, p)
        est = est + rest
        sub = sub + rest
        m_spec, m_energy = m2_spec, _sums_of_power(_power(m2_spec), plan.band)[:, 0]
    else:
        # the same surface evaluated between pixels about that peak (upsampled DFT of the cross-power
        # spectrum moved by the whole-pixel shift; no new transform), and the moving block's spectrum
        # brought to the whole-pixel shift (circularly) for the NCC
        ey, ex = _ramps(whole, p)
        cross *= ey
        cross *= ex
        sub, height = _refine(cross, p)
        est = whole + sub
        m_energy = m_sums[:, 0]
    # NCC of the band-limited, windowed blocks at the match (for the trust threshold; one pass: the
    # whole-pixel match, circularly), by Parseval's theorem straight from the spectra; the phase
    # ramps have unit modulus, so the moved block's energy is its own
    with np.errstate(divide="ignore", invalid="ignore"):
        ncc = _ramped_dot(f_spec, m_spec, plan.band, ey, ex) / np.sqrt(f_sums[:, 0] * m_energy)
        margin = np.clip(1.0 - np.maximum(rival, 0.0) / top, 0.0, 1.0)
    ok &= np.isfinite(ncc) & (np.abs(sub) < 1.0).all(axis=1)
    out[0][ok] = est[ok][:, ::-1]
    out[1][ok] = (height / plan.norm)[ok]
    out[2][ok] = ncc[ok]
    out[3][ok] = margin[ok]
    out[4][ok] = _isotropy(f_sums[ok])
    return out


def match_blocks(fixed: np.ndarray, moving: np.ndarray, nodes: np.ndarray, half_size: int,
                 max_shift: int, *, fine_sigma: float = 1.0, coarse_sigma: float | None = None,
                 power: float = 1.0, subpixel: bool = True) -> BlockMatches:
    """Return the sub-pixel shift, peak height, correlation and peak margin of every grid node.

    Parameters
    ----------
    fixed, moving : ndarray, shape (H, W)
        Images of the same frame and size. NaN marks pixels without data;
        a block that meets any is left unmatched.
    nodes : ndarray, shape (N, 2)
        Node positions ``(x, y)``; rounded to the nearest pixel. A node is
        matched when ``half_size + 2 * max_shift + 1`` pixels around it lie
        inside the images (:func:`block_reach`).
    half_size : int
        Each block is ``2 * (half_size + max_shift) + 2`` pixels square (or
        the next size fast for the FFT) under
        a window that is flat out to ``half_size`` and falls to zero at the
        block's edge.
    max_shift : int
        Shifts up to this many pixels in x and y are searched.
    fine_sigma : float
        Structure finer than about this (Gaussian sigma, pixels of these
        images) has little say: texture and dots that change from section to
        section must not drive the match.
    coarse_sigma : float, optional
        Variations coarser than this have little say either (shading);
        ``half_size`` by default.
    power : float
        Spectral normalisation: the cross-power spectrum is divided by its
        magnitude to this power (1 = phase correlation, 0 = plain
        cross-correlation).
    subpixel : bool
        False skips the second pass (the moving block cut again at the
        match) and keeps the sub-pixel peak read off the first surface: the
        shift keeps the window's small pull toward zero, at about half the
        cost; for coarse levels whose answer a finer level refines.

    Returns
    -------
    BlockMatches

    Notes
    -----
    Band-limited phase correlation [1]_: the normalised cross-power spectrum
    of the two windowed blocks, weighted by a Gaussian band-pass, is
    transformed back; its whole-pixel peak within ``+- max_shift`` and a
    parabola through its neighbours give a first shift. The moving block is
    then cut again at that shift, whole pixels by the cut and the fraction
    by moving its window (so the window, the same on both sides, sees
    nearly the same content and pulls the answer toward no shift by a
    negligible amount), and the peak of the new surface is found by
    evaluating it exactly between pixels, 1/16 pixel apart, with the
    matrix-multiply DFT of Guizar-Sicairos et al. [2]_, then a parabola
    through the best sample. Because the surface is evaluated exactly
    between pixels there is no pull toward whole-pixel shifts (peak
    locking), which an integer peak plus a parabola has (the first guess
    has it; the second pass measures what it leaves). With ``subpixel``
    False the first surface itself is evaluated between pixels about its
    peak. Peaks on the edge of the search window are rejected, since the
    true shift may lie beyond it. ``ncc`` is the zero-mean normalised
    cross-correlation [3]_ of the band-passed, windowed blocks at the
    match.

    References
    ----------
    .. [1] Kuglin, C. D. & Hines, D. C. "The phase correlation image
           alignment method", Proc. IEEE Int. Conf. on Cybernetics and
           Society (1975) 163-165.
    .. [2] Guizar-Sicairos, M., Thurman, S. T. & Fienup, J. R. "Efficient
           subpixel image registration algorithms", Optics Letters 33:156-158
           (2008). doi:10.1364/OL.33.000156
    .. [3] Lewis, J. P. "Fast normalized cross-correlation", Vision Interface
           (1995) 120-123.
    """
    if fixed.shape != moving.shape or fixed.ndim != 2:
        raise ValueError(f"fixed and moving must be 2-D of one shape, got {fixed.shape}, {moving.shape}")
    plan = match_plan(half_size, max_shift, fine_sigma=fine_sigma, coarse_sigma=coarse_sigma, power=power)
    f_img = np.asarray(fixed, np.float32)
    m_img = np.asarray(moving, np.float32)
    xy = np.rint(np.asarray(nodes, float).reshape(-1, 2)).astype(int)
    n = len(xy)
    out = BlockMatches(np.full((n, 2), np.nan), *(np.full(n, np.nan) for _ in range(4)))
    for a in range(0, n, plan.batch):
        sel = np.arange(a, min(n, a + plan.batch))
        res = match_spectra(block_spectra(f_img, xy[sel], plan), block_spectra(m_img, xy[sel], plan), m_img,
                            plan, bool(subpixel))
        for name in ("shifts", "peak", "ncc", "margin", "isotropy"):
            getattr(out, name)[sel] = getattr(res, name)
    return out


def match_block_pairs(fixed: np.ndarray, moving: np.ndarray, max_shift: int, *, half_size: int | None = None,
                      fine_sigma: float = 1.0, coarse_sigma: float | None = None, power: float = 1.0,
                      subpixel: bool = True) -> BlockMatches:
    """Return the sub-pixel shift and match quality of each pair of blocks (the project's one estimator).

    The batched form of :func:`match_blocks` for callers that cut their own
    blocks (quality metrics, insets, updates): the same two passes, no
    peak-locking bias, every pair in one array operation.

    Parameters
    ----------
    fixed, moving : ndarray, shape (N, H, W) or (H, W)
        Pairs of blocks of one shape. The shift is measured about each
        block's centre pixel ``(W // 2, H // 2)``; nothing is known outside a
        block (it counts as missing, which the window fades out). NaN marks
        pixels without data.
    max_shift : int
        Shifts up to this many pixels in x and y are searched; a peak on the
        edge of the search window is refused (the true shift may lie beyond).
    half_size : int, optional
        Half-width of the window's flat centre; by default the largest that
        keeps it inside the block after a move by ``max_shift``:
        ``min(H, W) // 2 - max_shift - 1``. It must be at least 2.
    fine_sigma, coarse_sigma, power, subpixel
        As in :func:`match_blocks`.

    Returns
    -------
    BlockMatches
        ``shifts[i] = (dx, dy)``: the content of ``fixed[i]`` at its centre
        ``p`` is found in ``moving[i]`` at ``p + (dx, dy)``; ``peak``,
        ``ncc``, ``margin``, ``isotropy`` and ``confidence`` as there. NaN
        where no match was made.

    Notes
    -----
    Checked against ``skimage.registration.phase_cross_correlation`` on
    translations of ``skimage.data.camera`` with fractional parts 0 to 0.5
    (``tests/test_align_kernels.py``).
    """
    f_all = np.asarray(fixed, np.float32)
    m_all = np.asarray(moving, np.float32)
    if f_all.shape != m_all.shape or f_all.ndim not in (2, 3):
        raise ValueError(f"fixed and moving must be (N, H, W) or (H, W) of one shape, got {f_all.shape}, {m_all.shape}")
    if f_all.ndim == 2:
        f_all, m_all = f_all[None], m_all[None]
    n, h, w = f_all.shape
    ms = int(max_shift)
    hs = min(h, w) // 2 - ms - 1 if half_size is None else int(half_size)
    if hs < 2 or ms < 1:
        raise ValueError(f"half_size must be >= 2 and max_shift >= 1, got {hs}, {ms} (blocks of {h} x {w} px)")
    out = BlockMatches(np.full((n, 2), np.nan), *(np.full(n, np.nan) for _ in range(4)))
    if n == 0:
        return out
    plan = match_plan(hs, ms, fine_sigma=fine_sigma, coarse_sigma=coarse_sigma, power=power)
    reach = plan.reach
    node = np.array([reach + w // 2, reach + h // 2])
    for a in range(0, n, plan.batch):
        sel = np.arange(a, min(n, a + plan.batch))
        pad = ((0, 0), (reach, reach), (reach, reach))
        fp = np.pad(f_all[sel], pad, constant_values=np.nan)
        mp = np.pad(m_all[sel], pad, constant_values=np.nan)
        xy = np.broadcast_to(node, (len(sel), 2))
        rows = np.arange(len(sel))
        res = match_spectra(block_spectra(fp, xy, plan, rows), block_spectra(mp, xy, plan, rows), mp, plan,
                            bool(subpixel), rows)
        for name in ("shifts", "peak", "ncc", "margin", "isotropy"):
            getattr(out, name)[sel] = getattr(res, name)
    return out


def block_reach(half_size: int, max_shift: int) -> int:
    """Return how far (pixels) from a node :func:`match_blocks` reads: nodes need this much array around them."""
    p = _side(half_size, max_shift)
    # the moving block cut again at the match, up to max_shift away, reaches farthest; nodes keep a
    # rim beyond that too (the margin of the Fourier-shifted wider cut it once read): without
    # it the overviews' block grids reach their edges, and the realistic/base residual rose from
    # 0.603 to 0.627 px
    q = sfft.next_fast_len(p + 2 * _RIM, real=True)
    rim = (q - p) // 2
    return max(p // 2 + rim, q - rim - 1 - p // 2) + int(max_shift) + 1


def block_match(fixed: np.ndarray, moving: np.ndarray, nodes: np.ndarray, half_size: int,
                max_shift: int, **kw) -> tuple[np.ndarray, np.ndarray]:
    """Return ``(shifts, ncc)`` of :func:`match_blocks` (see there)."""
    res = match_blocks(fixed, moving, nodes, half_size, max_shift, **kw)
    return res.shifts, res.ncc


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
        stack = np.sort(np.stack(stack), axis=0)             # NaN sort last
        count = np.isfinite(stack).sum(axis=0)
        # the median of each node's valid neighbours, as numpy.nanmedian gives it (the mean of the two
        # middle values for an even count), read off the sorted stack: nanmedian over a small axis
        # loops in Python
        lo = np.take_along_axis(stack, np.maximum(count - 1, 0)[None] // 2, axis=0)[0]
        hi = np.take_along_axis(stack, (count // 2)[None], axis=0)[0]
        med = np.where(count > 0, (lo + hi) / 2, np.nan)
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
    xy = np.rint(np.asarray(nodes, float).reshape(-1, 2)).astype(int)
    inside = np.flatnonzero((xy[:, 0] - br >= 0) & (xy[:, 1] - br >= 0) & (xy[:, 0] + br < w)
                            & (xy[:, 1] + br < h))
    for a in range(0, inside.size, _BATCH):
        sel = inside[a:a + _BATCH]
        blk = _patches(img, xy[sel, 0] - br, xy[sel, 1] - br, 2 * br + 1)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            sd = blk.std(axis=(1, 2))
        out[sel] = np.where(np.isfinite(blk).all(axis=(1, 2)), sd, np.nan)
    return out
