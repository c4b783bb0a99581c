"""The ``stackbuild synth`` command built from SynthParams writes what generate() writes."""
from __future__ import annotations

import pytest

from stackbuild.synth import SynthParams, generate

cli = pytest.importorskip("stackbuild.cli")


def test_help_lists_every_option(capsys):
    with pytest.raises(SystemExit) as done:
        cli.main(["synth", "--help"])
    assert done.value.code == 0
    text = capsys.readouterr().out
    assert "--tile-size" in text and "--repetitive-pair" in text and "--channel-every" in text


def test_command_line_matches_python_call(tmp_path):
    argv = ["synth", str(tmp_path / "cli"), "--quiet", "--seed", "3", "--sections", "2", "--grid", "2", "2",
            "--tile-size", "96", "--offset", "5", "--channels", "1", "--no-compress", "--drift", "0.5", "0"]
    assert cli.main(argv) == 0
    generate(tmp_path / "py", SynthParams(seed=3, sections=2, grid=(2, 2), tile_size=96, offset=5.0,
                                          channels=1, compress=False, drift=(0.5, 0.0)))
    for path in sorted((tmp_path / "py").rglob("*")):
        if path.is_file():
            assert (tmp_path / "cli" / path.relative_to(tmp_path / "py")).read_bytes() == path.read_bytes(), path


def test_bad_option_is_a_one_line_error(tmp_path, capsys):
    assert cli.main(["synth", str(tmp_path), "--quiet", "--lost-sections", "x"]) != 0
    assert "lost_sections" in capsys.readouterr().err
