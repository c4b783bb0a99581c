"""Re-stitching a section after tiles are imaged again registers only their pairs (``run/update_stitch.py``).

Ground truth: the synthetic stack's true tile positions (``stackbuild.synth`` truth, made for
ground truth only). Re-imaged tiles carry new noise (numpy's normal generator) and a stage
position read 1.5 and 2 px off, as a stage that does not return exactly would.
"""
from __future__ import annotations

import numpy as np
import tifffile

import stackbuild.stitch.stream as stream
from stackbuild.folder import BuildFolder
from stackbuild.manifest import read_tile_manifest
from stackbuild.run.update_stitch import restitch_section
from stackbuild.synth.truth import load_truth

SECTION = 3


def _reimage(grid_data, out, names):
    """Write re-imaged copies of ``names`` of section 3 and return the section's merged tile entries."""
    rng = np.random.default_rng(7)
    rows = ["section,tile,path,x,y"]
    for line in (grid_data / "first.csv").read_text().splitlines()[1:]:
        s, t, p, x, y = line.split(",")
        if int(s) == SECTION and t in names:
            img = tifffile.imread(grid_data / p).astype(np.float32)
            dst = out / f"{t}.tif"
            tifffile.imwrite(dst, np.clip(img + rng.normal(0, 4, img.shape), 0, 255).astype(np.uint8))
            rows.append(f"{s},{t},{dst},{float(x) + 1.5},{float(y) - 2.0}")
    (out / "again.csv").write_text("\n".join(rows) + "\n")
    new = {t.tile: t for t in read_tile_manifest(out / "again.csv").tiles}
    old = read_tile_manifest(grid_data / "first.csv").section_tiles(SECTION)
    return [new.get(t.tile, t) for t in old]


def test_only_pairs_of_new_tiles_are_registered_and_untouched_tiles_stay(grid_build, grid_data, tmp_path,
                                                                          monkeypatch):
    build = BuildFolder(grid_build)
    old = build.store.load_stitch(SECTION)
    tiles = _reimage(grid_data, tmp_path, {"r1c1"})  # the middle tile of 3 x 3: 4 overlapping neighbours
    read = []
    real = stream.read_tile
    monkeypatch.setattr(stream, "read_tile", lambda entry, section: read.append(entry.tile) or real(entry, section))
    rec, facts = restitch_section(old, tiles, {"r1c1"}, build.config.stitch, SECTION)
    # Pairs of the middle tile only (its 4 edge neighbours, plus diagonal ones if their overlap counts);
    # every other pair is the stored one.
    mine = [p for p in rec.pairs if "r1c1" in (p.a, p.b)]
    assert facts["pairs"] == len(mine) >= 4 and facts["pairs_kept"] == len(rec.pairs) - len(mine)
    assert set(read) <= {"r1c1"} | {n for p in mine for n in (p.a, p.b)}  # no tile outside its pairs is read
    stored = {frozenset((p.a, p.b)): p for p in old.pairs}
    for p in rec.pairs:
        if "r1c1" not in (p.a, p.b):
            assert p.to_json() == stored[frozenset((p.a, p.b))].to_json() | {"residual": p.residual}
    before = {t.tile: t for t in old.tiles}
    for t in rec.tiles:
        if t.tile != "r1c1":
            assert (t.x, t.y, t.gain, t.offset) == (before[t.tile].x, before[t.tile].y, before[t.tile].gain,
                                                      before[t.tile].offset)
    # Against the synthetic truth: the new tile sits where the truth puts it relative to its
    # untouched neighbours (common shift of the section removed), within 0.2 px.
    truth = load_truth(grid_data).tile_positions(SECTION)
    got = {t.tile: np.array([t.x, t.y]) for t in rec.tiles}
    shift = np.median([got[n] - np.array(truth[n]) for n in got if n != "r1c1"], axis=0)
    err = np.hypot(*(got["r1c1"] - np.array(truth["r1c1"]) - shift))
    assert err <= 0.2, err
    # Its gain and offset make it agree with its neighbours: the same content, only new noise.
    new = rec.tile("r1c1")
    assert abs(new.gain - before["r1c1"].gain) < 0.02 and abs(new.offset - before["r1c1"].offset) < 2.0
    assert facts["held_moved_px"] is not None and facts["held_moved_px"] < 0.5


def test_a_section_whose_every_tile_is_new_is_stitched_whole(grid_build, grid_data, tmp_path):
    # Nothing to hold: the placements are those the stitch stage itself gives these tiles
    # (stackbuild.stitch.section.stitch_section on the same inputs), not stage positions.
    from stackbuild.stitch.section import stitch_section

    build = BuildFolder(grid_build)
    names = {f"r{r}c{c}" for r in range(3) for c in range(3)}
    tiles = _reimage(grid_data, tmp_path, names)
    rec, facts = restitch_section(build.store.load_stitch(SECTION), tiles, names, build.config.stitch, SECTION)
    whole = stitch_section(tiles, build.config.stitch, SECTION)
    assert facts["pairs_kept"] == 0 and facts["held"] == 0
    assert [(t.tile, t.x, t.y) for t in rec.tiles] == [(t.tile, t.x, t.y) for t in whole.tiles]
