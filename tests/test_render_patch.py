"""Rewriting dirty shards of a written volume (render/patch.py): chunks outside the changed pixels are kept."""
from __future__ import annotations

import shutil

import numpy as np
import pytest
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


@pytest.mark.parametrize("here", [0, 1000])
def test_the_patch_gives_the_same_bytes_on_dask_threads_and_without_dask(tiny_build, tmp_path, monkeypatch, here):
    """Plane 1 overwritten on disk and patched whole comes back to the full render's pixels (the reference),
    whether the patch graph runs on dask's threaded scheduler (here=0) or in this process without dask."""
    from stackbuild.render import patch

    monkeypatch.setattr(patch, "HERE_WITHOUT_DASK", here)
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


def test_graph_run_here_gives_what_dask_gives():
    """A graph with shared and nested-list arguments: the same results as dask's own synchronous
    scheduler (dask.get, the reference), each final reported once, in order."""
    import dask

    from stackbuild.render.pyramid import run_graph_here

    got = {}
    dsk = {("a", 0): (np.add, 1, 2), ("b", 0): (np.multiply, ("a", 0), 10),
           ("c", 0): (sum, [("a", 0), ("b", 0), 5]), ("d", 0): (lambda rows, k: (rows, k), [[("c", 0)], [("b", 0)]], 3)}
    finals = [("c", 0), ("d", 0)]
    want = dask.get(dsk, finals)
    done = []
    dsk_here = dict(dsk)
    dsk_here[("c", 0)] = (lambda *a: got.setdefault("c", sum(*a)), [("a", 0), ("b", 0), 5])
    dsk_here[("d", 0)] = (lambda rows, k: got.setdefault("d", (rows, k)), [[("c", 0)], [("b", 0)]], 3)
    run_graph_here(dsk_here, finals, done.append)
    assert done == [0, 1]
    assert (got["c"], got["d"]) == tuple(want)
