"""The probe's chunk reader against zarr-python reading the same sharded array (the reference)."""
from __future__ import annotations

import numpy as np
import pytest
import zarr

from stackbuild.errors import InputError
from stackbuild.qc.levelread import ChunkKeeper, LevelReader


def _array(tmp_path, dtype):
    from zarr.codecs import BloscCodec, Crc32cCodec

    arr = zarr.create_array(str(tmp_path / "level"), shape=(2, 200, 230), dtype=dtype, chunks=(1, 64, 64),
                            shards=(1, 128, 128), compressors=[BloscCodec(cname="zstd", clevel=1), Crc32cCodec()],
                            fill_value=0)
    rng = np.random.default_rng(3)
    data = rng.integers(1, 200, size=arr.shape).astype(dtype)
    data[1, 130:, 130:] = 0  # a shard of fill only: no file
    arr[:] = data
    return zarr.open_array(str(tmp_path / "level"), mode="r"), data


@pytest.mark.parametrize("dtype", ["uint8", "uint16"])
def test_windows_equal_zarrs_own_read_and_each_chunk_is_decoded_once(tmp_path, dtype):
    arr, _ = _array(tmp_path, dtype)
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


def test_a_damaged_chunk_is_named(tmp_path):
    arr, _ = _array(tmp_path, "uint8")
    shard = next(p for p in (tmp_path / "level").rglob("*") if p.is_file() and p.name != "zarr.json")
    raw = bytearray(shard.read_bytes())
    raw[100:120] = bytes(20)
    shard.write_bytes(bytes(raw))
    z, sy, sx = (int(v) for v in shard.relative_to(tmp_path / "level" / "c").parts)
    reader = LevelReader.of(arr, "volume.zarr/em/0")
    with pytest.raises(InputError, match=rf"volume.zarr/em/0: chunk \(plane {z}, row {2 * sy}, col {2 * sx}\)"):
        reader.read(z, 2 * sy, 2 * sx)
