"""The volume's Blosc settings: the shuffle follows the pixel type, and the pixels survive the round trip."""
from __future__ import annotations

import json

import numpy as np
import pytest
import zarr

from stackbuild.errors import InputError
from stackbuild.render.settings import RenderSettings, check_settings
from stackbuild.render.write import render_volume

from render_builders import make_build


@pytest.mark.parametrize("dtype, shuffle", [(np.uint8, "noshuffle"), (np.uint16, "bitshuffle")])
def test_auto_shuffle_follows_the_pixel_type(tmp_path, dtype, shuffle):
    settings = RenderSettings(chunk=32, shard=2)
    folder = make_build(tmp_path, n_sections=2, dtype=dtype, settings=settings)
    render_volume(folder.root, settings)
    level0 = folder.volume_path / "em" / "0"
    meta = json.loads((level0 / "zarr.json").read_text())
    # Reference: the zarr v3 sharding and blosc codec specifications name the inner codecs and
    # the blosc configuration ("cname", "clevel", "shuffle") in the array's zarr.json.
    inner = meta["codecs"][0]["configuration"]["codecs"]
    blosc = next(c for c in inner if c["name"] == "blosc")["configuration"]
    assert (blosc["cname"], blosc["clevel"], blosc["shuffle"]) == ("zstd", 1, shuffle)
    arr = zarr.open_array(str(level0), mode="r")[...]  # zarr-python decodes what was written
    assert arr.dtype == dtype and arr.max() > 0


def test_unknown_shuffle_is_refused():
    with pytest.raises(InputError, match="shuffle"):
        check_settings(RenderSettings(shuffle="sideways"))


def test_write_block_gives_the_bytes_zarr_gives(tmp_path):
    # Reference: zarr-python's own write of the same block. write_block skips zarr's empty-chunk
    # test only when no chunk is all fill value, so the shard files are byte-identical, and a
    # block with an empty chunk still leaves that chunk out as zarr does.
    import zarr
    from skimage import data
    from zarr.codecs import BloscCodec, Crc32cCodec

    from stackbuild.render.pyramid import write_block
    full = data.camera()[None, :256, :256].copy()
    holey = full.copy()
    holey[:, :64, :64] = 0
    group = zarr.open_group(str(tmp_path / "v.zarr"), mode="w", zarr_format=3)
    for block in (full, holey):
        arrays = [group.create_array(n, shape=(1, 256, 256), dtype="uint8", chunks=(1, 64, 64), shards=(1, 128, 128),
                                     compressors=[BloscCodec(cname="zstd", clevel=1), Crc32cCodec()], fill_value=0,
                                     overwrite=True) for n in ("zarr", "ours")]
        arrays[0][0:1, :, :] = block
        for y in (0, 128):
            for x in (0, 128):
                write_block(arrays[1], 0, y, x, block[:, y:y + 128, x:x + 128])
        for shard in ("0/0/0", "0/0/1", "0/1/0", "0/1/1"):
            assert (tmp_path / "v.zarr/zarr/c" / shard).read_bytes() == (tmp_path / "v.zarr/ours/c" / shard).read_bytes()
        np.testing.assert_array_equal(arrays[1][:], block)


@pytest.mark.parametrize("dtype, shuffle, codec", [(np.uint8, "noshuffle", "zstd"), (np.uint16, "bitshuffle", "zstd"),
                                                   (np.uint16, "shuffle", "none")])
def test_whole_shards_written_directly_are_the_files_zarr_writes(tmp_path, dtype, shuffle, codec):
    # Reference: zarr-python's own write (its sharding codec: chunks in Morton order, index of offsets and
    # lengths at the end with its CRC-32C). The render writes whole shards without zarr's pipeline
    # (stackbuild.render.shardfile); the files must be the same: edge shards clipped to an array whose
    # edges are not whole chunks, a chunk of fill value only (left out), a shard rewritten over an older
    # file, and a shard of fill value only (no file).
    from skimage import data
    from zarr.codecs import BloscCodec, Crc32cCodec

    from stackbuild.render.pyramid import write_block
    from stackbuild.render.shardfile import shard_writer
    img = (data.camera()[None, :200, :230].astype(dtype) * (16 if dtype == np.uint16 else 1)).astype(dtype)
    img[:, :64, 64:128] = 0  # one whole chunk of fill value
    img[:, 128:, 128:] = 0  # the last shard holds nothing but fill value
    compressors = [Crc32cCodec()] if codec == "none" else [BloscCodec(cname=codec, clevel=1, shuffle=shuffle), Crc32cCodec()]
    group = zarr.open_group(str(tmp_path / "v.zarr"), mode="w", zarr_format=3)
    arrays = [group.create_array(n, shape=(1, 200, 230), dtype=dtype, chunks=(1, 64, 64), shards=(1, 128, 128),
                                 compressors=compressors, fill_value=0) for n in ("zarr", "ours")]
    assert shard_writer(arrays[1]) is not None  # the direct path is the one tested
    arrays[0][0:1, :, :] = img
    for old in (img[:, ::-1, ::-1].copy(), img):  # the second pass rewrites every shard file
        for y in (0, 128):
            for x in (0, 128):
                write_block(arrays[1], 0, y, x, old[:, y:y + 128, x:x + 128])
    names = sorted(p.relative_to(tmp_path / "v.zarr/zarr") for p in (tmp_path / "v.zarr/zarr/c").rglob("*") if p.is_file())
    assert names == sorted(p.relative_to(tmp_path / "v.zarr/ours") for p in (tmp_path / "v.zarr/ours/c").rglob("*")
                           if p.is_file())
    assert len(names) == 3  # the empty shard has no file
    for name in names:
        assert (tmp_path / "v.zarr/zarr" / name).read_bytes() == (tmp_path / "v.zarr/ours" / name).read_bytes()
    np.testing.assert_array_equal(zarr.open_array(str(tmp_path / "v.zarr/ours"), mode="r")[:], img)


def test_chunks_read_back_and_written_as_stored_give_the_file_zarr_writes(tmp_path):
    # Reference: zarr-python's own write of the same pixels. An update keeps the chunks of a dirty shard
    # that no changed pixel reaches by handing their stored bytes back to the shard writer
    # (render.pyramid.render_shard); the shard must still be the file zarr writes: edge chunks padded with
    # the fill value, a chunk of fill value only (not stored), and a chunk whose stored bytes are damaged
    # (left out by the reader, so encoded again from the pixels the caller has).
    from skimage import data
    from zarr.codecs import BloscCodec, Crc32cCodec

    from stackbuild.render.shardfile import shard_writer

    img = data.camera()[None, :200, :230].copy()
    img[:, :64, 64:128] = 0  # one whole chunk of fill value
    compressors = [BloscCodec(cname="zstd", clevel=1, shuffle="noshuffle"), Crc32cCodec()]
    group = zarr.open_group(str(tmp_path / "v.zarr"), mode="w", zarr_format=3)
    arrays = [group.create_array(n, shape=(1, 200, 230), dtype=np.uint8, chunks=(1, 64, 64), shards=(1, 128, 128),
                                 compressors=compressors, fill_value=0) for n in ("zarr", "ours")]
    for a in arrays:
        a[0:1, :, :] = img
    first = tmp_path / "v.zarr/ours/c/0/0/0"
    damaged = bytearray(first.read_bytes())
    damaged[10] ^= 0xFF  # inside the first chunk in Morton order, (0, 0, 0)
    first.write_bytes(bytes(damaged))
    writer = shard_writer(arrays[1])
    coords = [(0, i, j) for i in range(2) for j in range(2)]
    for y in (0, 128):
        for x in (0, 128):
            block = img[:, y:y + 128, x:x + 128]
            back = writer.stored((0, y, x), coords)
            assert set(back) == set(coords) - ({(0, 0, 0)} if (y, x) == (0, 0) else set())
            for (_, i, j), (_, pixels) in back.items():
                part = block[:, 64 * i:64 * i + 64, 64 * j:64 * j + 64]
                np.testing.assert_array_equal(pixels[:, :part.shape[1], :part.shape[2]], part)
            writer.write((0, y, x), block, {k: b for k, (b, _) in back.items() if b is not None})
    for name in ("0/0/0", "0/0/1", "0/1/0", "0/1/1"):
        assert (tmp_path / "v.zarr/zarr/c" / name).read_bytes() == (tmp_path / "v.zarr/ours/c" / name).read_bytes()


@pytest.mark.parametrize("grid", [(1, 4, 4), (1, 3, 5), (2, 3, 7), (1, 1, 1), (1, 16, 16), (3, 3, 3)])
def test_shard_chunk_order_is_zarrs(grid):
    # Reference: zarr-python's order of the chunks in a shard it writes (zarr.core.indexing.morton_order_iter).
    from zarr.core.indexing import morton_order_iter

    from stackbuild.render.shardfile import morton_order

    assert morton_order(grid) == [tuple(int(c) for c in pos) for pos in morton_order_iter(grid)]


def test_stored_array_reads_and_writes_as_zarr(tmp_path):
    # Reference: zarr-python's reads and writes of the same array. A patch of a written volume uses
    # StoredArray (no zarr import): its reads of any box (edge chunks, a chunk of fill value only, a shard
    # with no file) equal zarr's, a whole shard written through it gives zarr's file, it pickles as its
    # folder, and a damaged chunk raises the error that names array, plane and chunk.
    import pickle

    from skimage import data
    from zarr.codecs import BloscCodec, Crc32cCodec

    from stackbuild.errors import InputError
    from stackbuild.render.levelread import StoredArray
    from stackbuild.render.pyramid import write_block
    from stackbuild.render.shardfile import shard_writer

    img = data.camera()[None, :200, :230].copy()
    img[:, :64, 64:128] = 0  # one whole chunk of fill value
    img[:, 128:, 128:] = 0  # the last shard holds nothing but fill value: no file
    compressors = [BloscCodec(cname="zstd", clevel=1, shuffle="noshuffle"), Crc32cCodec()]
    group = zarr.open_group(str(tmp_path / "v.zarr"), mode="w", zarr_format=3)
    arrays = [group.create_array(n, shape=(1, 200, 230), dtype=np.uint8, chunks=(1, 64, 64), shards=(1, 128, 128),
                                 compressors=compressors, fill_value=0) for n in ("zarr", "ours")]
    arrays[0][0:1, :, :] = img
    stored = pickle.loads(pickle.dumps(StoredArray.open(tmp_path / "v.zarr/ours")))
    assert stored.shape == (1, 200, 230) and stored.shards == (1, 128, 128) and shard_writer(stored) is stored.layout
    for y in (0, 128):
        for x in (0, 128):
            write_block(stored, 0, y, x, img[:, y:y + 128, x:x + 128])
    assert stored._zarr is None  # whole shards only: zarr-python was not needed
    for name in ("0/0/0", "0/0/1", "0/1/0"):
        assert (tmp_path / "v.zarr/zarr/c" / name).read_bytes() == (tmp_path / "v.zarr/ours/c" / name).read_bytes()
    assert not (tmp_path / "v.zarr/ours/c/0/1/1").exists()
    rng = np.random.default_rng(3)
    for _ in range(20):
        y0, x0 = rng.integers(0, 199), rng.integers(0, 229)
        y1, x1 = rng.integers(y0 + 1, 201), rng.integers(x0 + 1, 231)
        np.testing.assert_array_equal(stored[0:1, y0:y1, x0:x1], arrays[0][0:1, y0:y1, x0:x1])
    assert stored._zarr is None
    write_block(stored, 0, 0, 0, 255 - img[:, :128, :128])  # a shard rewritten between reads, as a patch does
    np.testing.assert_array_equal(stored[0:1, 0:128, 0:128], 255 - img[:, :128, :128])
    first = tmp_path / "v.zarr/ours/c/0/0/0"
    damaged = bytearray(first.read_bytes())
    damaged[10] ^= 0xFF
    first.write_bytes(bytes(damaged))
    with pytest.raises(InputError, match=r"v.zarr/ours: chunk \(plane 0, row 0, col 0\) cannot be decoded"):
        stored[0:1, 0:10, 0:10]
