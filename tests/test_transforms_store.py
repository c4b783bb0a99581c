"""Transform types and the versioned store."""
from __future__ import annotations

import json

import numpy as np
import pytest
from skimage.transform import AffineTransform

from stackbuild.errors import InputError
from stackbuild.transforms import (
    Affine2D, Canvas, DisplacementField, PairMatch, SectionAlignment, SectionStitch, TilePlacement,
    TransformStore,
)


def test_affine_agrees_with_skimage():
    # Reference: skimage.transform.AffineTransform uses the same (x, y) point convention.
    ref = AffineTransform(scale=(1.02, 0.97), rotation=0.05, shear=0.01, translation=(12.5, -3.0))
    ours = Affine2D(ref.params)
    pts = np.random.default_rng(0).uniform(-100, 100, (50, 2))
    np.testing.assert_allclose(ours.apply(pts), ref(pts), atol=1e-9)
    np.testing.assert_allclose(ours.inverse().apply(ours.apply(pts)), pts, atol=1e-9)
    np.testing.assert_allclose(ours.then(ours.inverse()).matrix, np.eye(2, 3), atol=1e-12)


def test_displacement_field_is_bilinear_between_nodes():
    vec = np.zeros((2, 2, 2), np.float32)
    vec[..., 0] = [[0, 4], [8, 12]]  # dx grows with x and y
    f = DisplacementField(vec, origin=(10, 20), spacing=10)
    d = f.displacement(np.array([[15.0, 25.0], [10, 20], [100, 100]]))
    np.testing.assert_allclose(d[:, 0], [6.0, 0.0, 12.0], atol=0.05)  # centre, node, clamped


def _stitch_record():
    tiles = [TilePlacement("r0c0", "/data/a.tif", 64, 48, 0, 0, 0.25, -0.5, flags=["blank"]),
             TilePlacement("r0c1", "/data/b.tif", 64, 48, 50, 0, 51.0, 0.0, gain=1.1, offset=-2)]
    pairs = [PairMatch("r0c0", "r0c1", 50.75, 0.5, 50, 0, 0.9, 4.0, True, residual=0.1)]
    return SectionStitch(3, "uint8", tiles, pairs, np.ones((6, 8), np.float32), 8)


def test_round_trip_and_history(tmp_path):
    store = TransformStore(tmp_path / "transforms")
    rec = _stitch_record()
    store.save_stitch(rec)
    back = store.load_stitch(3)
    assert back.tiles == rec.tiles and back.pairs == rec.pairs
    np.testing.assert_array_equal(back.illumination, rec.illumination)
    assert back.bbox() == (-0.25, -1.0, 114.5, 47.5)  # pixel edges: centre - 0.5

    rec.tiles[0].x = 9.0
    store.save_stitch(rec)  # second run: the first version is kept in history
    assert store.load_stitch(3).tiles[0].x == 9.0
    old = store.history("stitch", 3)
    assert len(old) == 1 and json.loads(old[0].read_text())["record"]["tiles"][0]["x"] == 0.25
    assert store.sections_with("stitch") == [3]


def test_alignment_record_uses_ngff_vocabulary(tmp_path):
    store = TransformStore(tmp_path)
    field = DisplacementField(np.ones((3, 4, 2), np.float32), (0, 0), 32)
    store.save_alignment(SectionAlignment(5, Affine2D.similarity(1.01, 0.02, 5, 6), field))
    env = json.loads((store.section_dir(5) / "align.json").read_text())
    seq = env["record"]["transforms"]
    assert seq["type"] == "sequence" and [t["type"] for t in seq["transformations"]] == ["displacements", "affine"]
    assert env["frames"] == {"input": "aligned", "output": "section"}
    back = store.load_alignment(5)
    pts = np.array([[10.0, 20.0]])
    np.testing.assert_allclose(back.aligned_to_section(pts), Affine2D.similarity(1.01, 0.02, 5, 6).apply(pts + 1))


def test_canvas_round_trip(tmp_path):
    store = TransformStore(tmp_path)
    c = Canvas(100, 80, -3.0, 4.0, 2, 9, "uint8", 4.0, 40.0, [5], {7: ["damaged"]})
    store.save_canvas(c)
    assert store.load_canvas() == c and c.depth == 8


@pytest.mark.parametrize("damage, expect", [
    (lambda t: t[: len(t) // 2], "unreadable or truncated"),
    (lambda t: t.replace('"version": 1', '"version": 99'), "newer stackbuild"),
    (lambda t: t.replace('"stackbuild.transforms"', '"something.else"'), "not a stackbuild.transforms file"),
])
def test_damaged_records_give_clear_errors(tmp_path, damage, expect):
    store = TransformStore(tmp_path)
    path = store.save_stitch(_stitch_record())
    path.write_text(damage(path.read_text()))
    with pytest.raises(InputError, match=expect) as err:
        store.load_stitch(3)
    assert str(path) in str(err.value)


def test_missing_array_is_named(tmp_path):
    store = TransformStore(tmp_path)
    store.save_stitch(_stitch_record())
    import shutil
    shutil.rmtree(store.section_dir(3) / "illumination.zarr")
    with pytest.raises(InputError, match="illumination.zarr"):
        store.load_stitch(3)


def test_write_is_atomic_when_serialisation_fails(tmp_path):
    store = TransformStore(tmp_path)
    path = store.save_doc("contrast", {"gain": 1.0})
    with pytest.raises(ValueError):
        store.save_doc("contrast", {"gain": float("nan")})  # NaN is not JSON
    assert store.load_doc("contrast") == {"gain": 1.0} and not store.history("contrast")
    assert not list(path.parent.glob(".contrast.json.*"))  # no temporary left behind


def test_displacement_field_matches_scipy_bilinear():
    # Reference: scipy.interpolate.RegularGridInterpolator(method="linear") on the same nodes.
    from scipy.interpolate import RegularGridInterpolator

    rng = np.random.default_rng(3)
    vec = rng.normal(0, 4, (6, 7, 2)).astype(np.float32)
    f = DisplacementField(vec, origin=(-20.0, 10.0), spacing=32.0)
    gy, gx = -20.0 + 32.0 * np.arange(7), 10.0 + 32.0 * np.arange(6)
    ref = RegularGridInterpolator((gx, gy), vec.astype(np.float64), method="linear")
    xs, ys = np.linspace(-20, 172, 23), np.linspace(10, 170, 19)
    X, Y = np.meshgrid(xs, ys)
    expect = ref(np.column_stack([Y.ravel(), X.ravel()]))
    np.testing.assert_allclose(f.displacement(np.column_stack([X.ravel(), Y.ravel()])), expect, atol=1e-5)
    np.testing.assert_allclose(f.displacement_grid(xs, ys).reshape(-1, 2), expect, atol=1e-5)


@pytest.mark.parametrize("durable", [True, False])
def test_a_file_is_replaced_whole_or_left_as_it_was(tmp_path, durable):
    # No outside reference: the writer's own promise (POSIX rename replaces a file in one step). A reader of
    # tiles.csv mid-report saw a table cut short while it was written in place (the report's tables are
    # written without fsync, the records with it).
    import os
    from functools import partial

    from stackbuild.transforms.store import replace_atomically

    replace_file = partial(replace_atomically, durable=durable, newline="")

    path = tmp_path / "tiles.csv"
    path.write_text("old\n", encoding="utf-8")
    fresh = tmp_path / "fresh"
    fresh.write_text("")

    def half_then_fail(fh):
        fh.write("new, half")
        raise OSError("disk full")

    with pytest.raises(OSError):
        replace_file(path, half_then_fail)
    assert not replace_file(path, lambda fh: fh.write("columns differ") and False)
    assert path.read_text(encoding="utf-8") == "old\n"
    assert set(os.listdir(tmp_path)) == {"tiles.csv", "fresh"}      # nothing left beside it
    assert replace_file(path, lambda fh: fh.write("a,b\n1,2\n") > 0)
    assert path.read_text(encoding="utf-8") == "a,b\n1,2\n"
    assert set(os.listdir(tmp_path)) == {"tiles.csv", "fresh"}
    assert path.stat().st_mode & 0o777 == fresh.stat().st_mode & 0o777  # a new file's mode, not mkstemp's 0600


@pytest.mark.parametrize("dtype, shape", [("float32", (64, 64)), ("float32", (24, 24, 2)), ("uint16", (5, 7)),
                                          ("float64", (3,)), ("int8", (4, 4))])
def test_small_arrays_read_directly_equal_zarrs_read(tmp_path, dtype, shape):
    # Reference: zarr-python's own read of the array the store wrote (zarr v3, one chunk, bytes + zstd).
    import zarr

    from stackbuild.transforms.arrayfile import read_one_chunk

    arr = (np.random.default_rng(1).normal(0, 50, shape)).astype(dtype)
    path = tmp_path / "a.zarr"
    TransformStore._write_array(path, arr)
    ref = np.asarray(zarr.open_array(str(path), mode="r")[...])
    got = read_one_chunk(path)
    assert got is not None and got.dtype == ref.dtype and got.shape == ref.shape and got.flags.writeable
    np.testing.assert_array_equal(got, ref)


def test_other_array_layouts_are_left_to_zarr(tmp_path):
    # What the direct read does not handle (several chunks; a chunk zarr did not store because it holds
    # only the fill value) gives None, and the store still reads it through zarr.
    import zarr

    from stackbuild.transforms.arrayfile import read_one_chunk

    tiled = zarr.create_array(store=str(tmp_path / "t.zarr"), shape=(8, 8), dtype="float32", chunks=(4, 4),
                              zarr_format=3)
    tiled[...] = np.arange(64, dtype=np.float32).reshape(8, 8)
    assert read_one_chunk(tmp_path / "t.zarr") is None
    store = TransformStore(tmp_path / "transforms")
    store._write_array(store.section_dir(2) / "illumination.zarr", np.zeros((6, 8), np.float32))
    assert read_one_chunk(store.section_dir(2) / "illumination.zarr") is None
    np.testing.assert_array_equal(store._read_array(2, "illumination"), np.zeros((6, 8), np.float32))
    store.save_stitch(_stitch_record())
    chunk = store.section_dir(3) / "illumination.zarr" / "c" / "0" / "0"
    chunk.write_bytes(b"not zstd")  # undecodable: left to zarr, whose error the store reports with the path
    with pytest.raises(InputError, match="illumination.zarr"):
        store.load_stitch(3)


@pytest.mark.parametrize("dtype, shape, blank", [("float32", (64, 64), False), ("float32", (24, 24, 2), False),
                                                 ("uint16", (5, 7), False), ("float64", (3,), False),
                                                 ("int8", (4, 4), False), ("uint8", (3, 3), False),
                                                 ("float32", (6, 8), True)])
def test_small_arrays_are_written_as_zarr_writes_them(tmp_path, dtype, shape, blank):
    # Reference: the files zarr-python writes for the same array (create_array with one chunk, then a
    # whole-array write), compared byte for byte: its zarr.json and its one chunk (left out when blank).
    import zarr

    from stackbuild.transforms.arrayfile import write_one_chunk

    arr = np.zeros(shape, dtype) if blank else np.random.default_rng(2).normal(0, 50, shape).astype(dtype)
    ref = zarr.create_array(store=str(tmp_path / "ref.zarr"), shape=shape, dtype=dtype, chunks=shape, zarr_format=3)
    ref[...] = arr
    assert write_one_chunk(tmp_path / "mine.zarr", arr)
    files = lambda root: {str(p.relative_to(root)): p.read_bytes() for p in root.rglob("*") if p.is_file()}  # noqa: E731
    assert files(tmp_path / "mine.zarr") == files(tmp_path / "ref.zarr")
    assert not write_one_chunk(tmp_path / "b.zarr", np.zeros(3, bool)) and not (tmp_path / "b.zarr").exists()
