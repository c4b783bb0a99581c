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
