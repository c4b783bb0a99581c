"""Tile layouts that pass the manifest columns but are odd.

Awkward yet valid layouts (one tile, a blank section, gaps in the section
numbers, 16-bit tiles using the full range, a huge common stage offset) must
build; absurd ones (tiles scattered over an extent they cannot fill, a
coordinate far beyond any mosaic) must be refused when the manifest is read,
naming the file, line and section, not exhaust memory in the align stage.
"""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
import tifffile
import zarr

from stackbuild.cli import main
from stackbuild.errors import InputError
from stackbuild.manifest import read_tile_manifest
from stackbuild.synth import SynthParams, generate

SMALL = SynthParams(seed=3, sections=3, grid=(2, 2), tile_size=192, channels=0, compress=False)


def _rows(path: Path) -> list[dict]:
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def _write(path: Path, rows: list[dict]) -> None:
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)


def _grid_manifest(folder: Path, spread: float, offset: float = 0.0) -> Path:
    """Write a 2 x 2 grid of 64-pixel tiles at ``spread`` times their 56-pixel pitch."""
    folder.mkdir(parents=True, exist_ok=True)
    rows = []
    for r in range(2):
        for c in range(2):  # each tile its own file: one file on two lines is refused
            tifffile.imwrite(folder / f"t{r}{c}.tif", np.zeros((64, 64), np.uint8))
            rows.append({"section": 0, "tile": f"r{r}c{c}", "path": f"t{r}{c}.tif",
                         "x": offset + 56 * c * spread, "y": offset + 56 * r * spread})
    _write(folder / "tiles.csv", rows)
    return folder / "tiles.csv"


def _build(data: Path, out: Path) -> int:
    return main(["build", str(data / "tiles.csv"), "--out", str(out), "--quiet"])


def _level0(out: Path) -> np.ndarray:
    return zarr.open_group(str(out / "volume.zarr" / "em"), mode="r")["0"][...]


def test_scattered_section_is_refused_naming_line_and_section(tmp_path):
    # Before: positions 1000 x too far apart made align allocate a ~45000^2 mosaic (hung, then
    # a MemoryError traceback); the threshold of 64 x the covered area is a rule of thumb.
    path = _grid_manifest(tmp_path, spread=3000.0)
    with pytest.raises(InputError) as info:
        read_tile_manifest(path)
    assert info.value.file == str(path) and info.value.section == 0 and info.value.row in (2, 3, 4, 5)
    assert "pixels" in info.value.reason


def test_coordinate_beyond_any_mosaic_is_refused(tmp_path):
    path = _grid_manifest(tmp_path, spread=1.0)
    rows = _rows(path)
    rows[2]["x"] = "1e12"  # before: MemoryError for a (2, 90, 250000000049) array in align
    _write(path, rows)
    with pytest.raises(InputError) as info:
        read_tile_manifest(path)
    assert (info.value.file, info.value.row) == (str(path), 4) and "'x'" in info.value.reason


@pytest.mark.parametrize("spread,offset", [(1.0, 1e6), (1.0, -5e5), (20.0, 0.0)])
def test_offset_negative_and_sparse_layouts_are_accepted(tmp_path, spread, offset):
    assert len(read_tile_manifest(_grid_manifest(tmp_path, spread, offset)).tiles) == 4


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> tuple[Path, Path]:
    data = tmp_path_factory.mktemp("layout") / "data"
    generate(data, SMALL)
    out = data.parent / "build"
    assert _build(data, out) == 0
    return data, out


def test_common_stage_offset_does_not_change_the_volume(base, tmp_path):
    # Ground truth: moving every stage position by the same amount moves the section frame,
    # not the tissue, so the rendered volume must stay the same (up to rounding).
    data, out = base
    rows = _rows(data / "tiles.csv")
    for r in rows:
        r["x"], r["y"] = float(r["x"]) + 1e6, float(r["y"]) - 2e5
        r["path"] = str(data / r["path"])
    moved = tmp_path / "moved"
    moved.mkdir()
    _write(moved / "tiles.csv", rows)
    assert _build(moved, tmp_path / "b") == 0
    a, b = _level0(out).astype(int), _level0(tmp_path / "b").astype(int)
    assert a.shape == b.shape
    diff = np.abs(a - b)
    assert np.mean(diff > 1) < 1e-3  # measured 3e-5 on this stack (off-by-one rounding only)


def test_awkward_but_valid_stack_builds(base, tmp_path):
    # Sections 3, 7, 8 (4-6 lost); section 7 a single tile; section 8 all blank; 16-bit tiles
    # stretched to the full 0..65535 range.
    data, _ = base
    rows = _rows(data / "tiles.csv")
    renumber = {"0": 3, "1": 7, "2": 8}
    keep = []
    for r in rows:
        if r["section"] == "1" and r["tile"] != "r0c0":
            continue
        img = tifffile.imread(data / r["path"]).astype(np.float64)
        img = 65535 * (img - img.min()) / (img.max() - img.min())
        if r["section"] == "2":
            img[:] = 0
        name = tmp_path / f"{r['section']}_{r['tile']}.tif"
        tifffile.imwrite(name, np.round(img).astype(np.uint16))
        keep.append({**r, "section": renumber[r["section"]], "path": str(name)})
    _write(tmp_path / "tiles.csv", keep)
    out = tmp_path / "b"
    assert _build(tmp_path, out) == 0
    vol = _level0(out)
    assert vol.dtype == np.uint16 and vol.shape[0] == 6  # planes for sections 3..8
    assert not vol[1:4].any()  # the lost sections 4, 5, 6 are empty planes
    assert vol[0].max() > 60000  # the full 16-bit range survives
    stitch8 = json.loads((out / "transforms" / "sections" / "00008" / "stitch.json").read_text())["record"]
    assert all("blank" in t["flags"] for t in stitch8["tiles"])
    stitch7 = json.loads((out / "transforms" / "sections" / "00007" / "stitch.json").read_text())["record"]
    assert len(stitch7["tiles"]) == 1 and stitch7["stats"]["pairs"] == 0


def test_tiny_marker_image_is_refused_naming_the_row(tmp_path):
    # Before: a 5 x 4 marker image passed the manifest and raised "images must be 2-D and at
    # least 8 x 8" as a traceback from the channel stage's worker.
    from stackbuild.manifest import read_channel_manifest

    tifffile.imwrite(tmp_path / "ok.tif", np.ones((16, 16), np.uint16))
    tifffile.imwrite(tmp_path / "tiny.tif", np.arange(20, dtype=np.uint16).reshape(5, 4))
    path = tmp_path / "channels.csv"
    path.write_text("section,channel,path,pixel_size\n0,veridin,ok.tif,32\n1,veridin,tiny.tif,32\n")
    with pytest.raises(InputError) as info:
        read_channel_manifest(path)
    assert (info.value.file, info.value.row) == (str(path), 3) and "5 x 4" in info.value.reason
