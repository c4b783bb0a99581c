"""The tile manifest check: header reads in parallel, kept per file, so a changed manifest re-reads only new files."""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
import tifffile

from stackbuild.errors import InputError
from stackbuild.folder import BuildFolder
from stackbuild.manifest import read_tile_manifest


def _tiles(folder: Path, n: int, start: int = 0) -> list[str]:
    """Write ``n`` small tiles of an invented specimen (a grain of lattice-moss); return their manifest rows."""
    raw = folder / "raw"
    raw.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(start)
    rows = []
    for i in range(start, start + n):
        shape = (16 + i % 3, 20)
        tifffile.imwrite(raw / f"t{i}.tif", rng.integers(0, 255, shape, dtype=np.uint8))
        rows.append(f"{i // 4},t{i},raw/t{i}.tif,{(i % 4) * 18.0},0")
    return rows


def _csv(folder: Path, rows: list[str]) -> Path:
    path = folder / "tiles.csv"
    path.write_text("section,tile,path,x,y\n" + "\n".join(rows) + "\n")
    return path


def test_parallel_check_equals_the_serial_one_and_the_files(tmp_path):
    csv = _csv(tmp_path, _tiles(tmp_path, 12))
    par = read_tile_manifest(csv, threads=8)
    ser = read_tile_manifest(csv, threads=1)
    assert par.tiles == ser.tiles and par.files == ser.files
    for t in par.tiles:  # reference: tifffile reads the written files back; os.stat gives the facts
        assert (t.height, t.width) == tifffile.imread(t.path).shape
        st = os.stat(t.path)
        assert par.files[str(t.path)][:2] == (st.st_size, st.st_mtime_ns)


def test_first_bad_file_in_row_order_is_named(tmp_path):
    rows = _tiles(tmp_path, 8)
    (tmp_path / "raw" / "t2.tif").write_bytes(b"not a tiff")
    (tmp_path / "raw" / "t6.tif").unlink()
    with pytest.raises(InputError) as err:
        read_tile_manifest(_csv(tmp_path, rows), threads=8)
    assert err.value.row == 4 and "t2.tif" in str(err.value)  # line 4 = header + rows t0, t1, t2


def test_known_files_are_not_opened_again_unless_changed(tmp_path, header_calls):
    rows = _tiles(tmp_path, 6)
    first = read_tile_manifest(_csv(tmp_path, rows))
    assert len(header_calls) == 6
    header_calls.clear()
    rng = np.random.default_rng(9)
    tifffile.imwrite(tmp_path / "raw" / "t1.tif", rng.integers(0, 255, (30, 20), dtype=np.uint8))  # re-imaged
    again = read_tile_manifest(_csv(tmp_path, rows + _tiles(tmp_path, 1, start=6)), known=first.known_headers())
    assert sorted(header_calls) == ["t1", "t6"]
    assert next(t for t in again.tiles if t.tile == "t1").height == 30


def test_a_changed_manifest_in_a_build_opens_only_its_new_files(tmp_path, header_calls):
    rows = _tiles(tmp_path, 8)
    csv = _csv(tmp_path, rows)
    build = BuildFolder(tmp_path / "out")
    build.root.mkdir()
    build.save_state({"tiles": str(csv.resolve()), "stages": {}})
    build.tile_manifest()
    header_calls.clear()
    _csv(tmp_path, rows + _tiles(tmp_path, 2, start=8))
    assert len(build.tile_manifest().tiles) == 10
    assert sorted(header_calls) == ["t8", "t9"]
