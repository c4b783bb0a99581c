"""The stitch stage entry: ``run(folder, settings, *, mapper, progress)``.

One task per section: it reads that section's tiles, stitches them
(:func:`stackbuild.stitch.section.stitch_section`) and stores the record in
the build folder's transform store. A task's inputs are small (the build
path, the section's manifest rows, the settings).
"""
from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError
from ..folder import BuildFolder
from ..manifest import TileEntry
from .section import stitch_section
from .settings import StitchSettings


@dataclass(frozen=True)
class _StitchJob:
    build: str
    section: int
    tiles: tuple[TileEntry, ...]
    settings: StitchSettings


def _stitch_one(job: _StitchJob) -> dict:
    """Stitch one section and store its record (runs on a worker)."""
    rec = stitch_section(list(job.tiles), job.settings, job.section)
    BuildFolder(job.build).store.save_stitch(rec)
    return {"section": job.section, "flags": rec.flags, "stats": rec.stats}


def sections_to_stitch(folder: BuildFolder, sections: list[int] | None = None, resume: bool = False) -> list[int]:
    """Return the sections :func:`run` would stitch: all, or ``sections``, less those stitched already with ``resume``.

    Raises
    ------
    InputError
        If ``sections`` names a section without tiles in the manifest.
    """
    manifest = folder.tile_manifest()
    todo = sections if sections is not None else manifest.sections
    unknown = sorted(set(todo) - set(manifest.sections))
    if unknown:
        raise InputError(f"section(s) {unknown} have no tiles in the manifest", file=manifest.source)
    if resume:
        have = set(folder.store.sections_with("stitch"))
        todo = [s for s in todo if s not in have]
    return list(todo)


def run(folder: BuildFolder, settings: StitchSettings, *, mapper, progress=None,
        sections: list[int] | None = None, resume: bool = False) -> list[dict]:
    """Return one summary per stitched section, after stitching every section (or ``sections``) of ``folder``.

    With ``resume``, sections that already have a stitch record are skipped (see
    :func:`sections_to_stitch`). ``progress`` is not called: each section is one
    task, reported by ``mapper``.
    """
    todo = sections_to_stitch(folder, sections, resume)
    manifest = folder.tile_manifest()
    jobs = [_StitchJob(str(folder.root), s, tuple(manifest.section_tiles(s)), settings) for s in todo]
    return list(mapper(_stitch_one, jobs))
