"""Re-imaged tiles and appended sections: an update of a finished build, run as a transaction.

An update manifest lists tiles imaged again (rows whose ``section`` and
``tile`` name an existing tile replace it; new tile names are added to their
section) and, with ``append``, whole new sections. The update

1. checks the manifest and writes its plan (``DIR/updates/NNNN/plan.json``)
   with hard links to the transform records as they are, before it changes
   anything (:mod:`stackbuild.run.update_plan`);
2. registers again only the tile pairs that involve a new tile (stored results of the
   others are kept) and places the new tiles with every untouched one held where it was
   (:mod:`stackbuild.run.update_stitch`); appended sections are stitched whole;
3. keeps the alignment of a re-imaged section whose new pixels show its old content
   (:mod:`stackbuild.run.update_reach`); otherwise solves a window of sections around
   the changed ones and keeps the old alignment of every section (re-imaged ones
   included) the re-solve moves by no more than ``hold_within`` pixels
   (:func:`stackbuild.transforms.hold.hold_alignments`); appended sections are
   re-expressed through the existing section they follow (:mod:`stackbuild.run.update_align`);
4. registers the marker images again;
5. writes only the shards whose pixels can change, and the pyramid above them
   (:mod:`stackbuild.render.dirty`, :mod:`stackbuild.render.patch`), on a
   canvas that only ever grows (:func:`stackbuild.render.canvas.settle_canvas`);
6. writes the report.

Every step is recorded in the plan when it finishes. Each step's result depends
only on the records the earlier steps left and on the ``before`` records, so a
killed update run again (or ``--resume``) finishes exactly the same volume.
"""
from __future__ import annotations

import contextlib
import csv
import io
import json
import logging
import math
import os
import shutil
import signal
import time
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from ..folder import BuildFolder, csv_facts
from ..manifest import TileEntry, TileManifest, read_tile_manifest
from ..transforms.records import Canvas, SectionStitch, TilePlacement
from ..transforms.store import TransformStore, atomic_write_text
from .update_plan import (
    UpdatePlan, load_plans, next_number, now, plan_dir, save_plan, snapshot_transforms, unfinished,
)

log = logging.getLogger(__name__)

#: An untouched section keeps its alignment unless the re-solve moves one of its points further (section px).
HOLD_WITHIN = 0.5
#: An update replacing or adding at most this many tiles (and appending no section) runs in this process.
IN_PROCESS_TILES = 16
#: ... and re-stitching reads at most this many tiles (the new ones and the tiles they overlap).
IN_PROCESS_SECTION_TILES = 100


@dataclass
class UpdateOutcome:
    """What an update did (or, with ``dry_run``, would do).

    Attributes
    ----------
    plan : UpdatePlan or None
        The update's record (None for an inset, which is added beside the volume).
    lines : list of str
        The summary, one line each (the CLI prints them).
    verdict : object or None
        The report's verdict (None for a dry run).
    """

    plan: UpdatePlan | None
    lines: list[str] = field(default_factory=list)
    verdict: object | None = None


#: Test hook: ``STACKBUILD_UPDATE_KILL=align|channels|render`` kills the update's process group
#: part-way through that step (after some of its results are written, before it is recorded),
#: as a ``kill -9`` would; the fault tests use it to stop at a known place.
_KILL_ENV = "STACKBUILD_UPDATE_KILL"


def _killed_here(step: str) -> None:
    if os.environ.get(_KILL_ENV) == step:
        os.killpg(os.getpgid(0), signal.SIGKILL)


# --------------------------------------------------------------- manifests
def merged_manifest(old: TileManifest, new: TileManifest) -> str:
    """Return the CSV text of ``old`` with ``new``'s rows merged in by (section, tile).

    A row of ``new`` naming an existing tile of its section replaces it; other rows are added.
    """
    incoming = {(t.section, t.tile) for t in new.tiles}
    rows = [t for t in old.tiles if (t.section, t.tile) not in incoming] + list(new.tiles)
    rows.sort(key=lambda t: t.section)  # stable: manifest order within a section is kept
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["section", "tile", "path", "x", "y"])
    for t in rows:
        w.writerow([t.section, t.tile, str(t.path), repr(t.x), repr(t.y)])
    return buf.getvalue()


def _pack(shards) -> list[str]:
    """Return shards ``(i, j)`` as sorted ``"i,j"`` strings (compact in the plan)."""
    return [f"{i},{j}" for i, j in sorted(shards)]


def _unpack(packed) -> set[tuple[int, int]]:
    return {tuple(int(v) for v in p.split(",")) for p in packed}


def _sha256(path: Path) -> str:
    return csv_facts(path)["sha256"]


def _common_size(tiles: list[TileEntry]) -> tuple[int, int]:
    sizes = [(t.width, t.height) for t in tiles]
    return max(set(sizes), key=sizes.count)


def _check_new_tiles(old: TileManifest, new: TileManifest, append: bool, first: int | None) -> None:
    """Refuse, in one line, sections not in the build (without ``append``) and tiles of another size."""
    if new.dtype != old.dtype:
        raise InputError(f"new tiles are {new.dtype}, the build's are {old.dtype}", file=new.source)
    have = set(old.sections)
    unknown = sorted(set(new.sections) - have)
    if unknown and not append:
        raise InputError(f"section(s) {unknown} are not in this build; pass --append to add new sections "
                         "(nothing was changed)", file=new.source, row=new.section_tiles(unknown[0])[0].row)
    if append and first is not None and unknown and min(unknown) < first:
        raise InputError(f"section {min(unknown)} comes before the build's first section {first}; "
                         "only later sections (or lost ones) can be appended", file=new.source,
                         row=new.section_tiles(min(unknown))[0].row)
    for s in new.sections:
        ref = old.section_tiles(s) if s in have else old.tiles
        w, h = _common_size(ref)
        for t in new.section_tiles(s):
            if (t.width, t.height) != (w, h):
                raise InputError(f"tile {t.tile!r} of section {s} is {t.width} x {t.height} px, the build's "
                                 f"tiles are {w} x {h}; a region imaged at another pixel size needs a "
                                 "pixel_size column (nothing was changed)", file=new.source, row=t.row,
                                 section=s)


def _changed_tiles(old: TileManifest, new: TileManifest) -> dict[str, list[str]]:
    """Return section (text) -> names of tiles of existing sections that the update replaces or adds.

    A row naming an existing tile counts when its file, stage position or the file's size or
    modification time (a tile imaged again in place, under the same path) differs.
    """
    before = {(t.section, t.tile): t for t in old.tiles}
    have = set(old.sections)
    out: dict[str, list[str]] = {}
    for t in new.tiles:
        if t.section not in have:
            continue
        o = before.get((t.section, t.tile))
        # A tile imaged again in place keeps its path; its file's size or modification time tells.
        same_file = o is not None and Path(o.path).resolve() == Path(t.path).resolve() and \
            old.files.get(str(o.path), ())[:2] == new.files.get(str(t.path), ())[:2]
        if o is None or not same_file or (o.x, o.y) != (t.x, t.y):
            out.setdefault(str(t.section), []).append(t.tile)
    return out


# -------------------------------------------------------------- prediction
def _predicted_shards(build: BuildFolder, old: TileManifest, new: TileManifest, changed: dict, added: list[int],
                      canvas: Canvas | None) -> dict[str, list]:
    """Return plane (text) -> level-0 shards the update is expected to rewrite (before anything is solved).

    A replaced or added tile lands near its stage position (placed like its section's other
    tiles), within the stitch stage's largest stage error; its footprint there and its old
    one, with the footprints of the tiles they meet, are dirty. New sections dirty their plane.
    """
    from ..render.dirty import all_shards, changed_boxes, level0_shards

    if canvas is None:
        return {}
    settings = build.config.render
    block = settings.chunk * settings.shard
    margin = float(getattr(build.config.stitch, "max_stage_error", 50.0))
    store = build.store
    out: dict[str, list] = {}
    for key, names in changed.items():
        s = int(key)
        st, al = store.load_stitch(s), store.load_alignment(s)
        if st is None or not st.tiles:
            continue
        shift = sorted(t.x - t.stage_x for t in st.tiles)[len(st.tiles) // 2], \
            sorted(t.y - t.stage_y for t in st.tiles)[len(st.tiles) // 2]
        tiles = {t.tile: t for t in st.tiles}
        for entry in new.section_tiles(s):
            if entry.tile in names:
                tiles[entry.tile] = TilePlacement(entry.tile, str(entry.path), entry.width + int(2 * margin),
                                                  entry.height + int(2 * margin), entry.x, entry.y,
                                                  entry.x + shift[0] - margin, entry.y + shift[1] - margin)
        guess = SectionStitch(s, st.dtype, list(tiles.values()), [], st.illumination, st.illumination_step)
        boxes, _ = changed_boxes((st, al), (guess, al))
        shards = level0_shards(boxes, canvas, block)
        out[str(s - canvas.first_section)] = _pack(shards)
    for s in added:
        z = s - canvas.first_section
        if z < canvas.depth:
            out[str(z)] = _pack(all_shards((canvas.height, canvas.width), block))
        else:
            out[str(z)] = "all (new plane)"
    return out


def _metrics(build: BuildFolder) -> dict:
    path = build.qc_dir / "metrics.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def _totals(build: BuildFolder) -> dict:
    return _metrics(build).get("totals", {})


# -------------------------------------------------------------------- plan
def plan_update(build: BuildFolder, new_tiles: Path, *, append: bool = False, hold_within: float = HOLD_WITHIN,
                realign_neighbours: bool = False) -> tuple[UpdatePlan, TileManifest, str]:
    """Check an update manifest and return its plan, the merged manifest and its CSV text; nothing is written.

    Raises
    ------
    InputError
        A section not in the build without ``append``, tiles of another size or pixel type,
        or a bad manifest; one line naming the file and row.
    """
    old = build.tile_manifest()
    new = read_tile_manifest(new_tiles)
    canvas = build.store.load_canvas()
    _check_new_tiles(old, new, append, canvas.first_section if canvas else None)
    text = merged_manifest(old, new)
    state = build.load_state()
    changed = _changed_tiles(old, new)
    added = sorted(set(new.sections) - set(old.sections))
    number = next_number(build.root)
    plan = UpdatePlan(number=number, status="planned",
                      source={"path": str(Path(new_tiles).resolve()), "sha256": _sha256(Path(new_tiles))},
                      append=append, hold_within=float(hold_within), tiles_before=str(state["tiles"]),
                      tiles_after=str(build.merged_manifest_path(number).resolve()),
                      manifests_before=list(state.get("manifests", [])), replaced=changed, added=added,
                      canvas_before=None if canvas is None else canvas.to_json(),
                      totals_before=_totals(build), created=now(), realign_neighbours=realign_neighbours)
    plan.predicted = _predicted_shards(build, old, new, changed, added, canvas)
    # The stitch step reads the new tiles and the tiles they overlap: their number decides where to run.
    plan.facts["restitched_tiles"] = _tiles_to_read(old, new, changed, build.config.stitch)
    return plan, new, text


def _tiles_to_read(old: TileManifest, new: TileManifest, changed: dict, settings) -> int:
    """Return how many tiles re-stitching the re-imaged sections reads: the new tiles and those they overlap."""
    import numpy as np

    from ..stitch.overlaps import find_overlaps

    count = 0
    for key, names in changed.items():
        s = int(key)
        incoming = {t.tile: t for t in new.section_tiles(s)}
        tiles = [t for t in old.section_tiles(s) if t.tile not in incoming] + list(incoming.values())
        overlaps = find_overlaps(np.array([(t.x, t.y) for t in tiles], float),
                                 np.array([(t.width, t.height) for t in tiles], np.int64),
                                 settings.min_overlap, math.ceil(2 * settings.max_stage_error))
        fresh = {i for i, t in enumerate(tiles) if t.tile in names}
        count += len(fresh | {i for ov in overlaps if {ov.a, ov.b} & fresh for i in (ov.a, ov.b)})
    return count


def dry_run_lines(plan: UpdatePlan) -> list[str]:
    """Return what an update would change, one line each, for ``--dry-run``."""
    lines = [f"update {plan.number:04d} (dry run: nothing written)"]
    for s in plan.sections:
        what = "new section" if s in plan.added else "tiles " + ", ".join(plan.replaced[str(s)])
        lines.append(f"  section {s}: {what}")
    for z, shards in sorted(plan.predicted.items(), key=lambda kv: int(kv[0])):
        listed = shards if isinstance(shards, str) else " ".join(shards)
        lines.append(f"  plane {z}: level-0 shards (row,col) {listed}")
    lines.append("  untouched sections keep their alignment unless the re-solve moves them more than "
                 f"{plan.hold_within:g} px; such sections would be rewritten too")
    from .update_reach import SAME_CONTENT_NCC

    lines.append("  a re-imaged section keeps its alignment without a re-solve when its new pixels show the volume's "
                 f"old content (block shift <= {plan.hold_within:g} px, correlation >= {SAME_CONTENT_NCC:g}); else "
                 "its window is solved again")
    where = "in this process" if in_process(plan, None) else "on a Dask cluster (or --scheduler)"
    lines.append(f"  would run {where} ({sum(len(v) for v in plan.replaced.values())} tile(s) replaced or added, "
                 f"{plan.facts.get('restitched_tiles', 0)} tile(s) read to register their pairs again)")
    return lines


# ----------------------------------------------------------------- execute
def _begin(build: BuildFolder, plan: UpdatePlan, text: str, checked: TileManifest) -> None:
    """Keep the records as they are, write the plan, then point the build at the merged manifest."""
    d = plan_dir(build.root, plan.number)
    shutil.rmtree(d, ignore_errors=True)  # a folder without a plan: an earlier attempt that wrote nothing
    d.mkdir(parents=True)
    snapshot_transforms(build.store.root, d / "before")
    save_plan(build.root, plan)
    merged = Path(plan.tiles_after)
    atomic_write_text(merged, text)
    build.update_state(tiles=str(merged), manifests=plan.manifests_before + [str(merged)])
    # Files the kept snapshot already checked (unchanged size and mtime) are not opened again.
    build.keep_checked_manifest(read_tile_manifest(merged, known=build.checked_headers()), csv_facts(merged))


def _before_store(build: BuildFolder, plan: UpdatePlan) -> TransformStore:
    return TransformStore(plan_dir(build.root, plan.number) / "before")


def _stitch(build: BuildFolder, plan: UpdatePlan, mappers) -> None:
    """Stitch appended sections whole; in re-imaged ones register only the pairs of their new tiles.

    The pairs of two untouched tiles keep their stored results and the untouched tiles their
    placement (:func:`stackbuild.run.update_stitch.restitch_section`).
    """
    from . import stages
    from .update_stitch import restitch_task

    before, store = _before_store(build, plan), build.store
    manifest = build.tile_manifest()
    whole = [s for s in plan.sections if before.load_stitch(s) is None]
    if whole:
        stages.stitch_stage(build, mappers("stitch"), sections=whole)
    jobs = [(str(build.root), str(before.root), int(key), tuple(manifest.section_tiles(int(key))), tuple(names),
             build.config.stitch) for key, names in sorted(plan.replaced.items(), key=lambda kv: int(kv[0]))
            if int(key) not in whole]
    held = {str(f["section"]): f for f in mappers("stitch")(restitch_task, jobs)}
    plan.facts["stitch"] = {"held": held, "pairs": sum(f["pairs"] for f in held.values()) +
                            sum(len(store.load_stitch(s).pairs) for s in whole),
                            "pairs_kept": sum(f["pairs_kept"] for f in held.values())}


def _align(build: BuildFolder, plan: UpdatePlan, mappers) -> None:
    from ..align.stage import align_sections
    from ..render.dirty import _same_alignment
    from ..transforms.hold import hold_alignments
    from .update_reach import alignment_reach

    before, store = _before_store(build, plan), build.store
    # A re-imaged section whose new pixels show its old content where it was keeps its alignment
    # without a re-solve (the re-solve could move it only by its own noise, which the hold discards).
    reach = alignment_reach(build, before, plan.replaced, plan.hold_within, mappers("compare"))
    same = {s for s, r in reach.items() if r["same"]}
    resolve = sorted(set(plan.sections) - same)
    checked = {str(s): {"kept_without_solve": r["same"], "why": r["why"], "tiles": r["tiles"]}
               for s, r in sorted(reach.items())}
    if not resolve:
        _killed_here("align")
        plan.facts["align"] = {"realigned": [], "frame_rms_px": None, "largest_untouched_move_px": 0.0,
                               "moved_px": {}, "moved_beyond_tolerance": [], "window": [], "checked": checked}
        return
    scratch = build.scratch_dir("align")
    source = _Window(build.root, _window(store.sections_with("stitch"), resolve, build.config.align.neighbours,
                                         appended=plan.added))
    try:
        new = align_sections(source, build.config.align,
                             mapper=mappers("align"), progress=mappers.bar("solve"), scratch=scratch)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    old = {s: a for s in new if (a := before.load_alignment(s)) is not None}
    bboxes = {s: store.load_stitch(s).bbox() for s in new}
    # Re-imaged tiles were placed in their section's old frame, so its old alignment still holds unless
    # the re-solve moves it beyond the tolerance; untouched sections are held (no pixel of theirs may
    # change), except, when sections are appended, the existing ones the new ones are matched to.
    changed = {int(k) for k in plan.replaced} - same
    untouched = {s for s in old if s not in changed}
    near_new = {s for s in old if plan.realign_neighbours
                and any(0 < a - s <= build.config.align.neighbours for a in plan.added)}
    keep, facts = hold_alignments(old, new, bboxes, fit_on=untouched or set(old),
                                  movable=changed | near_new, tolerance=plan.hold_within)
    anchored = _anchor_appended(plan, old, new, keep, bboxes)
    for s, rec in keep.items():
        if not _same_alignment(store.load_alignment(s), rec):
            store.save_alignment(rec)
    _killed_here("align")
    moved = {s: v for s, v in facts["moved_px"].items() if s not in changed}
    plan.facts["align"] = {"realigned": facts["realigned"], "frame_rms_px": facts["frame_rms_px"],
                           "largest_untouched_move_px": max(moved.values(), default=0.0),
                           "moved_px": {str(s): round(v, 3) for s, v in sorted(facts["moved_px"].items())},
                           "moved_beyond_tolerance": sorted(s for s, v in facts["moved_px"].items()
                                                            if v > plan.hold_within),
                           "window": sorted(new), "checked": checked, "anchored": anchored}


def _anchor_appended(plan: UpdatePlan, old: dict, new: dict, keep: dict, bboxes: dict) -> dict:
    """Re-express each appended section through the nearest existing section below it (in place in ``keep``).

    See :mod:`stackbuild.run.update_align`; returns ``{section: {"anchor", "moved_px"}}``, how far
    this moved each new section from the one-affine frame change.
    """
    from .update_align import anchor_moves, through_anchor

    out = {}
    for s in plan.added:
        below = [a for a in old if a < s and a in keep and a in new]
        if s not in new or not below:
            continue
        a = max(below)
        try:
            rec = through_anchor(new[s], keep[a], new[a], bboxes[s])
        except ValueError as exc:  # an inverse that does not converge: keep the affine frame change
            log.warning("section %s: not anchored on section %s (%s)", s, a, exc)
            continue
        out[str(s)] = {"anchor": a, "moved_px": round(anchor_moves(keep[s], rec, bboxes[s]), 3)}
        keep[s] = rec
    return out


def _window(sections: list[int], changed: list[int], neighbours: int, appended=()) -> list[int]:
    """Return the sections solved again: each changed one and ``neighbours + 1`` stitched sections each side.

    The sections around a changed one anchor it (their alignments are held; see
    :func:`stackbuild.transforms.hold.hold_alignments`), so the rest of the stack is not solved again.
    An appended section needs only the ``neighbours`` sections it is matched to: it is re-expressed
    through the nearest of them (:func:`_anchor_appended`).
    """
    have = sorted(sections)
    keep = set()
    for s in changed:
        if s not in have:
            continue
        k = have.index(s)
        reach = neighbours if s in appended else neighbours + 1
        keep.update(have[max(0, k - reach):k + reach + 1])
    return sorted(keep)


class _Window:
    """A build's sections restricted to ``sections`` (an align source: see :mod:`stackbuild.align.sources`)."""

    def __init__(self, root, sections: list[int]):
        from ..align.sources import BuildSource

        self._source = BuildSource(root)
        self._sections = list(sections)

    def sections(self) -> list[int]:
        return list(self._sections)

    def __getattr__(self, name):
        if name.startswith("__") or name in ("_source", "_sections"):
            raise AttributeError(name)  # not delegated (pickling looks these up before __dict__ is set)
        return getattr(self._source, name)


def _dirty(build: BuildFolder, plan: UpdatePlan) -> tuple[Canvas, dict, dict]:
    """Return the settled canvas, its facts and plane -> level-0 shards whose pixels can change."""
    from ..render.canvas import compute_canvas, settle_canvas
    from ..render.dirty import changed_boxes, level0_shards

    settings = build.config.render
    block = settings.chunk * settings.shard
    manifest = build.tile_manifest()
    vol = build.config.volume
    fresh = compute_canvas(build.store, manifest.sections, manifest.lost_sections, vol.pixel_size,
                           vol.section_thickness)
    previous = None if plan.canvas_before is None else Canvas.from_json(plan.canvas_before)
    canvas, facts = settle_canvas(previous, fresh, shard=block, chunk=settings.chunk)
    before, store = _before_store(build, plan), build.store
    sections = set(store.sections_with("stitch")) | set(before.sections_with("stitch"))
    dirty = {}
    for s in sorted(sections):
        if _untouched(before, store, s):
            continue
        boxes, _ = changed_boxes((before.load_stitch(s), before.load_alignment(s)),
                                 (store.load_stitch(s), store.load_alignment(s)))
        boxes += _replaced_boxes(store, s, plan.replaced.get(str(s), []))
        shards = level0_shards(boxes, canvas, block)
        if shards:
            dirty[str(s - canvas.first_section)] = _pack(shards)
    return canvas, facts, dirty


def _replaced_boxes(store: TransformStore, section: int, names: list[str]) -> list:
    """Return the aligned-frame footprints of replaced tiles and of the tiles they overlap.

    A tile imaged again in place (same path, same placement) leaves its records as they were,
    so the record comparison finds nothing; its pixels changed all the same.
    """
    from ..render.dirty import tile_neighbourhood

    return tile_neighbourhood(store.load_stitch(section), store.load_alignment(section), names)


def _untouched(before: TransformStore, store: TransformStore, section: int) -> bool:
    """Return True if a section's stitch and align records are the very files kept before the update.

    The kept records are hard links and a record is only ever replaced by renaming a new file
    into place, so the same file (inode) means the same record, arrays included.
    """
    for kind in ("stitch", "align"):
        a, b = before.section_dir(section) / f"{kind}.json", store.section_dir(section) / f"{kind}.json"
        try:
            if not os.path.samefile(a, b):
                return False
        except OSError:  # missing on one side (or both): let the records be compared
            return False
    return True


def _render(build: BuildFolder, plan: UpdatePlan, mappers) -> None:
    from ..render.patch import patch_volume
    from . import stages

    if plan.render is None:
        canvas, facts, dirty = _dirty(build, plan)
        plan.render = {"canvas": canvas.to_json(), "canvas_facts": facts, "shards": dirty}
        save_plan(build.root, plan)  # the set to write is fixed before any of it is written
    canvas = Canvas.from_json(plan.render["canvas"])
    facts = plan.render["canvas_facts"]
    previous = None if plan.canvas_before is None else Canvas.from_json(plan.canvas_before)
    if previous is None or any(facts["moved"]) or facts["first_moved"]:
        build.store.save_canvas(canvas)
        done = stages.render_stage(build, overwrite=True, progress=mappers.bar("render"), mapper=mappers())
        plan.facts["render"] = {"planes": done.get("planes", []), "full": True}
    else:
        dirty = {int(z): _unpack(v) for z, v in plan.render["shards"].items()}
        bar = mappers.bar("render")

        def progress(done: int, total: int) -> None:
            bar(done, total)
            if done:
                _killed_here("render")
        done = patch_volume(build.root, build.config.render, canvas, dirty, previous=previous, progress=progress,
                            mapper=mappers())
        plan.facts["render"] = {"planes": done["planes"], "shards": done["shards"],
                                "shards_total": done["shards_total"], "full": False}
    stages.render_channels_stage(build, progress=mappers.bar("markers"), mapper=mappers())


class _Mappers:
    """Mappers and progress bars for an update's steps: on a Dask cluster, or in this process.

    ``mappers(name)`` returns a mapper whose progress shows as ``name`` (none without a name);
    ``mappers.bar(name)`` a progress bar. ``where`` says which, for the summary.
    """

    def __init__(self, client, show: bool):
        self.client, self.show = client, show
        self.where = "in this process" if client is None else "on the Dask cluster"

    def bar(self, name: str):
        from .progress import ProgressBar

        return ProgressBar(name, self.show)

    def __call__(self, name: str | None = None):
        from .cluster import client_mapper, serial_mapper

        bar = self.bar(name) if name else None
        return serial_mapper(bar) if self.client is None else client_mapper(self.client, bar)


def changed_sections(replaced: dict) -> set[int]:
    """Return the sections (numbers) of a plan's ``replaced`` mapping."""
    return {int(s) for s in replaced}


def in_process(plan: UpdatePlan, scheduler) -> bool:
    """Return True if the update is small enough to run in this process (no cluster is started).

    Small: no appended section, at most :data:`IN_PROCESS_TILES` replaced or added tiles and at
    most :data:`IN_PROCESS_SECTION_TILES` tiles read to register their pairs again (the new tiles and
    those they overlap), so its work (those pairs, a few shards, the report's changed sections) takes less time than
    starting worker processes. A given ``scheduler`` is always used.
    """
    return scheduler is None and not plan.added and \
        sum(len(v) for v in plan.replaced.values()) <= IN_PROCESS_TILES and \
        plan.facts.get("restitched_tiles", 0) <= IN_PROCESS_SECTION_TILES


@contextlib.contextmanager
def _mappers_for(plan: UpdatePlan, workers, scheduler, show: bool):
    """Yield the :class:`_Mappers` of an update: this process when it is small, else a cluster."""
    from .cluster import dask_client

    if in_process(plan, scheduler):
        yield _Mappers(None, show)
        return
    with dask_client(workers, scheduler) as client:
        yield _Mappers(client, show)


def _channels(build: BuildFolder, plan: UpdatePlan, mappers) -> None:
    from . import stages

    stages.channels_stage(build, mappers("channels"))
    _killed_here("channels")


def _run_steps(build: BuildFolder, plan: UpdatePlan, *, workers, scheduler, show: bool, fail_on) -> object:
    from . import stages

    seconds = plan.facts.setdefault("seconds", {})
    t0 = time.monotonic()
    with _mappers_for(plan, workers, scheduler, show) as mappers:
        seconds["cluster"] = round(time.monotonic() - t0, 2)
        plan.facts["ran"] = mappers.where
        # Each step records its status once done, so a re-run resumes after the last finished one.
        for step, status, run in (("stitch", "stitched", _stitch), ("align", "aligned", _align),
                                  ("channels", "registered", _channels), ("render", "rendered", _render)):
            if not plan.reached(status):
                t0 = time.monotonic()
                run(build, plan, mappers)
                plan.status, seconds[step] = status, round(time.monotonic() - t0, 2)
                save_plan(build.root, plan)
        t0 = time.monotonic()
        verdict = stages.report_stage(build, fail_on=fail_on, progress=mappers.bar("report"))
        seconds["report"] = round(time.monotonic() - t0, 2)
    # The report re-measures only sections and planes whose inputs changed (qc/measured keeps the rest).
    doc = _metrics(build)
    plan.facts["totals_after"] = doc.get("totals", {})
    reused = doc.get("reused", {}) or {}
    plan.facts["report"] = {"sections_reused": reused.get("sections"),
                            "sections": len(doc.get("sections", []) or []),
                            "pairs_reused": reused.get("pairs"), "pairs_measured": reused.get("pairs_measured")}
    plan.facts["verdict"] = {"passed": verdict.passed, "failures": list(verdict.failures)}
    plan.status = "done"
    save_plan(build.root, plan)
    return verdict


def update_build(build: BuildFolder, new_tiles: Path | None = None, *, append: bool = False,
                 dry_run: bool = False, resume: bool = False, hold_within: float = HOLD_WITHIN,
                 realign_neighbours: bool = False, fail_on: list[str] | None = None, workers=None,
                 scheduler=None, show_progress: bool = True) -> UpdateOutcome:
    """Apply an update manifest to a finished build (or finish an interrupted update); return the outcome.

    Parameters
    ----------
    build : BuildFolder
        A finished build.
    new_tiles : Path, optional
        The update manifest (see the module docstring). Given again after a killed update,
        it finishes that update; another manifest is refused while one is unfinished.
    append : bool
        Allow section numbers the build does not have (after its first section).
    dry_run : bool
        Only plan: return the dirty sections, planes and shards; write nothing.
    resume : bool
        Finish the unfinished update (``new_tiles`` may be omitted).
    hold_within : float
        Tolerance (section pixels) under which a re-imaged section keeps its alignment.
    realign_neighbours : bool
        With ``append``: existing sections matched to the new ones are re-aligned when the
        re-solve moves them beyond ``hold_within`` (by default every existing section is held).
    fail_on : list of str, optional
        ``--fail-on`` bars for the report.

    Raises
    ------
    InputError
        Bad input, or a request that does not fit the state of the build; nothing is changed then.
    """
    from .start import refuse_while_replaced

    refuse_while_replaced(build, "update")
    pending = unfinished(build.root)
    if pending is not None and pending.status == "rolling_back":
        raise InputError(f"update {pending.number:04d} is being rolled back; run 'stackbuild update "
                         f"{build.root} --rollback' again to finish that first", file=build.root)
    if pending is not None:
        same = new_tiles is None or _sha256(Path(new_tiles)) == pending.source["sha256"]
        if not (resume or new_tiles is not None) or not same:
            raise InputError(f"update {pending.number:04d} ({pending.source['path']}) did not finish; run it "
                             "again with --resume (or roll it back with --rollback) before another update",
                             file=build.root)
        if dry_run:
            return UpdateOutcome(pending, dry_run_lines(pending))
        plan = pending
    else:
        if new_tiles is None:
            raise InputError("nothing to resume: every update of this build has finished", file=build.root)
        from .insets import is_inset

        if is_inset(Path(new_tiles), build.config.volume.pixel_size):
            if dry_run:
                return UpdateOutcome(None, [f"{new_tiles}: finer tiles; they would be stitched, registered to their "
                                            "section and written as an inset under volume.zarr/insets/ "
                                            "(dry run: nothing written)"])
            return UpdateOutcome(None, _inset(build, Path(new_tiles), workers, scheduler, show_progress))
        plan, new, text = plan_update(build, Path(new_tiles), append=append, hold_within=hold_within,
                                      realign_neighbours=realign_neighbours)
        if dry_run:
            return UpdateOutcome(plan, dry_run_lines(plan))
        _begin(build, plan, text, new)
        _stitch_checked(build, plan)
    verdict = _run_steps(build, plan, workers=workers, scheduler=scheduler, show=show_progress, fail_on=fail_on)
    return UpdateOutcome(plan, summary_lines(plan, verdict), verdict)


def _inset(build: BuildFolder, path: Path, workers, scheduler, show: bool) -> list[str]:
    """Add an inset (:func:`stackbuild.run.insets.add_inset`): in this process when it has at most
    :data:`IN_PROCESS_TILES` tiles and no scheduler is given, else on a Dask cluster; one task per chunk."""
    from .cluster import dask_client
    from .insets import add_inset

    n_tiles = len(read_tile_manifest(path).tiles)
    if scheduler is None and n_tiles <= IN_PROCESS_TILES:
        return add_inset(build, path, mapper=_Mappers(None, show)("inset"))
    with dask_client(workers, scheduler) as client:
        return add_inset(build, path, mapper=_Mappers(client, show)("inset"))


def _stitch_checked(build: BuildFolder, plan: UpdatePlan) -> None:
    """Read every new tile's pixels once before the stitch step, so an unreadable one changes nothing."""
    from ..tiles import read_tile

    merged = build.tile_manifest()
    try:
        for s in plan.sections:
            names = set(plan.replaced.get(str(s), [])) if s not in plan.added else None
            for t in merged.section_tiles(s):
                if names is None or t.tile in names:
                    read_tile(t.path, t.height, t.width, t.section, dtype=t.dtype, source="update manifest")
    except InputError:
        _undo_begin(build, plan)
        raise


def _undo_begin(build: BuildFolder, plan: UpdatePlan) -> None:
    """Take back what :func:`_begin` did (only records of the build's inputs; no transform was touched)."""
    build.update_state(tiles=plan.tiles_before, manifests=plan.manifests_before)
    tiles_before = Path(plan.tiles_before)
    build.keep_checked_manifest(read_tile_manifest(tiles_before, known=build.checked_headers()),
                                csv_facts(tiles_before))
    Path(plan.tiles_after).unlink(missing_ok=True)
    shutil.rmtree(plan_dir(build.root, plan.number), ignore_errors=True)


def summary_lines(plan: UpdatePlan, verdict) -> list[str]:
    """Return the update's summary for the terminal, one line each."""
    f = plan.facts
    n_repl = sum(len(v) for v in plan.replaced.values())
    lines = [f"update {plan.number:04d}: {n_repl} tile(s) replaced or added in section(s) "
             f"{sorted(int(s) for s in plan.replaced) or '-'}; new section(s) {plan.added or '-'}; "
             f"ran {f.get('ran', 'on the Dask cluster')}"]
    held = f.get("stitch", {}).get("held", {})
    moved = [v["held_moved_px"] for v in held.values() if v.get("held_moved_px") is not None]
    lines.append(f"  stitch: {f.get('stitch', {}).get('pairs', 0)} tile pair(s) registered again, "
                 f"{f.get('stitch', {}).get('pairs_kept', 0)} kept from the build; untouched "
                 f"tiles held (a free re-solve would have moved them up to {max(moved, default=0.0):.2f} px)")
    a = f.get("align", {})
    for s, c in a.get("checked", {}).items():
        lines.append(f"  align: section {s} " + ("keeps its alignment without a re-solve: " if c["kept_without_solve"]
                                                  else "solved again: ") + c["why"])
    if a.get("window"):
        lines.append(f"  align: sections {a['window']} solved again, {len(a.get('realigned', []))} re-aligned "
                     f"{a.get('realigned', [])}; the re-solve would move untouched sections up to "
                     f"{a.get('largest_untouched_move_px', 0.0):.2f} px (held; re-imaged"
                     f"{' and neighbouring' if plan.realign_neighbours else ''} sections re-aligned beyond "
                     f"{plan.hold_within:g} px)")
    if a.get("anchored"):
        anchors = sorted({v["anchor"] for v in a["anchored"].values()})
        lines.append(f"  align: appended section(s) {sorted(int(k) for k in a['anchored'])} kept as solved against "
                     f"section(s) {anchors} as stored (moved up to "
                     f"{max(v['moved_px'] for v in a['anchored'].values()):.2f} px from one affine frame change)")
    r = f.get("render", {})
    if r.get("full"):
        lines.append(f"  render: the canvas origin moved, every plane rendered again ({len(r.get('planes', []))})")
    elif r:
        lines.append(f"  render: {r['shards'][0]} of {r['shards_total'][0]} level-0 shards rewritten "
                     f"({sum(r['shards'])} of {sum(r['shards_total'])} over all levels) in plane(s) {r['planes']}")
    before, after = plan.totals_before, f.get("totals_after", {})
    for key in ("stitch.rms", "stitch.p95", "align.rms", "align.p95"):
        if key in before or key in after:
            lines.append(f"  {key}: {_num(before.get(key))} -> {_num(after.get(key))} px")
    rep = f.get("report", {})
    if rep.get("sections_reused") is not None:
        lines.append(f"  report: {rep['sections'] - rep['sections_reused']} of {rep['sections']} section(s) measured "
                     "again, the others' measurements kept (their inputs did not change)")
    if rep.get("pairs_measured") is not None and rep.get("pairs_reused") is not None:
        lines.append(f"  report: probe: {rep['pairs_measured']} of {rep['pairs_measured'] + rep['pairs_reused']} plane "
                     "pair(s) measured again")
    if verdict is not None:
        lines.append("  report: " + ("PASSED" if verdict.passed else "FAILED: " + "; ".join(verdict.failures)))
    return lines


def _num(v) -> str:
    return "-" if v is None else f"{v:.3g}"


# ---------------------------------------------------------------- rollback
def _record_files(store: TransformStore) -> dict[tuple, Path]:
    """Return ``(section or None, kind) -> JSON path`` of every current record of a store."""
    out = {}
    if store.root.is_dir():
        for p in store.root.glob("*.json"):
            out[(None, p.stem)] = p
    base = store.root / "sections"
    if base.is_dir():
        for d in base.iterdir():
            if d.is_dir() and d.name.isdigit():
                for p in d.glob("*.json"):
                    out[(int(d.name), p.stem)] = p
    return out


def _body(path: Path) -> str:
    doc = json.loads(path.read_text(encoding="utf-8"))
    doc.pop("written", None)
    return json.dumps(doc, sort_keys=True)


def _restore_records(build: BuildFolder, before: TransformStore) -> list:
    """Put every record of ``before`` back (the current one goes to history); retire records it lacks."""
    store = build.store
    old, cur = _record_files(before), _record_files(store)
    restored = []
    for key in sorted(set(old) | set(cur), key=lambda k: (k[0] is None, k[0] or 0, k[1])):
        section, kind = key
        if kind == "canvas":
            continue  # the canvas only grows: planes keep their place
        if key not in old:
            store.retire(kind, section)
            restored.append(key)
            continue
        if key in cur and _body(old[key]) == _body(cur[key]):
            continue
        if kind == "stitch":
            store.save_stitch(before.load_stitch(section))
        elif kind == "align":
            store.save_alignment(before.load_alignment(section))
        else:
            store.save_doc(kind, before.load_doc(kind, section), section)
        restored.append(key)
    return restored


def rollback_update(build: BuildFolder, *, fail_on: list[str] | None = None, workers=None, scheduler=None,
                    show_progress: bool = True) -> UpdateOutcome:
    """Put back the transforms and tile manifest from before the latest update, and the volume with them.

    The shards to rewrite (where the current records and the earlier ones render differently) are
    recorded before any record is restored, so a killed rollback run again finishes the same work.
    The canvas keeps its size: planes of sections the update appended become empty (lost) planes.
    """
    from ..render.canvas import compute_canvas, settle_canvas
    from ..render.dirty import changed_boxes, level0_shards
    from ..render.patch import patch_volume
    from . import stages
    plans = [p for p in load_plans(build.root) if p.status != "rolled_back"]
    if not plans:
        raise InputError("no update to roll back", file=build.root)
    plan = plans[-1]
    before = _before_store(build, plan)
    settings = build.config.render
    block = settings.chunk * settings.shard
    if plan.status != "rolling_back":
        canvas = build.store.load_canvas()
        dirty: dict[str, set] = {}
        sections = set(build.store.sections_with("stitch")) | set(before.sections_with("stitch"))
        for s in sorted(sections):
            boxes, _ = changed_boxes((build.store.load_stitch(s), build.store.load_alignment(s)),
                                     (before.load_stitch(s), before.load_alignment(s)))
            if canvas is not None and boxes:
                dirty[str(s - canvas.first_section)] = level0_shards(boxes, canvas, block)
        for z, shards in ((plan.render or {}).get("shards") or {}).items():
            dirty.setdefault(z, set()).update(_unpack(shards))
        plan.facts["rollback"] = {"from_status": plan.status,
                                  "shards": {z: _pack(v) for z, v in dirty.items()}}
        plan.status = "rolling_back"
        save_plan(build.root, plan)
    restored = _restore_records(build, before)
    build.update_state(tiles=plan.tiles_before, manifests=plan.manifests_before)
    tiles_before = Path(plan.tiles_before)
    build.keep_checked_manifest(read_tile_manifest(tiles_before, known=build.checked_headers()),
                                csv_facts(tiles_before))
    manifest = build.tile_manifest()
    vol = build.config.volume
    fresh = compute_canvas(build.store, manifest.sections, manifest.lost_sections, vol.pixel_size,
                           vol.section_thickness)
    previous = build.store.load_canvas()
    canvas, _ = settle_canvas(previous, fresh, shard=block, chunk=settings.chunk)
    dirty = {int(z): _unpack(v) for z, v in plan.facts["rollback"]["shards"].items()}
    with _mappers_for(plan, workers, scheduler, show_progress) as mappers:
        done = patch_volume(build.root, settings, canvas, dirty, previous=previous,
                            progress=mappers.bar("render"), mapper=mappers())
        stages.render_channels_stage(build, progress=mappers.bar("markers"), mapper=mappers())
        verdict = stages.report_stage(build, fail_on=fail_on, progress=mappers.bar("report"))
    plan.status = "rolled_back"
    plan.facts["rollback"].update({"records": len(restored), "rewritten": done["shards"]})
    save_plan(build.root, plan)
    lines = [f"update {plan.number:04d} rolled back: {len(restored)} record(s) restored, "
             f"{done['shards'][0]} of {done['shards_total'][0]} level-0 shards rewritten in plane(s) {done['planes']}",
             "  report: " + ("PASSED" if verdict.passed else "FAILED: " + "; ".join(verdict.failures))]
    return UpdateOutcome(plan, lines, verdict)
