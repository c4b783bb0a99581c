"""Tile-manifest rules for awkward tile files: several pages, one file on two lines, lossy compression."""
import logging

import numpy as np
import pytest
import tifffile

from stackbuild.errors import InputError
from stackbuild.manifest import lossy_compression, read_tile_manifest


def _write_manifest(folder, rows):
    lines = ["section,tile,path,x,y"] + [",".join(map(str, r)) for r in rows]
    (folder / "tiles.csv").write_text("\n".join(lines) + "\n")
    return folder / "tiles.csv"


def _tile(seed=0, size=64):
    return np.random.default_rng(seed).integers(0, 255, (size, size), dtype=np.uint8)


def test_multi_page_tiff_is_refused_naming_the_file_and_its_pages(tmp_path):
    # A 16 x 16 thumbnail first, then the full image: the layout tifffile
    # writes for two successive imwrite(..., append=True) calls (TIFF 6.0:
    # one IFD per page).
    path = tmp_path / "a.tif"
    tifffile.imwrite(path, _tile(0, 16))
    tifffile.imwrite(path, _tile(1, 64), append=True)
    assert len(tifffile.TiffFile(path).pages) == 2  # reference: tifffile reads two pages back
    tifffile.imwrite(tmp_path / "b.tif", _tile(2))
    manifest = _write_manifest(tmp_path, [(0, "a", "a.tif", 0, 0), (0, "b", "b.tif", 50, 0)])
    with pytest.raises(InputError) as info:
        read_tile_manifest(manifest)
    msg = str(info.value)
    assert "a.tif" in msg and "2 pages" in msg and "page 0: 16 x 16" in msg and "page 1: 64 x 64" in msg
    assert info.value.row == 2


@pytest.mark.parametrize("sections", [(0, 0), (0, 1)])
def test_one_file_on_two_lines_is_refused_naming_both(tmp_path, sections):
    tifffile.imwrite(tmp_path / "a.tif", _tile(0))
    tifffile.imwrite(tmp_path / "b.tif", _tile(1))
    manifest = _write_manifest(tmp_path, [(sections[0], "a", "a.tif", 0, 0), (0, "b", "b.tif", 50, 0),
                                          (sections[1], "c", "./a.tif", 0, 50)])
    with pytest.raises(InputError) as info:
        read_tile_manifest(manifest)
    assert "lines 2 and 4" in str(info.value) and "a.tif" in str(info.value)
    assert info.value.row == 4


def test_jpeg_tiles_are_accepted_with_a_warning(tmp_path, caplog):
    # JPEG is TIFF compression scheme 7 (TIFF Technical Note 2); tifffile
    # writes it through imagecodecs and reports it as COMPRESSION.JPEG.
    tifffile.imwrite(tmp_path / "a.tif", _tile(0), compression="jpeg")
    tifffile.imwrite(tmp_path / "b.tif", _tile(1), compression="zlib")
    assert tifffile.TiffFile(tmp_path / "a.tif").pages.first.compression == tifffile.COMPRESSION.JPEG
    manifest = _write_manifest(tmp_path, [(0, "a", "a.tif", 0, 0), (0, "b", "b.tif", 50, 0)])
    with caplog.at_level(logging.WARNING, logger="stackbuild.manifest"):
        checked = read_tile_manifest(manifest)
    assert len(checked.tiles) == 2
    warned = [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING]
    assert len(warned) == 1 and "1 tile(s)" in warned[0] and "JPEG" in warned[0] and "a.tif" in warned[0]
    assert lossy_compression(tmp_path / "a.tif") == "JPEG"
    assert lossy_compression(tmp_path / "b.tif") is None  # zlib (deflate) is lossless


def test_jpeg_tiles_are_flagged_in_the_stitch_record(tmp_path):
    # Two overlapping crops of skimage.data.camera() (shipped by scikit-image),
    # stored as JPEG: the record names each lossy tile, and the section.
    from skimage import data

    from stackbuild.stitch.section import stitch_section
    from stackbuild.stitch.settings import StitchSettings

    cam = data.camera()
    tifffile.imwrite(tmp_path / "a.tif", cam[100:356, 0:256], compression="jpeg")
    tifffile.imwrite(tmp_path / "b.tif", cam[100:356, 200:456], compression="zlib")
    manifest = _write_manifest(tmp_path, [(0, "a", "a.tif", 0, 0), (0, "b", "b.tif", 200, 0)])
    res = stitch_section(read_tile_manifest(manifest).section_tiles(0), StitchSettings(illumination=False), 0)
    flags = {t.tile: t.flags for t in res.tiles}
    assert "lossy_compression" in flags["a"] and "lossy_compression" not in flags["b"]
    assert "lossy_tiles" in res.flags
    assert res.pairs[0].accepted and abs(res.pairs[0].dx - 200) < 0.2  # the true offset of the crops
