"""The probe's windows, cut from the chunks of the render's reader, against zarr-python reading the same sharded
array (the reference)."""
from __future__ import annotations

import numpy as np
import pytest
from test_render_levelread import sharded_level

from stackbuild.qc.windowread import ChunkKeeper
from stackbuild.render.levelread import LevelReader


@pytest.mark.parametrize("dtype", ["uint8", "uint16"])
def test_windows_equal_zarrs_own_read_and_each_chunk_is_decoded_once(tmp_path, dtype):
    arr, _ = sharded_level(tmp_path, dtype)
    reader = LevelReader.of(arr, "level")
    assert reader is not None
    boxes = [(1, 10, 150, 5, 230), (1, 100, 200, 120, 230), (0, 0, 200, 0, 230)]
    steps = [[(id(reader), b[0], *k) for k in reader.chunks_under(np.array([b[1:]]))] for b in boxes]
    keeper = ChunkKeeper(1 << 30)
    keeper.plan(steps)
    for i, (z, y0, y1, x0, x1) in enumerate(boxes):
        got = keeper.window(reader, i, z, y0, y1, x0, x1, reader.chunks_under(np.array([[y0, y1, x0, x1]])))
        np.testing.assert_array_equal(got, arr[z, y0:y1, x0:x1])  # zarr-python's read is the reference
    assert keeper.decoded == len({k for s in steps for k in s})
    part = ChunkKeeper(0).window(reader, 0, 0, 10, 100, 40, 120, {(0, 1)})  # one of the window's four chunks
    want = np.zeros_like(part)
    want[:54, 24:] = arr[0, 10:64, 64:120]
    np.testing.assert_array_equal(part, want)


def test_a_lazy_window_equals_the_window_read_whole_and_finds_data_as_it_does(tmp_path):
    arr, data = sharded_level(tmp_path, "uint8")
    reader = LevelReader.of(arr, "level")
    for z, y0, y1, x0, x1 in [(0, 10, 190, 20, 220), (1, 130, 200, 130, 230), (1, 100, 200, 100, 230)]:
        keys = reader.chunks_under(np.array([[y0, y1, x0, x1]]))
        whole = ChunkKeeper(1 << 30).window(reader, 0, z, y0, y1, x0, x1, keys)
        lazy = ChunkKeeper(1 << 30).lazy_window(reader, 0, z, y0, y1, x0, x1, keys)
        assert lazy.any_data() == bool(whole.any())
        lazy.fill(5, 20, 7, 40)
        np.testing.assert_array_equal(lazy.array[5:20, 7:40], whole[5:20, 7:40])
        np.testing.assert_array_equal(lazy.fill_all(), arr[z, y0:y1, x0:x1])  # zarr-python's read is the reference
