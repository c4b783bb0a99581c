"""Feature images for marker co-registration, checked against reference libraries and ground truth.

References used: scikit-image (``skimage.data.camera``, ``measure.block_reduce``,
``feature.hessian_matrix`` / ``hessian_matrix_eigvals``), SciPy
(``ndimage.gaussian_gradient_magnitude``). Drawn disks and lines are invented
ground-truth data.
"""
from __future__ import annotations

import cv2
import numpy as np
import pytest
from scipy import ndimage
from skimage import data, feature, measure

from stackbuild.channels import features as F
from stackbuild.channels.settings import ChannelSettings
from stackbuild.channels.stage import check_settings, feature_render_scale
from stackbuild.errors import InputError

INNER = (slice(12, -12), slice(12, -12))  # away from the border, where the libraries pad differently


@pytest.fixture(scope="module")
def camera():
    return data.camera().astype(np.float32)  # open data shipped with scikit-image


def test_block_mean_matches_skimage_block_reduce(camera):
    img = camera[:250, :253]  # trailing partial blocks are dropped
    got = F.whole_block_mean(img, 4)
    # Reference: skimage.measure.block_reduce with np.mean (it pads partial blocks; crop them away).
    want = measure.block_reduce(img.astype(np.float64), (4, 4), np.mean)[:62, :63]
    assert got.shape == (62, 63)
    np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-3)


def test_gradient_magnitude_matches_scipy(camera):
    got = F.gradient_magnitude(camera, 2.0)
    # Reference: scipy.ndimage.gaussian_gradient_magnitude (exact Gaussian derivatives). Ours is a
    # 3x3 Sobel of the Gaussian-smoothed image, which smooths a little more: within 10 % of the peak.
    want = ndimage.gaussian_gradient_magnitude(camera.astype(np.float64), 2.0)
    assert np.abs(got[INNER] - want[INNER]).max() < 0.1 * want[INNER].max()
    assert np.corrcoef(got[INNER].ravel(), want[INNER].ravel())[0, 1] > 0.99


def test_dark_blobs_is_the_smaller_hessian_eigenvalue(camera):
    sigma = 2.0
    got = F.dark_blobs(camera, sigma)
    # Reference: scikit-image's Gaussian-derivative Hessian and its eigenvalues (sorted, largest first);
    # scale normalisation by sigma**2 as in Lindeberg 1998 (doi:10.1023/A:1008045108935).
    h = feature.hessian_matrix(camera.astype(np.float64), sigma=sigma, order="rc", use_gaussian_derivatives=True)
    want = np.maximum(feature.hessian_matrix_eigvals(h)[-1], 0) * sigma ** 2
    assert np.abs(got[INNER] - want[INNER]).max() < 0.1 * want[INNER].max()
    assert np.corrcoef(got[INNER].ravel(), want[INNER].ravel())[0, 1] > 0.99


def test_dark_blobs_finds_disks_and_ignores_lines():
    # Ground truth: dark disks of radius 3 and one dark line on a bright field (invented).
    img = np.full((96, 96), 200, np.float32)
    centres = [(20, 24), (70, 30), (40, 75)]
    for x, y in centres:
        cv2.circle(img, (x, y), 3, 80, -1)
    cv2.line(img, (0, 55), (95, 55), 80, 2)
    resp = F.dark_blobs(img, 3 / np.sqrt(2))
    for x, y in centres:
        win = resp[y - 3:y + 4, x - 3:x + 4]
        r, c = np.unravel_index(np.argmax(win), win.shape)
        assert abs(r - 3) <= 1 and abs(c - 3) <= 1
    peak = min(resp[y, x] for x, y in centres)
    assert resp[53:58, 10:86].max() < 0.2 * peak  # along the line one eigenvalue is ~0


def test_dark_lines_marks_membranes_only():
    img = np.full((64, 64), 200, np.float32)
    img[:, 30:32] = 60  # a dark membrane two pixels wide (invented)
    resp = F.dark_lines(img, 4.0)
    assert resp[:, 30:32].min() > 50
    assert resp[:, :20].max() < 1e-3 and resp[:, 44:].max() < 1e-3  # float32 rounding only


def test_uncovered_pixels_make_no_edges():
    img = np.full((64, 64), 180, np.float32)
    mask = np.ones(img.shape, bool)
    img[:, 40:] = 0
    mask[:, 40:] = False  # no tile there: rendered as 0
    assert F.dark_lines(img, 3.0, mask)[:, :40].max() < 1e-3
    assert F.dark_blobs(img, 2.0, mask).max() < 1e-3


def test_feature_grid_and_settings_checks():
    assert [feature_render_scale(k, 4) for k in (1, 4, 6, 8, 12, 16)] == [1, 1, 1, 2, 3, 4]
    em = np.zeros((32, 32), np.float32)
    assert F.em_feature(em, em > -1, "edges", 2, 8, 1.3).shape == (8, 8)
    with pytest.raises(ValueError):
        F.em_feature(em, em > -1, "edges", 3, 8, 1.3)
    with pytest.raises(InputError):
        check_settings(ChannelSettings(feature="sharpness"))
    with pytest.raises(InputError):
        check_settings(ChannelSettings(vesicle_px=0.0))
