"""``update --rollback``: the transforms and tile manifest from before the latest update, and the volume with them.

The records kept when the update began (``DIR/updates/NNNN/before``, see
:mod:`stackbuild.run.update_plan`) are put back, the current ones going to the store's history;
only the shards where the two sets of records render differently are written again
(:func:`rollback_update`).
"""
from __future__ import annotations

import json
from pathlib import Path

from ..errors import InputError
from ..folder import BuildFolder, csv_facts
from ..manifest import read_tile_manifest
from ..transforms.store import TransformStore
from .update_cluster import update_mappers
from .update_plan import before_store, load_plans, pack_shards, save_plan, unpack_shards
from .update_summary import UpdateOutcome, verdict_line


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
    before = before_store(build.root, plan)
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
            dirty.setdefault(z, set()).update(unpack_shards(shards))
        plan.facts["rollback"] = {"from_status": plan.status,
                                  "shards": {z: pack_shards(v) for z, v in dirty.items()}}
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
    dirty = {int(z): unpack_shards(v) for z, v in plan.facts["rollback"]["shards"].items()}
    with update_mappers(plan, workers, scheduler, show_progress) as mappers:
        done = patch_volume(build.root, settings, canvas, dirty, previous=previous,
                            progress=mappers.bar("render"), mapper=mappers())
        stages.render_channels_stage(build, progress=mappers.bar("markers"), mapper=mappers())
        verdict = stages.report_stage(build, fail_on=fail_on, progress=mappers.bar("report"))
    plan.status = "rolled_back"
    plan.facts["rollback"].update({"records": len(restored), "rewritten": done["shards"]})
    save_plan(build.root, plan)
    lines = [f"update {plan.number:04d} rolled back: {len(restored)} record(s) restored, "
             f"{done['shards'][0]} of {done['shards_total'][0]} level-0 shards rewritten in plane(s) {done['planes']}",
             verdict_line(verdict)]
    return UpdateOutcome(plan, lines, verdict)
