"""Tile and channel manifest parsing: the input contract (README, "Manifests")."""
from __future__ import annotations

import numpy as np
import pytest
import tifffile

from stackbuild.errors import InputError
from stackbuild.manifest import read_channel_manifest, read_tile_manifest


def _tile(path, shape=(32, 48), dtype=np.uint8):
    path.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(path, np.zeros(shape, dtype))
    return path


@pytest.fixture
def tiles(tmp_path):
    for name in ("a", "b", "c"):
        _tile(tmp_path / "t" / f"{name}.tif")
    return tmp_path


def _write(tmp_path, text, name="tiles.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_good_manifest_reads_every_row(tiles):
    p = _write(tiles, "section,tile,path,x,y\n0,a,t/a.tif,0,0\n0,b,t/b.tif,40.5,0\n2,,t/c.tif,0,0\n")
    m = read_tile_manifest(p)
    assert [t.tile for t in m.tiles] == ["a", "b", "c"]  # empty tile id -> file stem
    assert m.sections == [0, 2] and m.lost_sections == [1]
    assert m.tiles[1].x == 40.5 and (m.tiles[0].height, m.tiles[0].width) == (32, 48)
    assert m.tiles[0].path.is_absolute()


def test_tile_column_is_optional(tiles):
    m = read_tile_manifest(_write(tiles, "section,path,x,y\n0,t/a.tif,0,0\n"))
    assert m.tiles[0].tile == "a"


@pytest.mark.parametrize("text, expect", [
    ("section,path,x\n0,t/a.tif,0\n", "missing column(s) y"),
    ("section,path,x,y\n0,t/a.tif,zero,0\n", "column 'x' must be a number"),
    ("section,path,x,y\n0,t/a.tif,nan,0\n", "column 'x' must be finite"),
    ("section,path,x,y\nfirst,t/a.tif,0,0\n", "column 'section' must be an integer"),
    ("section,tile,path,x,y\n0,a,t/a.tif,0,0\n0,a,t/b.tif,0,0\n", "duplicate tile 'a' in section 0"),
    ("section,path,x,y\n0,t/missing.tif,0,0\n", "image file not found"),
    ("section,path,x,y\n", "no rows"),
])
def test_bad_manifest_names_file_and_row(tiles, text, expect):
    p = _write(tiles, text)
    with pytest.raises(InputError) as err:
        read_tile_manifest(p)
    assert expect in str(err.value)
    assert str(p) in str(err.value)


def test_bad_row_number_is_reported(tiles):
    p = _write(tiles, "section,path,x,y\n0,t/a.tif,0,0\n0,t/b.tif,0,oops\n")
    with pytest.raises(InputError) as err:
        read_tile_manifest(p)
    assert err.value.row == 3 and f"{p}:3" in str(err.value)


def test_path_that_is_not_an_image(tiles):
    (tiles / "t" / "notes.tif").write_text("this is not a TIFF")
    with pytest.raises(InputError, match="not a readable TIFF"):
        read_tile_manifest(_write(tiles, "section,path,x,y\n0,t/notes.tif,0,0\n"))


def test_image_that_cannot_be_read_is_named_once_with_the_reason(tiles):
    from stackbuild.manifest import image_header

    (tiles / "t" / "folder.tif").mkdir()
    with pytest.raises(InputError) as err:  # checked again at render time, with no manifest to name
        image_header(tiles / "t" / "folder.tif")
    assert str(err.value).count("folder.tif") == 1 and "cannot be read" in str(err.value)


@pytest.mark.parametrize("shape, dtype, expect", [
    ((8, 8, 3), np.uint8, "single-channel"),
    ((8, 8), np.float32, "8- or 16-bit"),
])
def test_wrong_kind_of_image(tmp_path, shape, dtype, expect):
    _tile(tmp_path / "t" / "x.tif", shape, dtype)
    with pytest.raises(InputError, match=expect):
        read_tile_manifest(_write(tmp_path, "section,path,x,y\n0,t/x.tif,0,0\n"))


def test_mixed_pixel_types_are_refused(tmp_path):
    _tile(tmp_path / "t" / "a.tif", dtype=np.uint8)
    _tile(tmp_path / "t" / "b.tif", dtype=np.uint16)
    with pytest.raises(InputError, match="mix pixel types"):
        read_tile_manifest(_write(tmp_path, "section,path,x,y\n0,t/a.tif,0,0\n0,t/b.tif,0,0\n"))


def test_channel_manifest(tiles):
    p = _write(tiles, "section,channel,path,pixel_size,x,y\n0,marker-1,t/a.tif,32,,\n1,marker-1,t/b.tif,32,5,6\n",
               "channels.csv")
    entries = read_channel_manifest(p)
    assert entries[0].x is None and entries[1].x == 5.0 and entries[1].pixel_size == 32.0


@pytest.mark.parametrize("row, expect", [
    ("0,m,t/a.tif,0", "'pixel_size' must be > 0"),
    ("0,bad name,t/a.tif,8", "channel name"),
])
def test_bad_channel_rows(tiles, row, expect):
    p = _write(tiles, f"section,channel,path,pixel_size\n{row}\n", "channels.csv")
    with pytest.raises(InputError, match=expect):
        read_channel_manifest(p)
