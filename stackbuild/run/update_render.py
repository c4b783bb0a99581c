"""The shards an update rewrites: predicted before anything is solved, fixed before the render step, written.

:func:`predicted_shards` guesses them from stage positions for ``--dry-run`` and the plan;
:func:`dirty_shards` finds them from the records before and after the update (only sections whose
records changed are compared); :func:`render_step` records them in the plan before it writes any
(:mod:`stackbuild.render.patch`), so a killed render run again writes the same set. A canvas
whose origin moved renders every plane again.
"""
from __future__ import annotations

import math
import os

import numpy as np

from ..errors import InputError
from ..folder import BuildFolder
from ..manifest import TileManifest
from ..transforms.records import Canvas, SectionStitch, TilePlacement
from ..transforms.store import TransformStore
from .update_plan import UpdatePlan, before_store, killed_here, pack_shards, save_plan, unpack_shards


def predicted_shards(build: BuildFolder, new: TileManifest, changed: dict, added: list[int],
                     canvas: Canvas | None) -> dict[str, list]:
    """Return plane (text) -> level-0 shards the update is expected to rewrite (before anything is solved).

    A replaced or added tile lands near its stage position (placed like its section's other
    tiles), within the stitch stage's largest stage error; its footprint there and its old
    one, with the footprints of the tiles they meet, are dirty. New sections dirty their plane.
    """
    from ..render.dirty import all_shards, changed_boxes, level0_shards

    if canvas is None:
        return {}
    config = build.config  # read from build.json at each access
    settings = config.render
    block = settings.chunk * settings.shard
    margin = float(getattr(config.stitch, "max_stage_error", 50.0))
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
        out[str(s - canvas.first_section)] = pack_shards(shards)
    for s in added:
        z = s - canvas.first_section
        if z < canvas.depth:
            out[str(z)] = pack_shards(all_shards((canvas.height, canvas.width), block))
        else:
            out[str(z)] = "all (new plane)"
    return out


def dirty_shards(build: BuildFolder, plan: UpdatePlan) -> tuple[Canvas, dict, dict, dict]:
    """Return the settled canvas, its facts, plane -> level-0 shards to write and plane -> changed pixel boxes.

    Only sections whose records the update replaced are read (:func:`_untouched` tells the
    others by their files alone), so the cost follows the update, not the stack. The shards are
    those the render's dirty boxes meet; the pixel boxes (:func:`changed_pixels`), inside them,
    hold every pixel whose value can change, for the report.
    """
    from ..render.dirty import changed_boxes, level0_shards

    settings = build.config.render
    block = settings.chunk * settings.shard
    before, store = before_store(build.root, plan), build.store
    records = {s: ((before.load_stitch(s), before.load_alignment(s)), (store.load_stitch(s), store.load_alignment(s)))
               for s in changed_sections(build, plan)}
    canvas, facts = _settled_canvas(build, plan, {s: new for s, (_, new) in records.items()}, block, settings.chunk)
    dirty, pixels = {}, {}
    for s, (old, new) in records.items():
        names = plan.replaced.get(str(s), [])
        boxes, whole = changed_boxes(old, new)
        core = list(boxes) if whole else _changed_tiles(old, new, names)
        boxes += _replaced_boxes(new, names)
        shards = level0_shards(boxes, canvas, block)
        if shards:
            dirty[str(s - canvas.first_section)] = pack_shards(shards)
            pixels[str(s - canvas.first_section)] = changed_pixels(core, canvas)
    return canvas, facts, dirty, pixels


def _changed_tiles(old: tuple, new: tuple, names) -> list:
    """Return the aligned-frame footprints, before and after, of tiles ``names`` and of tiles whose records changed.

    For a section whose alignment and illumination stand: a pixel takes its value from the tiles
    covering it (feathered by each tile's own distance to its edge, :mod:`stackbuild.sampler`), so
    only pixels covered by one of these tiles, before or after, can change.
    """
    from ..render.dirty import changed_tiles, tile_boxes

    (os_, oa), (ns, na) = old, new
    moved = set(names) | changed_tiles(os_, ns)
    return tile_boxes(os_, oa, moved) + tile_boxes(ns, na, moved)


def changed_pixels(boxes: list, canvas: Canvas) -> list[list[int]]:
    """Return aligned-frame ``boxes`` as level-0 canvas pixel boxes ``[x0, y0, x1, y1]`` (``x1, y1`` exclusive).

    Widened by a pixel and clipped as the render's dirty shards are
    (:func:`stackbuild.render.dirty.canvas_pixels`); a box inside another is left out.
    ``tests/test_update_transaction.py`` checks that every pixel an update changed lies inside them.
    """
    from ..render.dirty import canvas_pixels

    out = set()
    for box in boxes:
        pixels = canvas_pixels(box, canvas)
        if pixels is not None:
            c0, r0, c1, r1 = pixels
            out.add((c0, r0, c1 + 1, r1 + 1))
    inside = lambda a, b: a != b and b[0] <= a[0] and b[1] <= a[1] and a[2] <= b[2] and a[3] <= b[3]  # noqa: E731
    return [list(b) for b in sorted(out) if not any(inside(b, o) for o in out)]


def changed_sections(build: BuildFolder, plan: UpdatePlan) -> list[int]:
    """Return the sections whose stitch or align record the update replaced (or added), by their files alone."""
    before, store = before_store(build.root, plan), build.store
    sections = set(store.sections_with("stitch")) | set(before.sections_with("stitch"))
    return [s for s in sorted(sections) if not _untouched(before, store, s)]


def _settled_canvas(build: BuildFolder, plan: UpdatePlan, changed: dict, shard: int, chunk: int) -> tuple[Canvas, dict]:
    """Return :func:`~stackbuild.render.canvas.settle_canvas` of the stored canvas and the current records.

    ``changed`` maps each section whose records the update replaced to its ``(stitch, alignment)``.
    Every other section lies inside the stored canvas already (it was settled to hold it), so the
    tight canvas of the changed sections alone moves or grows the stored one exactly as the tight
    canvas of the whole stack would (:func:`~stackbuild.render.canvas.compute_canvas` reads every
    section; a test holds the two equal). Lost and flagged sections of the others are the stored
    canvas's. Without a stored canvas, every section is read.
    """
    from ..render.canvas import compute_canvas, section_footprint, settle_canvas

    manifest = build.tile_manifest()
    vol = build.config.volume
    previous = None if plan.canvas_before is None else Canvas.from_json(plan.canvas_before)
    if previous is None:
        fresh = compute_canvas(build.store, manifest.sections, manifest.lost_sections, vol.pixel_size,
                               vol.section_thickness)
        return settle_canvas(None, fresh, shard=shard, chunk=chunk)
    present = set(manifest.sections)
    lost = set(manifest.lost_sections) | {s for s in previous.lost_sections if s in present and s not in changed}
    flagged = {s: f for s, f in previous.flagged_sections.items() if s in present and s not in changed}
    boxes = []
    for s, (st, al) in sorted(changed.items()):
        if st is None or not st.tiles:
            lost.add(s)
            continue
        if st.dtype != previous.dtype:
            raise InputError(f"sections mix pixel types {sorted({st.dtype, previous.dtype})}", file=build.store.root,
                             section=s)
        boxes.append(section_footprint(st, al))
        flags = list(st.flags) + ([] if al is None else list(al.flags))
        if flags:
            flagged[s] = flags
    if boxes:  # the same rounding as compute_canvas
        b = np.array(boxes)
        ox, oy = math.floor(b[:, 0].min() + 0.5), math.floor(b[:, 1].min() + 0.5)
        width, height = math.ceil(b[:, 2].max() - 0.5) - ox + 1, math.ceil(b[:, 3].max() - 0.5) - oy + 1
    else:  # nothing changed its footprint: the stored geometry holds everything
        ox, oy, width, height = previous.origin_x, previous.origin_y, previous.width, previous.height
    everything = present | lost
    flagged = dict(sorted(flagged.items()))  # in section order, as compute_canvas gives them
    fresh = Canvas(width=int(width), height=int(height), origin_x=float(ox), origin_y=float(oy),
                   first_section=min(everything), last_section=max(everything), dtype=previous.dtype,
                   pixel_size_nm=float(vol.pixel_size), section_thickness_nm=float(vol.section_thickness),
                   lost_sections=sorted(lost), flagged_sections=flagged)
    return settle_canvas(previous, fresh, shard=shard, chunk=chunk)


def _replaced_boxes(records: tuple, names: list[str]) -> list:
    """Return the aligned-frame footprints of replaced tiles and of the tiles they overlap.

    ``records`` is the section's current ``(stitch, alignment)``. A tile imaged again in place
    (same path, same placement) leaves its records as they were, so the record comparison finds
    nothing; its pixels changed all the same.
    """
    from ..render.dirty import tile_neighbourhood

    return tile_neighbourhood(*records, names)


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


def render_step(build: BuildFolder, plan: UpdatePlan, mappers) -> None:
    """Write the dirty shards (fixed in the plan first) and the pyramid above them, then the marker pyramids."""
    from ..render.patch import patch_volume
    from . import stages

    if plan.render is None:
        canvas, facts, dirty, pixels = dirty_shards(build, plan)
        plan.render = {"canvas": canvas.to_json(), "canvas_facts": facts, "shards": dirty, "pixels": pixels}
        save_plan(build.root, plan)  # the set to write is fixed before any of it is written
    canvas = Canvas.from_json(plan.render["canvas"])
    facts = plan.render["canvas_facts"]
    previous = None if plan.canvas_before is None else Canvas.from_json(plan.canvas_before)
    if previous is None or any(facts["moved"]) or facts["first_moved"]:
        build.store.save_canvas(canvas)
        done = stages.render_stage(build, overwrite=True, progress=mappers.bar("render"), mapper=mappers())
        plan.facts["render"] = {"planes": done.get("planes", []), "full": True}
    else:
        dirty = {int(z): unpack_shards(v) for z, v in plan.render["shards"].items()}
        bar = mappers.bar("render")

        def progress(done: int, total: int) -> None:
            bar(done, total)
            if done:
                killed_here("render")
        # Chunks of a dirty shard outside the changed pixels keep their stored bytes (read back, not rendered).
        pixels = {int(z): b for z, b in (plan.render.get("pixels") or {}).items()}
        done = patch_volume(build.root, build.config.render, canvas, dirty, previous=previous, pixels=pixels,
                            progress=progress, mapper=mappers())
        plan.facts["render"] = {"planes": done["planes"], "shards": done["shards"],
                                "shards_total": done["shards_total"], "full": False}
    stages.render_channels_stage(build, progress=mappers.bar("markers"), mapper=mappers())
