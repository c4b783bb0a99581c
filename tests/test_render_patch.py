"""Rewriting dirty shards of a written volume (render/patch.py): chunks outside the changed pixels are kept."""
from __future__ import annotations

import shutil

import numpy as np
import zarr

from stackbuild.folder import BuildFolder
from stackbuild.render.dirty import all_shards


def _patch(build, pixels):
    from stackbuild.render.patch import patch_volume

    folder = BuildFolder(build)
    canvas = folder.store.load_canvas()
    settings = folder.config.render
    block = settings.chunk * settings.shard
    shards = all_shards((canvas.height, canvas.width), block)
    return patch_volume(build, settings, canvas, {1: set(shards)}, pixels=pixels)


def test_chunks_outside_the_changed_pixels_are_read_back_and_those_inside_rendered(tiny_build, tmp_path):
    """A chunk of plane 1 overwritten on disk stays as it is when no changed pixel lies in it, and is
    rendered again (back to the full render's pixels, the reference) when one does."""
    build = tmp_path / "b"
    shutil.copytree(tiny_build, build)
    level0 = zarr.open_array(str(build / "volume.zarr" / "em" / "0"), mode="r+")
    truth = np.asarray(level0[1])
    c = level0.chunks[1]
    level0[1, :c, :c] = 7          # chunk (0, 0): outside the boxes below
    level0[1, :c, c:2 * c] = 7     # chunk (0, 1): one changed pixel in it
    done = _patch(build, {1: [[c + 5, 3, c + 6, 4]]})
    after = np.asarray(level0[1])
    assert done["planes"] == [1]
    assert (after[:c, :c] == 7).all()  # read back, not rendered
    np.testing.assert_array_equal(after[:, c:], truth[:, c:])  # rendered or kept as the full render wrote them
    np.testing.assert_array_equal(after[c:, :c], truth[c:, :c])


def test_a_plane_not_fresh_before_is_rendered_whole(tiny_build, tmp_path):
    """Without the plane's fingerprint (a render of it was interrupted), nothing of it is read back."""
    from stackbuild.render.fingerprint import read_plane_record, write_plane_record

    build = tmp_path / "b"
    shutil.copytree(tiny_build, build)
    em = build / "volume.zarr" / "em"
    level0 = zarr.open_array(str(em / "0"), mode="r+")
    truth = np.asarray(level0[1])
    c = level0.chunks[1]
    level0[1, :c, :c] = 7
    record = read_plane_record(em)
    record["fingerprints"].pop("1")
    write_plane_record(em, record["stamp"], record["fingerprints"], record["damaged"])
    _patch(build, {1: [[c + 5, 3, c + 6, 4]]})
    np.testing.assert_array_equal(np.asarray(level0[1]), truth)


def test_a_plane_overwritten_on_disk_and_patched_whole_comes_back(tiny_build, tmp_path):
    """Plane 1 overwritten on disk and patched whole comes back to the full render's pixels (the
    reference) at every level, through the patch's dask graph."""
    build = tmp_path / "b"
    shutil.copytree(tiny_build, build)
    em = build / "volume.zarr" / "em"
    levels = [zarr.open_array(str(em / str(n)), mode="r+") for n in range(len(list(em.glob("[0-9]*"))))]
    truth = [np.asarray(a[1]) for a in levels]
    for a in levels:
        a[1] = 7
    _patch(build, None)
    for a, want in zip(levels, truth):
        np.testing.assert_array_equal(np.asarray(a[1]), want)
