"""Ground truth of the synthetic sample: stored transforms reproduce the pixels written."""
from __future__ import annotations

import numpy as np
import pytest
import tifffile
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.ndimage import map_coordinates
from skimage.transform import AffineTransform

from stackbuild.synth import SynthParams, generate, load_truth
from stackbuild.synth.acquire import vignetting_profile
from stackbuild.synth.distort import section_affine, section_field, section_to_true, true_to_section
from stackbuild.synth.layout import section_shape

PARAMS = dict(sections=2, grid=(2, 3), tile_size=128, offset=10.0, cell_size=40.0, warp=6.0)


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    out = tmp_path_factory.mktemp("truth")
    generate(out, SynthParams(seed=5, **PARAMS))
    return out


def _predicted(truth, section, tile, undistorted):
    """Re-image a tile from the stored truth, with SciPy's bilinear sampling instead of OpenCV's."""
    x, y = truth.tile_positions(section)[tile]
    t = truth.tile_shape[0]
    gx, gy = np.meshgrid(np.arange(t) + x, np.arange(t) + y)
    p = truth.section_to_true(section, np.column_stack([gx.ravel(), gy.ravel()]))
    clean = map_coordinates(undistorted, [p[:, 1], p[:, 0]], order=1).reshape(t, t)
    gain, offset = truth.tile_gain_offset(section)[tile]
    return gain * truth.vignette() * clean + offset


def test_tiles_are_reproduced_from_truth_within_noise(sample):
    truth = load_truth(sample)
    for s in truth.sections:
        u = truth.undistorted(s)
        assert u.shape == truth.true_shape
        sigma = truth.noise_std(s)
        for tile in truth.tile_positions(s):
            image = tifffile.imread(sample / f"tiles/{s}/{tile}.tif").astype(np.float64)
            residual = image - _predicted(truth, s, tile, u)
            # noise plus rounding to integers (uniform, variance 1/12); 1.5x is the brief's tolerance
            assert abs(residual.mean()) < 0.1 * sigma
            assert residual.std() < 1.5 * np.hypot(sigma, 12 ** -0.5)
            assert residual.std() > 0.9 * sigma


def test_snr_is_signal_std_over_noise_std(sample):
    truth = load_truth(sample)
    s = truth.sections[0]
    u = truth.undistorted(s)
    signal, noise = [], []
    for tile in truth.tile_positions(s):
        clean = _predicted(truth, s, tile, u)
        signal.append(clean)
        noise.append(tifffile.imread(sample / f"tiles/{s}/{tile}.tif") - clean)
    ratio = np.std(signal) / np.std(noise)
    assert ratio == pytest.approx(truth.params.snr, rel=0.1)


def test_inverse_map_round_trips_to_a_thousandth_of_a_pixel(sample):
    truth = load_truth(sample)
    h, w = truth.section_shape
    q = np.random.default_rng(0).uniform([-20, -20], [w + 20, h + 20], (2000, 2))
    for s in truth.sections:
        back = truth.true_to_section(s, truth.section_to_true(s, q))
        assert np.abs(back - q).max() < 1e-3


def test_warp_is_bounded_and_has_no_affine_part(sample):
    truth = load_truth(sample)
    h, w = truth.section_shape
    gx, gy = np.meshgrid(np.linspace(0, w - 1, 24), np.linspace(0, h - 1, 24))
    q = np.column_stack([gx.ravel(), gy.ravel()])
    for s in truth.sections:
        p = truth.section_to_true(s, q)
        a = truth.section_affine(s)
        warp = p - a.apply(q)
        assert np.hypot(*warp.T).max() <= truth.params.warp + 1e-4
        assert np.hypot(*warp.T).max() > 0.3 * truth.params.warp
        # scikit-image's least-squares affine fit of the full map recovers the stored affine part
        fit = AffineTransform.from_estimate(q, p)
        fitted = fit.params[:2]
        assert np.abs(fitted[:, :2] - a.matrix[:, :2]).max() < 2e-3
        assert np.abs(fit(q) - a.apply(q)).max() < 0.25 * truth.params.warp


def test_section_affine_respects_its_limits(sample):
    truth = load_truth(sample)
    prm = truth.params
    for s in truth.sections:
        m = truth.section_affine(s).matrix[:, :2]
        sx, sy = np.hypot(*m[:, 0]), np.hypot(*m[:, 1])
        angle = np.degrees(np.arctan2(m[1, 0], m[0, 0]))
        assert abs(sx - 1) <= prm.scale + 1e-9 and abs(sy - 1) <= prm.scale + 1e-9
        assert abs(angle) <= prm.rotation + 1e-9


def _corr(a, b):
    return float(np.corrcoef(a.ravel(), b.ravel())[0, 1])


def test_channel_map_lines_the_marker_up_with_the_tissue(sample):
    truth = load_truth(sample)
    s = truth.sections[0]
    layers = truth.markers(s)
    image = tifffile.imread(sample / f"channels/{s}/ambrin.tif").astype(np.float64)
    h, w = image.shape
    gx, gy = np.meshgrid(np.arange(w, dtype=float), np.arange(h, dtype=float))
    c = np.column_stack([gx.ravel(), gy.ravel()])

    def seen(to_section):
        p = truth.section_to_true(s, to_section(c))
        return map_coordinates(layers["fill"], [p[:, 1], p[:, 0]], order=1).reshape(h, w)

    b = truth.params.channel_binning
    true_map = seen(lambda pts: truth.channel_to_section(s, "ambrin", pts))
    nominal = seen(lambda pts: b * pts + (b - 1) / 2)
    assert _corr(image, true_map) > 0.8
    assert _corr(image, true_map) > _corr(image, nominal) + 0.1
    assert truth.channels(s) == ["ambrin", "stippolin"]


def test_uint16_tiles_are_the_8_bit_model_times_256(tmp_path):
    params = SynthParams(seed=5, dtype="uint16", channels=0, **PARAMS)
    generate(tmp_path, params)
    truth = load_truth(tmp_path)
    s = truth.sections[0]
    image = tifffile.imread(tmp_path / f"tiles/{s}/r0c0.tif")
    assert image.dtype == np.uint16 and not (tmp_path / "channels.csv").exists()
    residual = image / 256.0 - _predicted(truth, s, "r0c0", truth.undistorted(s))
    assert residual.std() < 1.5 * truth.noise_std(s)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10 ** 6), warp=st.floats(0.0, 20.0), scale=st.floats(0.0, 0.05),
       rotation=st.floats(0.0, 10.0))
def test_inverse_map_round_trips_for_any_distortion(seed, warp, scale, rotation):
    params = SynthParams(seed=seed, warp=warp, scale=scale, rotation=rotation, grid=(2, 2), tile_size=256)
    affine, field = section_affine(params, 1), section_field(params, 1)
    h, w = section_shape(params)
    q = np.random.default_rng(seed).uniform([0, 0], [w, h], (500, 2))
    back = true_to_section(affine, field, section_to_true(affine, field, q))
    assert np.abs(back - q).max() < 1e-3


def test_vignetting_darkens_corners_by_the_stated_fraction():
    profile = vignetting_profile((101, 121), 0.2)
    assert profile[50, 60] == pytest.approx(1.0)
    assert profile[[0, 0, -1, -1], [0, -1, 0, -1]] == pytest.approx([0.8] * 4)
