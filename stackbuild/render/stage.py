"""The render stage entry: ``run(folder, settings, *, mapper, progress)``.

:func:`prepare` checks everything and says which planes are stale (nothing is
written); :func:`run` writes the EM pyramid's stale planes through the
render writer and Dask; :func:`run_markers` writes the marker-channel
pyramids beside it, in the same physical space.
"""
from __future__ import annotations

from ..folder import BuildFolder
from .channels import check_marker_images, render_channels
from .settings import RenderSettings
from .write import RenderJob, prepare_render, write_render


def prepare(folder: BuildFolder, settings: RenderSettings, *, planes: list[int] | None = None,
            resume: bool = False, overwrite: bool = False) -> RenderJob:
    """Return the render job of ``folder``: the canvas and the planes to write (nothing is written).

    The marker images the marker pyramids will read are checked here too, so a render that
    would fail at the markers is refused before the EM is written.
    """
    job = prepare_render(folder.root, settings, planes=planes, overwrite=overwrite, resume=resume)
    if folder.load_state().get("channels"):
        check_marker_images(folder)
    return job


def run(folder: BuildFolder, settings: RenderSettings, *, mapper=None, progress=None,
        job: RenderJob | None = None, planes: list[int] | None = None, resume: bool = False,
        overwrite: bool = False) -> dict:
    """Return the facts of the EM pyramid written into ``folder`` (its stale planes, or all with ``overwrite``).

    ``job`` is a :func:`prepare` result to use instead of preparing again.
    """
    if job is None:
        job = prepare(folder, settings, planes=planes, resume=resume, overwrite=overwrite)
    if not job.todo and not job.overwrite:
        return {"planes": [], "skipped": "every plane matches its transforms"}
    return write_render(job, progress=progress, mapper=mapper)


def run_markers(folder: BuildFolder, settings: RenderSettings, *, mapper=None, progress=None,
                overwrite: bool = False) -> dict:
    """Return the facts of the marker-channel pyramids written into ``folder`` (``{}`` for a build without markers)."""
    if not folder.load_state().get("channels"):
        return {}
    return render_channels(folder.root, settings, overwrite=overwrite, progress=progress, mapper=mapper)
