"""One run at a time per build folder (stackbuild/run/lock.py).

POSIX record locks belong to a process, so the competing holder is always a
separate Python process here.
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import pytest

from stackbuild.cli import main
from stackbuild.errors import BuildFolderError
from stackbuild.run.lock import LOCK_NAME, build_lock

HOLDER = textwrap.dedent("""
    import sys, time
    from stackbuild.run.lock import build_lock
    with build_lock(sys.argv[1], command="stackbuild render (test holder)"):
        print("held", flush=True)
        time.sleep(120)
""")


def _hold(folder):
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(folder)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "held"
    return proc


def test_a_second_run_is_refused_naming_the_holder(tmp_path, capsys):
    folder = tmp_path / "build"
    proc = _hold(folder)
    try:
        with pytest.raises(BuildFolderError) as err:
            with build_lock(folder):
                pass
        assert f"pid {proc.pid}" in str(err.value) and "test holder" in str(err.value)
        # Through the command line: one line, exit status 2, nothing else touched.
        assert main(["render", str(folder), "--quiet"]) == 2
        line = capsys.readouterr().err.strip()
        assert "another stackbuild run is using this build folder" in line and "\n" not in line
        assert sorted(p.name for p in folder.iterdir()) == [LOCK_NAME]
    finally:
        proc.kill()
        proc.wait()


def test_a_killed_holder_leaves_no_stale_lock(tmp_path):
    folder = tmp_path / "build"
    proc = _hold(folder)
    os.kill(proc.pid, signal.SIGKILL)  # as a lost cluster node or `kill -9` would
    proc.wait()
    deadline = time.monotonic() + 5
    while True:  # the kernel drops the lock with the process; allow it a moment
        try:
            with build_lock(folder):
                break
        except BuildFolderError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.05)


def test_a_refused_first_build_leaves_no_folder(tmp_path):
    bad = tmp_path / "tiles.csv"
    bad.write_text("section,path,x,y\n0,missing.tif,0,0\n")
    out = tmp_path / "new_build"
    assert main(["build", str(bad), "--out", str(out), "--quiet"]) == 2
    assert not out.exists()


def test_the_lock_is_released_after_a_command(tmp_path):
    folder = tmp_path / "build"
    with build_lock(folder):
        (folder / "build.json").write_text("{}")
    # Another process can take it now.
    code = "import sys; from stackbuild.run.lock import build_lock\nwith build_lock(sys.argv[1]): print('ok')"
    got = subprocess.run([sys.executable, "-c", code, str(folder)], capture_output=True, text=True, timeout=60)
    assert got.stdout.strip() == "ok", got.stderr
