"""The realistic phantom family: what persists between sections and what does not, measured with
scikit-image / NumPy routines (band-pass filters, windowed phase correlation, Pearson correlation)."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import ndimage
from skimage.filters import difference_of_gaussians, gaussian, window
from skimage.registration import phase_cross_correlation

from stackbuild.synth import SynthParams, generate, load_truth, phantom_section
from stackbuild.synth.distort import field_at, section_field
from stackbuild.synth.layout import section_shape
from stackbuild.synth.tissue import SPEED, common_drift
from stackbuild.synth.variants import VARIANTS, variant_params

REAL = SynthParams(seed=2, grid=(2, 2), tile_size=256, content="realistic")
STANDARD = SynthParams(seed=2, grid=(2, 2), tile_size=256, slant=0.0, drift=(1.2, 0.5))
CROP = (slice(32, -32),) * 2


def _shift(a, b, upsample=20):
    """skimage's phase correlation on Hann-windowed, mean-free images: the shift registering b onto a."""
    w = window("hann", a.shape)
    return phase_cross_correlation((a - a.mean()) * w, (b - b.mean()) * w, upsample_factor=upsample,
                                   normalization=None)[0]


def _bands(params, z):
    """Return (fine, coarse) Pearson correlation of sections z and z+1 after registering their common shift."""
    a, b = phantom_section(params, z, (512, 512)), phantom_section(params, z + 1, (512, 512))
    b = ndimage.shift(b, _shift(a, b), order=1)
    fine = [difference_of_gaussians(x, 1.0, 2.5)[CROP].ravel() for x in (a, b)]
    coarse = [gaussian(x, 3)[CROP].ravel() for x in (a, b)]
    return np.corrcoef(*fine)[0, 1], np.corrcoef(*coarse)[0, 1]


def test_fine_content_is_new_in_every_section_while_membranes_persist():
    # texture and vesicle-sized dots are drawn afresh: the 1-2.5 px band barely correlates between
    # neighbours, far less than in the standard family, whose texture blends over two sections
    fine_real, coarse_real = _bands(REAL, 3)
    fine_std, _ = _bands(STANDARD, 3)
    assert fine_real < 0.45 and fine_std > fine_real + 0.3
    # membranes and organelles persist: the smoothed image still correlates clearly
    assert coarse_real > 0.5
    unrelated = phantom_section(SynthParams(seed=77, grid=(2, 2), tile_size=256, content="realistic"), 3, (512, 512))
    base = phantom_section(REAL, 3, (512, 512))
    assert abs(np.corrcoef(gaussian(base, 3).ravel(), gaussian(unrelated, 3).ravel())[0, 1]) < 0.15


def test_cells_move_each_their_own_way_on_top_of_a_common_drift():
    # between sections 3 and 5 the whole crop shifts by the common drift; local shifts on 96 px blocks
    # spread by several px (median distance from their median), the standard family's by less than one
    def local(params):
        a, b = (gaussian(phantom_section(params, z, (576, 576)), 2) for z in (3, 5))
        s = np.array([_shift(a[r:r + 96, c:c + 96], b[r:r + 96, c:c + 96], 4)
                      for r in range(0, 576, 96) for c in range(0, 576, 96)])
        med = np.median(s, 0)
        return _shift(a, b), np.median(np.hypot(*(s - med).T))

    vx, vy = common_drift(REAL)
    assert 1.0 <= np.hypot(vx, vy) <= 2.0
    whole, spread = local(REAL)
    # the registering shift is minus the motion, (row, col) order
    assert whole == pytest.approx([-2 * vy, -2 * vx], abs=1.0)
    assert spread > 2 * SPEED[0]
    _, spread_std = local(STANDARD)
    assert spread_std < 1.0


def test_crops_of_the_true_frame_show_the_same_tissue():
    small = phantom_section(REAL, 5, (200, 240))
    large = phantom_section(REAL, 5, (400, 300))
    assert np.abs(small[8:-8, 8:-8] - large[:200, :240][8:-8, 8:-8]).max() < 0.5


def test_warps_come_from_a_coarse_grid_and_reach_their_bound():
    params = SynthParams(seed=4, grid=(3, 3), tile_size=256, content="realistic", warp=6.0)
    h, w = section_shape(params)
    gx, gy = np.meshgrid(np.linspace(0, w - 1, 60), np.linspace(0, h - 1, 60))
    q = np.column_stack([gx.ravel(), gy.ravel()])
    d = field_at(section_field(params, 1), q)
    # the bound is met on the generator's own 48 x 48 sampling; a 60 x 60 one sees within 5 %
    assert np.hypot(*d.T).max() == pytest.approx(6.0, rel=0.05)
    design = np.column_stack([q, np.ones(len(q))])
    coef = np.linalg.lstsq(design, d, rcond=None)[0]
    assert np.abs(design @ coef).max() < 0.1  # no affine part: that belongs to the section affine
    # smooth: a 5 x 5 control grid varies over about a quarter of the section, so neighbouring
    # samples (1/60 of the section apart) differ by far less than the amplitude
    step = np.abs(np.diff(d.reshape(60, 60, 2), axis=1)).max()
    assert step < 0.1 * 6.0
    other = field_at(section_field(params, 2), q)
    assert abs(np.corrcoef(d[:, 0], other[:, 0])[0, 1]) < 0.5  # independent per section


def test_a_small_realistic_sample_is_written_with_its_truth(tmp_path):
    params = variant_params("realistic", "small", seed=1, sections=3, tile_size=128)
    generate(tmp_path, params)
    truth = load_truth(tmp_path)
    assert truth.params.content == "realistic" and truth.sections == [0, 1, 2]
    assert truth.slant(np.array([[10.0, 20.0]])) == pytest.approx(np.array([common_drift(params)]))
    assert truth.undistorted(1).shape == truth.true_shape


def test_twelve_bit_tiles_hold_12_bit_values_in_16_bit_files(tmp_path):
    import tifffile

    params = variant_params("realistic", "bits12", seed=1, sections=1, tile_size=128, grid=(1, 2))
    generate(tmp_path / "b12", params)
    generate(tmp_path / "b8", dataclasses.replace(params, dtype="uint8", bit_depth=0))
    t12 = tifffile.imread(tmp_path / "b12" / "tiles" / "0" / "r0c0.tif")
    t8 = tifffile.imread(tmp_path / "b8" / "tiles" / "0" / "r0c0.tif")
    # an unsigned 12-bit value lies in 0 .. 2**12 - 1 = 4095 (definition of the bit depth)
    assert t12.dtype == np.uint16 and t12.max() <= 4095 and t12.max() > 2048
    assert len(np.unique(t12)) > 256  # finer than 8 bits
    # the same scene: 12-bit values are the 8-bit ones times 16, up to rounding of each
    assert np.abs(t12 / 16.0 - t8).max() <= 0.5 + 1 / 32
    assert load_truth(tmp_path / "b12").record["intensity_scale"] == 16


def test_variants_are_named_and_checked():
    assert variant_params("realistic", "dense").cell_size == 40.0
    assert variant_params("standard", "long").sections >= 36
    assert set(VARIANTS) >= {"base", "dense", "small", "long", "bits12"}
    with pytest.raises(Exception, match="variant"):
        variant_params("realistic", "huge")
