"""The render stage: write the registered volume as a multiscale OME-Zarr 0.5 pyramid (zarr v3).

All levels are written in the same pass: level ``n+1`` is computed from level
``n`` in the same dask graph, one task per shard and level, so no two tasks ever
write the same shard (see :mod:`stackbuild.render.pyramid`). Planes are written in
batches (one dask graph each); as each plane is finished its fingerprint (what it
was rendered from, see :mod:`stackbuild.render.fingerprint`) is saved in
``volume.zarr/em/.stackbuild_done.json``, so a killed render resumes with the planes
not yet done, a resumed one re-renders exactly the stale planes, and
``planes=[...]`` re-renders only those planes. Every check runs before anything is
written (:func:`prepare_render`); ``overwrite`` renders beside the build and swaps the
new pyramid in when it is complete (see :mod:`stackbuild.render.swap`).
"""
from __future__ import annotations

import json
import math
import shutil
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import BloscCodec, Crc32cCodec

from ..errors import BuildFolderError, InputError
from ..folder import BuildFolder
from .canvas import compute_canvas, settle_canvas
from .contrast import DOC_KIND, RangeJob, contrast_record, range_job
from .fingerprint import PLANE_RECORD, discard_plane, em_fingerprints, read_plane_record, write_plane_record
from .lazy import RenderPlan, section_records
from .ngff import multiscales_attrs, root_attrs
from .pyramid import compute_each, pyramid_writes
from .reduce import level_shapes
from .settings import blosc_shuffle, check_settings
from .swap import incoming_path, recover_swap, swap_in

CHECKPOINT = PLANE_RECORD
#: Level-0 shards rendered per dask graph (whole planes; each plane is checkpointed when it is done).
BATCH_SHARDS = 32


def _compressors(settings, dtype):
    """Return the chunk codec chain: Blosc (unless ``codec = "none"``), then a CRC-32C checksum.

    The checksum (zarr v3 core codec ``crc32c``) makes a chunk whose bytes changed on disk
    fail to decode instead of giving wrong pixels, so ``stackbuild audit`` finds it: Blosc
    itself carries no checksum. It costs 4 bytes per chunk.
    """
    checksum = Crc32cCodec()
    if settings.codec == "none":
        return [checksum]
    return [BloscCodec(cname=settings.codec, clevel=settings.clevel,
                       shuffle=blosc_shuffle(settings, np.dtype(dtype).itemsize)), checksum]


def _validate_records(folder: BuildFolder, sections: list[int]) -> None:
    """Load every transform record up front, so bad input is refused before anything is written."""
    for s in sections:
        section_records(str(folder.store.root), s)


def check_tiles(folder: BuildFolder, sections: list[int]) -> None:
    """Raise :class:`InputError` naming the first tile of ``sections`` (per their stitch records) that is gone.

    Only the files' existence is checked (one ``stat`` each, 16 at a time, since a
    production section has about a thousand tiles on a network file system); their
    headers were checked with the manifest, and pixels are checked where they are read.
    """
    paths = []
    for s in sections:
        stitch, _ = section_records(str(folder.store.root), s)
        paths.extend((s, t.tile, Path(t.path)) for t in stitch.tiles)
    with ThreadPoolExecutor(max_workers=16) as pool:
        present = list(pool.map(lambda item: item[2].is_file(), paths))
    for (s, tile, path), ok in zip(paths, present):
        if not ok:
            raise InputError(f"tile {tile!r} is gone; restore it (nothing was written)", file=path, section=s)


def _thread_mapper(fn, items) -> list:
    """Run ``fn`` on every item on a thread pool of this process (when the caller gave no mapper)."""
    with ThreadPoolExecutor() as pool:
        return list(pool.map(fn, items))


def _prepare_contrast(folder, settings, sections, planes_sections, mapper=None) -> None:
    """Measure the range of every section that needs it, one task per section (see :func:`range_job`)."""
    store = folder.store
    old = store.load_doc(DOC_KIND) or {}
    ranges = {int(k): (v["low"], v["high"]) for k, v in old.get("sections", {}).items()
              if old.get("percentiles") == list(settings.contrast_percentiles)
              and old.get("scale") == settings.contrast_scale}
    jobs = [RangeJob(str(store.root), s, tuple(settings.contrast_percentiles), settings.contrast_scale)
            for s in sections if s in planes_sections or s not in ranges]
    for s, lo, hi in (mapper or _thread_mapper)(range_job, jobs):
        ranges[s] = (lo, hi)
    ranges = {s: r for s, r in ranges.items() if s in sections}
    store.save_doc(DOC_KIND, contrast_record(ranges, tuple(settings.contrast_percentiles),
                                             settings.contrast_scale))


def _create_arrays(em: Path, shapes, depth: int, settings, dtype: str, attrs: dict) -> list:
    group = zarr.open_group(str(em), mode="w", zarr_format=3, attributes=attrs)
    arrays = []
    for n, (h, w) in enumerate(shapes):
        chunks = (1, settings.chunk, settings.chunk)
        shards = None if settings.shard == 1 else (1, settings.chunk * settings.shard, settings.chunk * settings.shard)
        arrays.append(group.create_array(str(n), shape=(depth, h, w), dtype=dtype, chunks=chunks, shards=shards,
                                         compressors=_compressors(settings, dtype), fill_value=0,
                                         dimension_names=["z", "y", "x"], overwrite=True))
    return arrays


@dataclass
class RenderJob:
    """A checked render, ready to write: what :func:`prepare_render` found, before anything is written."""

    folder: BuildFolder
    settings: object
    canvas: object
    plan: RenderPlan
    shapes: list
    stamp: dict
    todo: list[int]
    fingerprints: dict[int, str]
    overwrite: bool
    sections: list[int]


def prepare_render(build_dir, settings, *, planes: list[int] | None = None, overwrite: bool = False,
                   resume: bool = False) -> RenderJob:
    """Return the render to do, after every check and before anything is written.

    Checks the settings, every transform record, and that every tile the planes
    to render will read is still there, so a refused or failing render leaves
    the build folder as it was. See :func:`render_volume` for the parameters.

    Raises
    ------
    BuildFolderError
        If a volume of another canvas or layout exists and neither ``overwrite`` nor
        ``planes`` is given, or (without ``resume``) the volume is finished and matches
        its transforms.
    InputError
        If a transform record is unreadable or a tile is missing.
    """
    check_settings(settings)
    folder = BuildFolder(Path(build_dir))
    recover_swap(folder)
    manifest = folder.tile_manifest()
    vol = folder.config.volume
    em = folder.pyramid_path()
    _validate_records(folder, manifest.sections)
    # The stored canvas only grows (by whole shards), so re-rendering never moves a plane.
    canvas, _ = settle_canvas(folder.store.load_canvas(),
                              compute_canvas(folder.store, manifest.sections, manifest.lost_sections,
                                             vol.pixel_size, vol.section_thickness),
                              shard=settings.chunk * settings.shard, chunk=settings.chunk)
    plan = RenderPlan.from_canvas(folder.store.root, canvas, settings)
    shapes = level_shapes(canvas.height, canvas.width, settings.chunk)
    stamp = json.loads(json.dumps({"render": asdict(settings), "canvas": canvas.to_json()}))
    fps = em_fingerprints(folder.store, canvas, settings)
    todo = _planes_to_do(em, stamp, fps, canvas.depth, planes, overwrite, resume)
    overwrite = overwrite and (em / "zarr.json").exists()
    lost = set(canvas.lost_sections)
    check_tiles(folder, [canvas.first_section + z for z in todo if canvas.first_section + z not in lost])
    return RenderJob(folder, settings, canvas, plan, shapes, stamp, todo, fps, overwrite, manifest.sections)


def render_volume(build_dir, settings, *, planes: list[int] | None = None, overwrite: bool = False,
                  resume: bool = False, progress=None, mapper=None) -> dict:
    """Render and write the volume of a build folder; return facts about the run.

    Parameters
    ----------
    build_dir : str or Path
        The build folder (stitch records needed; alignments optional).
    settings : RenderSettings
        Chunking, compression, reducer, interpolation and contrast options.
    planes : list of int, optional
        Re-render only these output planes (0-based z) of an existing volume,
        keeping the others. Without it, the planes that are stale (never written,
        rendered from other records or settings, or found damaged: see
        :mod:`stackbuild.render.fingerprint`) are rendered, and a finished volume
        that matches its transforms is refused unless ``overwrite`` or ``resume``.
    overwrite : bool
        Render every plane into a new location beside the build and swap it in when
        it is complete: until then the old volume stays as it was.
    resume : bool
        Render the stale planes; nothing at all when there are none.
    progress : callable(done, total), optional
        Called after each batch of planes.
    mapper : callable(fn, items), optional
        Runs the contrast measurements, one task per section (default: the running Dask
        client, else a thread pool).

    Returns
    -------
    dict
        ``levels`` (shapes), ``planes`` (rendered), ``megapixels`` (all levels written),
        ``seconds``, ``path``.

    Raises
    ------
    BuildFolderError, InputError
        As :func:`prepare_render`; nothing is written then.
    """
    job = prepare_render(build_dir, settings, planes=planes, overwrite=overwrite, resume=resume)
    return write_render(job, progress=progress, mapper=mapper)


def write_render(job: RenderJob, *, progress=None, mapper=None) -> dict:
    """Write the planes of a :func:`prepare_render` job; return facts about the run (see :func:`render_volume`)."""
    t0 = time.perf_counter()
    folder, settings, canvas, shapes, stamp, todo = (job.folder, job.settings, job.canvas, job.shapes,
                                                     job.stamp, job.todo)
    em = folder.pyramid_path()
    target = incoming_path(folder, "em") if job.overwrite else em
    if job.overwrite:
        shutil.rmtree(target, ignore_errors=True)
    elif folder.store.load_canvas() != canvas:
        folder.store.save_canvas(canvas)
    if settings.contrast and todo:
        _prepare_contrast(folder, settings, job.sections, {canvas.first_section + z for z in todo}, mapper)
        job.fingerprints.update(em_fingerprints(folder.store, canvas, settings, todo))
    attrs = multiscales_attrs("em", len(shapes), canvas.pixel_size_nm, canvas.section_thickness_nm,
                              settings.reducer, extra=stamp)
    ckpt = read_plane_record(target)
    if ckpt is None or not (target / "zarr.json").exists():
        if not job.overwrite:
            zarr.open_group(str(folder.volume_path), mode="a", zarr_format=3).update_attributes(root_attrs())
        arrays = _create_arrays(target, shapes, canvas.depth, settings, canvas.dtype, attrs)
        ckpt = {"fingerprints": {}, "damaged": {}}
    else:
        group = zarr.open_group(str(target), mode="r+")
        if ckpt.get("stamp") != stamp:
            group.update_attributes(attrs)
        arrays = [group[str(n)] for n in range(len(shapes))]
    # A plane's fingerprint goes before its pixels are touched, and comes back when they are all written.
    done = {int(z): fp for z, fp in ckpt["fingerprints"].items() if int(z) not in set(todo)}
    damaged = {k: v for k, v in ckpt["damaged"].items() if int(k) not in set(todo)}
    write_plane_record(target, stamp, done, damaged)
    for z in todo:
        if str(z) in ckpt["damaged"]:  # a shard is read before it is partly rewritten: drop the damaged bytes
            discard_plane(target, z)
    _write_planes(job.plan, arrays, shapes, todo, settings, done, damaged, target, stamp, job.fingerprints,
                  progress, mapper)
    if job.overwrite:
        swap_in(folder, "em")
        if folder.store.load_canvas() != canvas:
            folder.store.save_canvas(canvas)
    mpx = sum(h * w for h, w in shapes) * len(todo) / 1e6
    return {"levels": [(canvas.depth, h, w) for h, w in shapes], "planes": todo,
            "megapixels": mpx, "seconds": time.perf_counter() - t0, "path": str(folder.volume_path)}


def _planes_to_do(em: Path, stamp: dict, fingerprints: dict, depth: int, planes, overwrite: bool,
                  resume: bool) -> list[int]:
    """Return the planes to render, refusing to replace a volume that was not asked for."""
    if planes is not None:
        bad = [p for p in planes if not 0 <= int(p) < depth]
        if bad:
            raise InputError(f"--planes {bad} are outside the volume (planes 0 to {depth - 1})", file=em)
    chosen = sorted({int(p) for p in planes}) if planes is not None else list(range(depth))
    if overwrite or not (em / "zarr.json").exists():
        return chosen
    ckpt = read_plane_record(em)
    if ckpt is None or not _same_arrays(ckpt.get("stamp", {}), stamp):
        raise BuildFolderError("holds a volume of another canvas size or chunk layout; pass --overwrite "
                               "to render a new one (the old one is kept until the new one is complete)",
                               file=em.parent)
    if planes is not None:
        return chosen
    stale = [z for z in range(depth) if str(z) in ckpt["damaged"]
             or ckpt["fingerprints"].get(str(z)) != fingerprints[z]]
    if not stale and not resume:
        raise BuildFolderError("a finished volume that matches its transforms already exists here; pass "
                               "--overwrite to render it again, or --planes to re-render some planes",
                               file=em.parent)
    return stale


def _same_arrays(a: dict, b: dict) -> bool:
    """Return True if two stamps give arrays of the same shape, type and chunk layout."""
    ca, cb = a.get("canvas", {}), b.get("canvas", {})
    ra, rb = a.get("render", {}), b.get("render", {})
    return all(ca.get(k) == cb.get(k) for k in ("width", "height", "first_section", "last_section", "dtype")) \
        and all(ra.get(k) == rb.get(k) for k in ("chunk", "shard", "codec", "clevel"))


def _write_planes(plan, arrays, shapes, todo, settings, done, damaged, target, stamp, fingerprints,
                  progress, mapper=None) -> None:
    block = settings.chunk * settings.shard
    per_plane = math.ceil(shapes[0][0] / block) * math.ceil(shapes[0][1] / block)
    # Enough shards per graph that the upper levels of one plane overlap other planes' work;
    # each plane is recorded (and counted) as soon as it is finished.
    batch = max(1, min(64, math.ceil(BATCH_SHARDS / per_plane)))
    total, finished = len(todo), 0
    groups = [todo[i:i + batch] for i in range(0, total, batch)]
    if progress is not None:
        progress(0, total)

    def finish(g: int, k: int) -> None:
        nonlocal finished
        z = groups[g][k]
        if z in done:
            return
        done[z] = fingerprints[z]
        write_plane_record(target, stamp, done, damaged)
        finished += 1
        if progress is not None:
            progress(finished, total)

    graphs = (pyramid_writes(plan, arrays, shapes, group, settings.reducer, block) for group in groups)
    stream = getattr(mapper, "compute_stream", None)
    if stream is not None:  # a cluster: the next batch starts while the last tasks of one run
        stream(graphs, finish)
        _finish_all(finish, groups, range(len(groups)))
        return
    for g, graph in enumerate(graphs):
        compute_each(mapper)(graph, lambda k, g=g: finish(g, k))
        _finish_all(finish, groups, [g])


def _finish_all(finish, groups: list[list[int]], which) -> None:
    """Record every plane of the groups ``which`` as written (their graphs returned without error).

    A scheduler need not call back for each plane (a local callback is not called when the
    graph runs on a cluster); ``finish`` skips the planes it has recorded already.
    """
    for g in which:
        for k in range(len(groups[g])):
            finish(g, k)
