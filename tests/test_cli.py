"""The command line: help for every option, version, one-line errors and exit status."""
from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import tifffile

from stackbuild import __version__
from stackbuild.cli import _parser, main

COMMANDS = ["build", "stitch", "align", "channels", "render", "report", "update", "synth"]


def _subparsers():
    top = _parser()
    action = next(a for a in top._actions if a.dest == "command")
    return action.choices


def test_version(capsys):
    with pytest.raises(SystemExit) as ex:
        main(["--version"])
    assert ex.value.code == 0 and __version__ in capsys.readouterr().out


@pytest.mark.parametrize("command", COMMANDS)
def test_every_option_has_help(command):
    parser = _subparsers()[command]
    for action in parser._actions:
        if action.dest == "help":
            continue
        assert action.help and len(action.help) > 10, f"{command} {action.option_strings or action.dest}"


def test_console_script_help_runs():
    # The installed entry point must work as a program, not only as a function.
    out = subprocess.run([sys.executable, "-m", "stackbuild.cli", "build", "--help"],
                         capture_output=True, text=True, check=True).stdout
    for flag in ("--out", "--channels", "--pixel-size", "--section-thickness", "--config",
                 "--workers", "--scheduler", "--resume", "--overwrite"):
        assert flag in out


def test_bad_manifest_is_one_line_and_status_2(tmp_path, capsys):
    (tmp_path / "tiles.csv").write_text("section,path,x\n0,a.tif,0\n")
    status = main(["build", str(tmp_path / "tiles.csv"), "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1
    assert "tiles.csv:1" in err[0] and "missing column(s) y" in err[0]
    assert not (tmp_path / "out").exists()  # nothing half-written


def test_non_empty_folder_without_a_build_is_refused(tmp_path, capsys):
    tifffile.imwrite(tmp_path / "a.tif", np.zeros((8, 8), np.uint8))
    (tmp_path / "tiles.csv").write_text("section,path,x,y\n0,a.tif,0,0\n")
    out = tmp_path / "out"
    out.mkdir()
    (out / "precious.txt").write_text("keep me")
    status = main(["build", str(tmp_path / "tiles.csv"), "--out", str(out), "--quiet"])
    assert status == 2 and "holds no build" in capsys.readouterr().err
    assert (out / "precious.txt").read_text() == "keep me"


def test_report_on_a_folder_that_is_not_a_build(tmp_path, capsys):
    assert main(["report", str(tmp_path)]) == 2
    assert "not a build folder" in capsys.readouterr().err


def test_bad_section_list_is_an_argument_error(capsys):
    with pytest.raises(SystemExit) as ex:
        main(["stitch", "somewhere", "--sections", "3-x"])
    assert ex.value.code == 2 and "section numbers like 3,5-7" in capsys.readouterr().err
