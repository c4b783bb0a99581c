"""The prepared-tile cache: what a reduced tile holds, and how many of them the cache keeps."""
from __future__ import annotations

import numpy as np
import pytest
import tifffile
from skimage import data, transform

from stackbuild import tiles as tiles_mod
from stackbuild.transforms import TilePlacement


def _tile(path, img, gain=1.0, offset=0.0):
    tifffile.imwrite(path, img)
    return TilePlacement(path.stem, str(path), img.shape[1], img.shape[0], 0.0, 0.0, 0.0, 0.0,
                         gain=gain, offset=offset)


def test_reduced_tile_is_the_block_mean_of_the_corrected_tile(tmp_path):
    raw = data.camera()[:96, :128]            # data shipped with scikit-image
    t = _tile(tmp_path / "cam.tif", raw, gain=1.5, offset=3.0)
    illumination = np.linspace(0.5, 2.0, 16, dtype=np.float32).reshape(4, 4)
    tiles_mod.TILE_CACHE.clear()
    value, _ = tiles_mod.prepared_tile(t, illumination, tiles_mod.profile_digest(illumination), 2)
    corrected = 1.5 * raw / tiles_mod.illumination_at_tile_size(illumination, 96, 128).astype(np.float64) + 3.0
    # Reference: skimage.transform.downscale_local_mean of the corrected full-resolution tile;
    # the prepared tile carries a one-pixel ring around it.
    np.testing.assert_allclose(value[1:-1, 1:-1], transform.downscale_local_mean(corrected, (2, 2)), rtol=1e-5)


def test_cache_keeps_the_same_bytes_at_every_scale_so_more_reduced_tiles(tmp_path):
    rng = np.random.default_rng(0)
    size = 64
    kept = [_tile(tmp_path / f"t{i}.tif", rng.integers(0, 255, (size, size), dtype=np.uint8))
            for i in range(3 * tiles_mod.TILES_KEPT)]
    # the bound is TILES_KEPT full-resolution prepared tiles, whatever scale they are read at
    assert tiles_mod.cache_bytes_for(size, size) == tiles_mod.TILES_KEPT * 4 * (size + 2) ** 2
    tiles_mod.TILE_CACHE.clear()
    tiles_mod.TILE_CACHE.max_bytes = 0
    for t in kept:
        tiles_mod.prepared_tile(t, None, "", 2)
    # at scale 2 a tile takes (32 + 2)^2 float32 against (64 + 2)^2 (ring included): 3 * TILES_KEPT fit
    assert tiles_mod.TILE_CACHE.nbytes == len(kept) * 4 * (size // 2 + 2) ** 2
    assert tiles_mod.TILE_CACHE.nbytes <= tiles_mod.cache_bytes_for(size, size)
    tiles_mod.PIXELS_READ.clear()
    for t in kept:
        tiles_mod.prepared_tile(t, None, "", 2)
    assert not tiles_mod.PIXELS_READ          # every one served from the cache, none read again


@pytest.mark.parametrize("byteorder, compression", [("<", None), (">", None), ("<", "zlib")])
def test_whole_tile_read_equals_tifffile(tmp_path, byteorder, compression):
    # Reference: tifffile.imread of the same file (uncompressed tiles are read by their one run of
    # pixels, after the first read without parsing the TIFF again; compressed ones through tifffile).
    img = (data.camera()[:40, :56].astype(np.uint16) * 13)
    path = tmp_path / "t.tif"
    tifffile.imwrite(path, img, byteorder=byteorder, compression=compression)
    for _ in range(2):
        got = tiles_mod.read_tile(path, 40, 56, dtype="uint16")
        np.testing.assert_array_equal(got, tifffile.imread(path))
        assert got.dtype == np.dtype("uint16")
