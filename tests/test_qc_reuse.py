"""A re-report measures only what changed: stored section and probe measurements carry fingerprints.

Ground truth: the planted build of qc_builders (invented data) and its written plane
records; what changed is known because the test changes it.
"""
from __future__ import annotations

import json

import pytest

from stackbuild.qc.metrics import collect
from stackbuild.qc.reuse import changed_planes, context_runs
from stackbuild.qc.settings import ReportSettings
from stackbuild.render.fingerprint import write_plane_record

from qc_builders import SECTIONS, make_build

SETTINGS = ReportSettings(probe_half_size=32, probe_spacing=64, probe_neighbourhood=1, slow_window=3,
                          probe_spans=1)  # reach: 3 // 2 + 1 = 2 planes each side


class Counting:
    """A mapper (the builtin map) that records every task it runs."""

    def __init__(self):
        self.calls = []

    def __call__(self, fn, items):
        items = list(items)
        self.calls += [(fn.__name__, item) for item in items]
        return list(map(fn, items))

    def of(self, name):
        return [item for fn, item in self.calls if fn == name]


def _stamp(root, fps):
    group = root / "volume.zarr" / "em"
    write_plane_record(group, {"written_by": "test"}, {int(z): fp for z, fp in fps.items()})


@pytest.fixture(scope="module")
def first(tmp_path_factory):
    root = make_build(tmp_path_factory.mktemp("reuse") / "build")
    _stamp(root, {z: f"plane{z}" for z in range(len(SECTIONS))})
    doc, _ = collect(root, SETTINGS)
    return root, doc


def test_nothing_changed_measures_nothing_and_gives_the_same_numbers(first):
    root, doc = first
    mapper = Counting()
    again, _ = collect(root, SETTINGS, mapper=mapper)
    assert again["reused"]["sections"] == len(SECTIONS)
    assert mapper.of("probe_region") == []
    for a, b in zip(doc["sections"], again["sections"]):
        assert a["align_error_px"] == b["align_error_px"] and a["stitch"] == b["stitch"]


def test_a_changed_section_is_measured_again_with_its_neighbourhood(first, tmp_path):
    import shutil

    root = tmp_path / "build"
    shutil.copytree(first[0], root, symlinks=True)
    # the stored files name the old folder: fingerprints hash record bytes, so copy them as they are
    rec = root / "transforms" / "sections" / "00004" / "stitch.json"
    doc = json.loads(rec.read_text())
    doc["record"]["stats"] = {**(doc["record"].get("stats") or {}), "touched": 1}
    rec.write_text(json.dumps(doc))
    _stamp(root, {z: (f"plane{z}" if z != 4 else "plane4-new") for z in range(len(SECTIONS))})
    mapper = Counting()
    again, _ = collect(root, SETTINGS, mapper=mapper)
    assert [j.section for j in mapper.of("seam_job")] == list(SECTIONS)  # every section asked ...
    assert again["reused"]["sections"] == len(SECTIONS) - 1              # ... one measured again
    # plane 4 changed: planes 2..4 depend on it (reach 2); the probe runs over 0..4 as context
    assert {tuple(j.z) for j in mapper.of("probe_region")} == {(0, 1, 2, 3, 4)}


def test_changed_planes_and_their_context():
    present = [0, 1, 2, 4, 5, 6, 7, 8, 9, 10]  # plane 3 lost
    assert changed_planes({"0": "a", "1": "b"}, {0: "a", 1: "c", 2: "unrecorded"}) == [1, 2]
    assert context_runs([], present, 2) == []
    assert context_runs([5], present, 2) == [[2, 4, 5, 6, 7]]  # reach counts present planes
    assert context_runs([0, 10], present, 1) == [[0, 1], [9, 10]]
    assert context_runs([1, 6], present, 2) == [[0, 1, 2, 4, 5, 6, 7, 8]]
