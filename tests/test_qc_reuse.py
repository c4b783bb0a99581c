"""A re-report measures only what changed: stored section and probe-pair measurements carry fingerprints.

Ground truth: the planted build of qc_builders (invented data) and its written plane
records; what changed is known because the test changes it.
"""
from __future__ import annotations

import json

import pytest

from stackbuild.qc.metrics import collect
from stackbuild.qc.probe import plane_pairs
from stackbuild.qc.runs import runs_of
from stackbuild.qc.settings import ReportSettings
from stackbuild.render.fingerprint import write_plane_record

from qc_builders import SECTIONS, make_build

SETTINGS = ReportSettings(probe_half_size=32, probe_spacing=64, probe_neighbourhood=1)  # probe_spans 2


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
    assert mapper.of("probe_pair") == [] and mapper.of("jitter_run") == []
    assert again["reused"]["pairs"] == len(plane_pairs(list(range(len(SECTIONS))), 2))
    for a, b in zip(doc["sections"], again["sections"]):
        assert a["align_error_px"] == b["align_error_px"] and a["stitch"] == b["stitch"]


def test_a_changed_section_is_measured_again_with_its_neighbourhood(first, tmp_path):
    import shutil

    root = tmp_path / "build"
    shutil.copytree(first[0], root, symlinks=True)
    # the stored files name the old folder: fingerprints hash record bytes, so copy them as they are
    rec = root / "transforms" / "sections" / "00002" / "stitch.json"
    doc = json.loads(rec.read_text())
    doc["record"]["stats"] = {**(doc["record"].get("stats") or {}), "touched": 1}
    rec.write_text(json.dumps(doc))
    _stamp(root, {z: (f"plane{z}" if z != 2 else "plane2-new") for z in range(len(SECTIONS))})
    mapper = Counting()
    again, _ = collect(root, SETTINGS, mapper=mapper)
    assert [j.section for j in mapper.of("seam_job")] == list(SECTIONS)  # every section asked ...
    assert again["reused"]["sections"] == len(SECTIONS) - 1              # ... one measured again
    # plane 2 changed: exactly the 2 x probe_spans pairs it takes part in are measured again, in one
    # task, out of the 7 pairs of 5 planes; the one run is solved again
    measured = sorted(p for j in mapper.of("probe_pair") for p in j.pairs)
    assert measured == [(0, 2), (1, 2), (2, 3), (2, 4)] and len(mapper.of("probe_pair")) == 1
    assert again["reused"]["pairs_measured"] == 4 and again["reused"]["pairs"] == 3
    assert again["reused"]["runs_solved"] == 1
    # ... and the numbers are those of a full report of the same folder (the stored pairs are re-used as such)
    full, _ = collect(root, SETTINGS, reuse=False)
    for a, b in zip(full["sections"], again["sections"]):
        assert a["align_error_px"] == pytest.approx(b["align_error_px"], abs=1e-9)


def test_a_plane_in_the_middle_takes_four_pairs_and_runs_have_fixed_cores():
    present = [0, 1, 2, 4, 5, 6, 7, 8, 9, 10]  # plane 3 lost
    pairs = plane_pairs(present, 2)
    assert [p for p in pairs if 5 in p] == [(2, 5), (4, 5), (5, 6), (5, 7)]  # spans count present planes
    assert len(pairs) == 2 * len(present) - 3
    runs = runs_of(list(range(40)), 6)
    assert [c for c, _ in runs] == [list(range(0, 16)), list(range(16, 32)), list(range(32, 40))]
    assert runs[1][1] == list(range(10, 38)) and runs[2][1] == list(range(26, 40))


def test_appended_sections_leave_the_stored_measurements_of_the_others_valid(first, tmp_path):
    # An append grows the canvas's section range (last_section) and the volume's depth, and moves no
    # pixel of an existing plane: every section and pair fingerprint of the existing planes must stay.
    import dataclasses
    import shutil

    from stackbuild.folder import BuildFolder
    from stackbuild.qc.reuse import pair_fingerprints, section_fingerprint

    root = tmp_path / "build"
    shutil.copytree(first[0], root, symlinks=True)
    folder = BuildFolder(root)
    canvas = folder.store.load_canvas()

    class Source:  # what pair_fingerprints reads of the probe's source: its level and shape
        origin, level, factor, bin = "volume.zarr", 0, 1, 1

        def __init__(self, depth):
            self.depth = depth
            self.data = type("Data", (), {"shape": (depth, 64, 64)})()

    pairs = plane_pairs(list(range(len(SECTIONS))), 2)
    before = ([section_fingerprint(folder, s, SETTINGS) for s in SECTIONS],
              pair_fingerprints(folder, Source(len(SECTIONS)), pairs, SETTINGS))
    folder.store.save_canvas(dataclasses.replace(canvas, last_section=canvas.last_section + 2))
    after = ([section_fingerprint(folder, s, SETTINGS) for s in SECTIONS],
             pair_fingerprints(folder, Source(len(SECTIONS) + 2), pairs, SETTINGS))
    assert after == before and all(before[1].values())
    # ... while a canvas whose origin moved does invalidate them (its pixels moved)
    folder.store.save_canvas(dataclasses.replace(canvas, origin_x=canvas.origin_x + 1))
    assert [section_fingerprint(folder, s, SETTINGS) for s in SECTIONS] != before[0]


def _worst_title_numbers(qc) -> tuple:
    """Return the worst section's estimate and largest block as its figure's title prints them (2 decimals)."""
    import csv

    rows = [r for r in csv.DictReader(open(qc / "sections.csv", encoding="utf-8")) if r["align_error_px"]]
    worst = max(rows, key=lambda r: float(r["align_error_px"]))
    return worst["section"], f"{float(worst['align_error_px']):.2f}", f"{float(worst['align_error_max_px']):.2f}"


def test_a_re_report_redraws_only_the_figures_that_show_what_changed(first, tmp_path):
    # Figures are kept with a key of what they show (qc/figures.py). Ground truth: which figure reads
    # which plane is known from the planted build (the worst section is z 2, drawn with z 1 and 3; the
    # re-slices cross every plane; the per-plane error curve and the tile maps read no pixels).
    import shutil

    from stackbuild.qc.report import run_report

    root = tmp_path / "build"
    shutil.copytree(first[0], root, symlinks=True)
    run_report(root, SETTINGS)
    qc = root / "qc"
    names = ("worst_section", "tiles", "error_z", "reslice", "displacement")
    stamp = {n: (qc / f"{n}.svg").stat().st_mtime_ns for n in names}
    thumbs = (qc / "measured" / "figures" / "thumbnails.json").read_text()
    run_report(root, SETTINGS)  # nothing changed: every figure and thumbnail kept as it was
    assert {n: (qc / f"{n}.svg").stat().st_mtime_ns for n in names} == stamp
    assert (qc / "measured" / "figures" / "thumbnails.json").read_text() == thumbs
    _stamp(root, {z: (f"plane{z}" if z != 4 else "plane4-new") for z in range(len(SECTIONS))})
    run_report(root, SETTINGS)  # plane 4 re-rendered to the same pixels: the figures show the same pixels
    assert {n: (qc / f"{n}.svg").stat().st_mtime_ns for n in ("worst_section", "tiles", "reslice", "displacement")} \
        == {n: stamp[n] for n in ("worst_section", "tiles", "reslice", "displacement")}
    import zarr

    for level in ("0", "1"):  # plane 4's pixels changed (plane 3's copied in): the re-slices cross it
        arr = zarr.open_array(str(root / "volume.zarr" / "em" / level), mode="r+")
        arr[4] = arr[3]
    _stamp(root, {z: (f"plane{z}" if z != 4 else "plane4-copied") for z in range(len(SECTIONS))})
    title = _worst_title_numbers(qc)
    run_report(root, SETTINGS)
    after = {n: (qc / f"{n}.svg").stat().st_mtime_ns for n in names}
    assert after["reslice"] != stamp["reslice"]
    # the worst section (z 2) is drawn with planes 1 and 3 only; the tile maps and field read no plane. Its title
    # carries its estimate, which plane 4 may move (each block's line runs through every plane): then, and only
    # then, it is drawn again
    assert {n: after[n] for n in ("tiles", "displacement")} == {n: stamp[n] for n in ("tiles", "displacement")}
    assert (after["worst_section"] == stamp["worst_section"]) == (_worst_title_numbers(qc) == title)
    run_report(root, SETTINGS, reuse=False)  # measuring everything again draws everything again
    assert all((qc / f"{n}.svg").stat().st_mtime_ns != after[n] for n in names)


def test_a_re_report_told_where_a_plane_changed_gives_the_numbers_of_a_full_report(first, tmp_path):
    # An update rewrites a few shards of a plane and tells the report where (qc.stage.run's `changed`).
    # Ground truth: a full report (reuse=False) of the same folder. Here a 96 x 96 px corner of plane 2
    # is replaced by the same place of plane 3 (a real change: the blocks there now match plane 3),
    # at both written levels.
    import shutil

    import numpy as np
    import zarr

    root = tmp_path / "build"
    shutil.copytree(first[0], root, symlinks=True)
    box = [416, 416, 512, 512]  # level-0 px, x1 and y1 exclusive
    for level, f in (("0", 1), ("1", 2)):
        arr = zarr.open_array(str(root / "volume.zarr" / "em" / level), mode="r+")
        ys, xs = slice(box[1] // f, box[3] // f), slice(box[0] // f, box[2] // f)
        arr[2, ys, xs] = arr[3, ys, xs]
    _stamp(root, {z: (f"plane{z}" if z != 2 else "plane2-patched") for z in range(len(SECTIONS))})
    mapper = Counting()
    told, _ = collect(root, SETTINGS, mapper=mapper, changed={2: {"before": "plane2", "boxes": [box]}})
    jobs = mapper.of("probe_pair")
    assert sorted(p for j in jobs for p in j.pairs) == [(0, 2), (1, 2), (2, 3), (2, 4)]
    assert all(k is not None for j in jobs for k in j.keep)  # each kept its stored blocks outside the box
    kept = [json.loads(p.read_text()) for p in sorted((root / "qc" / "measured" / "pairs").glob("*.json"))]
    full, _ = collect(root, SETTINGS, reuse=False)
    again = [json.loads(p.read_text()) for p in sorted((root / "qc" / "measured" / "pairs").glob("*.json"))]
    # the same block shifts as measuring every block again (to the stored 4 decimals) ...
    for k, a in zip(kept, again):
        for c in ("dx", "dy", "ncc"):
            assert np.allclose(np.array(k[c], float), np.array(a[c], float), equal_nan=True, atol=1e-4)
        assert k["beyond"] == a["beyond"]
    # ... and so the same estimates
    for a, b in zip(full["sections"], told["sections"]):
        assert a["align_error_px"] == pytest.approx(b["align_error_px"], abs=1e-6)
    # a stored pair measured from another version of the plane is not patched: measured whole
    _stamp(root, {z: (f"plane{z}" if z != 2 else "plane2-again") for z in range(len(SECTIONS))})
    mapper = Counting()
    collect(root, SETTINGS, mapper=mapper, changed={2: {"before": "plane2", "boxes": [box]}})
    assert [k for j in mapper.of("probe_pair") for k in j.keep] == [None] * 4


def test_an_error_figure_is_kept_while_its_numbers_move_less_than_it_can_show(tmp_path):
    # qc/figures.SEEN_PX (0.005 px) is under one pixel of the error curve and one colour step of the region
    # map at the default bars (a property of the figures, no outside source); compared with the values the
    # PNG was drawn with, so small changes cannot add up unseen.
    from stackbuild.folder import BuildFolder
    from stackbuild.qc.figures import SEEN_PX, FigureStore

    folder = BuildFolder(tmp_path)
    folder.qc_dir.mkdir(parents=True)
    drawn = []

    def draw():
        from stackbuild.qc.svg import Svg

        drawn.append(1)
        return Svg(10, 10).render()

    def get(values):
        FigureStore(folder).get("error_z", "c", ["rows"], draw, values)
        return len(drawn)

    assert get([0.5, None]) == 1
    assert get([0.5 + 0.8 * SEEN_PX, None]) == 1      # invisible: kept
    assert get([0.5 + 1.6 * SEEN_PX, None]) == 2      # 1.6 steps from what was drawn: drawn again
    assert get([0.5 + 1.6 * SEEN_PX, 0.1]) == 3       # a value appeared


def test_probe_tasks_split_by_region_give_the_numbers_of_one_task_per_run(first, tmp_path):
    # each region is measured on its own window, so plane run x region tasks joined by the merge tasks must
    # store the very pair documents and give the very estimates of one task per run of planes (exact equality:
    # the same arithmetic on the same pixels; no outside source needed for an identity)
    import dataclasses
    import shutil

    root = tmp_path / "build"
    shutil.copytree(first[0], root, symlinks=True)
    pairs_dir = root / "qc" / "measured" / "pairs"
    got = {}
    for per_task in (1000, 1):
        st = dataclasses.replace(SETTINGS, region_size=128, probe_task_regions=per_task)
        mapper = Counting()
        doc, _ = collect(root, st, mapper=mapper, reuse=False)
        got[per_task] = (doc, [p.read_text() for p in sorted(pairs_dir.glob("*.json"))], mapper)
    (one, pairs_one, m_one), (many, pairs_many, m_many) = got[1000], got[1]
    assert len(m_one.of("probe_pair")) == 1 and m_one.of("merge_pair_parts") == []
    regions = {r for j in m_many.of("probe_pair") for r in j.regions}
    assert len(regions) > 1 and len(m_many.of("probe_pair")) == len(regions)
    assert len(m_many.of("merge_pair_parts")) == 1
    assert not list((root / "qc" / "measured" / "parts").glob("*.json"))  # parts removed once merged
    assert pairs_one == pairs_many
    for a, b in zip(one["sections"], many["sections"]):
        assert a["align_error_px"] == b["align_error_px"]

    # The update's hand-off (`changed`) to these split tasks: regions whose windows miss the box are not
    # run, the others measure only their blocks near it; the stored pairs and estimates equal a full report
    # (ground truth: reuse=False on the same folder).
    import numpy as np
    import zarr

    box = [416, 416, 512, 512]
    for level, f in (("0", 1), ("1", 2)):
        arr = zarr.open_array(str(root / "volume.zarr" / "em" / level), mode="r+")
        arr[2, box[1] // f:box[3] // f, box[0] // f:box[2] // f] = arr[3, box[1] // f:box[3] // f, box[0] // f:box[2] // f]
    _stamp(root, {z: (f"plane{z}" if z != 2 else "plane2-patched") for z in range(len(SECTIONS))})
    mapper = Counting()
    told, _ = collect(root, st, mapper=mapper, changed={2: {"before": "plane2", "boxes": [box]}})
    # regions that cannot reach the box are not even given a task; the run's pairs are still merged and stored
    assert 0 < len(mapper.of("probe_pair")) < len(regions) and len(mapper.of("merge_pair_parts")) == 1
    kept = [json.loads(p.read_text()) for p in sorted(pairs_dir.glob("*.json"))]
    full, _ = collect(root, st, reuse=False)
    again = [json.loads(p.read_text()) for p in sorted(pairs_dir.glob("*.json"))]
    for k, a in zip(kept, again):
        for c in ("dx", "dy", "ncc"):
            assert np.allclose(np.array(k[c], float), np.array(a[c], float), equal_nan=True, atol=1e-4)
    for a, b in zip(full["sections"], told["sections"]):
        assert a["align_error_px"] == pytest.approx(b["align_error_px"], abs=1e-6)


def test_reslice_lines_are_read_again_only_for_planes_whose_fingerprint_changed(first, tmp_path, monkeypatch):
    # Reference: the two lines read through the whole stack in one call (planes.reslice_planes). Ground
    # truth: which plane's record changed is known because the test stamps it.
    import shutil

    import numpy as np

    from stackbuild.folder import BuildFolder
    from stackbuild.qc import figures, planes

    root = tmp_path / "build"
    shutil.copytree(first[0], root, symlinks=True)
    folder = BuildFolder(root)
    src = planes.open_planes(root, max_px=SETTINGS.reslice_px)
    whole = planes.reslice_planes(src, 100.0, 120.0)
    read = []
    monkeypatch.setattr(figures, "reslice_lines",
                        lambda s, x, y, zs: read.append(sorted(zs)) or planes.reslice_lines(s, x, y, zs))

    def lines():
        got = figures._reslice(folder, src, 100.0, 120.0, True)
        assert all(np.array_equal(a, b) for a, b in zip(got, whole))
        return read.pop()
    assert lines() == list(range(src.depth))  # first report: every plane read
    assert lines() == []  # nothing changed: every plane's lines kept
    _stamp(root, {z: (f"plane{z}" if z != 4 else "plane4-new") for z in range(len(SECTIONS))})
    assert lines() == [4]


def test_a_run_is_stamped_with_the_estimators_code(monkeypatch):
    # A stored run is re-used only by the code that solved it: editing the estimator without
    # bumping ESTIMATE_VERSION once handed a benchmark a dropped estimator's runs.
    import hashlib
    from pathlib import Path

    from stackbuild.qc import reuse

    here = Path(reuse.__file__).parent
    h = hashlib.blake2b(digest_size=16)
    for name in ("zchain.py", "runs.py"):
        h.update((here / name).read_bytes())
    assert reuse.ESTIMATE_CODE == h.hexdigest()
    args = ({(0, 1): "a", (1, 2): "b"}, [0, 1, 2], [0, 1, 2], ReportSettings())
    before = reuse.run_fingerprint(*args)
    monkeypatch.setattr(reuse, "ESTIMATE_CODE", "edited")
    assert reuse.run_fingerprint(*args) != before
