"""The checked tile manifest kept in the build folder (BuildFolder.tile_manifest).

Reference points outside the project: tile headers are compared with what
tifffile (the reference TIFF library) reads back; the recorded digest, size and
mtime with Python's hashlib (SHA-256, FIPS 180-4) and os.stat; the snapshot's
syntax with Python's json module (RFC 8259). Equality with a fresh
``read_tile_manifest`` pins that the cache gives exactly what a full check gives.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest
import tifffile

import stackbuild.manifest as manifest_mod
import stackbuild.folder as folder_mod
from stackbuild.errors import InputError
from stackbuild.manifest import TileManifest, read_tile_manifest
from stackbuild.folder import SNAPSHOT_VERSION, BuildFolder
from stackbuild.run.update import merged_manifest
from stackbuild.tiles import read_tile

# Invented scenario: a cross-cut of a cultured sponge spicule, imaged in odd tile sizes.
SHAPES = {"n1": (24, 40), "n2": (24, 36), "s1": (20, 40)}
CSV = ("section,tile,path,x,y\n"
       "3,n1,raw/n1.tif,0.1,-3.25\n"
       "3,n2,raw/n2.tif,31.000000000000004,1e-07\n"
       "5,,raw/s1.tif,12345.678901234,0\n")


def _tiles(folder: Path, shapes=SHAPES, dtype=np.uint16) -> None:
    for name, shape in shapes.items():
        (folder / "raw").mkdir(parents=True, exist_ok=True)
        tifffile.imwrite(folder / "raw" / f"{name}.tif", np.full(shape, 7, dtype))


@pytest.fixture
def build(tmp_path) -> BuildFolder:
    """A build folder whose record points at a three-tile manifest (sections 3 and 5)."""
    _tiles(tmp_path)
    (tmp_path / "tiles.csv").write_text(CSV)
    b = BuildFolder(tmp_path / "out")
    b.root.mkdir()
    b.save_state({"tiles": str((tmp_path / "tiles.csv").resolve()), "stages": {}})
    return b


def _no_tiff(monkeypatch) -> None:
    """Make any attempt to open a TIFF header fail the test."""
    def refuse(*args, **kw):
        raise AssertionError("a TIFF header was opened")

    monkeypatch.setattr(manifest_mod, "image_header", refuse)
    monkeypatch.setattr(manifest_mod, "_header", refuse)
    monkeypatch.setattr(manifest_mod.tifffile, "TiffFile", refuse)


def _same(got: TileManifest, want: TileManifest) -> None:
    """Assert two manifests agree field by field, value and type."""
    assert got.source == want.source and len(got.tiles) == len(want.tiles)
    for g, w in zip(got.tiles, want.tiles):
        for f in dataclasses.fields(w):
            a, b = getattr(g, f.name), getattr(w, f.name)
            assert type(a) is type(b) and a == b, (f.name, a, b)


def test_first_call_checks_fully_and_equals_a_fresh_read(build, header_calls):
    got = build.tile_manifest()
    assert sorted(header_calls) == sorted(SHAPES)
    _same(got, read_tile_manifest(build.load_state()["tiles"]))
    for t in got.tiles:  # reference: tifffile reads the written files back
        with tifffile.TiffFile(t.path) as tif:
            assert (t.height, t.width) == tif.pages.first.shape and np.dtype(t.dtype) == tif.pages.first.dtype
    assert [t.x for t in got.tiles] == [0.1, 31.000000000000004, 12345.678901234]  # exact, as in the CSV


def test_snapshot_records_the_csvs_digest_size_and_mtime(build):
    build.tile_manifest()
    csv_path = Path(build.load_state()["tiles"])
    doc = json.loads(build.snapshot_path.read_text(encoding="utf-8"))  # reference: RFC 8259 via json
    assert doc["format"] == "stackbuild.checked-manifest" and doc["version"] == SNAPSHOT_VERSION
    st = os.stat(csv_path)
    assert doc["csv"] == {"path": str(csv_path), "size": st.st_size, "mtime_ns": st.st_mtime_ns,
                          # reference: hashlib's SHA-256 of the file's bytes
                          "sha256": hashlib.sha256(csv_path.read_bytes()).hexdigest()}


def test_second_call_opens_no_tiff(build, monkeypatch):
    first = build.tile_manifest()
    _no_tiff(monkeypatch)
    _same(build.tile_manifest(), first)
    build.snapshot_path.unlink()  # without the snapshot the same call must reach the headers
    with pytest.raises(AssertionError, match="TIFF header"):
        build.tile_manifest()


def test_touching_the_csv_without_editing_keeps_the_snapshot(build, monkeypatch):
    build.tile_manifest()
    csv_path = Path(build.load_state()["tiles"])
    os.utime(csv_path, ns=(1_000_000_000, 1_000_000_000))  # keyed by content, not by time
    _no_tiff(monkeypatch)
    assert len(build.tile_manifest().tiles) == 3


def test_editing_the_csv_checks_it_again(build, header_calls):
    build.tile_manifest()
    csv_path = Path(build.load_state()["tiles"])
    st = os.stat(csv_path)
    csv_path.write_text(CSV.replace("0.1,-3.25", "0.2,-3.25"))  # same size ...
    os.utime(csv_path, ns=(st.st_atime_ns, st.st_mtime_ns))     # ... and same mtime
    header_calls.clear()
    got = build.tile_manifest()
    # The CSV is checked again, but its tile files are unchanged (size, mtime), so none is reopened
    # (kept per file; tests/test_manifest_parallel.py shows a changed file is).
    assert got.tiles[0].x == 0.2 and len(header_calls) == 0
    _same(got, read_tile_manifest(csv_path))
    doc = json.loads(build.snapshot_path.read_text(encoding="utf-8"))
    assert doc["csv"]["sha256"] == hashlib.sha256(csv_path.read_bytes()).hexdigest()


def test_an_edit_that_breaks_a_tile_row_is_named_and_not_kept(build):
    build.tile_manifest()
    csv_path = Path(build.load_state()["tiles"])
    csv_path.write_text(CSV + "5,bad,tiles.csv,0,0\n")  # a CSV is not a TIFF
    with pytest.raises(InputError) as err:
        build.tile_manifest()
    assert err.value.row == 5 and err.value.file == str(csv_path)
    doc = json.loads(build.snapshot_path.read_text(encoding="utf-8"))
    assert doc["record"]["count"] == 3  # the earlier snapshot stays; its digest no longer matches


def _ragged(doc):
    doc["record"]["columns"]["x"].pop()
    return json.dumps(doc)


def _bool_row(doc):
    doc["record"]["columns"]["row"][0] = True
    return json.dumps(doc)


def _foreign(doc):
    return json.dumps({**doc, "format": "somebody.else"})


@pytest.mark.parametrize("spoil", [
    lambda text, doc: text[: len(text) // 2],   # truncated write
    lambda text, doc: "",                       # empty file
    lambda text, doc: "\xff\xfe not json",      # garbage
    lambda text, doc: "[1, 2, 3]",              # JSON, but not an object
    lambda text, doc: _ragged(doc),             # a column one value short
    lambda text, doc: _bool_row(doc),           # a line number that is a boolean
    lambda text, doc: _foreign(doc),            # another program's file
], ids=["truncated", "empty", "garbage", "list", "ragged", "bool", "foreign"])
def test_a_corrupt_snapshot_is_rebuilt(build, header_calls, spoil):
    first = build.tile_manifest()
    text = build.snapshot_path.read_text(encoding="utf-8")
    build.snapshot_path.write_text(spoil(text, json.loads(text)), encoding="utf-8")
    header_calls.clear()
    _same(build.tile_manifest(), first)
    assert len(header_calls) == 3
    assert json.loads(build.snapshot_path.read_text(encoding="utf-8"))["version"] == SNAPSHOT_VERSION


def test_a_newer_snapshot_is_refused_by_name(build):
    build.tile_manifest()
    doc = json.loads(build.snapshot_path.read_text(encoding="utf-8"))
    doc["version"] = SNAPSHOT_VERSION + 1
    build.snapshot_path.write_text(json.dumps(doc), encoding="utf-8")
    with pytest.raises(InputError, match="newer stackbuild") as err:
        build.tile_manifest()
    assert err.value.file == str(build.snapshot_path)
    assert json.loads(build.snapshot_path.read_text())["version"] == SNAPSHOT_VERSION + 1  # left alone


def test_the_snapshot_follows_updates_merged_manifest(build, tmp_path, monkeypatch):
    old = build.tile_manifest()
    _tiles(tmp_path / "again", {"r1": (24, 40), "r2": (24, 40)})
    (tmp_path / "again" / "tiles.csv").write_text("section,path,x,y\n5,raw/r1.tif,0,0\n5,raw/r2.tif,30.5,0\n")
    new = read_tile_manifest(tmp_path / "again" / "tiles.csv")
    merged = build.root / "manifests" / "tiles.0001.csv"  # what update_build writes and switches to
    merged.write_text(merged_manifest(old, new))
    build.update_state(tiles=str(merged), manifests=[str(merged)])
    got = build.tile_manifest()
    _same(got, read_tile_manifest(merged))
    # update merges by (section, tile): the new tiles join section 5's untouched one
    assert [t.tile for t in got.section_tiles(5)] == ["s1", "r1", "r2"] and len(got.section_tiles(3)) == 2
    assert json.loads(build.snapshot_path.read_text())["csv"]["path"] == str(merged.resolve())
    _no_tiff(monkeypatch)
    _same(build.tile_manifest(), got)


def test_a_read_only_build_folder_still_gets_the_manifest(build, monkeypatch):
    def refuse(path, text):
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(folder_mod, "atomic_write_text", refuse)
    _same(build.tile_manifest(), read_tile_manifest(build.load_state()["tiles"]))
    assert not build.snapshot_path.exists()


def test_a_tile_changed_after_the_check_is_caught_where_pixels_are_read(build, tmp_path):
    kept = build.tile_manifest().tiles[0]
    tifffile.imwrite(tmp_path / "raw" / "n1.tif", np.zeros((8, 8), np.uint16))
    again = build.tile_manifest().tiles[0]
    assert (again.height, again.width) == SHAPES["n1"]  # the snapshot does not reopen tiles ...
    with pytest.raises(InputError, match="shape"):      # ... read_tile does
        read_tile(again.path, again.height, again.width, dtype=again.dtype)
    assert kept == again


def test_manifest_json_round_trip_is_exact(build):
    m = read_tile_manifest(build.load_state()["tiles"])
    _same(TileManifest.from_json(json.loads(json.dumps(m.to_json()))), m)
    doc = m.to_json()
    doc["columns"]["width"][1] = "36"
    with pytest.raises(ValueError, match="'width'"):
        TileManifest.from_json(doc)
    with pytest.raises(ValueError, match="not a tile manifest"):
        TileManifest.from_json({"count": 3})


def test_a_whole_build_checks_the_manifest_once(tiny_data, tmp_path, header_calls):
    """``build`` checks the manifest before it makes the folder and keeps that check: no stage repeats it."""
    from stackbuild.cli import main

    names = sorted(t.path.stem for t in read_tile_manifest(tiny_data / "tiles.csv").tiles)
    header_calls.clear()
    assert main(["build", str(tiny_data / "tiles.csv"), "--out", str(tmp_path / "b"), "--quiet"]) == 0
    assert sorted(header_calls) == names
