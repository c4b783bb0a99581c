"""Synthetic sample generator: determinism, manifests, file formats, defects."""
from __future__ import annotations

import cv2
import numpy as np
import pytest
import tifffile

from stackbuild.errors import InputError
from stackbuild.manifest import read_channel_manifest, read_tile_manifest
from stackbuild.synth import SynthParams, generate, load_truth

SMALL = dict(sections=4, grid=(2, 2), tile_size=128, offset=10.0, cell_size=40.0, channel_every=2,
             lost_sections="2", blank_tiles="1:r1c0", damaged_sections="3", repetitive_pair="0:r0c0-r0c1")


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    out = tmp_path_factory.mktemp("synth")
    generate(out, SynthParams(seed=11, **SMALL))
    return out


def _files(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_same_seed_gives_identical_bytes_and_other_seed_differs(sample, tmp_path):
    generate(tmp_path / "again", SynthParams(seed=11, **SMALL))
    generate(tmp_path / "other", SynthParams(seed=12, **SMALL))
    first, again, other = _files(sample), _files(tmp_path / "again"), _files(tmp_path / "other")
    assert first.keys() == again.keys()
    assert [k for k in first if first[k] != again[k]] == []
    tiles = [k for k in first if k.startswith("tiles/")]
    assert all(first[k] != other[k] for k in tiles)


def test_manifests_pass_the_project_readers(sample):
    manifest = read_tile_manifest(sample / "tiles.csv")
    assert manifest.sections == [0, 1, 3]
    assert manifest.lost_sections == [2]
    assert {t.tile for t in manifest.section_tiles(0)} == {"r0c0", "r0c1", "r1c0", "r1c1"}
    assert {(t.width, t.height, t.dtype) for t in manifest.tiles} == {(128, 128, "u1")}  # manifest reports numpy dtype codes
    channels = read_channel_manifest(sample / "channels.csv")
    assert {(c.section, c.channel) for c in channels} == {(0, "ambrin"), (0, "stippolin")}
    assert {c.pixel_size for c in channels} == {4.0 * 8}
    truth = load_truth(sample)
    assert truth.sections == [0, 1, 3] and truth.lost_sections == [2]
    stage = {(t.section, t.tile): (t.x, t.y) for t in manifest.tiles}
    for s in truth.sections:
        for tile, xy in truth.stage_positions(s).items():
            assert stage[(s, tile)] == pytest.approx(xy, abs=1e-9)


def test_tiffs_read_the_same_in_opencv(sample):
    # OpenCV's own TIFF reader (libtiff) must decode the zlib + predictor files to the same pixels.
    for path in sorted((sample / "tiles").rglob("*.tif"))[:3] + sorted((sample / "channels").rglob("*.tif")):
        assert np.array_equal(cv2.imread(str(path), cv2.IMREAD_UNCHANGED), tifffile.imread(path))


def test_stage_error_is_within_jitter(sample):
    truth = load_truth(sample)
    for s in truth.sections:
        true, stage = truth.tile_positions(s), truth.stage_positions(s)
        err = np.array([np.subtract(stage[t], true[t]) for t in true])
        assert np.abs(err).max() <= truth.params.jitter + 1e-3


def test_blank_tile_is_flat_resin_within_noise(sample):
    truth = load_truth(sample)
    tile = tifffile.imread(sample / "tiles/1/r1c0.tif").astype(np.float64)
    gain, offset = truth.tile_gain_offset(1)["r1c0"]
    from stackbuild.synth.acquire import RESIN_LEVEL
    residual = tile - (gain * truth.vignette() * RESIN_LEVEL + offset)
    sigma = truth.noise_std(1)
    assert abs(residual.mean()) < 0.2 * sigma
    assert residual.std() == pytest.approx(np.hypot(sigma, 12 ** -0.5), rel=0.05)
    other = tifffile.imread(sample / "tiles/1/r0c0.tif").astype(np.float64)
    assert other.std() > 3 * residual.std()


def test_fold_darkens_about_a_fifth_of_the_damaged_section(sample):
    truth = load_truth(sample)
    mask = truth.damage_mask(3)
    assert truth.damage_mask(0) is None
    assert mask.mean() == pytest.approx(0.2, abs=0.02)
    s = 3
    inside, outside = [], []
    for tile, (x, y) in truth.tile_positions(s).items():
        image = tifffile.imread(sample / f"tiles/{s}/{tile}.tif").astype(np.float64)
        sub = np.zeros(image.shape)
        xi, yi = int(round(x)), int(round(y))
        crop = mask[max(yi, 0):yi + 128, max(xi, 0):xi + 128]
        sub[:crop.shape[0], :crop.shape[1]] = crop
        inside.append(image[sub > 0.99])
        outside.append(image[sub < 0.01])
    assert np.concatenate(inside).mean() < 0.7 * np.concatenate(outside).mean()


def test_repetitive_overlap_is_periodic(sample):
    rec = load_truth(sample).defects["repetitive_pair"]
    assert rec["section"] == 0 and rec["tiles"] == ["r0c0", "r0c1"]
    x0, y0, x1, y1 = rec["box"]
    truth = load_truth(sample)
    tx, ty = truth.tile_positions(0)["r0c1"]
    image = tifffile.imread(sample / "tiles/0/r0c1.tif").astype(np.float64)
    patch = image[int(np.ceil(y0 - ty)) + 2:int(y1 - ty) - 2, int(np.ceil(x0 - tx)) + 1:int(x1 - tx) - 1]
    # strongest non-zero spatial frequency of the patch sits at the recorded period
    spectrum = np.abs(np.fft.rfft(patch - patch.mean(), n=512, axis=0)).mean(axis=1)
    peak = np.argmax(spectrum[1:]) + 1
    assert 512 / peak == pytest.approx(rec["period"], rel=0.1)


def test_bad_settings_are_input_errors(tmp_path):
    with pytest.raises(InputError, match="blank tile"):
        generate(tmp_path, SynthParams(grid=(2, 2), blank_tiles="0:r5c5"))
    with pytest.raises(InputError, match="outside"):
        generate(tmp_path, SynthParams(sections=3, lost_sections="7"))
    with pytest.raises(InputError, match="neighbouring"):
        generate(tmp_path, SynthParams(repetitive_pair="0:r0c0-r1c1"))


def test_regenerating_replaces_an_earlier_sample_and_keeps_other_files(tmp_path):
    small = dict(sections=2, grid=(1, 2), tile_size=96, cell_size=40.0, offset=4.0, warp=1.0)
    generate(tmp_path, SynthParams(channels=1, **small))
    (tmp_path / "README.md").write_text("notes")
    generate(tmp_path, SynthParams(channels=0, **small))
    assert not (tmp_path / "channels.csv").exists()  # no stale channel manifest
    assert (tmp_path / "README.md").read_text() == "notes"
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "data.txt").write_text("keep")
    with pytest.raises(InputError, match="holds no synthetic sample"):
        generate(foreign, SynthParams(**small))
