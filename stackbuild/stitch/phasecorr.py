"""Phase correlation with upsampled-DFT sub-pixel refinement, on real FFTs in float32.

Shift convention (used by everything in :mod:`stackbuild.stitch`)
---------------------------------------------------------------
:func:`phase_correlate` returns ``(dx, dy)`` in **(x, y) order**: the
displacement of the content of ``moving`` relative to ``fixed``, i.e.
``moving[y, x] ~= fixed[y - dy, x - dx]``. This is the *negative* of what
``skimage.registration.phase_cross_correlation`` returns (it gives the shift
that registers ``moving`` onto ``fixed``, in (row, col) order).
"""
from __future__ import annotations

from functools import lru_cache

import numpy as np
import scipy.fft

#: Half-width (pixels) of the neighbourhood excluded around the main peak when
#: looking for the runner-up peak (common practice, no source).
PEAK_EXCLUSION = 3
#: Peak ratios are capped here so that records stay finite.
MAX_PEAK_RATIO = 1000.0
#: The sub-pixel peak is refined under a Gaussian weight of at most this sigma (cycles per
#: pixel) on the cross-power spectrum. Near the Nyquist frequency the phases of sampled data do
#: not follow the shift theorem (aliasing of the pixels' area integration, interpolation), and
#: full spectral normalisation weights them as much as the rest, which pulls the sub-pixel peak
#: toward whole pixels (0.25 px read as 0.15 on area-sampled camera blocks, as
#: scikit-image's phase_cross_correlation reads it too). 0.1 was the best of 0.1 to 0.25 on
#: area-sampled, bilinear, cubic-spline and Fourier shifts of skimage.data.camera, with and
#: without noise (measured, tests/test_stitch_phasecorr.py).
REFINE_SIGMA = 0.1
#: The window is moved by the estimate and the peak refined again only for shifts of at least
#: this many pixels: below it the pull of one window on both images is under 0.01 px (measured on
#: 128 x 128 and 64 px wide blocks of skimage.data.camera moved by exact Fourier shifts, lowpass
#: 0.1), and the second pass costs about 0.7x the first. Stitching re-cuts its strips at the
#: whole-pixel estimate, so its last pass almost never needs it.
MOVED_WINDOW_FROM = 0.5
#: Windows and spectral weights kept per shape. Few: a strip of a 4096 px tile is
#: ~10 MB of float32, and cut sizes vary with each pair's offset, so a long
#: cache would hold hundreds of MB while saving little (they are cheap to make).
WINDOW_CACHE = 4


@lru_cache(maxsize=WINDOW_CACHE)
def hann_window(height: int, width: int) -> np.ndarray:
    """Return a separable 2-D Hann window of shape ``(height, width)``, float32, read-only.

    Notes
    -----
    Symmetric Hann window (``scipy.signal.windows.hann(n, sym=True)``
    equivalent), the outer product of two 1-D windows; cached per shape so
    repeated strips of one size do not recompute it.
    """
    w = np.outer(_hann_at(height, 0.0), _hann_at(width, 0.0)).astype(np.float32)
    w.setflags(write=False)
    return w


def _hann_at(n: int, offset: float) -> np.ndarray:
    """Return the 1-D symmetric Hann window of length ``n`` moved by ``offset`` pixels, float32 (0 outside its support).

    ``_hann_at(n, 0)`` is the 1-D factor of :func:`hann_window`; the window is
    a closed-form function, so it can be evaluated at any fractional offset.
    """
    if n == 1:
        return np.ones(1, np.float32)
    t = np.arange(n) - float(offset)
    w = 0.5 - 0.5 * np.cos(2 * np.pi * t / (n - 1))
    w[(t < 0) | (t > n - 1)] = 0.0
    return w.astype(np.float32)


@lru_cache(maxsize=WINDOW_CACHE)
def taper_window(height: int, width: int, taper: int) -> np.ndarray:
    """Return a separable 2-D Tukey window: flat, with a ``taper``-pixel cosine ramp at each edge; read-only.

    Unlike the Hann window it keeps the middle of a strip at full weight,
    for strips whose shared content may sit near an edge.
    """
    def one(n: int) -> np.ndarray:
        k = max(1, min(int(taper), n // 2))
        w = np.ones(n, np.float32)
        ramp = (0.5 - 0.5 * np.cos(np.pi * (np.arange(k) + 0.5) / k)).astype(np.float32)
        w[:k] = ramp
        w[n - k:] = ramp[::-1]
        return w

    w = np.outer(one(height), one(width)).astype(np.float32)
    w.setflags(write=False)
    return w


def _pad_fast(img: np.ndarray) -> np.ndarray:
    """Return ``img`` zero-padded at the bottom and right to fast FFT lengths.

    Only used after windowing, when the image already falls to zero at its
    edges, so the padding adds no edge and leaves the shift unchanged.
    """
    m, n = img.shape
    fm, fn = scipy.fft.next_fast_len(m), scipy.fft.next_fast_len(n, real=True)
    if (fm, fn) == (m, n):
        return img
    out = np.zeros((fm, fn), np.float32)
    out[:m, :n] = img
    return out


@lru_cache(maxsize=WINDOW_CACHE)
def _gaussian_weight(m: int, n: int, sigma: float) -> np.ndarray:
    """Return ``exp(-|f|^2 / (2 sigma^2))`` on the ``rfft2`` frequency grid (cycles per pixel), float32."""
    fy = np.fft.fftfreq(m)
    fx = np.fft.rfftfreq(n)
    # separable: exp(-(fx^2 + fy^2) / 2s^2) = exp(-fy^2 / 2s^2) exp(-fx^2 / 2s^2), two 1-D exponentials
    g = np.outer(np.exp(-fy * fy / (2.0 * sigma * sigma)).astype(np.float32),
                 np.exp(-fx * fx / (2.0 * sigma * sigma)).astype(np.float32))
    g.setflags(write=False)
    return g


def _signed(n: int) -> np.ndarray:
    """Signed shift for every FFT index: 0, 1, ..., then -n//2 ... -1 (numpy fftfreq order); read-only."""
    s = np.fft.fftfreq(n, 1.0 / n).round().astype(np.int64)
    s.setflags(write=False)
    return s


def _dft_at(spec: np.ndarray, n_cols: int, y0: float, x0: float, offsets: np.ndarray) -> np.ndarray:
    """Return the inverse DFT of the half spectrum ``spec`` at rows ``y0 + offsets`` x columns ``x0 + offsets``.

    ``spec`` is the ``rfft`` cross-power spectrum, shape ``(M, n_cols//2 + 1)``.
    The inverse DFT is evaluated by two matrix products (Guizar-Sicairos et
    al. 2008); Hermitian symmetry lets the half spectrum stand in for the
    full one: every column except 0 and Nyquist counts twice, then the real
    part is taken. ``exp(2 pi i k (y0 + o) / M)`` is the row phase at ``y0``
    times a kernel that depends only on the grid (cached), so each call
    evaluates sines and cosines along one axis only.
    """
    m, nh = spec.shape
    base_y, base_x = _grid_kernels(m, n_cols, nh, offsets.tobytes())
    kern_y = base_y * _cis(float(y0) * _signed(m), m)[None, :]
    kern_x = base_x * _cis(float(x0) * np.arange(nh, dtype=np.float64), n_cols)[:, None]
    return (kern_y @ spec @ kern_x).real


@lru_cache(maxsize=4 * WINDOW_CACHE)
def _grid_kernels(m: int, n_cols: int, nh: int, offsets: bytes) -> tuple[np.ndarray, np.ndarray]:
    """Return the DFT kernels of a grid of ``offsets`` around 0 (rows ``(len, m)``, columns ``(nh, len)``, the
    half spectrum's column weights folded in); read-only. Small: ``len * (m + nh)`` complex64 values."""
    offs = np.frombuffer(offsets, np.float64)
    ky = _signed(m).astype(np.float64)
    kx = np.arange(nh, dtype=np.float64)
    weight = np.full(nh, 2.0, np.float32)
    weight[0] = 1.0
    if n_cols % 2 == 0:
        weight[-1] = 1.0
    kern_y = _cis(np.outer(offs, ky), m)
    kern_x = _cis(np.outer(kx, offs), n_cols)
    kern_x *= weight[:, None]
    kern_y.setflags(write=False)
    kern_x.setflags(write=False)
    return kern_y, kern_x


def _cis(cycles: np.ndarray, period: int) -> np.ndarray:
    """Return ``exp(2 pi i cycles / period)`` as complex64 (angles reduced in float64 first)."""
    angle = ((cycles % period) * (2 * np.pi / period)).astype(np.float32)
    out = np.empty(angle.shape, np.complex64)
    out.real = np.cos(angle)
    out.imag = np.sin(angle)
    return out


def _refine(spec: np.ndarray, n_cols: int, y0: float, x0: float, upsample: int) -> tuple[float, float]:
    """Return the peak of the upsampled correlation within 1.5 px of ``(y0, x0)``, on a ``1/upsample`` grid.

    Two passes instead of one dense ``1.5 upsample``-square grid: a coarse
    grid of step ``1/c`` (``c ~ sqrt(upsample)``) over the 1.5 px window,
    then the fine grid of step ``1/upsample`` over one coarse step around the
    coarse maximum. The correlation is band-limited and smooth within its
    main lobe, so this finds the same grid maximum at about a quarter of the
    cost.
    """
    coarse = max(1, int(round(np.sqrt(upsample))))
    for step, half in ((1.0 / coarse, int(np.ceil(0.75 * coarse))),
                       (1.0 / upsample, int(np.ceil(upsample / coarse)))):
        offs = np.arange(-half, half + 1) * step
        up = _dft_at(spec, n_cols, y0, x0, offs)
        j, i = np.unravel_index(int(np.argmax(up)), up.shape)
        y0, x0 = y0 + offs[j], x0 + offs[i]
    return round(y0 * upsample) / upsample, round(x0 * upsample) / upsample


def _surface(spec: np.ndarray, m: int, n: int, max_shift: float | None):
    """Return the correlation surface of the half spectrum ``spec`` at the shifts within ``max_shift``, and the
    signed shifts of its rows and columns.

    When the search keeps at most half of the rows, the inverse runs along the columns first and only
    the kept rows are transformed along the rows (the same values as the full inverse, at a fraction
    of its cost for a search much smaller than the image).
    """
    sy, sx = _signed(m), _signed(n)
    if max_shift is None:
        return scipy.fft.irfft2(spec, s=(m, n)), sy, sx
    rows = np.flatnonzero(np.abs(sy) <= max_shift)
    cols = np.flatnonzero(np.abs(sx) <= max_shift)
    if 2 * len(rows) > m:
        return scipy.fft.irfft2(spec, s=(m, n))[np.ix_(rows, cols)], sy[rows], sx[cols]
    part = scipy.fft.ifft(spec, axis=0)[rows]
    return scipy.fft.irfft(part, n=n, axis=1)[:, cols], sy[rows], sx[cols]


def _peak_and_ratio(sub: np.ndarray, sy: np.ndarray, sx: np.ndarray, m: int, n: int) -> tuple[float, float, float]:
    """Return the integer peak ``(dy, dx)`` of the searched surface ``sub`` (rows at shifts ``sy``, columns at
    ``sx``, of a full ``m`` x ``n`` surface) and its ratio to the runner-up."""
    r, c = np.unravel_index(int(np.argmax(sub)), sub.shape)
    peak = float(sub[r, c])
    dy, dx = int(sy[r]), int(sx[c])
    # Exclude the peak's (2k+1)^2 neighbourhood, distances measured with wrap-around.
    near_r = np.abs((sy - dy + m // 2) % m - m // 2) <= PEAK_EXCLUSION
    near_c = np.abs((sx - dx + n // 2) % n - n // 2) <= PEAK_EXCLUSION
    sub[np.ix_(near_r, near_c)] = -np.inf
    second = float(sub.max())
    if not np.isfinite(second) or second <= 0:
        ratio = MAX_PEAK_RATIO if peak > 0 else 0.0
    else:
        ratio = min(MAX_PEAK_RATIO, peak / second) if peak > 0 else 0.0
    return float(dy), float(dx), float(ratio)


def _centred(img: np.ndarray, wy: np.ndarray, wx: np.ndarray) -> np.ndarray:
    """Return ``img`` minus its mean weighted by the separable window ``outer(wy, wx)``, so that ``img * window``
    has no DC term (the weighted sum as two matrix-vector products, not a weighted copy of the image)."""
    total = float(wy.sum(dtype=np.float64)) * float(wx.sum(dtype=np.float64))
    if total > 0:
        mean = float(np.dot((wy @ img).astype(np.float64), wx)) / total
    else:
        mean = float(img.mean())
    return img - np.float32(mean)


def _normalised(conj_fixed: np.ndarray, moving: np.ndarray, exponent: float) -> np.ndarray:
    """Return the cross-power spectrum ``F_m conj(F_f)`` divided by its magnitude to the power ``exponent``."""
    spec = scipy.fft.rfft2(moving)
    spec *= conj_fixed
    if exponent:
        # One power of |spec|^2 instead of a square root and a power of |spec|.
        power = spec.real * spec.real
        power += spec.imag * spec.imag
        np.maximum(power, np.float32((100 * np.finfo(np.float32).eps) ** 2), out=power)
        spec *= 1.0 / np.sqrt(power) if exponent == 1 else np.power(power, np.float32(-exponent / 2))
    return spec


def phase_correlate(fixed: np.ndarray, moving: np.ndarray, upsample: int = 100,
                    max_shift: float | None = None, window: bool = True,
                    spectral_exponent: float = 1.0, lowpass: float | None = None,
                    classical: bool = False) -> tuple[tuple[float, float], float]:
    """Return the sub-pixel shift ``(dx, dy)`` of ``moving`` relative to ``fixed``, and the peak ratio.

    Parameters
    ----------
    fixed, moving : ndarray, shape (M, N)
        Two images of the same shape (any real dtype; computed in float32).
    upsample : int
        Sub-pixel refinement factor: the shift is found on a grid of step
        ``1 / upsample`` pixel inside a window of 1.5 px around the integer
        peak. ``1`` gives the integer peak only.
    max_shift : float, optional
        Only peaks with ``|dx| <= max_shift`` and ``|dy| <= max_shift`` are
        considered (search restricted to the expected stage error).
    window : bool
        Subtract each image's mean and multiply by a Hann window before the
        transform, which suppresses the edge discontinuity of the periodic
        extension; the windowed images are then zero-padded to fast FFT
        lengths (``scipy.fft.next_fast_len``).
    spectral_exponent : float
        Exponent of the spectral normalisation: the cross-power spectrum is
        divided by its magnitude to this power. ``1`` is classical phase
        correlation, ``0`` plain cross-correlation; in between trades the
        sharp peak of the first for the noise robustness of the second
        (partial spectral normalisation: common practice, no source).
    lowpass : float, optional
        Sigma, in cycles per pixel, of a Gaussian weight on the normalised
        cross-power spectrum, which damps the noise-dominated high
        frequencies (Foroosh et al. 2002). None for no weight.
    classical : bool
        Refine the peak of the surface as it is: the upsampled-DFT method
        as published [1]_, which on the same (windowed) images gives what
        ``skimage.registration.phase_cross_correlation(upsample_factor=...)``
        gives, sub-pixel bias included. Kept for comparison; the default
        removes two biases (see Notes).

    Returns
    -------
    shift : (float, float)
        ``(dx, dy)`` such that ``moving[y, x] ~= fixed[y - dy, x - dx]``
        (x = column, y = row; see the module docstring).
    peak_ratio : float
        Height of the correlation peak over the highest value outside a
        ``(2*PEAK_EXCLUSION+1)``-pixel neighbourhood of it (within the search
        window); near 1 means the match is ambiguous. Capped at
        ``MAX_PEAK_RATIO``.

    Notes
    -----
    The cross-power spectrum ``F_m conj(F_f) / |F_m conj(F_f)|`` is formed from
    real FFTs (``scipy.fft.rfft2`` on float32); its inverse gives the integer
    peak; the peak is then refined by evaluating the inverse DFT on an
    upsampled grid with matrix-multiply DFTs (Guizar-Sicairos et al. 2008),
    the half spectrum standing in for the full one by Hermitian symmetry.

    Two biases of that peak are removed unless ``classical``:

    * **Peak locking.** Near the Nyquist frequency the phases of sampled
      data do not follow the shift theorem (the pixels' area integration
      aliases, interpolation bends them), and spectral normalisation weights
      those frequencies as much as the rest, which pulls the sub-pixel peak
      toward whole pixels: 0.25 px of an area-sampled camera block is read
      as 0.15, by the classical method and by scikit-image alike. The peak
      is refined under a Gaussian weight of sigma ``REFINE_SIGMA`` cycles
      per pixel (or ``lowpass`` if smaller), which keeps the peak where it
      is for an exact shift and damps the frequencies that lock it [2]_.
    * **Window pull.** One window on both images weights their shared
      content unequally when they are shifted, pulling the peak toward no
      shift (0.04 px at 6 px on 128 px blocks with a low-pass weight). The
      Hann window is a closed-form function, so for shifts of at least
      ``MOVED_WINDOW_FROM`` px it is evaluated again moved by the first
      estimate and applied to ``moving``; the windowed moving image is then
      the windowed fixed one shifted, and the peak is refined once more on
      that spectrum.

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient
       subpixel image registration algorithms", Optics Letters 33(2),
       156-158 (2008). doi:10.1364/OL.33.000156
    .. [2] H. Foroosh, J. B. Zerubia and M. Berthod, "Extension of phase
       correlation to subpixel registration", IEEE Trans. Image Process.
       11(3), 188-200 (2002). doi:10.1109/83.988953
    .. [3] C. D. Kuglin and D. C. Hines, "The phase correlation image
       alignment method", Proc. IEEE Int. Conf. on Cybernetics and Society,
       163-165 (1975).
    """
    a = np.asarray(fixed, dtype=np.float32)
    b = np.asarray(moving, dtype=np.float32)
    if a.ndim != 2 or a.shape != b.shape:
        raise ValueError(f"fixed and moving must be 2-D of one shape, got {a.shape} and {b.shape}")
    if min(a.shape) < 2:
        raise ValueError(f"images must be at least 2x2, got {a.shape}")
    if upsample < 1:
        raise ValueError(f"upsample must be >= 1, got {upsample}")
    if lowpass is not None and not lowpass > 0:
        raise ValueError(f"lowpass must be > 0 cycles/pixel, got {lowpass}")
    if max_shift is not None and max_shift < 0:
        raise ValueError(f"max_shift must be >= 0, got {max_shift}")
    m0, n0 = a.shape
    if window:
        w = hann_window(m0, n0)
        wy, wx = _hann_at(m0, 0.0), _hann_at(n0, 0.0)
        a = _pad_fast(_centred(a, wy, wx) * w)
        b_in = _pad_fast(_centred(b, wy, wx) * w)
    else:
        b_in = b
    m, n = a.shape
    conj_fa = scipy.fft.rfft2(a)
    np.conjugate(conj_fa, out=conj_fa)
    cross = _normalised(conj_fa, b_in, spectral_exponent)
    spec = cross if lowpass is None else cross * _gaussian_weight(m, n, float(lowpass))
    y0, x0, ratio = _peak_and_ratio(*_surface(spec, m, n, max_shift), m, n)
    if upsample > 1 and classical:
        y0, x0 = _refine(spec, n, y0, x0, upsample)
    elif upsample > 1:
        sigma = REFINE_SIGMA if lowpass is None else min(float(lowpass), REFINE_SIGMA)
        weight = _gaussian_weight(m, n, sigma)
        # the surface's spectrum already carries this weight when the low-pass is the refinement's
        y0, x0 = _refine(spec if sigma == lowpass else cross * weight, n, y0, x0, upsample)
        if window and max(abs(y0), abs(x0)) >= MOVED_WINDOW_FROM:
            # the window moved by the estimate: the windowed moving image is now the windowed
            # fixed one moved by the shift, so the window no longer pulls the peak toward 0
            wy, wx = _hann_at(m0, y0), _hann_at(n0, x0)
            moved = np.outer(wy, wx)
            cross = _normalised(conj_fa, _pad_fast(_centred(b, wy, wx) * moved), spectral_exponent)
            y0, x0 = _refine(cross * weight, n, y0, x0, upsample)
    return (x0, y0), ratio
