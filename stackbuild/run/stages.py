"""The stages of a build, mapped over sections and chunks.

Each stage reads what it needs from the build folder and writes its result
back there; a stage never calls another stage's internals. Work is spread
through a ``mapper`` (see :mod:`stackbuild.run.cluster`), so the scheduler is
a parameter, not a decision buried in a stage.
"""
from __future__ import annotations

import contextlib
import logging
import time

from ..errors import InputError
from ..transforms.store import atomic_write_text
from ..folder import BuildFolder

log = logging.getLogger(__name__)

STAGES = ("stitch", "align", "channels", "render", "report")


def stitch_stage(build: BuildFolder, mapper, *, sections: list[int] | None = None,
                 resume: bool = False) -> list[dict]:
    """Stitch every section (or ``sections``) of the build; return one summary per section.

    With ``resume``, sections that already have a stitch record are skipped.
    """
    from ..stitch.stage import run, sections_to_stitch

    todo = sections_to_stitch(build, sections, resume)  # refused before the stage is marked running
    build.mark_stage("stitch", "running")
    t0 = time.monotonic()
    out = run(build, build.config.stitch, mapper=mapper, sections=todo)
    build.mark_stage("stitch", "done", seconds=round(time.monotonic() - t0, 2),
                     sections=len(build.tile_manifest().sections))
    return out


def _record_stamps(build: BuildFolder, kind: str) -> dict[str, int]:
    """Return ``path -> mtime_ns`` of every section's current ``kind`` record."""
    base = build.store.root / "sections"
    out = {}
    for p in base.glob(f"*/{kind}.json") if base.exists() else []:
        try:
            out[str(p)] = p.stat().st_mtime_ns
        except OSError:
            pass
    return out


@contextlib.contextmanager
def _marked_running(build: BuildFolder, stage: str, kind: str):
    """Mark ``stage`` running for the ``with`` body; a refusal that wrote no ``kind`` record is taken back.

    A stage refused before it wrote anything (no stitched sections, a channel row for a
    section without tiles, bad settings) leaves ``build.json`` byte-identical; one that
    failed after writing records stays marked running, so ``build --resume`` runs it again.
    """
    before = build.state_path.read_bytes()
    stamps = _record_stamps(build, kind)
    build.mark_stage(stage, "running")
    try:
        yield
    except InputError:
        if _record_stamps(build, kind) == stamps:
            atomic_write_text(build.state_path, before.decode("utf-8"))
        raise


def align_stage(build: BuildFolder, mapper, *, progress=None) -> dict:
    """Align all stitched sections to each other and store one alignment per section."""
    from ..align.stage import run

    t0 = time.monotonic()
    with _marked_running(build, "align", "align"):
        result = run(build, build.config.align, mapper=mapper, progress=progress)
    build.mark_stage("align", "done", seconds=round(time.monotonic() - t0, 2))
    return result


def channels_stage(build: BuildFolder, mapper, *, progress=None) -> dict:
    """Register every marker image to its EM section (nothing to do without a channel manifest)."""
    from ..channels.stage import run

    if not build.load_state().get("channels"):
        return {}
    t0 = time.monotonic()
    with _marked_running(build, "channels", "channels"):
        result = run(build, build.config.channels, mapper=mapper, progress=progress)
    build.mark_stage("channels", "done", seconds=round(time.monotonic() - t0, 2))
    return result


def render_channels_stage(build: BuildFolder, *, overwrite: bool = False, progress=None, mapper=None) -> dict:
    """Write each marker channel's pyramid beside the EM, in the same physical space (stale planes only, unless ``overwrite``)."""
    if not build.load_state().get("channels"):
        return {}  # asked before the import: the marker renderer's modules cost an update 0.1-0.4 s to load
    from ..render.stage import run_markers

    return run_markers(build, build.config.render, mapper=mapper, overwrite=overwrite, progress=progress)


def render_stage(build: BuildFolder, *, planes: list[int] | None = None, resume: bool = False,
                 overwrite: bool = False, progress=None, mapper=None, job=None) -> dict:
    """Write the OME-Zarr pyramid from the raw tiles and the stored transforms.

    With ``resume``, only the stale planes are rendered (never written, rendered
    from other transforms or settings, or found damaged by ``stackbuild audit``);
    nothing when there are none. The stage is marked running only once every check
    has passed, so a refused render leaves ``build.json`` as it was. ``job``: a
    :func:`stackbuild.render.stage.prepare` result to use instead of preparing here.
    """
    from ..render.stage import prepare, run

    if job is None:
        job = prepare(build, build.config.render, planes=planes, overwrite=overwrite, resume=resume)
    if not job.todo and not job.overwrite:
        if not build.stage_done("render"):
            build.mark_stage("render", "done", seconds=0.0, planes=0)
        return {"planes": [], "skipped": "every plane matches its transforms"}
    build.mark_stage("render", "running")
    t0 = time.monotonic()
    facts = run(build, build.config.render, mapper=mapper, progress=progress, job=job)
    build.mark_stage("render", "done", seconds=round(time.monotonic() - t0, 2),
                     planes=len(facts.get("planes", [])))
    return facts


def report_stage(build: BuildFolder, *, fail_on: list[str] | None = None, progress=None, mapper=None,
                 changed: dict | None = None):
    """Measure the result, draw the plots, write ``DIR/qc``; return the verdict.

    ``mapper`` runs the report's region tasks (in this process when omitted). ``changed``: where an
    update rewrote planes (see :func:`stackbuild.qc.stage.run`), so only that is measured again.
    """
    from ..qc.stage import run as run_report

    before = build.state_path.read_bytes()
    build.mark_stage("report", "running")
    t0 = time.monotonic()
    try:
        verdict = run_report(build, build.config.report, fail_on=fail_on, progress=progress, mapper=mapper,
                             changed=changed)
    except InputError:
        # The report writes its files only once everything is measured: a refused or failed
        # report changed nothing, so the build record goes back to what it was, byte for byte.
        atomic_write_text(build.state_path, before.decode("utf-8"))
        raise
    build.mark_stage("report", "done", seconds=round(time.monotonic() - t0, 2))
    return verdict


def run_build(build: BuildFolder, client, *, resume: bool = False, fail_on: list[str] | None = None,
              show: bool = True):
    """Run every stage on ``build`` in order (:data:`STAGES`) on ``client``; return the report's verdict.

    With ``resume``, finished stages are kept: stitched sections, a finished align or
    channels stage, rendered planes that still match their transforms.
    """
    from .cluster import client_mapper
    from .progress import ProgressBar

    def mapper(name: str):
        return client_mapper(client, ProgressBar(name, show))

    stitch_stage(build, mapper("stitch"), resume=resume)
    if not (resume and build.stage_done("align")):
        align_stage(build, mapper("align"), progress=ProgressBar("align", show))
    if not (resume and build.stage_done("channels")):
        channels_stage(build, mapper("channels"))
    render_stage(build, resume=resume, progress=ProgressBar("render", show), mapper=mapper("contrast"))
    render_channels_stage(build, progress=ProgressBar("markers", show), mapper=mapper("markers"))
    return report_stage(build, fail_on=fail_on, mapper=mapper("report"))  # its mapper's bar counts each phase
