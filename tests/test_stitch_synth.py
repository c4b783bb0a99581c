"""Stitching as acquisitions arrive: bit depths, large stage errors, a blank tile, a split section.

Ground truth (true tile positions, tile gains) comes from ``stackbuild synth``;
the other bit depths are derived from one 16-bit sample the way cameras and
converters store them (12 significant bits in a 16-bit file; a narrow range
of a 16-bit file; 8 bits), so every depth carries the same specimen and noise.
"""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
import tifffile

from stackbuild.manifest import read_tile_manifest
from stackbuild.stitch.intensity import illumination_at_tile_size
from stackbuild.stitch.section import stitch_section
from stackbuild.stitch.settings import StitchSettings
from stackbuild.synth import SynthParams, generate, load_truth

#: One section of 3 x 3 tiles of 512 px (384 for the bit depths), no marker channels.
BASE = dict(sections=1, grid=(3, 3), tile_size=512, channels=0, landmarks=0, compress=False)

#: The ways a 16-bit synthetic tile (8-bit scale x 256) is stored at other bit depths.
DEPTHS = {
    "16-bit": lambda a: a,
    "12-bit in 16-bit files": lambda a: np.round(a / 16.0).astype(np.uint16),    # 0 .. 4095
    "narrow 16-bit": lambda a: np.round(1000 + a * (2000 / 65535)).astype(np.uint16),  # 1000 .. 3000
    "8-bit": lambda a: np.round(a / 257.0).astype(np.uint8),
}


def _sample(folder: Path, **params) -> tuple[list, dict]:
    generate(folder, SynthParams(**{**BASE, **params}))
    return read_tile_manifest(folder / "tiles.csv").section_tiles(0), load_truth(folder)


def _placement_errors(res, truth_pos: dict) -> np.ndarray:
    """Per-tile distance (px) from the true position after removing the common translation."""
    got = np.array([(t.x, t.y) for t in res.tiles])
    want = np.array([truth_pos[t.tile] for t in res.tiles])
    d = got - want
    d -= d.mean(axis=0)
    return np.hypot(d[:, 0], d[:, 1])


def _outputs(res) -> dict[str, np.ndarray]:
    """Return each tile's corrected pixels as the renderer computes them: gain * raw / illumination + offset."""
    prof = 1.0
    if res.illumination is not None:
        prof = illumination_at_tile_size(res.illumination, res.tiles[0].height, res.tiles[0].width)
    return {t.tile: t.gain * tifffile.imread(t.path).astype(np.float32) / prof + t.offset for t in res.tiles}


def _levels(pixels) -> np.ndarray:
    """Return the 1st percentile, median and 99th percentile of a set of tiles' pixels."""
    return np.percentile(np.concatenate([np.ravel(p) for p in pixels]), [1, 50, 99])


def _check_levels(res, what: str = "") -> None:
    """Assert that intensity correction keeps a section's levels (issue #12).

    The median of the corrected section stays within 5 % of the raw tiles'
    (the issue's bound). Its 1st and 99th percentiles are held to 10 % (our
    bound): a correct correction pulls the tails in when tile gains differ,
    since the brightest and darkest raw pixels come from the tiles imaged
    brightest and darkest; with the synthetic gain spread of +-10 % even the
    true gains move the 99th percentile by about 6 % (measured on the 16-bit
    sample, see test_correction_matches_the_true_gains).
    """
    fixed = _levels(_outputs(res).values())
    raw = _levels(tifffile.imread(t.path) for t in res.tiles)
    assert abs(fixed[1] / raw[1] - 1) <= 0.05, what
    np.testing.assert_allclose(fixed[[0, 2]], raw[[0, 2]], rtol=0.10, err_msg=what)


def _direct(pair) -> bool:
    (ra, ca), (rb, cb) = (tuple(int(v) for v in n[1:].split("c")) for n in (pair.a, pair.b))
    return abs(ra - rb) + abs(ca - cb) == 1


@pytest.fixture(scope="module")
def depths(tmp_path_factory):
    root = tmp_path_factory.mktemp("depths")
    _, truth = _sample(root / "16", seed=3, dtype="uint16", tile_size=384)
    out = {}
    for name, convert in DEPTHS.items():
        folder = root / name.replace(" ", "_")
        if name != "16-bit":
            shutil.copytree(root / "16", folder)
            for f in (folder / "tiles").rglob("*.tif"):
                tifffile.imwrite(f, convert(tifffile.imread(f)))
        else:
            folder = root / "16"
        tiles = read_tile_manifest(folder / "tiles.csv").section_tiles(0)
        out[name] = (tiles, stitch_section(tiles, StitchSettings(), 0))
    return truth, out


def test_every_bit_depth_stitches_alike(depths):
    # Must-show of issue #12; the thresholds (0.1 px RMS, 0.3 px max, 0.02 px
    # between depths) are the issue's, measured against the synthetic truth.
    truth, out = depths
    rms = {}
    for name, (tiles, res) in out.items():
        err = _placement_errors(res, truth.tile_positions(0))
        rms[name] = float(np.sqrt(np.mean(err ** 2)))
        assert rms[name] <= 0.1 and err.max() <= 0.3, name
        assert not any(t.flags for t in res.tiles), name  # nothing blank, saturated or unplaced
        assert res.stats["pairs_accepted"] >= 12, name   # at least the 12 direct neighbour pairs
    assert max(rms.values()) - min(rms.values()) <= 0.02


def test_output_keeps_the_input_type_and_range(depths):
    # The record keeps the tiles' pixel type; the corrected section keeps its
    # levels (see _check_levels) and stays inside the type, at every bit depth.
    _, out = depths
    for name, (tiles, res) in out.items():
        assert res.dtype == tiles[0].dtype, name
        _check_levels(res, name)
        assert max(float(v.max()) for v in _outputs(res).values()) <= np.iinfo(res.dtype).max, name


def test_correction_matches_the_true_gains(depths):
    # Ground truth: synth records each tile's gain g and offset o (recorded =
    # g * vignette * content + o, 8-bit scale; x 256 in 16-bit tiles). Undoing
    # them exactly, in the same gauge (mean gain 1), gives the section levels
    # our solved gains and offsets must reproduce (our tolerance: 1 %).
    truth, out = depths
    tiles, res = out["16-bit"]
    true = truth.tile_gain_offset(0)
    g = np.array([true[t.tile][0] for t in res.tiles])
    o = 256.0 * np.array([true[t.tile][1] for t in res.tiles])
    k = 1.0 / np.mean(1.0 / g)
    prof = illumination_at_tile_size(res.illumination, 384, 384)
    ideal = [k * (tifffile.imread(t.path) / prof - o[i]) / g[i] + o.mean() for i, t in enumerate(res.tiles)]
    np.testing.assert_allclose(_levels(_outputs(res).values()), _levels(ideal), rtol=0.01)
    np.testing.assert_allclose([t.gain for t in res.tiles], k / g, atol=0.03)


def test_large_stage_errors_with_small_overlaps(tmp_path):
    # Must-show of issue #12: 8 % overlap, per-tile stage errors up to +-50 px
    # (neighbours up to 100 px apart from their nominal offset), noise at SNR 3.
    tiles, truth = _sample(tmp_path, seed=7, overlap=0.08, jitter=50.0, snr=3.0, dtype="uint16")
    stage = np.array([(t.x, t.y) for t in tiles])
    true = np.array([truth.tile_positions(0)[t.tile] for t in tiles])
    assert np.abs(stage - true).max() > 40  # the sample really has errors near the bound
    res = stitch_section(tiles, StitchSettings(), 0)
    direct = [p for p in res.pairs if _direct(p)]
    assert len(direct) == 12 and all(p.accepted for p in direct)
    err = _placement_errors(res, truth.tile_positions(0))
    assert np.sqrt(np.mean(err ** 2)) <= 0.15


def test_search_widens_when_stage_errors_exceed_the_setting(tmp_path):
    # Stage errors of up to +-30 px per tile against max_stage_error = 10: the
    # first pairs found show errors at the edge of the search, so the pairs
    # lost to it are searched again, wider. The measured stage error is
    # checked against the truth's (synth writes both the stage and the true
    # positions; our tolerance 3 px).
    tiles, truth = _sample(tmp_path, seed=1, tile_size=384, jitter=30.0)
    res = stitch_section(tiles, StitchSettings(max_stage_error=10.0), 0)
    assert res.stats["pairs_widened"] > 0
    assert all(p.accepted for p in res.pairs if _direct(p))
    err = _placement_errors(res, truth.tile_positions(0))
    assert np.sqrt(np.mean(err ** 2)) <= 0.1
    off = np.array([(t.x - t.stage_x, t.y - t.stage_y) for t in res.tiles])
    true_off = np.array([np.subtract(truth.tile_positions(0)[t.tile], (t.stage_x, t.stage_y)) for t in res.tiles])
    d = true_off - np.median(true_off, axis=0)
    assert res.stats["stage_error_p95"] == pytest.approx(np.percentile(np.abs(d).max(axis=1), 95), abs=3.0)
    assert np.abs(off - true_off - (off - true_off).mean(axis=0)).max() < 0.3


@pytest.fixture(scope="module")
def blank_middle(tmp_path_factory):
    root = tmp_path_factory.mktemp("blank")
    out = {}
    for tag, blank in (("with", "0:r1c1"), ("without", "")):
        tiles, truth = _sample(root / tag, seed=0, blank_tiles=blank)
        out[tag] = stitch_section(tiles, StitchSettings(), 0)
    return out, truth


def test_blank_middle_tile_leaves_the_others_as_they_were(blank_middle):
    # Must-show of issue #12: every other tile's output within 2 % of the same
    # section imaged without the blank tile (median over each tile's pixels).
    out, _ = blank_middle
    res = out["with"]
    centre = next(t for t in res.tiles if t.tile == "r1c1")
    assert "blank" in centre.flags and (centre.gain, centre.offset) == (1.0, 0.0)
    with_blank, without = _outputs(res), _outputs(out["without"])
    for name, ref in without.items():
        if name != "r1c1":
            rel = np.abs(with_blank[name] - ref) / np.abs(ref).mean()
            assert np.median(rel) <= 0.02, name
    gains = np.array([t.gain for t in res.tiles if t.tile != "r1c1"])
    assert np.all(np.abs(gains - 1) < 0.2)


def test_blank_middle_tile_keeps_the_section_levels(blank_middle):
    out, _ = blank_middle
    res = out["with"]
    _check_levels(res)
    others = [p for p in res.pairs if "r1c1" not in (p.a, p.b) and _direct(p)]
    assert all(p.accepted for p in others)  # the ring around the blank tile still holds together


def test_section_split_into_two_groups_keeps_each_groups_level(tmp_path):
    # A 2 x 3 section whose right column shows another specimen (taken from a
    # sample of another seed), imaged brighter (x 1.3, as after a beam change):
    # every pair across the split is registered and rejected, so the section
    # falls into two groups no accepted pair joins. Issue #12: neither group's
    # median grey moves by more than 5 % from its raw tiles'.
    grid = {**BASE, "grid": (2, 3), "dtype": "uint16", "tile_size": 384}
    generate(tmp_path / "a", SynthParams(**grid, seed=4))
    generate(tmp_path / "b", SynthParams(**grid, seed=9))
    for r in range(2):
        img = tifffile.imread(tmp_path / f"b/tiles/0/r{r}c2.tif").astype(np.float64)
        tifffile.imwrite(tmp_path / f"a/tiles/0/r{r}c2.tif", np.clip(img * 1.3, 0, 65535).astype(np.uint16))
    tiles = read_tile_manifest(tmp_path / "a/tiles.csv").section_tiles(0)
    res = stitch_section(tiles, StitchSettings(), 0)
    across = [p for p in res.pairs if p.a.endswith("c2") != p.b.endswith("c2")]
    assert across and not any(p.accepted for p in across)
    assert "disconnected" in res.flags
    fixed = _outputs(res)
    for group in (("c0", "c1"), ("c2",)):
        names = [t.tile for t in res.tiles if t.tile.endswith(group)]
        raw = np.median(np.concatenate([tifffile.imread(tmp_path / f"a/tiles/0/{n}.tif").ravel() for n in names]))
        got = np.median(np.concatenate([fixed[n].ravel() for n in names]))
        assert abs(got / raw - 1) <= 0.05, group


def test_section_with_a_blank_middle_tile_aligns_normally(tmp_path):
    # Issue #12: the section is aligned like its neighbours, not flagged damaged
    # or interpolated. Checked once by hand that this can fail: the same stack
    # with section 1's gains set as the issue reports them (8.3 on the blank
    # tile, 0.08 elsewhere) comes out of alignment flagged interpolated and damaged.
    from stackbuild.align.stage import run_align
    from stackbuild.transforms import TransformStore
    from align_builders import small_settings

    params = SynthParams(seed=2, sections=3, grid=(3, 3), tile_size=256, offset=12.0, warp=3.0, channels=0,
                         landmarks=0, blank_tiles="1:r1c1", compress=False)
    manifest = read_tile_manifest(generate(tmp_path / "sample", params))
    store = TransformStore(tmp_path / "build" / "transforms")
    for z in manifest.sections:
        store.save_stitch(stitch_section(manifest.section_tiles(z), StitchSettings(), z))
    aligned = run_align(tmp_path / "build", small_settings(), mapper=map)
    assert "blank" in next(t for t in store.load_stitch(1).tiles if t.tile == "r1c1").flags
    assert {z: a.flags for z, a in aligned.items()} == {0: [], 1: [], 2: []}
