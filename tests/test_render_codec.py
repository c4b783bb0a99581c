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
