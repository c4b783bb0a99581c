"""Landmark residuals of the marker registration (stackbuild/qc/landmarks.py, manifest.read_landmarks).

The external reference is the ground truth of the synthetic sample: the true
``channel -> section`` affine and the true tile positions, which the build
never sees. The residuals the report gives must equal the registration's true
error, measured in the build's own section frame.
"""
from __future__ import annotations

import csv
import json
import shutil

import numpy as np
import pytest

from stackbuild.cli import main
from stackbuild.errors import InputError
from stackbuild.manifest import read_channel_manifest, read_landmarks, read_tile_manifest
from stackbuild.folder import BuildFolder
from stackbuild.synth import load_truth
from stackbuild.transforms import Affine2D


@pytest.fixture
def built(tiny_build):
    """The session's finished tiny build (conftest.py): channels and landmarks."""
    return tiny_build


def _metrics(folder):
    return json.loads((folder / "qc" / "metrics.json").read_text())


def test_residuals_equal_the_registrations_true_error(built, tiny_data):
    truth = load_truth(tiny_data)
    folder = BuildFolder(built)
    doc = _metrics(built)
    rows = doc["landmarks"]
    assert len(rows) == sum(1 for _ in open(tiny_data / "landmarks.csv")) - 1
    for s in {r["section"] for r in rows}:
        placed = {t.tile: (t.x, t.y) for t in folder.store.load_stitch(s).tiles}
        true = truth.tile_positions(s)
        # The build's section frame is the true one shifted by the stitcher's gauge (the mean offset).
        gauge = np.mean([np.subtract(placed[t], true[t]) for t in placed], axis=0)
        rec = folder.store.load_doc("channels", section=s)
        for r in (r for r in rows if r["section"] == s):
            ours = Affine2D.from_json(rec["channels"][r["channel"]]["transform"]).apply([r["marker"]])[0]
            want = ours - (truth.channel_to_section(s, r["channel"], [r["marker"]])[0] + gauge)
            # Within the stitching error of a tiny mosaic (RMS ~0.05 px; bound from memory of the
            # stitching tests, 4x their 0.3 px max for this 256-px, 2x2-tile sample).
            assert np.hypot(r["dx"] - want[0], r["dy"] - want[1]) < 0.5, r
            assert r["residual_nm"] == pytest.approx(r["residual"] * doc["volume"]["pixel_size_nm"])
    totals = doc["totals"]
    res = np.array([r["residual"] for r in rows])
    assert totals["channels.landmark_rms"] == pytest.approx(np.sqrt(np.mean(res ** 2)))
    assert totals["channels.landmark_max"] == pytest.approx(res.max())
    for c in doc["channels"]:
        mine = [r["residual"] for r in rows if (r["section"], r["channel"]) == (c["section"], c["channel"])]
        assert c["landmark_residual"] == pytest.approx(np.sqrt(np.mean(np.square(mine))))
    with open(built / "qc" / "landmarks.csv", newline="") as fh:
        assert len(list(csv.DictReader(fh))) == len(rows)
    html = (built / "qc" / "report.html").read_text()
    assert "Worst landmarks" in html and "Landmark residuals of the marker registrations" in html
    import xml.etree.ElementTree as ET
    svg = "{http://www.w3.org/2000/svg}"
    assert ET.parse(built / "qc" / "landmarks.svg").getroot().tag == f"{svg}svg"  # well-formed SVG
    assert "Marker channels over the EM" in html
    assert ET.parse(built / "qc" / "channels.svg").getroot().find(f".//{svg}image") is not None  # a PNG panel


def test_a_planted_registration_error_is_measured_and_named(built, tmp_path):
    copy = tmp_path / "build"
    shutil.copytree(built, copy)
    folder = BuildFolder(copy)
    doc = _metrics(copy)
    s = doc["landmarks"][0]["section"]
    rec = folder.store.load_doc("channels", section=s)
    name = doc["landmarks"][0]["channel"]
    t = rec["channels"][name]["transform"]
    t["affine"][0][2] += 7.0  # the marker lands 7 EM px further right than registered
    folder.store.save_doc("channels", rec, section=s)
    before = {(r["name"]): r["dx"] for r in doc["landmarks"]}
    assert main(["report", str(copy), "--quiet", "--fail-on", "channels.landmark_max>5px"]) == 3
    after = _metrics(copy)
    for r in after["landmarks"]:
        moved = 7.0 if (r["section"], r["channel"]) == (s, name) else 0.0
        assert r["dx"] == pytest.approx(before[r["name"]] + moved, abs=1e-6)
    assert (after["worst"]["landmark"]["section"], after["worst"]["landmark"]["channel"]) == (s, name)


def _rewrite(src, dst, edit):
    rows = list(csv.reader(open(src)))
    edit(rows)
    with open(dst, "w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    return dst


@pytest.mark.parametrize("edit, words", [
    (lambda r: r[1].__setitem__(1, "nosuch"), "no channel 'nosuch'"),
    (lambda r: r[1].__setitem__(2, "r9c9"), "no tile 'r9c9'"),
    (lambda r: r[1].__setitem__(3, "4000"), "outside the"),
    (lambda r: r[1].__setitem__(5, "nan"), "must be finite"),
])
def test_bad_landmark_rows_are_named(tiny_data, tmp_path, edit, words):
    bad = _rewrite(tiny_data / "landmarks.csv", tmp_path / "landmarks.csv", edit)
    with pytest.raises(InputError) as err:
        read_landmarks(bad, read_tile_manifest(tiny_data / "tiles.csv"),
                       read_channel_manifest(tiny_data / "channels.csv"))
    assert words in str(err.value) and err.value.row == 2


def test_landmarks_need_channels(tiny_data, tmp_path, capsys):
    assert main(["build", str(tiny_data / "tiles.csv"), "--landmarks", str(tiny_data / "landmarks.csv"),
                 "--out", str(tmp_path / "b"), "--quiet"]) == 2
    assert "--landmarks needs --channels" in capsys.readouterr().err
    assert not (tmp_path / "b").exists()
