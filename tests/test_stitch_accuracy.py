"""Stitching accuracy on ground-truth sections and on a photograph scikit-image ships."""
import numpy as np
import pytest
import tifffile
from skimage import data
from skimage.color import rgb2gray

from stackbuild.errors import InputError
from stackbuild.manifest import read_tile_manifest
from stackbuild.stitch.section import stitch_section
from stackbuild.stitch.settings import StitchSettings
from stackbuild.stitch.intensity import illumination_at_tile_size

from stitch_fixtures import make_section, placement_errors, vignetting


@pytest.fixture(scope="module")
def plain(tmp_path_factory):
    # Invented ground truth: 5x5 tiles of 256 px, ~20 % overlap, +-20 px stage
    # jitter, 20 % vignetting, per-tile gain/offset, noise at SNR 5.
    sec = make_section(tmp_path_factory.mktemp("plain"), seed=1)
    return sec, stitch_section(sec.tiles, StitchSettings(), 0)


@pytest.fixture(scope="module")
def with_blank(tmp_path_factory):
    sec = make_section(tmp_path_factory.mktemp("blank"), seed=1, blank=12)
    return sec, stitch_section(sec.tiles, StitchSettings(), 0)


def test_placement_error_on_ground_truth(plain):
    sec, res = plain
    err = placement_errors(res, sec.truth)  # after removing one common translation
    assert np.sqrt(np.mean(err ** 2)) <= 0.1
    assert err.max() <= 0.3
    assert not any(t.flags for t in res.tiles)
    assert res.stats["pairs_accepted"] >= 40  # at least every direct neighbour pair (5x5 grid has 40)
    assert res.stats["seam_residual_rms"] < 0.3


def test_pair_shift_sign_convention(plain):
    # dx, dy = position of b minus position of a, against the truth.
    sec, res = plain
    idx = {n: i for i, n in enumerate(sec.names)}
    for p in res.pairs:
        if p.accepted:
            want = sec.truth[idx[p.b]] - sec.truth[idx[p.a]]
            assert np.hypot(p.dx - want[0], p.dy - want[1]) < 0.6


def test_illumination_profile_follows_the_vignetting(plain):
    sec, res = plain
    prof = res.illumination
    assert prof.dtype == np.float32 and prof.shape == (16, 16)  # ceil(256 / 16)
    assert abs(float(prof.mean()) - 1) < 1e-5
    full = illumination_at_tile_size(prof, 256, 256)
    true = vignetting(256, 256, 0.2)
    true = true / true.mean()
    # Our tolerances: a median over only 25 tiles of a granular specimen leaves
    # a few per cent of sampling error, more at the edges, where the bilinear
    # upsampling also clamps within half a step (8 px) of the border.
    assert np.abs(full - true)[32:-32, 32:-32].max() < 0.04
    assert np.abs(full - true).max() < 0.08
    # And it removes most of the fall-off: corrected corners vs centre.
    assert abs(full[0, 0] / full[128, 128] - true[0, 0] / true[128, 128]) < 0.08


def test_gain_and_offset_make_overlaps_agree(plain):
    sec, res = plain
    gain = np.array([t.gain for t in res.tiles])
    assert abs(gain.mean() - 1) < 1e-3
    # Gauge of the section (ours): on average the correction leaves the tiles' median grey as it was.
    raw = np.array([t.stats["median"] for t in res.tiles])
    fixed = gain * raw + np.array([t.offset for t in res.tiles])
    assert np.mean(fixed) == pytest.approx(np.mean(raw), rel=1e-6)
    # The solved gain undoes the applied one: gain * applied is constant.
    # Our tolerance 5 %: the residual error of the 25-tile illumination profile
    # at the tile edges (where the overlaps are) accumulates along the grid.
    prod = gain * sec.gains
    assert prod.std() / prod.mean() < 0.05
    assert np.corrcoef(gain, 1 / sec.gains)[0, 1] > 0.8


def test_blank_tile_is_flagged_and_placed_from_neighbours(plain, with_blank):
    sec, res = with_blank
    blank = res.tiles[12]
    assert "blank" in blank.flags and "unplaced" in blank.flags
    assert "unplaced_tiles" in res.flags
    for p in res.pairs:
        if blank.tile in (p.a, p.b):
            assert not p.accepted and p.reason == "blank_tile"
    pos = np.array([(t.x, t.y) for t in res.tiles])
    stage = np.array([(t.stage_x, t.stage_y) for t in res.tiles])
    near = [6, 7, 8, 11, 13, 16, 17, 18]
    want = stage[12] + (pos[near] - stage[near]).mean(axis=0)
    np.testing.assert_allclose(pos[12], want, atol=1e-6)
    # No other tile moves relative to the rest by more than 0.2 px. The mosaic
    # as a whole is fixed only by the weak stage prior (its mean over the
    # tiles a pair reaches), so one common translation is removed first.
    ref = np.array([(t.x, t.y) for t in plain[1].tiles])
    others = np.arange(25) != 12
    move = pos[others] - ref[others]
    move -= move.mean(axis=0)
    assert np.hypot(move[:, 0], move[:, 1]).max() <= 0.2
    err = placement_errors(res, sec.truth, skip={12})
    assert np.sqrt(np.mean(err ** 2)) <= 0.1


def test_repetitive_texture_pair_is_rejected_and_named(tmp_path):
    sec = make_section(tmp_path, seed=1, periodic_seam=(0, 1))
    res = stitch_section(sec.tiles, StitchSettings(), 0)
    pair = next(p for p in res.pairs if (p.a, p.b) == ("r0c0", "r0c1"))
    assert not pair.accepted
    assert pair.reason in {"weak_peak", "residual", "far_from_stage"}
    assert pair.peak_ratio < StitchSettings().min_peak_margin or pair.reason != "weak_peak"
    assert res.stats["pairs_rejected"].get(pair.reason, 0) >= 1
    err = placement_errors(res, sec.truth)
    assert np.sqrt(np.mean(err ** 2)) <= 0.1


def test_photograph_reassembled(tmp_path):
    # Open data shipped by scikit-image: skimage.data.immunohistochemistry()
    # (512 x 512 RGB), converted to grey, cut into 3x3 tiles of 200 px with
    # integer and sub-pixel true offsets; no noise, vignetting or gain added.
    grey = rgb2gray(data.immunohistochemistry())
    sec = make_section(tmp_path, rows=3, cols=3, tile=200, overlap=56, jitter=6.0, vignette=0.0,
                       snr=1e9, gain_spread=0.0, offset_spread=0.0, seed=5, scene=grey)
    res = stitch_section(sec.tiles, StitchSettings(), 0)
    err = placement_errors(res, sec.truth)
    assert res.stats["pairs_accepted"] >= 12  # the 12 direct neighbour pairs of a 3x3 grid
    assert np.sqrt(np.mean(err ** 2)) <= 0.1


def test_unreadable_tile_names_the_file(tmp_path):
    sec = make_section(tmp_path, rows=2, cols=2, seed=2)
    bad = sec.tiles[1].path
    # Checked first: the manifest check itself refuses a truncated file; here it
    # breaks between the check and the stitch.
    entries = read_tile_manifest(tmp_path / "tiles.csv").section_tiles(0)
    raw = bad.read_bytes()
    bad.write_bytes(raw[: len(raw) // 2])  # header intact, pixel data cut short
    with pytest.raises(InputError) as info:
        stitch_section(entries, StitchSettings(), 7)
    assert info.value.file == str(bad)
    assert info.value.section == 7
    assert "r0c1" in str(info.value)


def test_tile_that_differs_from_its_header_is_an_input_error(tmp_path):
    sec = make_section(tmp_path, rows=1, cols=2, seed=2)
    tifffile.imwrite(sec.tiles[0].path, np.zeros((10, 10), np.uint16))
    with pytest.raises(InputError, match="header said"):
        stitch_section(sec.tiles, StitchSettings(), 0)


def test_empty_section_is_an_input_error():
    with pytest.raises(InputError, match="no tiles"):
        stitch_section([], StitchSettings(), 3)


def test_single_tile_section(tmp_path):
    sec = make_section(tmp_path, rows=1, cols=1, seed=2)
    res = stitch_section(sec.tiles, StitchSettings(illumination=False), 0)
    t = res.tiles[0]
    assert (t.x, t.y) == pytest.approx((t.stage_x, t.stage_y), abs=1e-6)
    assert res.pairs == [] and res.illumination is None and t.flags == []


def test_record_round_trips_through_the_transform_store(plain, tmp_path):
    # The record must be plain JSON (standard library json, no numpy scalars)
    # and survive the project's store unchanged.
    import json

    from stackbuild.transforms import TransformStore

    _, res = plain
    json.dumps(res.to_json(), allow_nan=False)
    store = TransformStore(tmp_path / "transforms")
    store.save_stitch(res)
    back = store.load_stitch(0)
    assert back.to_json() == res.to_json()
    np.testing.assert_array_equal(back.illumination, res.illumination)


def test_unusable_setting_is_an_input_error(tmp_path):
    sec = make_section(tmp_path, rows=1, cols=2, seed=2)
    with pytest.raises(InputError, match=r"\[stitch\] spectral_exponent"):
        stitch_section(sec.tiles, StitchSettings(spectral_exponent=2.0), 0)
