"""Phase correlation kernel checked against a published example and scikit-image."""
import numpy as np
import pytest
import scipy.ndimage as ndi
import scipy.signal
from skimage import data
from skimage.registration import phase_cross_correlation

from stackbuild.stitch.phasecorr import hann_window, phase_correlate, taper_window


def fourier_shifted(image, shift_yx):
    """Return ``image`` moved by ``shift_yx`` (rows, cols) as an exact circular Fourier shift."""
    return np.fft.ifftn(ndi.fourier_shift(np.fft.fftn(image), shift_yx)).real


def test_published_worked_example_camera():
    # Source: the published worked example of the upsampled-DFT method
    # (Guizar-Sicairos, Thurman & Fienup 2008, doi:10.1364/OL.33.000156), as
    # shown in scikit-image's registration gallery: camera() moved by
    # (3.48574, 8.73837) px (row, col) with the Fourier shift theorem, recovered
    # to 1/100 px with upsample 100. The numbers are from memory of that example.
    img = data.camera().astype(np.float64)
    moved = fourier_shifted(img, (3.48574, 8.73837))
    (dx, dy), ratio = phase_correlate(img, moved, upsample=100, window=False)
    assert abs(dy - 3.48574) <= 0.01
    assert abs(dx - 8.73837) <= 0.01
    assert ratio > 3  # a unique peak


def test_published_example_with_window_and_smoothing():
    # Same published case; our pipeline options (Hann window, partial spectral normalisation,
    # spectral weight) must not bias it by more than 0.02 px (our tolerance).
    img = data.camera().astype(np.float64)
    moved = fourier_shifted(img, (3.48574, 8.73837))
    (dx, dy), _ = phase_correlate(img, moved, upsample=100, window=True, spectral_exponent=0.8, lowpass=0.1)
    assert abs(dy - 3.48574) <= 0.02
    assert abs(dx - 8.73837) <= 0.02


@pytest.mark.parametrize("seed", range(6))
def test_agrees_with_skimage_on_strips(seed):
    # Reference library: skimage.registration.phase_cross_correlation(upsample_factor=100).
    # Same pre-windowed strips to both; the two must agree within 0.02 px.
    # skimage returns the shift that registers moving onto fixed, in (row, col):
    # the negative of ours, in the other order.
    rng = np.random.default_rng(seed)
    img = data.camera().astype(np.float64)
    shift = rng.uniform(-6, 6, 2)
    moved = ndi.shift(img, shift, order=3, mode="nearest")
    r0 = int(rng.integers(20, 200))
    a = img[r0:r0 + 256, 100:164]
    b = moved[r0:r0 + 256, 100:164]
    a = a + rng.normal(0, 5, a.shape)
    b = b + rng.normal(0, 5, b.shape)
    w = hann_window(*a.shape)
    a, b = (a - a.mean()) * w, (b - b.mean()) * w
    ref = phase_cross_correlation(a, b, upsample_factor=100)[0]
    (dx, dy), _ = phase_correlate(a, b, upsample=100, window=False, classical=True)
    assert abs(dx + ref[1]) <= 0.02
    assert abs(dy + ref[0]) <= 0.02
    # And both find the applied shift (cubic-spline shift, noise): 0.2 px is our tolerance.
    assert abs(dx - shift[1]) < 0.2 and abs(dy - shift[0]) < 0.2
    (dx, dy), _ = phase_correlate(a, b, upsample=100, window=False)
    assert abs(dx - shift[1]) < 0.2 and abs(dy - shift[0]) < 0.2


def test_hann_window_matches_scipy():
    # Reference library: scipy.signal.windows.hann (symmetric).
    want = np.outer(scipy.signal.windows.hann(37, sym=True), scipy.signal.windows.hann(20, sym=True))
    np.testing.assert_allclose(hann_window(37, 20), want, atol=1e-6)


def test_taper_window_is_flat_inside_and_tapers_at_edges():
    w = taper_window(40, 30, 5)
    assert np.all(w[5:-5, 5:-5] == 1)
    assert w[0, 15] < 0.1 and w[15, 0] < 0.1
    np.testing.assert_allclose(w, w[::-1, ::-1])


def test_max_shift_restricts_the_search():
    # Ground truth: a periodic pattern (period 16 px) moved by 3 px has equal
    # peaks at 3 and 3 - 16; restricting |shift| <= 5 must pick the first.
    yy, xx = np.mgrid[:64, :64]
    img = np.cos(2 * np.pi * xx / 16) + 0.5 * np.cos(2 * np.pi * yy / 32)
    moved = np.roll(img, 3, axis=1)
    (dx, dy), _ = phase_correlate(img, moved, upsample=10, max_shift=5, window=False)
    assert abs(dx - 3) < 0.1 and abs(dy) < 0.1


def test_peak_ratio_low_for_periodic_texture_high_for_camera():
    # A 2-D periodic pattern has many equal correlation peaks (ratio near 1);
    # a natural image (skimage.data.camera) has one.
    yy, xx = np.mgrid[:128, :128]
    rng = np.random.default_rng(3)
    grid = np.cos(2 * np.pi * xx / 9) * np.cos(2 * np.pi * yy / 11)
    noisy = lambda im: im + rng.normal(0, 0.2, im.shape)
    _, r_grid = phase_correlate(noisy(grid), noisy(np.roll(grid, (2, 3), (0, 1))), max_shift=30)
    cam = data.camera()[100:228, 100:228].astype(float)
    _, r_cam = phase_correlate(cam, np.roll(cam, (2, 3), (0, 1)), max_shift=30)
    assert r_grid < 1.3 < r_cam


def test_bad_arguments():
    a = np.zeros((8, 8))
    with pytest.raises(ValueError, match="same shape|one shape"):
        phase_correlate(a, np.zeros((8, 9)))
    with pytest.raises(ValueError, match="upsample"):
        phase_correlate(a, a, upsample=0)
    with pytest.raises(ValueError, match="max_shift"):
        phase_correlate(a, a, max_shift=-1)


def test_windowed_padded_path_agrees_with_skimage():
    # Reference library: skimage.registration.phase_cross_correlation(upsample_factor=100)
    # given the same Hann-windowed strips zero-padded to the FFT lengths we use
    # (scipy.fft.next_fast_len); odd strip sizes force the padding.
    import scipy.fft

    rng = np.random.default_rng(11)
    img = data.camera().astype(np.float64)
    for _ in range(4):
        # Residual shifts below 1 px, as left after the pipeline's re-cut.
        shift = rng.uniform(-1, 1, 2)
        moved = ndi.shift(img, shift, order=3, mode="nearest")
        a, b = img[60:311, 200:261], moved[60:311, 200:261]  # 251 x 61
        (dx, dy), _ = phase_correlate(a, b, upsample=100, classical=True)
        w = hann_window(*a.shape)
        m, n = scipy.fft.next_fast_len(a.shape[0]), scipy.fft.next_fast_len(a.shape[1], real=True)
        pa, pb = np.zeros((m, n)), np.zeros((m, n))
        pa[:251, :61] = (a - a.mean()) * w
        pb[:251, :61] = (b - b.mean()) * w
        ref = phase_cross_correlation(pa, pb, upsample_factor=100)[0]
        assert abs(dx + ref[1]) <= 0.02 and abs(dy + ref[0]) <= 0.02
        # Against the applied shift, with the pipeline's spectral settings: the
        # cubic-spline shift (scipy.ndimage.shift) is inexact near Nyquist, which
        # full normalisation weights as much as the rest (~0.1 px error here).
        (dx, dy), _ = phase_correlate(a, b, upsample=100, spectral_exponent=0.8, lowpass=0.1)
        assert abs(dx - shift[1]) < 0.05 and abs(dy - shift[0]) < 0.05  # noise-free: our tolerance


def area_sampled_camera(shifts_px4):
    """Return skimage.data.camera seen as a scene and area-sampled at 1/4 px offsets.

    The scene is camera() interpolated 4x (cv2.resize, bicubic); each
    output pixel is the mean of a 4 x 4 block of it, as a detector pixel
    integrates its area, after the scene is moved by ``shifts_px4`` (rows,
    cols) quarter pixels: an exact fractional shift of area-sampled data.
    """
    import cv2

    scene = cv2.resize(data.camera().astype(np.float32), (2048, 2048), interpolation=cv2.INTER_CUBIC)
    moved = np.roll(scene, shifts_px4, axis=(0, 1))
    return (scene.reshape(512, 4, 512, 4).mean(axis=(1, 3)),
            moved.reshape(512, 4, 512, 4).mean(axis=(1, 3)))


@pytest.mark.parametrize("quarters", [(1, -3), (2, 1), (3, -1), (21, -27)])
def test_fractional_shifts_of_area_sampled_camera_are_not_pulled_to_whole_pixels(quarters):
    # Ground truth: the applied shift of area-sampled skimage.data.camera (above), 128 px blocks.
    # Reference library: skimage.registration.phase_cross_correlation(upsample_factor=100) on
    # the same blocks reads 0.25 px as about 0.15 (peak locking of the classical method);
    # classical=True, the same method on windowed blocks, is pulled as far (0.09 to 0.1 px);
    # the default must read the truth within 0.02 px (our tolerance) and beat the reference.
    fixed, moving = area_sampled_camera(quarters)
    truth = np.array(quarters) / 4.0
    ours, classical, reference = [], [], []
    for r, c in [(100, 100), (250, 300), (300, 120), (60, 340)]:
        a, b = fixed[r:r + 128, c:c + 128], moving[r:r + 128, c:c + 128]
        (dx, dy), _ = phase_correlate(a, b, upsample=100)
        ours.append((dy, dx))
        (dx, dy), _ = phase_correlate(a, b, upsample=100, classical=True)
        classical.append((dy, dx))
        reference.append(-phase_cross_correlation(a, b, upsample_factor=100)[0])
    err = np.abs(np.array(ours) - truth)
    ref_err = np.abs(np.array(reference) - truth)
    assert err.max() <= 0.02, err
    assert np.sqrt(np.mean(err ** 2)) < np.sqrt(np.mean(ref_err ** 2))
    # the bias is the method's, not our implementation's or the window's
    assert np.abs(np.array(classical) - truth).max() >= 0.05


def test_window_does_not_pull_a_multi_pixel_shift_toward_zero():
    # Ground truth: skimage.data.camera moved by an exact Fourier shift (scipy.ndimage.fourier_shift)
    # of (5.3, -6.7) px, 128 px blocks, the stitching settings (partial normalisation, low-pass):
    # one window on both blocks pulls the classical peak 0.02 px toward 0; the moved window
    # must leave < 0.01 px (our tolerance).
    img = data.camera().astype(np.float64)
    moved = fourier_shifted(img, (5.3, -6.7))
    for r, c in [(100, 100), (250, 300), (300, 120)]:
        a, b = img[r:r + 128, c:c + 128], moved[r:r + 128, c:c + 128]
        (dx, dy), _ = phase_correlate(a, b, upsample=100, spectral_exponent=0.8, lowpass=0.1)
        assert abs(dy - 5.3) < 0.01 and abs(dx + 6.7) < 0.01
