"""The render's reader of its shard layout against zarr-python reading the same sharded array (the reference)."""
from __future__ import annotations

import numpy as np
import pytest
import zarr

from stackbuild.errors import InputError
from stackbuild.render.levelread import LevelReader, StoredLevel


def sharded_level(tmp_path, dtype):
    """Return a 3-D sharded array as the render lays it out, written by zarr-python, and its pixels."""
    from zarr.codecs import BloscCodec, Crc32cCodec

    arr = zarr.create_array(str(tmp_path / "level"), shape=(2, 200, 230), dtype=dtype, chunks=(1, 64, 64),
                            shards=(1, 128, 128), compressors=[BloscCodec(cname="zstd", clevel=1), Crc32cCodec()],
                            fill_value=0)
    rng = np.random.default_rng(3)
    data = rng.integers(1, 200, size=arr.shape).astype(dtype)
    data[1, 130:, 130:] = 0  # a shard of fill only: no file
    arr[:] = data
    return zarr.open_array(str(tmp_path / "level"), mode="r"), data


def test_a_damaged_chunk_is_named(tmp_path):
    arr, _ = sharded_level(tmp_path, "uint8")
    shard = next(p for p in (tmp_path / "level").rglob("*") if p.is_file() and p.name != "zarr.json")
    raw = bytearray(shard.read_bytes())
    raw[100:120] = bytes(20)
    shard.write_bytes(bytes(raw))
    z, sy, sx = (int(v) for v in shard.relative_to(tmp_path / "level" / "c").parts)
    reader = LevelReader.of(arr, "volume.zarr/em/0")
    with pytest.raises(InputError, match=rf"volume.zarr/em/0: chunk \(plane {z}, row {2 * sy}, col {2 * sx}\)"):
        reader.read(z, 2 * sy, 2 * sx)


@pytest.mark.parametrize("cname", ["zstd", "lz4", "blosclz"])
@pytest.mark.parametrize("dtype,shuffle", [("uint8", 0), ("uint8", 1), ("uint16", 0), ("uint16", 2)])
def test_rows_decoded_block_by_block_equal_numcodecs_decode_of_the_whole_stream(cname, dtype, shuffle):
    from numcodecs import Blosc

    from stackbuild.render.bloscrows import LazyChunk

    rng = np.random.default_rng(7)
    shape = (96, 80)
    smooth = (np.add.outer(np.arange(96), np.arange(80)) * 3 % 251).astype(dtype)
    noise = rng.integers(0, np.iinfo(dtype).max, size=shape, endpoint=True).astype(dtype)  # blocks that do not compress
    data = np.where((np.arange(96) // 24 % 2 == 1)[:, None], noise, smooth)
    codec = Blosc(cname=cname, clevel=1, shuffle=shuffle, blocksize=2048)
    stream = codec.encode(data)
    want = np.frombuffer(codec.decode(stream), dtype).reshape(shape)  # numcodecs' decode is the reference
    for r0, r1 in [(0, 1), (30, 31), (10, 70), (95, 96), (0, 96)]:
        chunk = LazyChunk(stream, shape, dtype, codec.decode)
        np.testing.assert_array_equal(chunk.rows(r0, r1)[r0:r1], want[r0:r1])
        whole = LazyChunk(stream, shape, dtype, codec.decode, by_block=False)  # the stream decoded in one call
        np.testing.assert_array_equal(whole.rows(r0, r1), want)
    partial = LazyChunk(stream, shape, dtype, codec.decode)
    partial.rows(40, 41)
    if dtype == "uint8" and cname != "blosclz":  # plain frames: only the block under row 40 is decoded
        assert partial.decoded_blocks == 1


@pytest.mark.parametrize("dtype", ["uint8", "uint16"])
def test_a_level_read_without_zarr_equals_zarrs_own_read(tmp_path, dtype):
    # zarr-python's read of the same array is the reference (its layout read from zarr.json, its chunks decoded)
    from stackbuild.render.shardfile import shard_reader, shard_writer

    arr, _ = sharded_level(tmp_path, dtype)
    level = StoredLevel.open(tmp_path / "level", "level")
    assert level is not None and level.shape == arr.shape and level.dtype == arr.dtype
    ours, theirs = shard_reader(tmp_path / "level"), shard_writer(arr)
    assert (ours.chunk, ours.shard, ours.shape, ours.dtype, ours.fill) == \
        (theirs.chunk, theirs.shard, tuple(theirs.shape), theirs.dtype, theirs.fill)
    assert ours.key((1, 2, 3)) == theirs.key((1, 2, 3))
    for key in [1, -1, (0,), (1, slice(130, None), slice(130, None)),  # a shard of fill only (no file)
                (0, slice(10, 190), slice(5, 229)), (slice(0, 2), slice(63, 64), slice(None)),
                (slice(None), slice(None), slice(100, 101)), (0, slice(-50, None), slice(-70, -3)),
                (1, slice(5, 5), slice(0, 10))]:
        got, want = level[key], arr[key]
        assert got.shape == want.shape and got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)
    with pytest.raises(IndexError):
        level[2]
    assert LevelReader.of(level, "level") is not None


def test_a_layout_the_reader_does_not_handle_is_left_to_zarr(tmp_path):
    zarr.create_array(str(tmp_path / "plain"), shape=(2, 40, 40), dtype="uint8", chunks=(1, 20, 20))  # no shards
    assert StoredLevel.open(tmp_path / "plain", "plain") is None
    assert StoredLevel.open(tmp_path / "nothing", "nothing") is None
