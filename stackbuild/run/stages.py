"""The stages of a build, mapped over sections and chunks.

Each stage reads what it needs from the build folder and writes its result
back there; a stage never calls another stage's internals. Work is spread
through a ``mapper`` (see :mod:`stackbuild.run.cluster`), so the scheduler is
a parameter, not a decision buried in a stage.
"""
from __future__ import annotations

import logging
import time
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError
from ..manifest import TileEntry
from ..stitch.settings import StitchSettings
from ..transforms.store import atomic_write_text
from ..folder import BuildFolder

log = logging.getLogger(__name__)

STAGES = ("stitch", "align", "channels", "render", "report")


@dataclass(frozen=True)
class _StitchJob:
    build: str
    section: int
    tiles: tuple[TileEntry, ...]
    settings: StitchSettings


def _stitch_one(job: _StitchJob) -> dict:
    """Stitch one section and store its record (runs on a worker)."""
    from ..stitch.section import stitch_section

    rec = stitch_section(list(job.tiles), job.settings, job.section)
    BuildFolder(Path(job.build)).store.save_stitch(rec)
    return {"section": job.section, "flags": rec.flags, "stats": rec.stats}


def stitch_stage(build: BuildFolder, mapper, *, sections: list[int] | None = None,
                 resume: bool = False) -> list[dict]:
    """Stitch every section (or ``sections``) of the build; return one summary per section.

    With ``resume``, sections that already have a stitch record are skipped.
    """
    manifest = build.tile_manifest()
    cfg = build.config
    todo = sections if sections is not None else manifest.sections
    unknown = sorted(set(todo) - set(manifest.sections))
    if unknown:
        raise InputError(f"section(s) {unknown} have no tiles in the manifest", file=manifest.source)
    if resume:
        have = set(build.store.sections_with("stitch"))
        todo = [s for s in todo if s not in have]
    build.mark_stage("stitch", "running")
    t0 = time.monotonic()
    jobs = [_StitchJob(str(build.root), s, tuple(manifest.section_tiles(s)), cfg.stitch) for s in todo]
    out = mapper(_stitch_one, jobs)
    build.mark_stage("stitch", "done", seconds=round(time.monotonic() - t0, 2),
                     sections=len(manifest.sections))
    return out


def align_stage(build: BuildFolder, mapper, *, progress=None) -> dict:
    """Align all stitched sections to each other and store one alignment per section."""
    from ..align.stage import run_align

    build.mark_stage("align", "running")
    t0 = time.monotonic()
    result = run_align(build.root, build.config.align, mapper=mapper, progress=progress)
    build.mark_stage("align", "done", seconds=round(time.monotonic() - t0, 2))
    return result


def channels_stage(build: BuildFolder, mapper, *, progress=None) -> dict:
    """Register every marker image to its EM section (nothing to do without a channel manifest)."""
    from ..channels.stage import run_channels

    if not build.load_state().get("channels"):
        return {}
    build.mark_stage("channels", "running")
    t0 = time.monotonic()
    result = run_channels(build.root, build.config.channels, mapper=mapper, progress=progress)
    build.mark_stage("channels", "done", seconds=round(time.monotonic() - t0, 2))
    return result


def render_channels_stage(build: BuildFolder, *, overwrite: bool = False, progress=None) -> dict:
    """Write each marker channel's pyramid beside the EM, in the same physical space (stale planes only, unless ``overwrite``)."""
    from ..render.channels import render_channels

    if not build.load_state().get("channels"):
        return {}
    return render_channels(build.root, build.config.render, overwrite=overwrite, progress=progress)


def render_stage(build: BuildFolder, *, planes: list[int] | None = None, resume: bool = False,
                 overwrite: bool = False, progress=None) -> dict:
    """Write the OME-Zarr pyramid from the raw tiles and the stored transforms.

    With ``resume``, only the stale planes are rendered (never written, rendered
    from other transforms or settings, or found damaged by ``stackbuild audit``);
    nothing when there are none. The stage is marked running only once every check
    has passed, so a refused render leaves ``build.json`` as it was.
    """
    from ..render.write import prepare_render, write_render

    job = prepare_render(build.root, build.config.render, planes=planes, overwrite=overwrite, resume=resume)
    if not job.todo and not job.overwrite:
        if not build.stage_done("render"):
            build.mark_stage("render", "done", seconds=0.0, planes=0)
        return {"planes": [], "skipped": "every plane matches its transforms"}
    build.mark_stage("render", "running")
    t0 = time.monotonic()
    facts = write_render(job, progress=progress)
    build.mark_stage("render", "done", seconds=round(time.monotonic() - t0, 2),
                     planes=len(facts.get("planes", [])))
    return facts


def report_stage(build: BuildFolder, *, fail_on: list[str] | None = None, progress=None):
    """Measure the result, draw the plots, write ``DIR/qc``; return the verdict."""
    from ..qc.report import run_report

    before = build.state_path.read_bytes()
    build.mark_stage("report", "running")
    t0 = time.monotonic()
    try:
        verdict = run_report(build.root, build.config.report, fail_on=fail_on, progress=progress)
    except InputError:
        # The report writes its files only once everything is measured: a refused or failed
        # report changed nothing, so the build record goes back to what it was, byte for byte.
        atomic_write_text(build.state_path, before.decode("utf-8"))
        raise
    build.mark_stage("report", "done", seconds=round(time.monotonic() - t0, 2))
    return verdict
