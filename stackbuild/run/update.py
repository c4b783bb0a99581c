"""Re-imaged tiles and appended sections: an update of a finished build, run as a transaction.

An update manifest lists tiles imaged again (rows whose ``section`` and
``tile`` name an existing tile replace it; new tile names are added to their
section) and, with ``append``, whole new sections. The update

1. checks the manifest (:mod:`stackbuild.run.update_manifest`) and writes its plan
   (``DIR/updates/NNNN/plan.json``) with hard links to the transform records as they
   are, before it changes anything (:mod:`stackbuild.run.update_plan`);
2. registers again only the tile pairs that involve a new tile (stored results of the
   others are kept) and places the new tiles with every untouched one held where it was
   (:mod:`stackbuild.run.update_stitch`); appended sections are stitched whole;
3. keeps the alignment of a re-imaged section whose new pixels show its old content
   (:mod:`stackbuild.run.update_reach`); otherwise solves a window of sections around
   the changed ones and keeps the old alignment of every section (re-imaged ones
   included) the re-solve moves by no more than ``hold_within`` pixels
   (:mod:`stackbuild.run.update_window`); appended sections are re-expressed through
   the existing section they follow (:mod:`stackbuild.run.update_align`);
4. registers the marker images again;
5. writes only the shards whose pixels can change, and the pyramid above them
   (:mod:`stackbuild.run.update_render`), on a canvas that only ever grows
   (:func:`stackbuild.render.canvas.settle_canvas`);
6. writes the report.

Every step is recorded in the plan when it finishes. Each step's result depends
only on the records the earlier steps left and on the ``before`` records, so a
killed update run again (or ``--resume``) finishes exactly the same volume. A small
update runs in this process (:mod:`stackbuild.run.update_cluster`); the summary is
:mod:`stackbuild.run.update_summary`, the rollback :mod:`stackbuild.run.update_rollback`.
"""
from __future__ import annotations

import json
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError
from ..folder import BuildFolder, csv_facts
from ..manifest import TileManifest, read_tile_manifest
from ..transforms.store import atomic_write_text
from .update_cluster import inset_mappers, update_mappers
from .update_manifest import changed_tiles, check_new_tiles, merged_checked, merged_manifest, tiles_to_read
from .update_plan import (
    UpdatePlan, killed_here, next_number, now, plan_dir, save_plan, snapshot_transforms, unfinished,
)
from .update_render import predicted_shards, render_step
from .update_rollback import rollback_update
from .update_stitch import stitch_step
from .update_summary import UpdateOutcome, dry_run_lines, summary_lines
from .update_window import align_step

#: The command line's entry points, with the rest of the update's public names.
__all__ = ["HOLD_WITHIN", "UpdateOutcome", "merged_manifest", "plan_update", "rollback_update", "update_build"]

#: An untouched section keeps its alignment unless the re-solve moves one of its points further (section px).
HOLD_WITHIN = 0.5


def _sha256(path: Path) -> str:
    return csv_facts(path)["sha256"]


def _metrics(build: BuildFolder) -> dict:
    path = build.qc_dir / "metrics.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


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
    check_new_tiles(old, new, append, canvas.first_section if canvas else None)
    text = merged_manifest(old, new)
    state = build.load_state()
    changed = changed_tiles(old, new)
    added = sorted(set(new.sections) - set(old.sections))
    number = next_number(build.root)
    merged = merged_checked(old, new, build.merged_manifest_path(number))
    plan = UpdatePlan(number=number, status="planned",
                      source={"path": str(Path(new_tiles).resolve()), "sha256": _sha256(Path(new_tiles))},
                      append=append, hold_within=float(hold_within), tiles_before=str(state["tiles"]),
                      tiles_after=str(build.merged_manifest_path(number).resolve()),
                      manifests_before=list(state.get("manifests", [])), replaced=changed, added=added,
                      canvas_before=None if canvas is None else canvas.to_json(),
                      totals_before=_metrics(build).get("totals", {}), created=now(),
                      realign_neighbours=realign_neighbours)
    plan.predicted = predicted_shards(build, new, changed, added, canvas)
    # The stitch step reads the new tiles and the tiles they overlap: their number decides where to run.
    plan.facts["restitched_tiles"] = tiles_to_read(old, new, changed, build.config.stitch)
    # ... and so does the size of the appended sections, stitched and aligned whole.
    plan.facts["appended_pixels"] = sum(t.width * t.height for s in added for t in new.section_tiles(s))
    return plan, merged, text


# ----------------------------------------------------------------- execute
def _begin(build: BuildFolder, plan: UpdatePlan, text: str, checked: TileManifest) -> None:
    """Keep the records as they are, write the plan, then point the build at the merged manifest.

    ``checked`` is the merged manifest as :func:`plan_update` checked it (from the build's kept
    snapshot and the update's rows: no tile of the build is looked at again).
    """
    d = plan_dir(build.root, plan.number)
    shutil.rmtree(d, ignore_errors=True)  # a folder without a plan: an earlier attempt that wrote nothing
    d.mkdir(parents=True)
    snapshot_transforms(build.store.root, d / "before")
    save_plan(build.root, plan)
    merged = Path(plan.tiles_after)
    atomic_write_text(merged, text)
    build.update_state(tiles=str(merged), manifests=plan.manifests_before + [str(merged)])
    build.keep_checked_manifest(checked, csv_facts(merged))


def _undo_begin(build: BuildFolder, plan: UpdatePlan) -> None:
    """Take back what :func:`_begin` did (only records of the build's inputs; no transform was touched)."""
    build.update_state(tiles=plan.tiles_before, manifests=plan.manifests_before)
    tiles_before = Path(plan.tiles_before)
    build.keep_checked_manifest(read_tile_manifest(tiles_before, known=build.checked_headers()),
                                csv_facts(tiles_before))
    Path(plan.tiles_after).unlink(missing_ok=True)
    shutil.rmtree(plan_dir(build.root, plan.number), ignore_errors=True)


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


@dataclass
class _MarkersOf(BuildFolder):
    """The build, its channel manifest cut to ``sections`` (the marker images the channels stage registers)."""

    sections: frozenset = frozenset()

    def channel_manifest(self):
        return [c for c in super().channel_manifest() if c.section in self.sections]


def _channels_step(build: BuildFolder, plan: UpdatePlan, mappers) -> None:
    """Register again the marker images of the sections whose EM records changed; the others' stand.

    A marker image is registered to its own EM section (``channel -> section``), so only a
    section whose records the update replaced can change its registration.
    """
    from . import stages
    from .update_render import changed_sections

    markers = _MarkersOf(build.root, frozenset(changed_sections(build, plan)))
    if markers.channel_manifest():  # none of the changed sections has a marker image: nothing to register
        stages.channels_stage(markers, mappers("channels"))
    killed_here("channels")


#: The update's resumable steps in order: (name, the plan status once done, the step).
_STEPS = (("stitch", "stitched", stitch_step), ("align", "aligned", align_step),
          ("channels", "registered", _channels_step), ("render", "rendered", render_step))


def _run_steps(build: BuildFolder, plan: UpdatePlan, *, workers, scheduler, show: bool, fail_on) -> object:
    from . import stages

    seconds = plan.facts.setdefault("seconds", {})
    if not plan.reached("rendered") and "planes_before" not in plan.facts:
        plan.facts["planes_before"] = _planes_before(build)  # kept before any plane is rewritten
        save_plan(build.root, plan)
    t0 = time.monotonic()
    with update_mappers(plan, workers, scheduler, show) as mappers:
        seconds["cluster"] = round(time.monotonic() - t0, 2)
        plan.facts["ran"] = mappers.where
        # Each step records its status once done, so a re-run resumes after the last finished one.
        for step, status, run in _STEPS:
            if not plan.reached(status):
                t0 = time.monotonic()
                run(build, plan, mappers)
                plan.status, seconds[step] = status, round(time.monotonic() - t0, 2)
                save_plan(build.root, plan)
        t0 = time.monotonic()
        # The report's tasks run where the steps ran (a cluster only for an append or a large update).
        verdict = stages.report_stage(build, fail_on=fail_on, mapper=mappers("report"),
                                      changed=_changed_regions(build, plan))
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


def _planes_before(build: BuildFolder) -> dict[str, str]:
    """Return ``{z: render fingerprint}`` of the written planes as they are (damaged ones left out)."""
    from ..render.fingerprint import read_plane_record

    rec = read_plane_record(build.pyramid_path()) or {}
    damaged = rec.get("damaged") or {}
    return {z: fp for z, fp in (rec.get("fingerprints") or {}).items() if z not in damaged and fp}


def _changed_regions(build: BuildFolder, plan: UpdatePlan) -> dict | None:
    """Return where the render step changed planes, for the report: ``{z: {"before", "boxes"}}`` (level-0 px).

    The boxes are the pixel boxes the step found can change (every pixel outside them kept its value:
    :func:`stackbuild.run.update_render.changed_pixels`), or, for a plan recorded without them, the
    level-0 shards it rewrote. With 4096 px shards a plane of a small stack is one shard, so the
    pixel boxes are what keeps the report from measuring the whole plane again. ``before`` is the
    plane's render fingerprint before the update. None (the report measures the changed planes
    whole) after a full render or a grown canvas.
    """
    from .update_plan import unpack_shards

    render, before = plan.render or {}, plan.facts.get("planes_before")
    done = plan.facts.get("render") or {}
    if before is None or not render.get("shards") or done.get("full", True) or any(render["canvas_facts"]["grew"]):
        return None
    width, height = render["canvas"]["width"], render["canvas"]["height"]
    settings = build.config.render  # read from build.json at each access
    block = settings.chunk * settings.shard
    pixels = render.get("pixels") or {}
    return {int(z): {"before": before.get(z),
                     "boxes": pixels[z] if z in pixels else [[j * block, i * block, min((j + 1) * block, width),
                                                              min((i + 1) * block, height)]
                                                             for i, j in sorted(unpack_shards(packed))]}
            for z, packed in render["shards"].items()}


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

    t0 = time.monotonic()
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
        from .update_manifest import is_inset

        if is_inset(Path(new_tiles), build.config.volume.pixel_size):
            if dry_run:
                return UpdateOutcome(None, [f"{new_tiles}: finer tiles; they would be stitched, registered to their "
                                            "section and written as an inset under volume.zarr/insets/ "
                                            "(dry run: nothing written)"])
            return UpdateOutcome(None, _inset(build, Path(new_tiles), workers, scheduler, show_progress))
        plan, merged, text = plan_update(build, Path(new_tiles), append=append, hold_within=hold_within,
                                      realign_neighbours=realign_neighbours)
        if dry_run:
            return UpdateOutcome(plan, dry_run_lines(plan))
        _begin(build, plan, text, merged)
        _stitch_checked(build, plan)
        plan.facts.setdefault("seconds", {})["plan"] = round(time.monotonic() - t0, 2)
    verdict = _run_steps(build, plan, workers=workers, scheduler=scheduler, show=show_progress, fail_on=fail_on)
    return UpdateOutcome(plan, summary_lines(plan, verdict), verdict)


def _inset(build: BuildFolder, path: Path, workers, scheduler, show: bool) -> list[str]:
    """Add an inset (:func:`stackbuild.run.insets.add_inset`), where
    :func:`stackbuild.run.update_cluster.inset_mappers` says; one task per chunk."""
    from .insets import add_inset

    with inset_mappers(len(read_tile_manifest(path).tiles), workers, scheduler, show) as mappers:
        return add_inset(build, path, mapper=mappers("inset"))
