"""``build --overwrite`` never deletes the old build before its replacement is complete (issue #15).

The replacement is made in ``DIR/.build-incoming`` while the old build stays whole; a finished one
is swapped in by a few renames, and a swap killed halfway is finished by the next command that
takes the folder's lock. Files are compared byte for byte (SHA-256, Python's hashlib).
"""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest


def _digest(folder: Path) -> dict[str, str]:
    """Return ``relative path -> sha256`` of every file under ``folder``, the lock and a replacement left out."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*"))
            if p.is_file() and p.name != ".stackbuild.lock" and ".build-incoming" not in p.relative_to(folder).parts}


@pytest.fixture
def build_copy(tiny_build, tmp_path) -> Path:
    """Return a private copy of the shared tiny build (conftest)."""
    out = tmp_path / "b"
    shutil.copytree(tiny_build, out)
    return out


def test_build_overwrite_leaves_the_old_build_byte_identical_until_the_new_one_is_complete(build_copy, tiny_data):
    from stackbuild.errors import InputError
    from stackbuild.run import stages
    from stackbuild.run.cluster import serial_mapper
    from stackbuild.run.start import start_build

    before = _digest(build_copy)
    new = start_build(build_copy, tiny_data / "tiles.csv", channels=tiny_data / "channels.csv", overwrite=True)
    assert new.root == build_copy / ".build-incoming" and new.home == build_copy
    stages.stitch_stage(new, serial_mapper())  # the new build's first stage writes its records...
    assert new.store.sections_with("stitch")
    assert _digest(build_copy) == before  # ...and the old build is still whole: killed here, nothing is lost
    # Neither flag: refused, naming the unfinished replacement. 'build --resume' continues the
    # replacement, not the old build; '--overwrite' starts it again.
    with pytest.raises(InputError, match="unfinished replacement"):
        start_build(build_copy, tiny_data / "tiles.csv")
    again = start_build(build_copy, tiny_data / "tiles.csv", resume=True)
    assert again.root == new.root and again.store.sections_with("stitch")
    fresh = start_build(build_copy, tiny_data / "tiles.csv", channels=tiny_data / "channels.csv", overwrite=True)
    assert fresh.root == new.root and not fresh.store.sections_with("stitch")
    assert _digest(build_copy) == before


def test_update_and_added_markers_are_refused_while_a_replacement_is_unfinished(build_copy, tiny_data):
    # A change to the old build now would be discarded, silently, when 'build --resume' swaps the
    # replacement in; so both are refused with one line, and nothing changes.
    from stackbuild.errors import InputError
    from stackbuild.folder import BuildFolder
    from stackbuild.run.markers import add_channels
    from stackbuild.run.start import start_build
    from stackbuild.run.update import update_build

    start_build(build_copy, tiny_data / "tiles.csv", overwrite=True)
    before = _digest(build_copy)
    with pytest.raises(InputError, match="unfinished replacement"):
        update_build(BuildFolder(build_copy), tiny_data / "tiles.csv")
    with pytest.raises(InputError, match="unfinished replacement"):
        add_channels(BuildFolder(build_copy), tiny_data / "channels.csv")
    assert _digest(build_copy) == before


def _finished_replacement(build: Path, tiles: Path):
    """Return a replacement of ``build`` made complete by hand (the old outputs, with one report file changed)."""
    from stackbuild.run.start import start_build

    (build / "updates" / "0001").mkdir(parents=True)  # an update of the old build: it goes with the old build
    (build / "updates" / "0001" / "plan.json").write_text("{}\n")
    new = start_build(build, tiles, overwrite=True)
    for name in ("transforms", "volume.zarr", "qc"):
        shutil.copytree(build / name, new.root / name)
    metrics = new.root / "qc" / "metrics.json"
    metrics.write_text(json.dumps({**json.loads(metrics.read_text()), "made_by": "the replacement"}))
    return new


def test_finished_replacement_is_swapped_in_and_a_swap_killed_halfway_is_finished(tmp_path, monkeypatch):
    from stackbuild.render.write import render_volume
    from stackbuild.run import start
    from stackbuild.run.lock import build_lock

    from render_builders import SMALL, make_build

    pristine = make_build(tmp_path / "src", n_sections=2, settings=SMALL).root  # a small finished build
    render_volume(pristine, SMALL)
    (pristine / "qc").mkdir()
    (pristine / "qc" / "metrics.json").write_text("{}\n")
    tiles = tmp_path / "src" / "tiles.csv"
    build_copy = tmp_path / "b"
    real = start.os.replace
    k = 0
    while True:  # die at the k-th rename of the swap, for every k, until the swap runs through
        shutil.rmtree(build_copy, ignore_errors=True)
        shutil.copytree(pristine, build_copy)
        new = _finished_replacement(build_copy, tiles)
        want = {n: h for n, h in _digest(new.root).items() if not n.startswith("scratch")}
        old = _digest(build_copy)
        calls = []

        def dying(a, b):
            calls.append(a)
            if len(calls) > k:
                raise OSError("simulated kill")
            return real(a, b)

        monkeypatch.setattr(start.os, "replace", dying)
        try:
            done = start.finish_build(new)
            finished = True
        except OSError:
            finished = False
        monkeypatch.setattr(start.os, "replace", real)
        if not finished and not (new.root / start.SWAP_RECORD).exists():  # killed before the swap was recorded
            assert k == 0 and _digest(build_copy) == old  # the old build stays; the replacement is unfinished
            k += 1
            continue
        if not finished:
            with build_lock(build_copy):  # the next command on the folder finishes the swap
                pass
        else:
            assert done.root == build_copy
        got = _digest(build_copy)
        assert {n: h for n, h in got.items() if not n.startswith(("scratch", "manifests/"))} == \
            {n: h for n, h in want.items() if not n.startswith("manifests/")}, k
        assert not (build_copy / "updates").exists(), k  # the old build's update went with it
        assert got["manifests/tiles.checked.json"] == want["manifests/tiles.checked.json"]
        assert not (build_copy / ".build-incoming").exists() and not (build_copy / ".build-replaced").exists()
        if finished:
            break
        k += 1
    assert k == 12  # cut at each rename: the swap record, then old aside + new in per output (one for updates/)
