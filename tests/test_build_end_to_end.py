"""The whole pipeline through the command line, on real files and real Dask worker processes."""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile
import zarr

import stackbuild
from stackbuild.cli import main


def _digest(folder: Path) -> dict[str, str]:
    """Return ``{relative path: sha256}`` of every chunk file under ``folder``."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != "zarr.json"
            and not p.name.startswith(".")}


def _small_chunks(folder: Path) -> Path:
    """Return a pipeline file with small chunks, so the tiny volume still has several levels."""
    path = folder / "small.toml"
    path.write_text("[render]\nchunk = 128\nshard = 2\n")
    return path


@pytest.fixture
def built(tiny_build):
    """The session's finished tiny build (conftest.py), with channels and 128 px chunks."""
    return tiny_build


def test_build_writes_volume_transforms_and_report(built):
    state = json.loads((built / "build.json").read_text())
    assert all(state["stages"][s]["status"] == "done" for s in ("stitch", "align", "render", "report"))
    em = zarr.open_group(str(built / "volume.zarr" / "em"), mode="r")
    assert em.attrs["ome"]["version"] == "0.5"
    level0 = em["0"]
    assert level0.shape[0] == 5  # sections 0..4, the lost one included
    assert not np.any(level0[2])  # section 2 is lost: an empty plane
    for z in (0, 1, 3, 4):  # every present section fills its own footprint: no blank tile, no hole
        ys, xs = np.nonzero(level0[z])
        box = (np.ptp(ys) + 1) * (np.ptp(xs) + 1)
        assert len(ys) > 0.9 * box and box > 0.5 * level0[z].size, z
    assert (built / "qc" / "report.html").stat().st_size > 10_000
    assert sorted(p.name for p in (built / "transforms" / "sections").iterdir()) == ["00000", "00001", "00003", "00004"]


def test_open_volume_lazy_equals_written(built):
    written = stackbuild.open_volume(built, level=1, lazy=False)
    lazy = stackbuild.open_volume(built, level=1, lazy=True)
    np.testing.assert_array_equal(written[3].compute(), lazy[3].compute())
    assert written.scale_nm[1] == 2 * 4.0  # level 1: twice the 4 nm default pixel


def test_resume_of_a_finished_build_changes_nothing(built, tiny_data):
    before = _digest(built / "volume.zarr")
    assert main(["build", str(tiny_data / "tiles.csv"), "--out", str(built), "--resume",
                 "--quiet"]) == 0
    assert _digest(built / "volume.zarr") == before


def test_refuses_existing_build_without_resume_or_overwrite(built, tiny_data, capsys):
    assert main(["build", str(tiny_data / "tiles.csv"), "--out", str(built), "--quiet"]) == 2
    assert "--resume" in capsys.readouterr().err


def test_killed_build_resumes_to_the_same_volume(built, tiny_data, tmp_path):
    out = tmp_path / "killed"
    cmd = [sys.executable, "-m", "stackbuild.cli", "build", str(tiny_data / "tiles.csv"), "--out", str(out),
           "--channels", str(tiny_data / "channels.csv"), "--config", str(_small_chunks(tmp_path)),
           "--workers", "1", "--quiet"]
    proc = subprocess.Popen(cmd, start_new_session=True)
    deadline = time.monotonic() + 120
    killed = False
    while time.monotonic() < deadline and proc.poll() is None:
        if (out / "transforms" / "sections").exists() and any((out / "transforms" / "sections").iterdir()):
            os.killpg(proc.pid, signal.SIGKILL)  # the whole process group: CLI and its Dask workers
            killed = True
            break
        time.sleep(0.05)
    proc.wait(timeout=60)
    # The kill really landed mid-build: the process died of SIGKILL and the render never finished.
    assert killed and proc.returncode == -signal.SIGKILL, proc.returncode
    stages = json.loads((out / "build.json").read_text()).get("stages", {})
    assert stages.get("render", {}).get("status") != "done", stages
    status = main(["build", str(tiny_data / "tiles.csv"), "--out", str(out), "--resume",
                   "--quiet"])
    assert status == 0
    assert _digest(out / "volume.zarr" / "em") == _digest(built / "volume.zarr" / "em")


def test_update_restitches_the_reimaged_section(built, tiny_data, tmp_path):
    work = tmp_path / "b"
    shutil.copytree(built, work)
    # Section 1 imaged again: same field of view, a brighter detector setting.
    lines = (tiny_data / "tiles.csv").read_text().splitlines()
    again = tmp_path / "again"
    rows = ["section,tile,path,x,y"]
    for line in lines[1:]:
        section, tile, path, x, y = line.split(",")
        if section != "1":
            continue
        img = tifffile.imread(tiny_data / path).astype(np.float32) * 1.15
        dst = again / f"{tile}.tif"
        dst.parent.mkdir(parents=True, exist_ok=True)
        tifffile.imwrite(dst, np.clip(img, 0, 255).astype(np.uint8))
        rows.append(f"1,{tile},{dst},{x},{y}")
    (again / "tiles.csv").write_text("\n".join(rows) + "\n")
    assert main(["update", str(work), "--tiles", str(again / "tiles.csv"), "--quiet"]) == 0
    store = stackbuild.transforms.TransformStore(work / "transforms")
    assert len(store.history("stitch", 1)) == 1 and not store.history("stitch", 0)
    new_tiles = {t.path for t in store.load_stitch(1).tiles}
    assert all(str(again) in p for p in new_tiles)
    written = stackbuild.open_volume(work, level=0, lazy=False)[1].compute()
    lazy = stackbuild.open_volume(work, level=0, lazy=True)[1].compute()
    np.testing.assert_array_equal(written, lazy)  # the re-imaged plane was rendered again
    old = stackbuild.open_volume(built, level=0, lazy=False)[1].compute()
    # ... and shows the new tiles (the canvas may grow a pixel when the section is re-placed)
    assert written[written > 0].mean() > old[old > 0].mean() * 1.05
    assert (work / "volume.zarr" / "channels").is_dir()  # marker pyramids survive a full re-render


def test_report_fail_on_sets_the_exit_status(built, capsys):
    assert main(["report", str(built), "--quiet", "--fail-on", "stitch.rms>100px"]) == 0
    assert main(["report", str(built), "--quiet", "--fail-on", "align.p95>0.001px"]) == 3
    assert "quality bar missed" in capsys.readouterr().err
    assert main(["report", str(built), "--quiet", "--fail-on", "p95 is bad"]) == 2


def test_stage_runs_on_an_existing_scheduler_from_its_file(built, tmp_path):
    # The path a Slurm run takes (dask-jobqueue workers behind a scheduler file), with local workers.
    from distributed import LocalCluster

    work = tmp_path / "b"
    shutil.copytree(built, work)
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        sched = tmp_path / "scheduler.json"
        sched.write_text(json.dumps({"address": cluster.scheduler_address}))
        assert main(["stitch", str(work), "--sections", "1", "--scheduler", str(sched), "--quiet"]) == 0
    store = stackbuild.transforms.TransformStore(work / "transforms")
    assert len(store.history("stitch", 1)) == 1  # re-stitched there; the first version kept


def test_unreachable_scheduler_is_a_clear_error(built, capsys):
    assert main(["stitch", str(built), "--scheduler", "tcp://127.0.0.1:9", "--quiet"]) == 2
    assert "cannot reach the Dask scheduler" in capsys.readouterr().err


def test_resume_with_other_settings_is_refused(built, tiny_data, capsys):
    assert main(["build", str(tiny_data / "tiles.csv"), "--out", str(built), "--resume", "--pixel-size", "5",
                 "--quiet"]) == 2
    assert "volume.pixel_size" in capsys.readouterr().err
