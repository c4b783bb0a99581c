"""Re-imaged regions: replace the tiles of some sections, then redo only what changed.

The new tile manifest lists only the sections that were imaged again. Their
old tiles are replaced (in a new merged manifest kept inside the build
folder; the user's files are never edited), those sections are stitched
again, the stack is re-aligned (the global solve couples all sections), the
marker images are registered again (their maps are relative to the section
frame), and only the EM planes whose transforms moved are rendered again.
"""
from __future__ import annotations

import csv
import io
import logging
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..manifest import TileManifest, read_tile_manifest
from ..transforms.store import atomic_write_text
from ..folder import BuildFolder, csv_facts

log = logging.getLogger(__name__)

#: A plane is rendered again when its transform moved a point by more than this (pixels).
MOVE_TOLERANCE = 0.05


def merged_manifest(old: TileManifest, new: TileManifest) -> str:
    """Return the CSV text of ``old`` with every section present in ``new`` replaced by ``new``'s tiles."""
    replaced = set(new.sections)
    rows = [t for t in old.tiles if t.section not in replaced] + list(new.tiles)
    rows.sort(key=lambda t: t.section)  # stable: manifest order within a section is kept
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["section", "tile", "path", "x", "y"])
    for t in rows:
        w.writerow([t.section, t.tile, str(t.path), repr(t.x), repr(t.y)])
    return buf.getvalue()


def _sample_points(build: BuildFolder, section: int) -> np.ndarray | None:
    stitch = build.store.load_stitch(section)
    if stitch is None:
        return None
    x0, y0, x1, y1 = stitch.bbox()
    gx, gy = np.meshgrid(np.linspace(x0, x1, 9), np.linspace(y0, y1, 9))
    return np.column_stack([gx.ravel(), gy.ravel()])


def _moved_planes(build: BuildFolder, before: dict, first: int) -> list[int]:
    """Return output planes whose aligned -> section map changed by more than the tolerance."""
    moved = []
    for section, (points, old_map) in before.items():
        new = build.store.load_alignment(section)
        if new is None or points is None:
            moved.append(section - first)
            continue
        if np.abs(new.aligned_to_section(points) - old_map).max() > MOVE_TOLERANCE:
            moved.append(section - first)
    return moved


def update_build(build: BuildFolder, new_tiles: Path, *, workers=None, scheduler=None,
                 show_progress: bool = True) -> dict:
    """Replace re-imaged sections' tiles and redo stitch, align, render and report where needed.

    Returns
    -------
    dict
        ``sections`` re-stitched, ``planes`` re-rendered, ``manifest`` written.
    """
    from . import stages
    from .cluster import client_mapper, dask_client
    from .progress import ProgressBar

    old = build.tile_manifest()
    new = read_tile_manifest(new_tiles)
    if new.dtype != old.dtype:
        raise InputError(f"new tiles are {new.dtype}, the build's are {old.dtype}", file=new.source)
    state = build.load_state()
    n = len(state.get("manifests", [])) + 1
    merged = build.merged_manifest_path(n)
    atomic_write_text(merged, merged_manifest(old, new))
    facts = csv_facts(merged)
    checked = read_tile_manifest(merged)  # check before switching the build to it
    canvas = build.store.load_canvas()
    first = canvas.first_section if canvas else min(old.sections + new.sections)
    before = {}
    for s in old.sections:
        a = build.store.load_alignment(s)
        pts = _sample_points(build, s)
        if a is not None and pts is not None:
            aligned = a.affine.inverse().apply(pts)  # roughly where the section sits in the aligned frame
            before[s] = (aligned, a.aligned_to_section(aligned))
    build.update_state(tiles=str(merged), manifests=state.get("manifests", []) + [str(merged)])
    build.keep_checked_manifest(checked, facts)  # so the stages below do not check every tile again
    show = show_progress
    with dask_client(workers, scheduler) as client:
        try:
            stages.stitch_stage(build, client_mapper(client, ProgressBar("stitch", show)), sections=new.sections)
        except InputError:
            # A new tile that cannot be read: the build goes back to its old tiles, whose records it still
            # holds, rather than naming tiles its records were not made from.
            build.update_state(tiles=state["tiles"], manifests=state.get("manifests", []))
            build.keep_checked_manifest(old, csv_facts(Path(state["tiles"])))
            raise
        stages.align_stage(build, client_mapper(client, ProgressBar("align", show)),
                           progress=ProgressBar("solve", show))
        # Marker images are registered to the section frame, which re-stitching moves.
        stages.channels_stage(build, client_mapper(client, ProgressBar("channels", show)))
        planes = sorted(set(_moved_planes(build, before, first)) | {s - first for s in new.sections})
        try:
            facts = stages.render_stage(build, planes=planes, progress=ProgressBar("render", show))
        except InputError as exc:  # the canvas grew or shrank: every plane must be rendered again
            log.info("full re-render: %s", exc)
            facts = stages.render_stage(build, overwrite=True, progress=ProgressBar("render", show))
        stages.render_channels_stage(build, progress=ProgressBar("markers", show))
    stages.report_stage(build, progress=ProgressBar("report", show))
    return {"sections": new.sections, "planes": facts.get("planes", []), "manifest": str(merged)}
