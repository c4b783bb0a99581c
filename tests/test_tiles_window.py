"""A reduced tile read by window equals the same slice of the whole tile prepared and reduced.

Reference: the whole-tile path (``tiles.prepared_tile``: correction, then ``cv2.resize`` with
``INTER_AREA``, OpenCV's block mean for integer factors); pixels from ``skimage.data.camera``.
"""
import numpy as np
import pytest
import tifffile
from skimage import data

from stackbuild import tiles
from stackbuild.transforms import TilePlacement


def _tile(tmp_path, h, w, compression=None):
    img = (data.camera()[:h, :w].astype(np.uint16) * 13 + 7)
    path = tmp_path / f"t{h}x{w}{compression or ''}.tif"
    tifffile.imwrite(path, img, compression=compression, rowsperstrip=37 if compression else None)
    return TilePlacement("t", str(path), w, h, 0, 0, 0.0, 0.0, gain=1.25, offset=-3.0)


@pytest.mark.parametrize("shape", [(480, 512), (479, 509)])
@pytest.mark.parametrize("scale", [2, 3, 4])
@pytest.mark.parametrize("compression", [None, "zlib"])
def test_reduced_window_equals_the_slice_of_the_whole_tile(tmp_path, shape, scale, compression):
    tile = _tile(tmp_path, *shape, compression)
    profile = np.linspace(0.8, 1.2, 35, dtype=np.float32).reshape(5, 7)
    key = tiles.profile_digest(profile)
    tiles.TILE_CACHE.clear()
    whole, _ = tiles.prepared_tile(tile, profile, key, scale)
    n_r, n_c = whole.shape
    rng = np.random.default_rng(scale)
    windows = [(0, n_r, 0, n_c), (0, 5, 0, 7), (n_r - 6, n_r, n_c - 3, n_c), (3, 4, 9, 10)]
    windows += [tuple(sorted(rng.integers(0, n_r + 1, 2))) + tuple(sorted(rng.integers(0, n_c + 1, 2)))
                for _ in range(20)]
    for r0, r1, c0, c1 in windows:
        got = tiles.prepared_window(tile, profile, (r0, r1, c0, c1), scale=scale)
        if r1 - r0 == 0 or c1 - c0 == 0 or got is None:
            continue
        np.testing.assert_array_equal(got, whole[r0:r1, c0:c1], err_msg=f"window {(r0, r1, c0, c1)}")


def test_section_tiles_reads_small_windows_unless_cached_and_caches_large_ones(tmp_path):
    from types import SimpleNamespace
    tile = _tile(tmp_path, 480, 512)
    provider = tiles.SectionTiles(SimpleNamespace(illumination=None, section=0, dtype="uint16", tiles=[tile]))
    tiles.TILE_CACHE.clear()
    small, _ = provider(tile, 4, window=(10, 30, 20, 50))
    assert tiles.TILE_CACHE.nbytes == 0                    # read by window, not cached
    big, _ = provider(tile, 4, window=(0, 100, 0, 120))
    assert tiles.TILE_CACHE.nbytes > 0                     # most of the tile: prepared whole, cached
    np.testing.assert_array_equal(small, tiles.prepared_tile(tile, None, provider._key, 4)[0][10:30, 20:50])
    before = dict(tiles.PIXELS_READ)
    again, _ = provider(tile, 4, window=(10, 30, 20, 50))          # now cached: sliced, nothing read
    assert dict(tiles.PIXELS_READ) == before
    np.testing.assert_array_equal(again, small)
