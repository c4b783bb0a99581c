"""Adding a marker channel to a finished build, and replacing one image of it.

Outside reference: the OME-Zarr specification 0.5 (ome-zarr-models) for the new marker pyramid.
"""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import os

import numpy as np
import pytest
import tifffile
import zarr

from stackbuild.cli import main


def _files(group: Path) -> dict[str, tuple[str, int]]:
    return {str(p.relative_to(group)): (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
            for p in sorted(group.glob("*/c/**/*")) if p.is_file()}


@pytest.fixture(scope="module")
def with_markers(grid_build, grid_data, tmp_path_factory):
    work = tmp_path_factory.mktemp("markers") / "b"
    shutil.copytree(grid_build, work)
    em = _files(work / "volume.zarr" / "em")
    transforms = {p: p.read_bytes() for p in (work / "transforms" / "sections").rglob("*.json")}
    assert main(["channels", str(work), "--merge", str(grid_data / "markers.csv"), "--quiet"]) == 0
    return work, em, transforms


@pytest.mark.skipif(not os.environ.get("STACKBUILD_SLOW_TESTS"), reason="slow: set STACKBUILD_SLOW_TESTS=1")
def test_a_marker_is_added_to_a_finished_build(with_markers):
    from ome_zarr_models.v05.image import Image

    work, em, transforms = with_markers
    group = work / "volume.zarr" / "channels" / "ambrin"
    # Standard: OME-Zarr specification 0.5, validated by the ome-zarr-models package (v05.Image).
    Image.from_zarr(zarr.open_group(str(group), mode="r"))
    assert _files(work / "volume.zarr" / "em") == em  # EM chunks: bytes and mtimes
    assert all(p.read_bytes() == b for p, b in transforms.items())  # EM transforms untouched
    state = json.loads((work / "build.json").read_text())
    assert state["stages"]["channels"]["status"] == "done" and "channels.0001.csv" in state["channels"]
    assert {"0", "1", "3", "4"} <= {k.split("/")[2] for k in _files(group) if k.startswith("0/")}  # its planes


@pytest.mark.skipif(not os.environ.get("STACKBUILD_SLOW_TESTS"), reason="slow: set STACKBUILD_SLOW_TESTS=1")
def test_one_marker_image_replaced_rewrites_its_plane_only(with_markers, grid_data, tmp_path, capsys):
    work, em, _ = with_markers
    group = work / "volume.zarr" / "channels" / "ambrin"
    first = _files(group)

    # Section 3 probed again: a new image for that one row.
    img = tifffile.imread(grid_data / "channels" / "3" / "ambrin.tif")
    again = tmp_path / "ambrin3.tif"
    tifffile.imwrite(again, np.flip(img, 1).copy())
    line = next(ln for ln in (grid_data / "markers.csv").read_text().splitlines() if ln.startswith("3,"))
    parts = line.split(",")
    parts[2] = str(again)
    (tmp_path / "again.csv").write_text("section,channel,path,pixel_size,x,y\n" + ",".join(parts) + "\n")
    assert main(["channels", str(work), "--merge", str(tmp_path / "again.csv"), "--quiet"]) == 0
    assert "1 replaced" in capsys.readouterr().out
    second = _files(group)
    changed = {k.split("/")[2] for k in first.keys() | second.keys() if first.get(k) != second.get(k)}
    assert changed == {"3"}  # plane 3 (section 3) only; the other marker planes keep bytes and mtimes
    assert _files(work / "volume.zarr" / "em") == em


@pytest.mark.skipif(not os.environ.get("STACKBUILD_SLOW_TESTS"), reason="slow: set STACKBUILD_SLOW_TESTS=1")
def test_update_registers_again_only_the_markers_of_changed_sections(with_markers, grid_data, tmp_path):
    """Two tiles of section 3 imaged again: only section 3's marker registration is written again."""
    work = tmp_path / "b"
    shutil.copytree(with_markers[0], work)
    records = {p.parent.name: p.stat().st_mtime_ns for p in (work / "transforms" / "sections").glob("*/channels.json")}
    rng = np.random.default_rng(5)
    rows = ["section,tile,path,x,y"]
    for line in (grid_data / "tiles.csv").read_text().splitlines()[1:]:
        s, t, p, x, y = line.split(",")
        if s == "3" and t in ("r0c0", "r0c1"):
            img = tifffile.imread(grid_data / p).astype(np.float32) + rng.normal(0, 4, (1,))
            tifffile.imwrite(tmp_path / f"{t}.tif", np.clip(img, 0, 255).astype(np.uint8))
            rows.append(f"{s},{t},{tmp_path / (t + '.tif')},{x},{y}")
    (tmp_path / "again.csv").write_text("\n".join(rows) + "\n")
    assert main(["update", str(work), "--tiles", str(tmp_path / "again.csv"), "--quiet"]) in (0, 3)
    after = {p.parent.name: p.stat().st_mtime_ns for p in (work / "transforms" / "sections").glob("*/channels.json")}
    assert len(records) >= 4 and set(after) == set(records)
    assert {k for k in records if after[k] != records[k]} <= {next(k for k in records if int(k) == 3)}
