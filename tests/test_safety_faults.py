"""Data safety under faults (issue #15): the volume matches its transforms or says it does not,
nothing is deleted before its replacement exists, refused commands change nothing, outputs are
readable as the umask says, and every fault is one line.

The volumes are read back with zarr-python, the reference reader of zarr v3; TIFF files are
damaged by editing their tags as the TIFF 6.0 specification lays them out (ImageWidth 256,
ImageLength 257, StripOffsets 273, StripByteCounts 279: from memory of the specification).
The fault matrix these tests pin is listed in DEVELOPERS.md ("Faults").
"""
from __future__ import annotations

import hashlib
import json
import re
import shutil
import struct
import subprocess
from pathlib import Path

import numpy as np
import pytest
import tifffile
import zarr

from stackbuild.cli import main

from render_builders import SMALL, make_build


# ------------------------------------------------------------------ helpers
def _digest(folder: Path) -> dict[str, str]:
    """Return ``relative path -> sha256`` of every file under ``folder`` (hidden ones too, not the lock)."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != ".stackbuild.lock"}


def _one_line(capsys) -> str:
    """Return the only line on stderr, failing if there are more (no Dask dump, no traceback)."""
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1, err
    assert err[0].startswith("stackbuild: error: "), err
    return err[0]


@pytest.fixture
def build_copy(tiny_build, tmp_path) -> Path:
    """Return a private copy of the shared tiny build (conftest; its tiles are shared and must not be changed)."""
    dst = tmp_path / "build"
    shutil.copytree(tiny_build, dst)
    return dst


# ------------------------------------------------------- 1. volume matches its transforms
def test_stale_plane_is_listed_and_exactly_it_is_rendered_again(build_copy):
    from stackbuild.folder import BuildFolder
    from stackbuild.render.audit import audit_volume
    from stackbuild.render.fingerprint import plane_fingerprint, stale_planes
    from stackbuild.run import stages

    folder = BuildFolder(build_copy)
    assert stale_planes(folder) == []
    canvas = folder.store.load_canvas()
    z = max(folder.store.sections_with("channels")) - canvas.first_section  # a section with a marker image
    path = folder.store.section_dir(canvas.first_section + z) / "align.json"
    env = json.loads(path.read_text())
    for t in env["record"]["transforms"]["transformations"]:
        if t["type"] == "affine":
            t["affine"][0][2] += 1.5  # the section moves by 1.5 px: its planes no longer match
    path.write_text(json.dumps(env))
    before = plane_fingerprint(folder, z)
    name = _channel(build_copy)
    assert stale_planes(folder) == [z] and stale_planes(folder, name) == [z]
    found = audit_volume(folder, pixels=False)
    assert [(f.pyramid, f.plane, f.kind) for f in found.findings] == [("em", z, "stale"),
                                                                     (f"channels/{name}", z, "stale")]
    em0 = zarr.open_array(str(build_copy / "volume.zarr" / "em" / "0"), mode="r")[...]
    assert stages.render_stage(folder, resume=True)["planes"] == [z]  # exactly the stale plane
    assert stages.render_channels_stage(folder)["channels"][name]["planes"] == [z]
    after = zarr.open_array(str(build_copy / "volume.zarr" / "em" / "0"), mode="r")[...]
    others = [k for k in range(after.shape[0]) if k != z]
    np.testing.assert_array_equal(after[others], em0[others])  # zarr-python reads both
    assert not np.array_equal(after[z], em0[z])
    assert plane_fingerprint(folder, z) not in (None, before)
    assert audit_volume(folder).ok


def _channel(build: Path) -> str:
    return sorted(p.name for p in (build / "volume.zarr" / "channels").iterdir() if p.is_dir())[0]


def test_corrupted_chunk_is_named_by_audit_and_repaired_by_render_resume(build_copy, capsys):
    from stackbuild.folder import BuildFolder
    from stackbuild.render.audit import audit_volume
    from stackbuild.run import stages

    level0 = build_copy / "volume.zarr" / "em" / "0"
    good = zarr.open_array(str(level0), mode="r")[...]
    chunk = sorted(p for p in level0.rglob("*") if p.is_file() and p.name != "zarr.json")[2]
    z = int(chunk.relative_to(level0).parts[1])  # zarr v3 default chunk keys: c/<z>/<y>/<x>
    data = bytearray(chunk.read_bytes())
    data[len(data) // 2: len(data) // 2 + 64] = bytes(64)  # zero 64 bytes in the middle
    chunk.write_bytes(bytes(data))
    with pytest.raises(Exception):  # zarr-python, the reference reader, cannot decode it
        zarr.open_array(str(level0), mode="r")[z]
    capsys.readouterr()
    assert main(["audit", str(build_copy), "--quiet"]) == 4
    out = capsys.readouterr().out
    assert re.search(rf"damaged: volume.zarr/em plane {z}: volume.zarr/em/0 chunk \(plane {z}, row \d+, col \d+\) "
                     "cannot be decoded", out), out
    folder = BuildFolder(build_copy)
    assert stages.render_stage(folder, resume=True)["planes"] == [z]  # what 'render --resume' runs
    np.testing.assert_array_equal(zarr.open_array(str(level0), mode="r")[...], good)
    assert audit_volume(folder).ok


def test_reading_a_corrupted_chunk_names_array_plane_and_chunk(build_copy):
    from stackbuild.errors import InputError
    from stackbuild.render.audit import CheckedArray

    level0 = build_copy / "volume.zarr" / "em" / "0"
    chunk = sorted(p for p in level0.rglob("*") if p.is_file() and p.name != "zarr.json")[1]
    z = int(chunk.relative_to(level0).parts[1])
    chunk.write_bytes(chunk.read_bytes()[:40])  # truncated chunk
    arr = CheckedArray(zarr.open_array(str(level0), mode="r"), "volume.zarr/em/0")
    with pytest.raises(InputError, match=rf"volume.zarr/em/0: chunk \(plane {z}, row \d+, col \d+\) cannot be decoded"):
        arr[:, :, :]


# ------------------------------------------------------- 2. never delete before the replacement exists
def test_overwrite_with_a_tile_gone_leaves_the_old_volume_byte_identical(tmp_path, capsys):
    from stackbuild.run import stages

    folder = make_build(tmp_path, n_sections=3, settings=SMALL)
    stages.render_stage(folder)  # what 'render' runs, without starting a cluster
    before = _digest(folder.root)
    (tmp_path / "raw" / "s1_r1_c0.tif").unlink()
    capsys.readouterr()
    assert main(["render", str(folder.root), "--overwrite", "--quiet"]) == 2
    line = _one_line(capsys)
    assert "s1_r1_c0.tif" in line
    assert _digest(folder.root) == before  # volume, records and build.json untouched


def test_render_with_a_marker_image_gone_is_refused_before_the_em_is_touched(build_copy, capsys):
    # Before: the EM was rendered again and swapped in, then the marker pyramid refused (exit 2, folder changed).
    record = sorted((build_copy / "transforms" / "sections").glob("*/channels.json"))[-1]
    env = json.loads(record.read_text())
    for rec in env["record"]["channels"].values():  # the record names an image that is gone (shared data kept)
        rec["path"] = str(build_copy.parent / "gone" / "marker.tif")
    record.write_text(json.dumps(env))
    before = _digest(build_copy)
    capsys.readouterr()
    assert main(["render", str(build_copy), "--overwrite", "--quiet"]) == 2
    assert "marker.tif" in _one_line(capsys)
    assert _digest(build_copy) == before  # EM, markers, records and build.json untouched


def test_overwrite_failing_mid_render_leaves_the_old_volume_byte_identical(tmp_path, monkeypatch):
    from stackbuild.render import pyramid
    from stackbuild.render.write import render_volume

    folder = make_build(tmp_path, n_sections=3, settings=SMALL)
    render_volume(folder.root, SMALL)
    before = _digest(folder.volume_path)
    real = pyramid.render_block

    def failing(plan, z, *args):  # a tile that breaks after every check has passed
        if z == 2:
            raise OSError("simulated read failure")
        return real(plan, z, *args)

    monkeypatch.setattr(pyramid, "render_block", failing)
    with pytest.raises(OSError, match="simulated"):
        render_volume(folder.root, SMALL, overwrite=True)
    assert _digest(folder.volume_path) == before
    monkeypatch.setattr(pyramid, "render_block", real)
    render_volume(folder.root, SMALL, overwrite=True)  # the next try cleans up and swaps in
    assert not folder.incoming_dir.exists()
    assert _digest(folder.volume_path).keys() == before.keys()


# ------------------------------------------------------- 3. refused commands change nothing
def test_refused_render_leaves_build_json_and_build_resume_succeeds(build_copy, tiny_data, capsys):
    state = (build_copy / "build.json").read_bytes()
    capsys.readouterr()
    assert main(["render", str(build_copy), "--quiet"]) == 2  # finished and matching: refused
    line = _one_line(capsys)
    assert "--overwrite" in line and "overwrite=" not in line  # flags as the user types them
    assert (build_copy / "build.json").read_bytes() == state
    from stackbuild.errors import InputError
    from stackbuild.folder import BuildFolder
    from stackbuild.run import stages

    with pytest.raises(InputError, match="--overwrite"):  # the stage itself, as update and build call it
        stages.render_stage(BuildFolder(build_copy))
    assert (build_copy / "build.json").read_bytes() == state
    assert main(["render", str(build_copy), "--planes", "99", "--quiet"]) == 2
    assert "--planes" in _one_line(capsys)
    assert (build_copy / "build.json").read_bytes() == state
    assert main(["report", str(build_copy), "--fail-on", "nonsense>>", "--quiet"]) == 2
    assert (build_copy / "build.json").read_bytes() == state
    assert main(["build", str(tiny_data / "tiles.csv"), "--out", str(build_copy), "--resume",
                 "--quiet"]) == 0


def test_refused_stage_leaves_build_json_unchanged(tiny_data, tmp_path):
    from stackbuild.errors import InputError
    from stackbuild.run import stages
    from stackbuild.run.cluster import serial_mapper
    from stackbuild.run.start import start_build

    build = start_build(tmp_path / "b", tiny_data / "tiles.csv", channels=tiny_data / "channels.csv")
    state = build.state_path.read_bytes()
    for stage in (stages.align_stage, stages.channels_stage):  # nothing stitched yet: refused
        with pytest.raises(InputError, match="stitch"):
            stage(build, serial_mapper())
        assert build.state_path.read_bytes() == state


# ------------------------------------------------------- 4. file modes
def test_every_output_is_readable_as_umask_022_says(tiny_build):
    from stackbuild.transforms.store import file_mode

    if file_mode() != 0o644:
        pytest.skip("the shared build was made under another umask than 022")
    # POSIX open(2)/mkdir(2): a new file gets 0666 & ~umask, a folder 0777 & ~umask (from memory).
    bad = []
    for p in [tiny_build, *tiny_build.rglob("*")]:
        mode = p.stat().st_mode & 0o777
        want = 0o755 if p.is_dir() else 0o644
        if mode != want:
            bad.append(f"{p.relative_to(tiny_build)} {oct(mode)}")
    assert not bad, bad[:10]


# ------------------------------------------------------- 6. physical scale never silent
def test_assumed_scale_is_said_and_recorded(tiny_build, tiny_data, tmp_path, capsys):
    from stackbuild.cli import _say_assumed_scale
    from stackbuild.folder import BuildFolder
    from stackbuild.run.start import start_build

    assert json.loads((tiny_build / "build.json").read_text())["assumed_scale"] == \
        {"pixel_size": 4.0, "section_thickness": 40.0}
    capsys.readouterr()
    _say_assumed_scale(BuildFolder(tiny_build))
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "assumed pixel size 4 nm and section thickness 40 nm" in err[0]
    assert "physical scale assumed, not given: pixel size 4 nm and section thickness 40 nm" in \
        (tiny_build / "qc" / "report.html").read_text()
    assert "--pixel-size NM and --section-thickness NM" in err[0]
    given = start_build(tmp_path / "b", tiny_data / "tiles.csv", pixel_size=5.0)
    assert given.load_state()["assumed_scale"] == {"section_thickness": 40.0}
    config = tmp_path / "scale.toml"
    config.write_text("[volume]\npixel_size = 5.0\nsection_thickness = 50.0\n")
    both = start_build(tmp_path / "c", tiny_data / "tiles.csv", config=config)
    assert "assumed_scale" not in both.load_state()


# ------------------------------------------------------- 5. one line per fault
def _patch_tags(path: Path, values: dict[int, int]) -> None:
    """Overwrite the values of classic little-endian TIFF tags in the first IFD (TIFF 6.0 layout)."""
    b = bytearray(path.read_bytes())
    assert b[:4] == b"II*\0"
    ifd = struct.unpack("<I", b[4:8])[0]
    for i in range(struct.unpack("<H", b[ifd:ifd + 2])[0]):
        e = ifd + 2 + 12 * i
        tag, kind = struct.unpack("<HH", b[e:e + 4])
        if tag in values:
            fmt = "<H" if kind == 3 else "<I"
            b[e + 8:e + 8 + struct.calcsize(fmt)] = struct.pack(fmt, values[tag])
    path.write_bytes(bytes(b))


@pytest.mark.parametrize("damage", ["truncated", "huge_header", "short_data"])
def test_damaged_tiff_is_refused_with_one_line_and_nothing_written(tmp_path, damage, capsys):
    rng = np.random.default_rng(5)
    rows = ["section,tile,path,x,y"]
    for s in range(2):
        for j in range(2):
            p = tmp_path / f"t{s}{j}.tif"
            tifffile.imwrite(p, rng.integers(0, 255, (128, 128), dtype=np.uint8))
            rows.append(f"{s},t{j},{p},{j * 110},0")
    (tmp_path / "tiles.csv").write_text("\n".join(rows) + "\n")
    bad = tmp_path / "t11.tif"
    if damage == "truncated":
        bad.write_bytes(bad.read_bytes()[:5000])
    elif damage == "huge_header":  # 60000 x 60000 claimed by a 128 x 128 file: 3.6 Gpx
        _patch_tags(bad, {256: 60000, 257: 60000})
    else:  # 1000 x 1000 claimed (under the pixel limit), 16 kB of uncompressed pixels stored
        _patch_tags(bad, {256: 1000, 257: 1000, 278: 1000})
    out = tmp_path / "out"
    assert main(["build", str(tmp_path / "tiles.csv"), "--out", str(out), "--quiet"]) == 2
    line = _one_line(capsys)
    assert f"{tmp_path / 'tiles.csv'}:5" in line and "t11.tif" in line
    assert {"truncated": "is truncated", "huge_header": "more than the limit",
            "short_data": "bytes of pixel data"}[damage] in line
    assert not out.exists()


def test_absurd_but_finite_affine_is_refused_when_read(build_copy, capsys):
    path = build_copy / "transforms" / "sections" / "00001" / "align.json"
    env = json.loads(path.read_text())
    for t in env["record"]["transforms"]["transformations"]:
        if t["type"] == "affine":
            t["affine"][0][0] = 1e12
    path.write_text(json.dumps(env))
    before = _digest(build_copy / "volume.zarr")
    capsys.readouterr()
    assert main(["render", str(build_copy), "--resume", "--quiet"]) == 2
    line = _one_line(capsys)
    assert "align.json" in line and "section 1" in line and "1e+12" in line
    assert _digest(build_copy / "volume.zarr") == before


@pytest.fixture
def small_disk(tmp_path):
    """Yield a 600 kB tmpfs (smaller than the volume below needs); skip where it cannot be mounted."""
    mnt = tmp_path / "disk"
    mnt.mkdir()
    try:
        subprocess.run(["mount", "-t", "tmpfs", "-o", "size=600k", "tmpfs", str(mnt)], check=True,
                       capture_output=True, timeout=20)
    except (OSError, subprocess.SubprocessError):
        pytest.skip("cannot mount a tmpfs here (needs root)")
    yield mnt
    subprocess.run(["umount", "-l", str(mnt)], capture_output=True, timeout=20)


def test_disk_full_is_one_line_and_resume_completes_once_space_is_freed(small_disk, tmp_path, capsys):
    from stackbuild.render.settings import RenderSettings
    from stackbuild.render.write import render_volume

    raw = RenderSettings(chunk=64, shard=2, codec="none")  # uncompressed: about 1.3 MB of volume
    folder = make_build(tmp_path / "src", n_sections=6, tile=(192, 192), overlap=16, settings=raw)
    out = small_disk / "build"
    shutil.copytree(folder.root, out)  # the build folder on the small disk, its tiles elsewhere
    capsys.readouterr()
    assert main(["render", str(out), "--quiet"]) == 1
    line = _one_line(capsys)
    assert f"no space left on the file system holding {out}" in line and "--resume" in line
    subprocess.run(["mount", "-o", "remount,size=20m", str(small_disk)], check=True, timeout=20)
    from stackbuild.folder import BuildFolder
    from stackbuild.render.audit import audit_volume
    from stackbuild.run import stages

    stages.render_stage(BuildFolder(out), resume=True)  # what 'render --resume' runs
    assert audit_volume(BuildFolder(out)).ok
    render_volume(folder.root, raw)  # the same volume rendered where there is room
    for n in range(3):
        np.testing.assert_array_equal(zarr.open_array(str(out / "volume.zarr" / "em" / str(n)), mode="r")[...],
                                      zarr.open_array(str(folder.volume_path / "em" / str(n)), mode="r")[...])


def test_a_lost_worker_is_one_warning_line(caplog):
    import time

    from stackbuild.run.cluster import WorkerWatch

    class Scheduler:  # a worker is replaced between two looks, as a nanny restarts a killed one
        looks = 0

        def scheduler_info(self):
            self.looks += 1
            return {"workers": {"tcp://a": {}, "tcp://b": {}} if self.looks < 3 else {"tcp://a": {}, "tcp://c": {}}}

    with caplog.at_level("WARNING", logger="stackbuild.run.cluster"):
        watch = WorkerWatch(Scheduler(), every=0.01)
        time.sleep(0.3)
        watch.stop()
    assert watch.lost == ["tcp://b"]
    lines = [r.getMessage() for r in caplog.records]
    assert len(lines) == 1 and "tcp://b left or was lost" in lines[0]
