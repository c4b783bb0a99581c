"""A build whose records or tiles are spoiled after the fact.

A transform record edited by hand to hold NaN or infinity, a tile replaced by a
broken file or one of another size: each must give one line naming the file
(and the section) and leave the build's records as they were.
"""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import tifffile

from stackbuild.cli import main
from stackbuild.synth import SynthParams, generate

SMALL = SynthParams(seed=3, sections=3, grid=(2, 2), tile_size=192, channels=0, compress=False)


@pytest.fixture(scope="module")
def small_build(tmp_path_factory) -> tuple[Path, Path]:
    """Return ``(data folder, finished build folder)`` of a 3-section, 2 x 2-tile stack."""
    data = tmp_path_factory.mktemp("small") / "data"
    generate(data, SMALL)
    out = data.parent / "build"
    assert main(["build", str(data / "tiles.csv"), "--out", str(out), "--quiet"]) == 0
    return data, out


def _copy(small_build, tmp_path) -> tuple[Path, Path]:
    """Return a private copy of the data and the build, the build pointing at the copied data."""
    data, out = small_build
    d, b = tmp_path / "data", tmp_path / "build"
    shutil.copytree(data, d)
    shutil.copytree(out, b)
    # the kept manifest check too, as in a real build: tiles are not re-checked at stage starts
    for p in [b / "build.json", b / "manifests" / "tiles.checked.json", *b.rglob("stitch.json")]:
        p.write_text(p.read_text().replace(str(data), str(d)))
    return d, b


def _digest(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and not p.name.startswith(".")}


def _one_error(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if line.startswith("stackbuild: ")]
    assert len(errors) == 1, err
    assert errors[0].startswith("stackbuild: error: "), errors
    return errors[0]


def _edit(path: Path, change) -> None:
    env = json.loads(path.read_text())
    change(env["record"])
    path.write_text(json.dumps(env))  # json writes NaN / Infinity, as a hand edit might


@pytest.mark.parametrize("key,value", [("x", float("nan")), ("gain", float("inf")), ("y", 1e300)])
def test_non_finite_stitch_record_is_named_and_nothing_written(small_build, tmp_path, capsys, key, value):
    # Before: NaN raised "cannot convert float NaN to integer" and 1e300 "Maximum allowed
    # dimension exceeded" as tracebacks from an align worker.
    _, b = _copy(small_build, tmp_path)
    record = b / "transforms" / "sections" / "00001" / "stitch.json"
    _edit(record, lambda r: r["tiles"][0].__setitem__(key, value))
    before = _digest(b / "transforms")
    assert main(["align", str(b), "--quiet"]) == 2
    line = _one_error(capsys)
    assert str(record) in line and "section 1" in line and key in line
    assert _digest(b / "transforms") == before


def test_nan_alignment_is_named_by_render_and_report(small_build, tmp_path, capsys):
    _, b = _copy(small_build, tmp_path)
    record = b / "transforms" / "sections" / "00002" / "align.json"
    _edit(record, lambda r: r["transforms"]["transformations"][-1]["affine"][0].__setitem__(2, float("nan")))
    before = _digest(b / "volume.zarr")
    for command in (["render", str(b), "--overwrite", "--quiet"], ["report", str(b), "--quiet"]):
        assert main(command) == 2
        line = _one_error(capsys)
        assert str(record) in line and "section 2" in line
    assert _digest(b / "volume.zarr") == before


def test_bad_canvas_is_named(small_build, tmp_path, capsys):
    _, b = _copy(small_build, tmp_path)
    record = b / "transforms" / "canvas.json"
    _edit(record, lambda r: r.__setitem__("origin_x", float("nan")))
    assert main(["render", str(b), "--overwrite", "--quiet"]) == 2
    assert str(record) in _one_error(capsys)


def test_truncated_tile_is_named_by_stitch(small_build, tmp_path, capsys):
    d, b = _copy(small_build, tmp_path)
    tile = d / "tiles" / "1" / "r0c1.tif"
    b_stitch = (b / "transforms" / "sections" / "00001" / "stitch.json").read_bytes()
    tile.write_bytes(tile.read_bytes()[:5000])  # after the manifest check: its header still reads
    assert main(["stitch", str(b), "--sections", "1", "--quiet"]) == 2
    line = _one_error(capsys)
    assert str(tile) in line and "section 1" in line
    assert (b / "transforms" / "sections" / "00001" / "stitch.json").read_bytes() == b_stitch


def test_resized_tile_is_named_by_render(small_build, tmp_path, capsys):
    d, b = _copy(small_build, tmp_path)
    tile = d / "tiles" / "2" / "r1c0.tif"
    tifffile.imwrite(tile, np.zeros((100, 120), np.uint8))
    assert main(["render", str(b), "--overwrite", "--quiet"]) == 2
    line = _one_error(capsys)
    assert str(tile) in line and "(100, 120)" in line


def test_tile_replaced_by_other_pixel_type_is_named_by_render(small_build, tmp_path, capsys):
    # Before: a 16-bit file in an 8-bit build rendered silently (status 0), wrapped or clipped.
    d, b = _copy(small_build, tmp_path)
    tile = d / "tiles" / "1" / "r1c1.tif"
    tifffile.imwrite(tile, tifffile.imread(tile).astype(np.uint16) * 256)
    assert main(["render", str(b), "--overwrite", "--quiet"]) == 2
    assert str(tile) in _one_error(capsys)


def test_unwritable_output_folder_is_one_line(small_build, tmp_path, capsys):
    # Before: "internal error: NotADirectoryError ..." with exit status 1.
    data, _ = small_build
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    assert main(["build", str(data / "tiles.csv"), "--out", str(blocker / "sub"), "--quiet"]) == 2
    assert str(blocker / "sub") in _one_error(capsys)


def test_report_before_stitch_is_refused(small_build, tmp_path, capsys):
    _, b = _copy(small_build, tmp_path)
    for name in ("transforms", "volume.zarr", "qc"):
        shutil.rmtree(b / name)
    state = json.loads((b / "build.json").read_text())
    state["stages"] = {}
    (b / "build.json").write_text(json.dumps(state))
    assert main(["render", str(b), "--quiet"]) == 2  # already refused, naming the missing record
    assert "stitch" in _one_error(capsys)
    assert main(["report", str(b), "--quiet"]) == 2
    assert "stitch" in _one_error(capsys)


def test_unwritable_record_folder_is_named(small_build, tmp_path, capsys):
    # Before: NotADirectoryError traceback from the transform store, in a stitch worker.
    _, b = _copy(small_build, tmp_path)
    folder = b / "transforms" / "sections" / "00001"
    shutil.rmtree(folder)
    folder.write_text("a file where the section's folder should be")
    assert main(["stitch", str(b), "--sections", "1", "--quiet"]) == 2
    line = _one_error(capsys)
    assert str(folder) in line and "section 1" in line


def test_update_with_unreadable_new_tile_keeps_the_old_tiles(small_build, tmp_path, capsys):
    # Before: the build was left pointing at the new manifest while section 1's records
    # still came from the old tiles.
    d, b = _copy(small_build, tmp_path)
    new = tmp_path / "reimaged"
    new.mkdir()
    rows = [line.split(",") for line in (d / "tiles.csv").read_text().splitlines()]
    out = [",".join(rows[0])]
    for r in rows[1:]:
        if r[0] == "1":
            shutil.copy(d / r[2], new / Path(r[2]).name)
            out.append(",".join([r[0], r[1], Path(r[2]).name, *r[3:]]))
    (new / "tiles.csv").write_text("\n".join(out) + "\n")
    bad = new / "r1c1.tif"
    bad.write_bytes(bad.read_bytes()[:5000])  # the header still reads; the pixels do not
    state = json.loads((b / "build.json").read_text())
    before = _digest(b / "transforms")
    assert main(["update", str(b), "--tiles", str(new / "tiles.csv"), "--quiet"]) == 2
    assert str(bad) in _one_error(capsys)
    after = json.loads((b / "build.json").read_text())
    assert (after["tiles"], after.get("manifests", [])) == (state["tiles"], state.get("manifests", []))
    assert _digest(b / "transforms") == before
    assert main(["render", str(b), "--overwrite", "--quiet"]) == 0  # the old tiles still render


def test_channel_row_for_a_section_without_tiles_is_named(small_build, tmp_path, capsys):
    data, _ = small_build
    rng = np.random.default_rng(5)
    for s in (0, 5):
        tifffile.imwrite(tmp_path / f"m{s}.tif", rng.integers(0, 4000, (48, 48)).astype(np.uint16))
    channels = tmp_path / "channels.csv"
    channels.write_text("section,channel,path,pixel_size\n0,veridin,m0.tif,32\n5,veridin,m5.tif,32\n")
    status = main(["build", str(data / "tiles.csv"), "--out", str(tmp_path / "b"), "--channels", str(channels),
                   "--quiet"])
    assert status == 2
    line = _one_error(capsys)
    assert f"{channels}:3" in line and "section 5" in line
