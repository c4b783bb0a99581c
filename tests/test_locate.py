"""``locate``: points between volume, raw tile and stage coordinates, and across transform versions.

Outside references: the raw tiles themselves (what the microscope recorded) against the written
volume, compared with scikit-image's ``phase_cross_correlation`` (upsampled DFT, Guizar-Sicairos
et al. 2008) and a plain normalised cross-correlation.
"""
from __future__ import annotations

import csv
import json
import shutil

import numpy as np
import pytest
import tifffile
from skimage.registration import phase_cross_correlation

import stackbuild
from stackbuild.cli import main
from stackbuild.run.locate import locate_points
from stackbuild.transforms import Affine2D, TransformStore

HALF = 16  # neighbourhood half-size, pixels


@pytest.fixture(scope="module")
def volume(grid_build):
    return stackbuild.open_volume(grid_build, level=0, lazy=False).compute()


def _inside_points(build, volume, n, seed=0):
    """Return ``n`` random volume points whose located tile pixel lies HALF+1 px inside its tile."""
    rng = np.random.default_rng(seed)
    z = rng.choice([0, 1, 3, 4], 20 * n)
    y = rng.uniform(HALF, volume.shape[1] - HALF - 1, 20 * n)
    x = rng.uniform(HALF, volume.shape[2] - HALF - 1, 20 * n)
    pts = [{"z": int(a), "y": float(b), "x": float(c)} for a, b, c in zip(z, y, x)]
    rows = locate_points(build, pts, "volume")
    store = TransformStore(build / "transforms")
    out = []
    for r in rows:
        if r["flags"] or r["tile"] is None:
            continue
        t = store.load_stitch(r["section"]).tile(r["tile"])
        if HALF + 1 <= r["tile_x"] <= t.width - HALF - 2 and HALF + 1 <= r["tile_y"] <= t.height - HALF - 2:
            out.append((r, t))
        if len(out) == n:
            break
    return out


def test_volume_to_tile_to_volume_round_trip(grid_build, volume):
    found = _inside_points(grid_build, volume, 40)
    back = locate_points(grid_build, [{"section": r["section"], "tile": r["tile"], "tile_x": r["tile_x"],
                                       "tile_y": r["tile_y"]} for r, _ in found], "tile")
    err = [max(abs(a["x"] - b["x"]), abs(a["y"] - b["y"]), abs(a["z"] - b["z"])) for (a, _), b in zip(found, back)]
    assert len(err) == 40 and max(err) <= 0.05  # issue bar: 0.05 px


def test_raw_tile_neighbourhood_matches_the_volume(grid_build, volume):
    # Reference: skimage.registration.phase_cross_correlation (upsample_factor=20) for the residual
    # shift, and the normalised cross-correlation of the two neighbourhoods. Every pixel of the
    # volume's neighbourhood is located on the raw tile (so the section's small rotation is followed)
    # and the raw tile is sampled there bilinearly (scipy.ndimage.map_coordinates).
    from scipy.ndimage import map_coordinates

    found = _inside_points(grid_build, volume, 12, seed=1)
    assert len(found) == 12
    for r, t in found:
        zi, yi, xi = int(r["z"]), int(round(r["y"])), int(round(r["x"]))
        vol = volume[zi, yi - HALF:yi + HALF + 1, xi - HALF:xi + HALF + 1].astype(np.float64)
        yy, xx = np.mgrid[yi - HALF:yi + HALF + 1, xi - HALF:xi + HALF + 1]
        rows = locate_points(grid_build, [{"z": zi, "y": float(a), "x": float(b)}
                                          for a, b in zip(yy.ravel(), xx.ravel())], "volume")
        same = np.array([q["tile"] == t.tile for q in rows]).reshape(vol.shape)
        tx = np.array([q["tile_x"] for q in rows], np.float64).reshape(vol.shape)
        ty = np.array([q["tile_y"] for q in rows], np.float64).reshape(vol.shape)
        raw = map_coordinates(tifffile.imread(t.path).astype(np.float64), [ty, tx], order=1, mode="nearest")
        a, b = vol[same] - vol[same].mean(), raw[same] - raw[same].mean()
        ncc = float((a * b).sum() / np.sqrt((a * a).sum() * (b * b).sum()))
        shift, _, _ = phase_cross_correlation(vol, raw, upsample_factor=20, normalization=None)
        assert same.mean() > 0.5, r  # mostly the tile the point was located on
        assert ncc >= 0.9, (r, ncc)
        assert np.abs(shift).max() <= 0.5, (r, shift)


def test_flags_for_lost_sections_and_places_without_tiles(grid_build, volume):
    rows = locate_points(grid_build, [{"z": 2, "y": 300, "x": 300}, {"z": 0, "y": 1, "x": 1},
                                      {"z": 0, "y": -50, "x": 10}], "volume")
    assert rows[0]["flags"] == "lost_section" and rows[0]["tile"] is None
    assert "no_tile" in rows[1]["flags"] and "outside_tissue" in rows[1]["flags"]  # the canvas margin
    assert "outside_volume" in rows[2]["flags"]


def test_nanometres_in_and_out(grid_build, volume):
    px = locate_points(grid_build, [{"z": 3, "y": 200.5, "x": 310.25}], "volume")[0]
    nm = locate_points(grid_build, [{"z_nm": 120.0, "y_nm": 802.0, "x_nm": 1241.0}], "volume", nm=True)[0]
    assert (nm["tile"], nm["tile_x"], nm["tile_y"]) == (px["tile"], px["tile_x"], px["tile_y"])
    assert (px["x_nm"], px["y_nm"], px["z_nm"]) == (1241.0, 802.0, 120.0)  # 4 nm pixels, 40 nm sections


def test_locate_command_writes_every_frame(grid_build, tmp_path, capsys):
    points = tmp_path / "in.csv"
    points.write_text("name,section,stage_x,stage_y\nsynapse-a,3,300,260\nnowhere,2,10,10\n")
    out = tmp_path / "out.csv"
    assert main(["locate", str(grid_build), "--points", str(points), "--from", "stage", "--out", str(out),
                 "--quiet"]) == 0
    rows = list(csv.DictReader(out.open()))
    assert [r["name"] for r in rows] == ["synapse-a", "nowhere"]
    assert {"z", "y", "x", "z_nm", "tile", "tile_x", "tile_y", "stage_x", "stage_y", "flags"} <= set(rows[0])
    assert rows[0]["flags"] == "" and rows[0]["tile"] and rows[1]["flags"] == "lost_section"
    bad = tmp_path / "bad.csv"
    bad.write_text("z,y\n1,2\n")
    assert main(["locate", str(grid_build), "--points", str(bad), "--from", "volume", "--out", str(out),
                 "--quiet"]) == 2
    assert "missing column(s) x" in capsys.readouterr().err


def test_points_follow_a_known_change_between_versions(grid_build, tmp_path):
    # Version 0 is made by hand: section 3 aligned 2 px left and 1 px up of where version 1 has it,
    # so a point on section 3 placed in version 0 must move by exactly (+2, +1) px; others stay.
    work = tmp_path / "b"
    shutil.copytree(grid_build, work)
    before = work / "updates" / "0001" / "before"
    shutil.copytree(work / "transforms", before)
    old = TransformStore(before)
    a = old.load_alignment(3)
    a.affine = Affine2D.translation(2.0, 1.0).then(a.affine)  # aligned p -> p + (2, 1) -> section
    old.save_alignment(a)
    plan = {"format": "stackbuild.update", "version": 1, "number": 1, "status": "done", "source": {},
            "append": False, "hold_within": 0.5, "tiles_before": "", "tiles_after": ""}
    (work / "updates" / "0001" / "plan.json").write_text(json.dumps(plan))
    rows = locate_points(work, [{"z": 3, "y": 300.0, "x": 250.0}, {"z": 1, "y": 300.0, "x": 250.0}], "volume",
                         from_version=0, to_version=1)
    # The shift sits after the elastic field (coarse frame), so it reaches the aligned frame through the
    # field's gradient: a few thousandths of a pixel here (the fields are smooth, at most a few px).
    assert rows[0]["x"] == pytest.approx(252.0, abs=0.02) and rows[0]["y"] == pytest.approx(301.0, abs=0.02)
    assert rows[0]["moved_px"] == pytest.approx(np.hypot(2, 1), abs=0.02)
    assert rows[1]["moved_px"] == pytest.approx(0.0, abs=1e-9)
