"""The update's check whether re-imaged pixels show the old content where it was (``run/update_reach.py``).

Outside references: the texture is scikit-image's shipped ``data.camera()`` image, and the known
sub-pixel shifts are applied with SciPy's ``ndimage.shift`` (cubic spline), independent of the
phase correlation that measures them.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import data

from stackbuild.run.update_reach import SAME_CONTENT_NCC, compare_blocks


@pytest.fixture(scope="module")
def camera() -> np.ndarray:
    return data.camera().astype(np.float32)[:256, :384]


def test_a_known_subpixel_shift_is_measured_in_every_block(camera):
    moved = ndimage.shift(camera, (0.3, -0.2), order=3, mode="nearest")  # rows, cols
    found = compare_blocks(camera, moved)
    assert len(found) == 6  # 2 x 3 blocks of 128 px
    # Blocks hold real structure, so the measured length is the applied one (0.36 px) within 0.05 px.
    assert all(abs(s - np.hypot(0.3, 0.2)) <= 0.05 for s, _ in found), found
    assert all(c >= 0.9 for _, c in found)


def test_the_same_content_imaged_again_passes_and_other_content_does_not(camera):
    rng = np.random.default_rng(0)
    again = np.clip(camera + rng.normal(0, 4, camera.shape), 0, 255)
    same = compare_blocks(camera, again)
    # Noise of 4 grey levels moves the fit by about a tenth of a pixel on the flat sky blocks.
    assert max(s for s, _ in same) <= 0.2 and min(c for _, c in same) >= SAME_CONTENT_NCC
    other = compare_blocks(camera, np.roll(camera, 64, axis=1)[:, ::-1].copy())
    assert min(c for _, c in other) < SAME_CONTENT_NCC


def test_blank_blocks_are_left_out_and_shapes_must_agree(camera):
    blank = np.full_like(camera, 40.0)
    assert compare_blocks(blank, blank) == []
    with pytest.raises(ValueError, match="one shape"):
        compare_blocks(camera, camera[:, :200])
