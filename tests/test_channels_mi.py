"""Mutual-information kernel and MI registration, checked against scikit-image, SciPy and a known map.

Images: ``skimage.data.camera()`` (shipped with scikit-image), block-mean
downsampled; the second modality is a nonlinear remap of it (inverted and
gamma-corrected), warped by a known similarity with ``skimage.transform.warp``.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import entropy
from skimage import data, metrics, transform

from stackbuild.channels.mutual_info import mutual_information, register_mutual_information
from stackbuild.transforms import Affine2D


@pytest.fixture(scope="module")
def camera():
    # Source: skimage.data.camera(), 512 x 512, reduced to 256 x 256 by 2 x 2 block means.
    return transform.downscale_local_mean(data.camera().astype(np.float64), (2, 2))


def _other_modality(img: np.ndarray) -> np.ndarray:
    """Inverted, gamma 0.5: no linear relation to the input, a one-to-one one."""
    return (1.0 - np.clip(img / 255.0, 0, 1)) ** 0.5


def test_normalized_mi_equals_skimage(camera):
    other = _other_modality(camera) + 0.02 * np.random.default_rng(0).standard_normal(camera.shape)
    for bins in (16, 32, 100):
        # Reference: skimage.metrics.normalized_mutual_information (Studholme's (H0 + H1) / H01), same bins.
        ref = metrics.normalized_mutual_information(camera, other, bins=bins)
        assert mutual_information(camera, other, bins=bins) == pytest.approx(ref, rel=1e-12)


def test_mi_of_an_image_with_itself_is_its_entropy(camera):
    # Reference: I(A; A) = H(A), with H from scipy.stats.entropy of numpy's 32-bin histogram.
    counts, _ = np.histogram(camera, bins=32)
    assert mutual_information(camera, camera, bins=32, normalized=False) == pytest.approx(entropy(counts), rel=1e-12)
    assert mutual_information(camera, camera, bins=32) == pytest.approx(2.0)


def test_mi_of_independent_images_is_near_zero():
    # Closed form: independent uniform noise has I = 0 up to the finite-sample bias (bins^2 / 2N nats).
    g = np.random.default_rng(1)
    a, b = g.random((300, 300)), g.random((300, 300))
    assert mutual_information(a, b, bins=16, normalized=False) < 2 * 16 ** 2 / (2 * a.size)


def test_registration_recovers_a_known_similarity_across_modalities(camera):
    size, off = 208, 24.0
    c = (size - 1) / 2
    # Known map moving -> fixed: rotation 2 degrees about the crop centre, shift (7.3, -4.1), scale 1,
    # after the nominal crop offset (24, 24).
    truth = Affine2D.similarity(1.0, math.radians(2.0), 7.3, -4.1, center=(c, c)).then(
        Affine2D.translation(off, off))
    # skimage.transform.warp: output(p) = input(map(p)), so this moving image sees fixed(truth(p)).
    moving = transform.warp(camera / 255.0, transform.AffineTransform(matrix=truth.homogeneous),
                            output_shape=(size, size), order=3)
    moving = _other_modality(moving * 255.0)
    found, info = register_mutual_information(camera, moving, Affine2D.translation(off, off), "similarity",
                                              bins=32, max_offset=12.0, max_rotation=4.0)
    grid = np.stack(np.meshgrid(np.linspace(0, size - 1, 9), np.linspace(0, size - 1, 9)), -1).reshape(-1, 2)
    err = np.hypot(*(found.apply(grid) - truth.apply(grid)).T)
    assert err.max() < 0.3  # the brief's tolerance, over the whole image
    assert info["after"] > info["before"]
    assert not info["at_limit"]
    assert info["distinctness"] > 6.0  # a unique optimum (threshold: rule of thumb, see ChannelSettings)


def test_offset_beyond_the_search_range_is_reported(camera):
    size, off = 160, 48.0
    truth = Affine2D.translation(off + 14.0, off - 3.0)  # 14 px beyond the nominal position in x
    moving = _other_modality(transform.warp(camera / 255.0, transform.AffineTransform(matrix=truth.homogeneous),
                                            output_shape=(size, size), order=1) * 255.0)
    _, info = register_mutual_information(camera, moving, Affine2D.translation(off, off), "rigid",
                                          bins=32, max_offset=6.0, max_rotation=0.0)
    assert info["at_limit"]


def test_registration_refuses_bad_arguments(camera):
    with pytest.raises(ValueError, match="model"):
        register_mutual_information(camera, camera, model="projective")
    with pytest.raises(ValueError, match="2-D"):
        register_mutual_information(camera[0], camera)
