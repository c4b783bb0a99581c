"""Quality metrics: planted errors are found, and the numbers agree with reference routes."""
from __future__ import annotations

import json

import numpy as np
import pytest
import zarr
from scipy import ndimage
from skimage import data
from skimage.registration import phase_cross_correlation

from stackbuild.qc.blockmatch import match_blocks, summarize
from stackbuild.qc.measure import plane_neighbours
from stackbuild.qc.metrics import SCHEMA_VERSION, collect
from stackbuild.qc.settings import ReportSettings
from test_qc_synthbuild import (CENTRE, PLANT_ANGLE, PLANT_ROT_SECTION, PLANT_SHIFT, PLANT_TILE,
                                PLANT_TILE_SECTION, make_build)


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    root = make_build(tmp_path_factory.mktemp("qc") / "build")
    doc, meas = collect(root, ReportSettings())
    return root, doc, meas


def test_match_blocks_recovers_a_scipy_shift():
    # Reference: scipy.ndimage.shift moves an image by a known sub-pixel amount;
    # data: scikit-image's bundled 'gravel' image.
    fixed = data.gravel().astype(np.float32)[:256, :256]
    dx, dy = 1.3, -2.6
    moving = ndimage.shift(fixed, (dy, dx), order=3, mode="nearest")
    m = match_blocks(fixed, moving, spacing=40, radius=12, search=6)
    assert len(m.ncc) >= 16
    # moving(p + d) = fixed(p), so d is the applied shift; 0.1 px is the usual
    # accuracy of a parabola fit on a textured image (from memory, common practice).
    assert np.median(m.shifts[:, 0]) == pytest.approx(dx, abs=0.1)
    assert np.median(m.shifts[:, 1]) == pytest.approx(dy, abs=0.1)


def test_match_blocks_drops_flat_and_ambiguous_blocks():
    # A linear ramp matches itself along its level lines: no block may be reported.
    ramp = np.tile(np.linspace(0, 100, 128, dtype=np.float32), (128, 1))
    assert len(match_blocks(ramp, ramp, spacing=20, radius=8, search=5).ncc) == 0
    flat = np.full((128, 128), 7, np.float32)
    assert len(match_blocks(flat, flat, spacing=20, radius=8, search=5).ncc) == 0


def test_summarize_matches_numpy():
    # Reference: numpy's percentile (linear interpolation) and RMS by definition.
    v = np.array([0.0, 1.0, 2.0, 3.0, 10.0])
    s = summarize(v)
    assert s["rms"] == pytest.approx(np.sqrt(np.mean(v ** 2)))
    assert s["p95"] == pytest.approx(np.percentile(v, 95))
    assert s["max"] == 10.0 and s["n"] == 5
    assert summarize([])["rms"] is None


def test_lost_planes_are_bridged():
    assert plane_neighbours(5, {2}) == [(0, 1), (1, 3), (3, 4)]
    assert plane_neighbours(3, set()) == [(0, 1), (1, 2)]


def test_the_planted_tile_is_named_worst(planted):
    _, doc, _ = planted
    worst = doc["worst"]["tile"]
    assert (worst["section"], worst["tile"]) == (PLANT_TILE_SECTION, PLANT_TILE)
    # Ground truth: the tile was recorded PLANT_SHIFT = 3 px away from where it was cut.
    assert worst["seam_median"] == pytest.approx(np.hypot(*PLANT_SHIFT), abs=0.15)
    others = [t["seam_median"] for t in doc["tiles"] if t is not worst and t["seam_median"] is not None]
    assert max(others) < 0.5 * worst["seam_median"]
    # every other pair was placed exactly (ground truth): only noise is left
    clean = [p["residual"] for p in doc["pairs"] if PLANT_TILE not in (p["a"], p["b"])
             or p["section"] != PLANT_TILE_SECTION]
    assert len(clean) == 60 - 4 and max(clean) < 0.1
    assert doc["worst"]["section_stitch"]["section"] == PLANT_TILE_SECTION
    assert PLANT_TILE in (doc["worst"]["pair"]["a"], doc["worst"]["pair"]["b"])


def test_seam_residual_has_the_planted_direction(planted):
    _, _, meas = planted
    seam = next(s for s in meas.seams[PLANT_TILE_SECTION] if (s.a, s.b) == (PLANT_TILE, "r1c2"))
    # Tile a sits 3 px too far right, so b appears 3 px to the left of where a expects it.
    assert np.median(seam.blocks.shifts, axis=0) == pytest.approx(-np.asarray(PLANT_SHIFT), abs=0.15)


def test_the_planted_rotation_is_named_worst(planted):
    _, doc, _ = planted
    assert doc["worst"]["section_align"]["section"] == PLANT_ROT_SECTION
    scores = {r["section"]: r["align_score"] for r in doc["sections"]}
    assert scores[PLANT_ROT_SECTION] > 1.2 * max(v for k, v in scores.items() if k != PLANT_ROT_SECTION)


def test_plane_residuals_follow_the_rotation(planted):
    _, _, meas = planted
    pair = next(p for p in meas.plane_pairs if p.zb == PLANT_ROT_SECTION)
    # Ground truth geometry: plane z is sampled at R p, so the block at p finds
    # its match at R^-1 p, a residual d = R^-1 p - p (exact for a rotation).
    c, s = np.cos(PLANT_ANGLE), np.sin(PLANT_ANGLE)
    v = pair.blocks.points - CENTRE
    expect = np.column_stack([c * v[:, 0] + s * v[:, 1], -s * v[:, 0] + c * v[:, 1]]) - v
    assert len(v) >= 20
    # measured at level 1 (2 px per pixel): a few tenths of a pixel is the resolution
    assert np.abs(pair.blocks.shifts - expect).max() < 0.45
    assert np.median(np.abs(pair.blocks.shifts - expect)) < 0.15


def test_block_residual_agrees_with_phase_cross_correlation(planted):
    root, doc, meas = planted
    # Reference: skimage.registration.phase_cross_correlation (upsampled DFT,
    # Guizar-Sicairos et al. 2008) on 65 px windows of the level-0 planes.
    vol = zarr.open_array(str(root / "volume.zarr" / "em" / "0"), mode="r")
    pair = next(p for p in meas.plane_pairs if p.zb == PLANT_ROT_SECTION)
    a, b = vol[pair.za].astype(np.float32), vol[pair.zb].astype(np.float32)
    diffs = []
    for (x, y), d in list(zip(pair.blocks.points, pair.blocks.shifts))[::3]:
        cx, cy, r = int(round(x)), int(round(y)), 32
        if min(cx, cy) < r + 8 or max(cx, cy) > a.shape[0] - r - 8:
            continue
        shift, _, _ = phase_cross_correlation(a[cy - r:cy + r + 1, cx - r:cx + r + 1],
                                              b[cy - r:cy + r + 1, cx - r:cx + r + 1], upsample_factor=20)
        diffs.append(np.hypot(-shift[1] - d[0], -shift[0] - d[1]))
    assert len(diffs) >= 4
    assert np.median(diffs) < 0.3


def test_elastic_and_copied_numbers_equal_the_records(planted):
    root, doc, _ = planted
    # Separate route: read the stored displacement array with zarr and reduce it with numpy.
    vec = zarr.open_array(str(root / "transforms" / "sections" / "00003" / "displacement.zarr"), mode="r")[...]
    mag = np.hypot(vec[..., 0], vec[..., 1])
    row = next(r for r in doc["sections"] if r["section"] == 3)
    assert row["elastic"]["max"] == pytest.approx(float(mag.max()), rel=1e-6)
    assert row["elastic"]["rms"] == pytest.approx(float(np.sqrt(np.mean(mag ** 2))), rel=1e-6)
    assert row["inliers"] == {"4": 43}  # copied from the aligner's coarse-stage record
    assert row["aligner_stats"]["coarse"]["pairs"]["4"]["inliers"] == 43
    rec = json.loads((root / "transforms" / "sections" / "00001" / "stitch.json").read_text())["record"]
    rejected = [p for p in rec["pairs"] if not p["accepted"]]
    assert doc["totals"]["rejected"] == len(rejected) == 1
    assert doc["totals"]["flagged.tiles"] == 1


def test_locations_carry_pixels_and_nanometres(planted):
    _, doc, _ = planted
    at = doc["worst"]["tile"]["at"]
    px = doc["volume"]["pixel_size_nm"]
    assert at["x_nm"] == pytest.approx(at["x_px"] * px, abs=0.1)
    assert at["y_nm"] == pytest.approx(at["y_px"] * px, abs=0.1)
    # the planted tile's centre: true x 156 + 3 px recorded shift + (200 - 1) / 2
    assert at["x_px"] == pytest.approx(156 + 3 + 99.5)
    assert doc["schema_version"] == SCHEMA_VERSION


def test_channel_rows_come_from_the_channel_records(planted):
    _, doc, _ = planted
    rows = {c["channel"]: c for c in doc["channels"]}
    assert set(rows) == {"glowA", "glowB"}
    assert doc["worst"]["channel"]["channel"] == "glowB"  # lowest measure after registration
    assert doc["totals"]["channels.flagged"] == 1
    # image centre (23.5, 31.5) through the stored affine x 4 + (100, 60); section 1 is aligned by identity
    assert (rows["glowA"]["at"]["x_px"], rows["glowA"]["at"]["y_px"]) == (4 * 23.5 + 100, 4 * 31.5 + 60)


def test_a_build_without_channels_or_volume_still_measures_seams(tmp_path):
    from stackbuild.qc.metrics import write_metrics

    root = make_build(tmp_path / "b", volume=False)
    (root / "transforms" / "sections" / "00001" / "channels.json").unlink()
    (root / "transforms" / "canvas.json").unlink()
    doc, meas = collect(root, ReportSettings(measure_scale=4))
    assert doc["channels"] == [] and doc["worst"]["tile"]["tile"] == PLANT_TILE
    names = {p.name for p in write_metrics(doc, tmp_path / "qc", meas)}
    assert "channels.csv" not in names and "sections.csv" in names
