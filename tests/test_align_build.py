"""The align stage on a build folder: synthetic sample -> stitch records with the TRUE tile
positions (isolates alignment from stitching) -> run_align -> stored records, against the truth."""
from __future__ import annotations

import pickle

import numpy as np
import pytest

from stackbuild.align.stage import run_align
from stackbuild.manifest import read_tile_manifest
from stackbuild.synth import SynthParams, generate, load_truth
from stackbuild.transforms import SectionStitch, TilePlacement, TransformStore
from align_builders import p95, rms, small_settings, split_linear


@pytest.fixture(scope="module")
def build(tmp_path_factory):
    root = tmp_path_factory.mktemp("align_build")
    params = SynthParams(seed=11, sections=8, grid=(1, 2), tile_size=512, offset=30.0, warp=4.0,
                         slant=0.0, channels=0, lost_sections="5", damaged_sections="2")
    manifest = read_tile_manifest(generate(root / "sample", params))
    truth = load_truth(root / "sample")
    store = TransformStore(root / "build" / "transforms")
    for z in manifest.sections:
        pos = truth.tile_positions(z)
        tiles = [TilePlacement(t.tile, str(t.path), t.width, t.height, t.x, t.y, *pos[t.tile])
                 for t in manifest.section_tiles(z)]
        store.save_stitch(SectionStitch(z, manifest.section_tiles(z)[0].dtype, tiles))
    seen = []

    def pickling_mapper(fn, items):
        # what a distributed mapper does: every task and its answer cross a process boundary
        return [pickle.loads(pickle.dumps(fn(pickle.loads(pickle.dumps(i))))) for i in items]

    aligns = run_align(root / "build", small_settings(), mapper=pickling_mapper,
                       progress=lambda d, t: seen.append((d, t)))
    return truth, store, aligns, seen, root


def test_records_are_stored_and_progress_is_reported(build):
    truth, store, aligns, seen, root = build
    assert sorted(aligns) == [0, 1, 2, 3, 4, 6, 7]
    assert store.sections_with("align") == sorted(aligns)
    back = store.load_alignment(3)
    pts = np.array([[100.0, 50.0], [700.0, 400.0]])
    np.testing.assert_allclose(back.aligned_to_section(pts), aligns[3].aligned_to_section(pts), atol=1e-4)
    assert seen and seen[-1][0] == seen[-1][1]
    assert "lost_neighbour" in aligns[4].flags and "lost_neighbour" in aligns[6].flags
    assert not (root / "build" / "scratch" / "align").exists()


def test_stack_matches_the_truth(build):
    truth, store, aligns, seen, root = build
    h, w = truth.section_shape
    ys, xs = np.mgrid[90:h - 90:24, 90:w - 90:24]
    p = np.column_stack([xs.ravel(), ys.ravel()]).astype(float)
    zs = [z for z in sorted(aligns) if z != 2]   # the folded section is judged by its flag only
    r = {z: truth.section_to_true(z, aligns[z].aligned_to_section(p)) - p for z in zs}
    mean = np.mean([r[z] for z in zs], axis=0)
    r = {z: v - mean for z, v in r.items()}
    lin, rest = split_linear(r)
    assert rms(rest) <= 1.0 and p95(rest) <= 2.0
    assert rms(np.stack(list(r.values()))) <= 1.5
    assert "damaged" in aligns[2].flags
