"""``update``: re-imaged tiles and appended sections rewrite only what changes, as a transaction.

Ground truth for "what changed" is the build itself: a volume rendered from scratch
through the updated transforms (the lazy renderer) and the shard files before the
update (bytes and modification times). The OME-Zarr check uses the specification
0.5 through the ome-zarr-models package.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile
import zarr

import stackbuild
from stackbuild.cli import main

#: Longer cases (append, rollback, kills at align and channels) run with STACKBUILD_SLOW_TESTS=1.
slow = pytest.mark.skipif(not os.environ.get("STACKBUILD_SLOW_TESTS"),
                          reason="slow: set STACKBUILD_SLOW_TESTS=1 to run")

def _files(em: Path) -> dict[str, tuple[str, int]]:
    """Return ``{level/c/z/row/col: (sha256, mtime_ns)}`` of every stored chunk under ``em``."""
    return {str(p.relative_to(em)): (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
            for p in sorted(em.glob("*/c/**/*")) if p.is_file()}


def _reimaged(data: Path, out: Path, section: int, tiles: list[str], *, size=None) -> Path:
    """Write an update manifest: ``tiles`` of ``section`` imaged again (new noise, stage read 1-2 px off)."""
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(3)
    rows = ["section,tile,path,x,y"]
    for line in (data / "tiles.csv").read_text().splitlines()[1:]:
        s, t, p, x, y = line.split(",")
        if int(s) != section or t not in tiles:
            continue
        img = tifffile.imread(data / p).astype(np.float32)
        img = np.clip(img + rng.normal(0, 4, img.shape), 0, 255).astype(np.uint8)
        if size is not None:
            img = np.zeros(size, np.uint8) + img[: size[0], : size[1]].mean().astype(np.uint8)
        dst = out / f"{s}_{t}.tif"
        tifffile.imwrite(dst, img)
        rows.append(f"{s},{t},{dst},{float(x) + 1.5},{float(y) - 2.0}")
    (out / "tiles.csv").write_text("\n".join(rows) + "\n")
    return out / "tiles.csv"


@pytest.fixture(scope="module")
def updated(grid_build, grid_data, tmp_path_factory) -> tuple[Path, Path]:
    work = tmp_path_factory.mktemp("u") / "b"
    shutil.copytree(grid_build, work)
    manifest = _reimaged(grid_data, work.parent / "again", 3, ["r0c0", "r0c1"])
    assert main(["update", str(work), "--tiles", str(manifest), "--quiet"]) == 0
    return work, manifest


def _copy(src: Path, tmp_path: Path) -> Path:
    dst = tmp_path / "b"
    shutil.copytree(src, dst)
    return dst


def _tree(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != ".stackbuild.lock"}


# ------------------------------------------------------------------- 2 tiles
def test_two_replaced_tiles_rewrite_only_their_shards(grid_build, updated):
    work, _ = updated
    before, after = _files(grid_build / "volume.zarr" / "em"), _files(work / "volume.zarr" / "em")
    plan = json.loads((work / "updates" / "0001" / "plan.json").read_text())
    assert plan["status"] == "done" and plan["replaced"] == {"3": ["r0c0", "r0c1"]}
    dirty = {int(z): {tuple(int(v) for v in p.split(",")) for p in shards}
             for z, shards in plan["render"]["shards"].items()}
    assert set(dirty) == {3}  # plane = section here; untouched sections are held
    realigned = plan["facts"]["align"]["realigned"]
    assert set(realigned) <= {3}
    assert plan["facts"]["ran"] == "in this process"  # 2 tiles: no cluster is started
    # Only the pairs of the two re-imaged tiles are registered again; the other pairs keep their stored results.
    stitch = plan["facts"]["stitch"]
    assert stitch["pairs"] + stitch["pairs_kept"] == 20 and 0 < stitch["pairs"] < 20, stitch
    # The re-imaged tiles show their old content where it was (fresh noise only), so the section keeps
    # its alignment without a re-solve: no window of sections is solved again.
    checked = plan["facts"]["align"]["checked"]["3"]
    assert checked["kept_without_solve"] and plan["facts"]["align"]["window"] == [], checked
    assert all(t["blocks"] > 0 and t["max_shift_px"] <= 0.5 for t in checked["tiles"].values())
    # The report measures the re-imaged section again and keeps the untouched sections' measurements.
    assert plan["facts"]["report"]["sections_reused"] >= 3, plan["facts"]["report"]
    # ... and the probe measures again only the plane pairs within its reach of plane 3.
    assert plan["facts"]["report"]["pairs_measured"] > 0 and plan["facts"]["report"]["pairs_reused"] > 0, \
        plan["facts"]["report"]
    changed = {k for k in before.keys() | after.keys() if before.get(k) != after.get(k)}  # all-zero chunks are not stored
    for key in changed:  # level/c/z/row/col
        level, _, z, i, j = key.split(os.sep)
        assert int(z) in dirty, key  # no chunk of another section was touched (bytes or mtime)
        if level == "0":
            assert (int(i), int(j)) in dirty[int(z)], key
    if realigned:  # the re-solve moved the section beyond the tolerance: its whole plane is dirty
        return
    # The section kept its alignment, so only the re-imaged tiles (top row) and the tiles they overlap
    # (middle row) can change: every chunk wholly below the middle row keeps its bytes and mtime.
    store = stackbuild.transforms.TransformStore(work / "transforms")
    canvas, st, al = store.load_canvas(), store.load_stitch(3), store.load_alignment(3)
    corners = [(t.x + dx, t.y + dy) for t in st.tiles if t.tile[:2] in ("r0", "r1")
               for dx in (-0.5, t.width - 0.5) for dy in (-0.5, t.height - 0.5)]
    below = al.section_to_aligned(np.array(corners))[:, 1].max() - canvas.origin_y + 2  # bilinear reach
    from stackbuild.folder import BuildFolder

    render = BuildFolder(work).config.render
    shard_px = render.chunk * render.shard
    far = {k for k in before if k.split(os.sep)[:3] == ["0", "c", "3"] and int(k.split(os.sep)[3]) * shard_px > below}
    assert far and not far & changed


def test_update_equals_a_render_from_scratch_of_the_new_transforms(updated):
    work, _ = updated
    for level in (0, 2):
        written = stackbuild.open_volume(work, level=level, lazy=False)[3].compute()
        fresh = stackbuild.open_volume(work, level=level, lazy=True)[3].compute()
        np.testing.assert_array_equal(written, fresh)


def test_an_update_within_the_canvas_never_imports_zarr(grid_build, updated, tmp_path):
    # An update of a few tiles writes its shards, record arrays and nothing of the metadata through the
    # project's own writers (byte-for-byte against zarr-python's files: test_render_codec,
    # test_transforms_store), so it never imports zarr-python (about 0.2 s of each update's CPU, issue 17).
    work = _copy(grid_build, tmp_path)
    code = ("import sys; from stackbuild.cli import main; "
            "rc = main(['update', sys.argv[1], '--tiles', sys.argv[2], '--quiet']); print(rc, 'zarr' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code, str(work), str(updated[1])], capture_output=True, text=True,
                         cwd=tmp_path)
    assert out.stdout.split()[-2:] == ["0", "False"], out.stdout + out.stderr
    np.testing.assert_array_equal(stackbuild.open_volume(work, level=0, lazy=False)[3].compute(),
                                  stackbuild.open_volume(updated[0], level=0, lazy=False)[3].compute())


def test_every_changed_pixel_lies_in_the_boxes_the_report_is_told(grid_build, updated):
    """The report re-measures only inside the pixel boxes the update hands it: no pixel outside changed.

    Ground truth: the plane before the update (the build) and after it, every written level; a
    level-k pixel covers 2**k level-0 px (the pyramid's 2 x 2 reduction).
    """
    work, _ = updated
    plan = json.loads((work / "updates" / "0001" / "plan.json").read_text())
    boxes = plan["render"]["pixels"]["3"]
    width, height = plan["render"]["canvas"]["width"], plan["render"]["canvas"]["height"]
    assert sum((x1 - x0) * (y1 - y0) for x0, y0, x1, y1 in boxes) < width * height / 2, boxes  # 2 tiles of 9
    for level in (0, 1, 2):
        f = 2 ** level
        old = zarr.open_array(str(grid_build / "volume.zarr" / "em" / str(level)), mode="r")[3]
        new = zarr.open_array(str(work / "volume.zarr" / "em" / str(level)), mode="r")[3]
        inside = np.zeros(old.shape, bool)
        for x0, y0, x1, y1 in boxes:
            inside[y0 // f:-(-y1 // f), x0 // f:-(-x1 // f)] = True
        changed = old != new
        assert changed.any() and not (changed & ~inside).any(), level


def test_the_updates_report_gives_the_numbers_of_a_full_report(updated, tmp_path):
    """The update's report, told where planes changed, against a full report (reuse=False) of the same volume.

    Kept blocks may differ from re-measured ones in the last float32 bits (pocketfft's batches), so
    the estimates are compared to 1e-4 px (the stored shifts have 4 decimals).
    """
    from stackbuild.folder import BuildFolder
    from stackbuild.qc.metrics import collect

    work = _copy(updated[0], tmp_path)
    told = json.loads((work / "qc" / "metrics.json").read_text())
    full, _ = collect(work, BuildFolder(work).config.report, reuse=False)
    assert len(full["sections"]) == len(told["sections"]) == 5
    for a, b in zip(full["sections"], told["sections"]):
        assert a["section"] == b["section"]
        pairs = [(k, a[k], b[k]) for k in ("align_error_px", "align_error_max_px", "jitter_px")]
        pairs += [(f"motion_prev.{m}", (a["motion_prev"] or {}).get(m), (b["motion_prev"] or {}).get(m))
                  for m in ("median", "p95")]
        for key, x, y in pairs:
            assert (x is None) == (y is None) and (x is None or x == pytest.approx(y, abs=1e-4)), (a["section"], key)


def test_kept_manifest_equals_a_full_check_of_the_merged_csv(updated):
    """The update keeps the merged manifest made from the two checked ones; checking its CSV from scratch agrees."""
    from stackbuild.folder import BuildFolder
    from stackbuild.manifest import read_tile_manifest

    work, _ = updated
    build = BuildFolder(work)
    kept, fresh = build.tile_manifest(), read_tile_manifest(json.loads((work / "build.json").read_text())["tiles"])
    assert kept.source == fresh.source and kept.tiles == fresh.tiles and kept.files == fresh.files
    assert {t.tile for t in kept.tiles if t.section == 3 and "again" in str(t.path)} == {"r0c0", "r0c1"}


def test_a_new_row_reusing_another_tiles_file_is_refused_before_anything_is_written(grid_build, grid_data, tmp_path,
                                                                                      capsys):
    work = _copy(grid_build, tmp_path)
    before = _tree(work)
    line = next(ln for ln in (grid_data / "first.csv").read_text().splitlines()[1:] if ln.startswith("3,"))
    s, t, p, x, y = line.split(",")
    other = "r2c2" if t != "r2c2" else "r0c0"
    (tmp_path / "dup.csv").write_text(f"section,tile,path,x,y\n3,{other},{grid_data / p},{x},{y}\n")
    assert main(["update", str(work), "--tiles", str(tmp_path / "dup.csv"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "is already tile" in err[0], err
    assert _tree(work) == before


@pytest.mark.parametrize("shift", [(0.0, 0.0), (900.0, 40.0), (-700.0, -300.0)])
def test_canvas_from_the_changed_sections_equals_the_canvas_of_every_section(updated, tmp_path, shift):
    """The update reads only changed sections for its canvas; the whole-stack canvas is the reference.

    A section moved past the canvas's high edge must grow it, one moved past its low edge must move
    its origin (every plane rendered again), exactly as compute_canvas over every section says.
    """
    import dataclasses

    from stackbuild.folder import BuildFolder
    from stackbuild.render.canvas import compute_canvas, settle_canvas
    from stackbuild.run.update_plan import UpdatePlan
    from stackbuild.run.update_render import _settled_canvas
    from stackbuild.transforms.records import Canvas

    work = _copy(updated[0], tmp_path)
    build = BuildFolder(work)
    plan = UpdatePlan.from_json(json.loads((work / "updates" / "0001" / "plan.json").read_text()), work)
    st, al = build.store.load_stitch(3), build.store.load_alignment(3)
    moved = dataclasses.replace(st, tiles=[dataclasses.replace(t, x=t.x + shift[0], y=t.y + shift[1]) for t in st.tiles])
    build.store.save_stitch(moved)
    render = build.config.render
    block, vol, manifest = render.chunk * render.shard, build.config.volume, build.tile_manifest()
    previous = Canvas.from_json(plan.canvas_before)
    want = settle_canvas(previous, compute_canvas(build.store, manifest.sections, manifest.lost_sections,
                                                  vol.pixel_size, vol.section_thickness), shard=block, chunk=render.chunk)
    got = _settled_canvas(build, plan, {3: (moved, al)}, block, render.chunk)
    assert got[0].to_json() == want[0].to_json() and got[1] == want[1]
    assert (got[1]["grew"][0] > 0) == (shift[0] > 0) and any(got[1]["moved"]) == (shift[0] < 0)


def test_updated_volume_is_still_ome_zarr_0_5(updated):
    from ome_zarr_models.v05.image import Image

    work, _ = updated
    # Standard: OME-Zarr specification 0.5, validated by the ome-zarr-models package (v05.Image).
    image = Image.from_zarr(zarr.open_group(str(work / "volume.zarr" / "em"), mode="r"))
    assert len(image.attributes.ome.multiscales[0].datasets) >= 3


class _StoppedAfterAlign(Exception):
    pass


def test_a_tile_whose_content_changed_has_its_section_solved_again(grid_build, grid_data, tmp_path, monkeypatch):
    # A tile that was out of focus before (here: the new one is, a Gaussian blur of 5 px from
    # scipy.ndimage) no longer shows the old content, so the update cannot keep the alignment on
    # the strength of the pixels: it solves the window around the section again.
    from scipy import ndimage

    from stackbuild.folder import BuildFolder
    from stackbuild.run import update
    from stackbuild.run.update import update_build

    work = _copy(grid_build, tmp_path)
    manifest = _reimaged(grid_data, tmp_path / "again", 3, ["r1c1"])
    path = Path(manifest.read_text().splitlines()[1].split(",")[2])
    tifffile.imwrite(path, ndimage.gaussian_filter(tifffile.imread(path).astype(np.float32), 5).astype(np.uint8))
    # The decision is the align step's and is recorded when that step finishes; the update is stopped at
    # the next step (its channels step fails), so the render and the report, which other tests cover, are
    # not paid for here.
    def stop(step):
        if step == "channels":
            raise _StoppedAfterAlign

    monkeypatch.setattr(update, "killed_here", stop)
    with pytest.raises(_StoppedAfterAlign):
        update_build(BuildFolder(work), manifest, show_progress=False)
    plan = json.loads((work / "updates" / "0001" / "plan.json").read_text())
    assert plan["status"] == "aligned"
    checked = plan["facts"]["align"]["checked"]["3"]
    assert not checked["kept_without_solve"] and "content changed" in checked["why"], checked
    assert 3 in plan["facts"]["align"]["window"]


@slow
def test_a_tile_imaged_again_in_place_is_taken_up(grid_build, grid_data, tmp_path):
    # The same path, new pixels: the manifest's size and modification time tell the update, which
    # renders the tile's footprint again although its placement is unchanged.
    work = _copy(grid_build, tmp_path)
    manifest = _reimaged(grid_data, tmp_path / "again", 3, ["r2c2"])
    assert main(["update", str(work), "--tiles", str(manifest), "--quiet"]) == 0
    path = Path(manifest.read_text().splitlines()[1].split(",")[2])
    img = tifffile.imread(path)
    tifffile.imwrite(path, np.clip(img.astype(np.int16) + 9, 0, 255).astype(np.uint8))  # brighter, same size
    os.utime(path, ns=(path.stat().st_atime_ns, path.stat().st_mtime_ns + 10**9))
    assert main(["update", str(work), "--tiles", str(manifest), "--quiet"]) == 0
    plan = json.loads((work / "updates" / "0002" / "plan.json").read_text())
    assert plan["replaced"] == {"3": ["r2c2"]} and plan["render"]["shards"].get("3")
    written = stackbuild.open_volume(work, level=0, lazy=False)[3].compute()
    np.testing.assert_array_equal(written, stackbuild.open_volume(work, level=0, lazy=True)[3].compute())


def test_dry_run_lists_dirty_shards_and_writes_nothing(grid_build, grid_data, tmp_path, capsys):
    work = _copy(grid_build, tmp_path)
    manifest = _reimaged(grid_data, tmp_path / "again", 3, ["r2c2"])
    before = _tree(work)
    assert main(["update", str(work), "--tiles", str(manifest), "--dry-run", "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "section 3: tiles r2c2" in out and "plane 3: level-0 shards" in out
    # A corner tile of 3 x 3 overlaps 3 tiles (2 edges, 1 corner): only those 4 tiles are read again.
    assert "would run in this process (1 tile(s) replaced or added, 4 tile(s) read to register their pairs again)" in out
    assert _tree(work) == before


def test_unknown_section_without_append_is_refused_and_nothing_changes(grid_build, grid_data, tmp_path, capsys):
    work = _copy(grid_build, tmp_path)
    before = _tree(work)
    assert main(["update", str(work), "--tiles", str(grid_data / "later.csv"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--append" in err[0] and "later.csv" in err[0]
    assert _tree(work) == before


def test_tiles_of_another_size_are_refused(grid_build, grid_data, tmp_path, capsys):
    work = _copy(grid_build, tmp_path)
    manifest = _reimaged(grid_data, tmp_path / "big", 3, ["r1c1"], size=(96, 96))
    before = _tree(work)
    assert main(["update", str(work), "--tiles", str(manifest), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "pixel_size" in err[0] and "96 x 96" in err[0]
    assert _tree(work) == before


# -------------------------------------------------------------- kill, rerun
def test_update_killed_in_render_then_run_again_is_byte_identical(grid_build, grid_data, updated, tmp_path,
                                                                  capsys):
    work = _copy(grid_build, tmp_path)
    _, manifest = updated
    cmd = [sys.executable, "-m", "stackbuild.cli", "update", str(work), "--tiles", str(manifest), "--quiet"]
    env = {**os.environ, "STACKBUILD_UPDATE_KILL": "render"}
    proc = subprocess.run(cmd, env=env, start_new_session=True, timeout=300)
    assert proc.returncode == -signal.SIGKILL
    plan = json.loads((work / "updates" / "0001" / "plan.json").read_text())
    assert plan["status"] == "registered" and plan["render"] is not None  # killed inside the render step
    # Another update is refused while this one is unfinished, and changes nothing.
    other = _reimaged(grid_data, tmp_path / "other", 4, ["r0c0"])
    state = (work / "build.json").read_bytes()
    assert main(["update", str(work), "--tiles", str(other), "--quiet"]) == 2
    assert "--resume" in capsys.readouterr().err and (work / "build.json").read_bytes() == state
    # The same update again finishes the plan; a missed --fail-on bar gives status 3.
    assert main(["update", str(work), "--tiles", str(manifest), "--fail-on", "align.p95>0.001px",
                 "--quiet"]) == 3
    out = capsys.readouterr()
    assert "report: FAILED" in out.out and "quality bar missed" in out.err
    done, reference = updated[0] / "volume.zarr" / "em", work / "volume.zarr" / "em"
    assert {k: v[0] for k, v in _files(done).items()} == {k: v[0] for k, v in _files(reference).items()}


@slow
@pytest.mark.parametrize("step", ["align", "channels"])
def test_update_killed_in_align_or_channels_then_run_again_is_byte_identical(grid_build, updated, tmp_path,
                                                                            step):
    work = _copy(grid_build, tmp_path)
    _, manifest = updated
    cmd = [sys.executable, "-m", "stackbuild.cli", "update", str(work), "--tiles", str(manifest), "--quiet"]
    proc = subprocess.run(cmd, env={**os.environ, "STACKBUILD_UPDATE_KILL": step}, start_new_session=True,
                          timeout=300)
    assert proc.returncode == -signal.SIGKILL
    assert main(["update", str(work), "--resume", "--quiet"]) == 0
    done, reference = updated[0] / "volume.zarr" / "em", work / "volume.zarr" / "em"
    assert {k: v[0] for k, v in _files(done).items()} == {k: v[0] for k, v in _files(reference).items()}


# ------------------------------------------------------------------ rollback
@slow
def test_rollback_restores_the_volume_and_the_records(grid_build, updated, tmp_path, capsys):
    work = _copy(updated[0], tmp_path)
    assert main(["update", str(work), "--rollback", "--quiet"]) == 0
    assert "rolled back" in capsys.readouterr().out
    before, after = _files(grid_build / "volume.zarr" / "em"), _files(work / "volume.zarr" / "em")
    assert {k: v[0] for k, v in after.items()} == {k: v[0] for k, v in before.items()}
    state = json.loads((work / "build.json").read_text())
    assert state["tiles"] == json.loads((grid_build / "build.json").read_text())["tiles"]
    store, old = stackbuild.transforms.TransformStore(work / "transforms"), \
        stackbuild.transforms.TransformStore(grid_build / "transforms")
    assert [t.path for t in store.load_stitch(3).tiles] == [t.path for t in old.load_stitch(3).tiles]


# -------------------------------------------------------------------- append
@slow
def test_appending_sections_keeps_existing_planes(grid_build, grid_data, tmp_path, capsys):
    work = _copy(grid_build, tmp_path)
    before = _files(work / "volume.zarr" / "em")
    assert main(["update", str(work), "--tiles", str(grid_data / "later.csv"), "--append", "--quiet"]) == 0
    plan = json.loads((work / "updates" / "0001" / "plan.json").read_text())
    assert plan["added"] == [5, 6]
    assert plan["facts"]["ran"] == "in this process"  # two small sections: sooner than starting workers
    after = _files(work / "volume.zarr" / "em")
    assert set(plan["facts"]["align"]["realigned"]) <= {5, 6}  # only the new sections: existing ones are held
    assert all(after.get(key) == value for key, value in before.items())  # bytes and modification times
    vol = stackbuild.open_volume(work, level=0, lazy=False)
    assert vol.shape[0] == 7 and np.count_nonzero(vol[6].compute()) > 0
