"""The committed sample in sample_tiles/: readable, as documented, and true to its ground truth."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile
from scipy.ndimage import map_coordinates

from stackbuild.manifest import read_channel_manifest, read_tile_manifest
from stackbuild.synth import load_truth

SAMPLE = Path(__file__).resolve().parents[1] / "sample_tiles"
pytestmark = pytest.mark.skipif(not (SAMPLE / "tiles.csv").is_file(), reason="sample_tiles/ not present")


def test_sample_is_as_documented():
    manifest = read_tile_manifest(SAMPLE / "tiles.csv")
    assert manifest.sections == [0, 1, 2, 3, 4, 6, 7, 8] and manifest.lost_sections == [5]
    assert all(len(manifest.section_tiles(s)) == 9 for s in manifest.sections)
    assert {(t.width, t.height) for t in manifest.tiles} == {(448, 448)}
    channels = read_channel_manifest(SAMPLE / "channels.csv")
    assert sorted({c.section for c in channels}) == [0, 2, 4, 6, 8]
    assert {c.channel for c in channels} == {"ambrin", "stippolin"}
    size = sum(p.stat().st_size for p in SAMPLE.rglob("*") if p.is_file())
    assert size <= 15 * 2 ** 20


def test_sample_tile_matches_its_truth_and_every_section_lies_inside_the_tissue():
    truth = load_truth(SAMPLE)
    h, w = truth.section_shape
    big_h, big_w = truth.true_shape
    corners = np.array([[0, 0], [w - 1, 0], [0, h - 1], [w - 1, h - 1]], float)
    for s in truth.sections:
        p = truth.section_to_true(s, corners)
        assert p.min() > 0 and p[:, 0].max() < big_w - 1 and p[:, 1].max() < big_h - 1
    s, tile = 3, "r1c1"
    x, y = truth.tile_positions(s)[tile]
    gx, gy = np.meshgrid(np.arange(448) + x, np.arange(448) + y)
    p = truth.section_to_true(s, np.column_stack([gx.ravel(), gy.ravel()]))
    # SciPy's bilinear sampling of the re-rendered undistorted section
    clean = map_coordinates(truth.undistorted(s), [p[:, 1], p[:, 0]], order=1).reshape(448, 448)
    gain, offset = truth.tile_gain_offset(s)[tile]
    residual = tifffile.imread(SAMPLE / f"tiles/{s}/{tile}.tif") - (gain * truth.vignette() * clean + offset)
    assert residual.std() < 1.5 * truth.noise_std(s)
