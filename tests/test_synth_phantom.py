"""The tissue phantom: slant field, oblique structures, crop consistency, texture everywhere."""
from __future__ import annotations

import cv2
import numpy as np
import pytest
from skimage.registration import phase_cross_correlation

from stackbuild.synth import SynthParams, phantom_layers, phantom_section
from stackbuild.synth.layout import true_shape
from stackbuild.synth.phantom import slant_at, slant_grid, slant_model


def test_slant_reaches_its_amplitude_and_has_no_mean_or_affine_part():
    params = SynthParams(seed=2, grid=(2, 2), tile_size=256)
    model = slant_model(params)
    h, w = true_shape(params)
    xs, ys = np.arange(0, w, 8.0), np.arange(0, h, 8.0)
    vx, vy = slant_grid(model, xs, ys)
    assert np.hypot(vx, vy).max() == pytest.approx(params.slant, rel=0.02)
    gx, gy = np.meshgrid(xs, ys)
    design = np.column_stack([gx.ravel(), gy.ravel(), np.ones(gx.size)])
    coef, *_ = np.linalg.lstsq(design, np.column_stack([vx.ravel(), vy.ravel()]), rcond=None)
    assert np.abs(coef[2]).max() < 0.02 * params.slant  # mean
    assert np.abs(coef[:2]).max() * w < 0.05 * params.slant  # linear part across the frame
    pts = np.column_stack([gx.ravel()[::97], gy.ravel()[::97]])
    assert np.allclose(slant_at(model, pts), np.column_stack([vx.ravel()[::97], vy.ravel()[::97]]))


def test_common_drift_moves_structures_by_the_stated_amount():
    # With the slant off, section z + 4 shows the content of section z moved by 4 * drift.
    params = SynthParams(seed=4, sections=9, grid=(2, 2), tile_size=256, slant=0.0, drift=(1.5, -1.0))
    a = phantom_section(params, 2, (256, 256))
    b = phantom_section(params, 6, (256, 256))
    # skimage returns the shift that registers the moving image onto the reference, i.e. -motion
    shift, _, _ = phase_cross_correlation(a, b, upsample_factor=20)
    assert shift[::-1] == pytest.approx(np.array([-6.0, 4.0]), abs=0.6)


def test_crops_of_the_true_frame_show_the_same_tissue():
    params = SynthParams(seed=8, grid=(2, 2), tile_size=256)
    small = phantom_section(params, 3, (160, 192))
    large = phantom_section(params, 3, (300, 260))
    inner = (slice(8, 150), slice(8, 180))
    assert np.abs(small[inner] - large[:160, :192][inner]).max() < 0.5


def test_intensities_look_like_em_and_change_gradually_with_depth():
    params = SynthParams(seed=1, grid=(2, 2), tile_size=256)
    u = [phantom_section(params, z, (256, 256)) for z in (0, 1, 4)]
    assert u[0].dtype == np.float32 and 0 <= u[0].min() and u[0].max() <= 255
    # common practice for backscatter EM of stained tissue: bright cytoplasm, dark membranes
    assert np.median(u[0]) > 140 and np.percentile(u[0], 2) < 90
    near, far = np.corrcoef(u[0].ravel(), u[1].ravel())[0, 1], np.corrcoef(u[0].ravel(), u[2].ravel())[0, 1]
    assert 0.3 < far < near < 0.99
    unrelated = phantom_section(SynthParams(seed=99, grid=(2, 2), tile_size=256), 0, (256, 256))
    assert abs(np.corrcoef(u[0].ravel(), unrelated.ravel())[0, 1]) < 0.15


def test_feature_detector_finds_corners_in_every_block():
    # OpenCV's ORB detector must find keypoints across the whole section (texture everywhere).
    params = SynthParams(seed=3, grid=(2, 2), tile_size=256)
    u = np.clip(phantom_section(params, 0, (512, 512)), 0, 255).astype(np.uint8)
    keypoints = cv2.ORB_create(nfeatures=4000, fastThreshold=5).detect(u, None)
    counts = np.zeros((4, 4), int)
    for k in keypoints:
        x, y = k.pt
        counts[min(int(y // 128), 3), min(int(x // 128), 3)] += 1
    assert counts[1:3, 1:3].min() >= 20 and counts.min() >= 5


def test_marker_layers_are_in_unit_range_and_partly_filled():
    params = SynthParams(seed=6, grid=(2, 2), tile_size=256)
    layers = phantom_layers(params, 2, (300, 300), markers=True)
    fill, puncta = layers["fill"], layers["puncta"]
    assert fill.min() >= 0 and fill.max() <= 1 and puncta.min() >= 0 and puncta.max() <= 1
    assert 0.1 < (fill > 0.5).mean() < 0.6
