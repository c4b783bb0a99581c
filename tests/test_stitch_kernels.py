"""Stitching kernels: overlaps, placement solve, intensity model, tile inspection."""
import cv2
import numpy as np
import pytest
import scipy.ndimage as ndi
import scipy.stats
from skimage import data

from stackbuild.stitch.inspect import flag_tiles, focus_measure, robust_contrast, tile_stats
from stackbuild.stitch.intensity import (illumination_at_tile_size, illumination_profile,
                                         profile_shape, solve_gain_offset, tile_thumbnail)
from stackbuild.stitch.overlaps import find_overlaps, neighbours
from stackbuild.stitch.pairs import fast_len_below, ncc_after_shift
from stackbuild.stitch.placement import solve_translations


def grid(rows, cols, step):
    return np.array([(c * step, r * step) for r in range(rows) for c in range(cols)], float)


def test_overlaps_of_a_grid():
    pos = grid(3, 4, 80)
    sizes = np.full((12, 2), 100)
    ovs = find_overlaps(pos, sizes, min_overlap=10, margin=5)
    # 3x4 grid: 3*3 horizontal + 2*4 vertical + 2*3*2 diagonal neighbours.
    assert len(ovs) == 9 + 8 + 12
    right = next(o for o in ovs if (o.a, o.b) == (0, 1))
    assert right.box_a == (80, 0, 100, 100) and right.box_b == (0, 0, 20, 100)
    assert right.pad_a == (75, 0, 100, 100) and right.pad_b == (0, 0, 25, 100)
    assert sorted(neighbours(ovs, 12)[5]) == [0, 1, 2, 4, 6, 8, 9, 10]
    assert len(find_overlaps(pos, sizes, min_overlap=25)) == 0


def test_fast_lengths():
    assert fast_len_below(97) == 96 and fast_len_below(64) == 64 and fast_len_below(7) == 6


def test_placement_recovers_exact_positions_and_rejects_an_outlier():
    # Ground truth: exact pair shifts of random positions, one pair corrupted by 8 px.
    rng = np.random.default_rng(0)
    stage = grid(4, 4, 100)
    truth = stage + rng.uniform(-10, 10, stage.shape)
    ovs = find_overlaps(stage, np.full((16, 2), 120), 10)
    pairs = np.array([(o.a, o.b) for o in ovs])
    shifts = truth[pairs[:, 1]] - truth[pairs[:, 0]]
    shifts[3] += (8.0, 0.0)
    sol = solve_translations(pairs, shifts, np.ones(len(pairs)), stage, prior_weight=1e-6,
                             max_residual=1.0)
    assert not sol.kept[3] and sol.kept.sum() == len(pairs) - 1
    d = sol.positions - truth
    d -= d.mean(axis=0)
    assert np.abs(d).max() < 1e-3
    assert sol.residuals[3] == pytest.approx(8.0, abs=1e-2)


def test_placement_closed_form_two_tiles():
    # Closed form: two tiles, one pair d, prior lambda toward stage s:
    # minimise (p1 - p0 - d)^2 + lam (p0 - s0)^2 + lam (p1 - s1)^2 per axis.
    lam, d, s = 0.5, np.array([[10.0, -4.0]]), np.array([[0.0, 0.0], [8.0, 0.0]])
    sol = solve_translations(np.array([[0, 1]]), d, np.ones(1), s, prior_weight=lam, max_residual=100)
    a = np.array([[1 + lam, -1], [-1, 1 + lam]])
    for axis in range(2):
        want = np.linalg.solve(a, [-d[0, axis] + lam * s[0, axis], d[0, axis] + lam * s[1, axis]])
        np.testing.assert_allclose(sol.positions[:, axis], want, atol=1e-9)


def test_illumination_upsampling_is_cv2_resize_linear():
    # Reference library: OpenCV's cv2.resize(INTER_LINEAR) is the documented convention.
    prof = np.random.default_rng(1).uniform(0.8, 1.2, profile_shape(100, 130, 16)).astype(np.float32)
    assert prof.shape == (7, 9)
    up = illumination_at_tile_size(prof, 100, 130)
    np.testing.assert_array_equal(up, cv2.resize(prof, (130, 100), interpolation=cv2.INTER_LINEAR))
    assert up.dtype == np.float32 and up.shape == (100, 130)


def test_illumination_profile_from_shaded_copies_of_a_photograph():
    # Open data shipped by scikit-image: the stationary textures brick, grass and
    # gravel, cut into 48 non-overlapping 128 px tiles, each multiplied by the
    # same known linear shading ramp.
    ramp = np.linspace(0.8, 1.2, 128, dtype=np.float32)[None, :] * np.ones((128, 1), np.float32)
    thumbs = [tile_thumbnail((img[r:r + 128, c:c + 128].astype(np.float32) + 20) * ramp, 16)
              for img in (data.brick(), data.grass(), data.gravel())
              for r in range(0, 512, 128) for c in range(0, 512, 128)]
    prof = illumination_profile(np.stack(thumbs))
    want = cv2.resize(ramp, (8, 8), interpolation=cv2.INTER_AREA)
    want /= want.mean()
    assert abs(prof.mean() - 1) < 1e-5
    assert np.abs(prof - want).max() < 0.06  # our tolerance for 48 tiles


def test_gain_offset_recovered_exactly():
    # Ground truth: tile intensities I_i = (J - o_i) / g_i for a common J, so
    # the correction g_i I_i + o_i makes every overlap equal.
    rng = np.random.default_rng(2)
    n = 9
    g = rng.uniform(0.8, 1.2, n)
    o = rng.uniform(-10, 10, n)
    g /= g.mean()
    o -= o.mean()
    ovs = find_overlaps(grid(3, 3, 80), np.full((n, 2), 100), 10)
    pairs = np.array([(x.a, x.b) for x in ovs])
    mj, sj = rng.uniform(80, 120, len(pairs)), rng.uniform(10, 30, len(pairs))
    ma, sa = (mj - o[pairs[:, 0]]) / g[pairs[:, 0]], sj / g[pairs[:, 0]]
    mb, sb = (mj - o[pairs[:, 1]]) / g[pairs[:, 1]], sj / g[pairs[:, 1]]
    gain, offset = solve_gain_offset(pairs, ma, sa, mb, sb, n)
    np.testing.assert_allclose(gain, g, atol=1e-3)
    np.testing.assert_allclose(offset, o, atol=1e-2)


def test_gain_offset_with_no_pairs_is_identity():
    gain, offset = solve_gain_offset(np.zeros((0, 2), int), [], [], [], [], 4)
    np.testing.assert_allclose(gain, 1, atol=1e-6)
    np.testing.assert_allclose(offset, 0, atol=1e-6)


def test_focus_measure_is_variance_of_scipy_laplacian():
    # Reference library: scipy.ndimage.laplace (the same 4-neighbour kernel), interior pixels.
    img = data.camera().astype(np.float32)
    lap = ndi.laplace(img.astype(np.float64))
    ours = cv2.Laplacian(img, cv2.CV_32F, ksize=1)
    np.testing.assert_allclose(ours[1:-1, 1:-1], lap[1:-1, 1:-1], atol=1e-2)
    assert focus_measure(img) == pytest.approx(float(ours.var()), rel=1e-6)
    # Blurring (scipy.ndimage.gaussian_filter) lowers it by far more than our 0.2 threshold.
    assert focus_measure(ndi.gaussian_filter(img, 3)) < 0.2 * focus_measure(img)


def test_robust_contrast_uses_normal_scaled_mad():
    # Reference library: scipy.stats.median_abs_deviation(scale="normal") on the band-passed
    # blocks; the quadratic removed with numpy.polynomial.polynomial.polyvander2d + lstsq.
    img = data.camera().astype(np.float32)
    small = cv2.resize(img, (64, 64), interpolation=cv2.INTER_AREA)
    c = (2 * np.arange(64) + 1) / 64 - 1.0
    vv, uu = np.meshgrid(c, c, indexing="ij")
    full = np.polynomial.polynomial.polyvander2d(uu.ravel(), vv.ravel(), [2, 2])
    quad = full[:, [0, 1, 2, 3, 4, 6]]  # 1, v, v^2, u, uv, u^2 (total degree <= 2)
    fit = quad @ np.linalg.lstsq(quad, small.ravel().astype(np.float64), rcond=None)[0]
    small = (small - fit.reshape(64, 64)).astype(np.float32)
    band = small - cv2.GaussianBlur(small, (0, 0), 4.0, borderType=cv2.BORDER_REFLECT)
    want = scipy.stats.median_abs_deviation(band, axis=None, scale="normal")
    assert robust_contrast(img) == pytest.approx(float(want), rel=1e-3)


def test_flags_blank_saturated_out_of_focus():
    rng = np.random.default_rng(4)
    cam = data.camera()  # uint8, shipped by scikit-image
    yy, xx = np.mgrid[:512, :512]
    shading = 1 - 0.2 * ((yy - 256) ** 2 + (xx - 256) ** 2) / (2 * 256 ** 2)
    blank = np.clip(120 * shading + rng.normal(0, 12, (512, 512)), 0, 255).astype(np.uint8)
    saturated = cam.copy()
    saturated[:100] = 255
    blurred = ndi.gaussian_filter(cam, 4)
    stats = [tile_stats(t) for t in (cam, cam[::-1].copy(), blank, saturated, blurred)]
    flags = flag_tiles(stats, blank_contrast_to_noise=3.0, focus_min=0.2, saturated_max=0.05)
    assert flags[0] == [] and flags[1] == []
    assert flags[2] == ["blank"]  # noise and shading, but no structure
    assert "saturated" in flags[3]
    assert flags[4] == ["out_of_focus"]
    # Flags do not depend on bit depth or range: the same camera image at full 16 bits,
    # as 12-bit values in a 16-bit file, and squeezed into 1000..3000 of a 16-bit file.
    for scaled in (cam.astype(np.uint16) * 257, cam.astype(np.uint16) * 16,
                   (1000 + cam.astype(np.uint16) * 7.84).astype(np.uint16)):
        s = tile_stats(scaled)
        assert s["contrast_to_noise"] == pytest.approx(stats[0]["contrast_to_noise"], rel=0.15)
        assert flag_tiles([s, stats[2]], 3.0, 0.2, 0.05) == [[], ["blank"]]


def test_ncc_after_shift_matches_pearson_for_zero_shift():
    # Reference library: scipy.stats.pearsonr.
    rng = np.random.default_rng(5)
    a = rng.normal(size=(40, 30)).astype(np.float32)
    b = (a + rng.normal(size=a.shape)).astype(np.float32)
    ncc, ia, ib = ncc_after_shift(a, b, (0.0, 0.0))
    assert ncc == pytest.approx(scipy.stats.pearsonr(ia.ravel(), ib.ravel())[0], abs=1e-5)


def test_clipping_is_seen_at_the_tiles_own_top_value():
    # 12-bit data in a 16-bit file clip at 4095, far below the type's 65535:
    # skimage.data.camera() (shipped by scikit-image) scaled to 12 bits, its top
    # 100 rows driven into the clip.
    cam12 = data.camera().astype(np.uint16) * 16
    clipped = cam12.copy()
    clipped[:100] = 4095
    ok, bad = tile_stats(cam12), tile_stats(clipped)
    assert ok["saturated_fraction"] == 0.0
    assert bad["saturated_fraction"] == pytest.approx(100 / 512, abs=0.01)
    assert flag_tiles([ok, bad], 3.0, 0.2, 0.05) == [[], ["saturated"]]


def test_gains_are_bounded_and_flagged_tiles_keep_their_intensity():
    # Closed form: two tiles whose overlap spreads differ 3-fold ask for gains
    # 0.5 and 1.5 (mean 1); bounded at 1.3 and 1/1.3. A third, ineligible tile
    # (blank) in the same pairs keeps gain 1 and offset 0 and changes nothing.
    pairs = np.array([[0, 1], [1, 2]])
    ma, sa = np.array([100.0, 100.0]), np.array([30.0, 10.0])
    mb, sb = np.array([100.0, 100.0]), np.array([10.0, 10.0])
    free, _ = solve_gain_offset(pairs[:1], ma[:1], sa[:1], mb[:1], sb[:1], 2, 1e-6)
    np.testing.assert_allclose(free, [0.5, 1.5], atol=1e-3)
    gain, offset = solve_gain_offset(pairs, ma, sa, mb, sb, 3, 1e-6, eligible=np.array([True, True, False]),
                                     max_gain_change=0.3)
    np.testing.assert_allclose(gain, [1 / 1.3, 1.3, 1.0], atol=1e-3)
    assert offset[2] == 0.0


def test_tile_percentiles_from_a_histogram_equal_numpy_percentile_bit_for_bit():
    from stackbuild.stitch.inspect import percentiles
    rng = np.random.default_rng(11)
    for k in range(300):
        dtype = (np.uint8, np.uint16)[k % 2]
        top = int(rng.integers(1, np.iinfo(dtype).max))
        values = rng.integers(0, top, int(rng.integers(1, 3000)), dtype=dtype, endpoint=True)
        q = [1, 50, 99] if k % 3 else [0, *rng.uniform(0, 100, 4), 100]
        # Reference: numpy.percentile (linear method) of the float32 pixels, as tile_stats used to call it.
        expect = np.percentile(values.astype(np.float32), q)
        got = percentiles(values, q)
        assert got.dtype == expect.dtype and np.array_equal(got, expect), (dtype, values.size, q)


def test_pixel_noise_is_immerkaer_on_a_grid_and_finds_the_added_noise():
    # Reference library: scipy.ndimage.convolve with Immerkaer's mask over the whole image and
    # scipy.stats.median_abs_deviation(scale="normal") of every response; ours reads at most
    # STAT_SAMPLES of them on a grid. Ground truth: the deviation of the Gaussian noise added to
    # the camera image (shipped by scikit-image).
    from stackbuild.stitch.inspect import pixel_noise
    rng = np.random.default_rng(11)
    cam = np.tile(data.camera(), (2, 2)).astype(np.float64)
    mask = np.array([[1, -2, 1], [-2, 4, -2], [1, -2, 1]], float)
    for sigma, lift in ((4.0, 0.35), (12.0, 0.15)):
        noisy = (cam + rng.normal(0, sigma, cam.shape)).astype(np.float32)
        resp = ndi.convolve(noisy.astype(np.float64), mask)[1:-1, 1:-1]
        ref = scipy.stats.median_abs_deviation(resp, axis=None, scale="normal") / 6
        # Our tolerance 2 %: the median of 65536 samples against that of a million.
        assert pixel_noise(noisy) == pytest.approx(ref, rel=0.02)
        # The camera's edges lift the estimate, the more so the weaker the noise (our tolerances).
        assert sigma <= pixel_noise(noisy) <= (1 + lift) * sigma


def test_sampled_focus_is_the_variance_of_scipy_laplacian_on_a_grid():
    # Reference library: scipy.ndimage.laplace; the sampled measure is its variance at the
    # grid of interior pixels (every 4th row and column of a 1024 px image), and that is within
    # a few per cent of the whole image's.
    from stackbuild.stitch.inspect import sampled_focus
    img = np.tile(data.camera(), (2, 2))
    lap = ndi.laplace(img.astype(np.float64))
    assert sampled_focus(img) == pytest.approx(float(lap[1:-1:4, 1:-1:4].var()), rel=1e-5)
    assert sampled_focus(img) == pytest.approx(focus_measure(img), rel=0.05)


@pytest.mark.parametrize("n", [1, 2, 7, 4096, 4097])
def test_median_is_numpy_median(n):
    """The one-partition median gives numpy.median's value (the reference) on odd and even counts, on
    Immerkaer responses of skimage.data.camera (integer-valued, many ties) and on noise."""
    from stackbuild.stitch.inspect import median

    img = data.camera().astype(np.float32)
    resp = (img[:-2, 1:-1] + img[2:, 1:-1] + img[1:-1, :-2] + img[1:-1, 2:] - 4 * img[1:-1, 1:-1]).ravel()[:n]
    noise = np.random.default_rng(n).standard_normal(n).astype(np.float32)
    for values in (resp, noise, np.abs(resp - np.median(resp))):
        assert median(values) == float(np.median(values))
