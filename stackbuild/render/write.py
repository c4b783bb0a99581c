"""The render stage: write the registered volume as a multiscale OME-Zarr 0.5 pyramid (zarr v3).

All levels are written in the same pass: level ``n+1`` is computed from level
``n`` in the same dask graph, one task per shard and level, so no two tasks ever
write the same shard (see :mod:`stackbuild.render.pyramid`). Planes are written in
batches (one dask graph each); as each plane is finished the list of finished
planes is saved to ``volume.zarr/em/.stackbuild_done.json``, so a killed render
resumes with the planes not yet done, and ``planes=[...]`` re-renders only those planes.
"""
from __future__ import annotations

import json
import math
import shutil
import time
from dataclasses import asdict
from pathlib import Path

import zarr
from zarr.codecs import BloscCodec

from ..errors import BuildFolderError, InputError
from ..run.cluster import client_mapper, compute_each
from ..folder import BuildFolder
from ..transforms.store import atomic_write_text
from .canvas import compute_canvas
from .contrast import DOC_KIND, RangeJob, contrast_record, range_job
from .lazy import RenderPlan, section_records
from .ngff import multiscales_attrs, root_attrs
from .pyramid import pyramid_writes
from .reduce import level_shapes
from .settings import check_settings

CHECKPOINT = ".stackbuild_done.json"
#: Level-0 shards rendered per dask graph (whole planes; each plane is checkpointed when it is done).
BATCH_SHARDS = 32


def _compressors(settings):
    if settings.codec == "none":
        return None
    return [BloscCodec(cname=settings.codec, clevel=settings.clevel, shuffle="shuffle")]


def _validate_records(folder: BuildFolder, sections: list[int]) -> None:
    """Load every transform record up front, so bad input is refused before anything is written."""
    for s in sections:
        section_records(str(folder.store.root), s)


def _default_mapper():
    """Return a mapper onto the running Dask client, else onto a thread pool of this process."""
    try:
        from distributed import default_client

        return client_mapper(default_client())
    except (ImportError, ValueError):  # no distributed, or no client
        from concurrent.futures import ThreadPoolExecutor

        def mapper(fn, items):
            with ThreadPoolExecutor() as pool:
                return list(pool.map(fn, items))
        return mapper


def _prepare_contrast(folder, settings, sections, planes_sections, mapper=None) -> None:
    """Measure the range of every section that needs it, one task per section (see :func:`range_job`)."""
    store = folder.store
    old = store.load_doc(DOC_KIND) or {}
    ranges = {int(k): (v["low"], v["high"]) for k, v in old.get("sections", {}).items()
              if old.get("percentiles") == list(settings.contrast_percentiles)
              and old.get("scale") == settings.contrast_scale}
    jobs = [RangeJob(str(store.root), s, tuple(settings.contrast_percentiles), settings.contrast_scale)
            for s in sections if s in planes_sections or s not in ranges]
    for s, lo, hi in (mapper or _default_mapper())(range_job, jobs):
        ranges[s] = (lo, hi)
    ranges = {s: r for s, r in ranges.items() if s in sections}
    store.save_doc(DOC_KIND, contrast_record(ranges, tuple(settings.contrast_percentiles),
                                             settings.contrast_scale))


def _read_checkpoint(em: Path) -> dict | None:
    path = em / CHECKPOINT
    if not path.exists():
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None


def _create_arrays(em: Path, shapes, depth: int, settings, dtype: str, attrs: dict) -> list:
    group = zarr.open_group(str(em), mode="w", zarr_format=3, attributes=attrs)
    arrays = []
    for n, (h, w) in enumerate(shapes):
        chunks = (1, settings.chunk, settings.chunk)
        shards = None if settings.shard == 1 else (1, settings.chunk * settings.shard, settings.chunk * settings.shard)
        arrays.append(group.create_array(str(n), shape=(depth, h, w), dtype=dtype, chunks=chunks, shards=shards,
                                         compressors=_compressors(settings), fill_value=0,
                                         dimension_names=["z", "y", "x"], overwrite=True))
    return arrays


def render_volume(build_dir, settings, *, planes: list[int] | None = None, overwrite: bool = False,
                  progress=None, mapper=None) -> dict:
    """Render and write the volume of a build folder; return facts about the run.

    Parameters
    ----------
    build_dir : str or Path
        The build folder (stitch records needed; alignments optional).
    settings : RenderSettings
        Chunking, compression, reducer, interpolation and contrast options.
    planes : list of int, optional
        Re-render only these output planes (0-based z) of an existing volume,
        keeping the others. Without it, an unfinished volume (see the
        checkpoint) is resumed and a finished one is refused unless ``overwrite``.
    overwrite : bool
        Replace an existing volume.
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
    BuildFolderError
        If a finished volume exists and neither ``overwrite`` nor ``planes`` is given.
    InputError
        If a transform record is missing, truncated or from a newer format (nothing is written).
    """
    t0 = time.perf_counter()
    check_settings(settings)
    folder = BuildFolder(Path(build_dir))
    manifest = folder.tile_manifest()
    vol = folder.config.volume
    em = folder.pyramid_path()
    _validate_records(folder, manifest.sections)
    canvas = compute_canvas(folder.store, manifest.sections, manifest.lost_sections,
                            vol.pixel_size, vol.section_thickness)
    plan = RenderPlan.from_canvas(folder.store.root, canvas, settings)
    shapes = level_shapes(canvas.height, canvas.width, settings.chunk)
    used = asdict(settings)
    stamp = json.loads(json.dumps({"render": used, "canvas": canvas.to_json()}))
    todo = _planes_to_do(em, stamp, canvas.depth, planes, overwrite)
    if overwrite and folder.volume_path.exists():
        shutil.rmtree(folder.volume_path)
    if folder.store.load_canvas() != canvas:
        folder.store.save_canvas(canvas)
    if settings.contrast:
        _prepare_contrast(folder, settings, manifest.sections, {canvas.first_section + z for z in todo},
                          mapper)
    attrs = multiscales_attrs("em", len(shapes), canvas.pixel_size_nm, canvas.section_thickness_nm,
                              settings.reducer, extra=stamp)
    ckpt = _read_checkpoint(em)
    if ckpt is None or not (em / "zarr.json").exists():
        zarr.open_group(str(folder.volume_path), mode="a", zarr_format=3).update_attributes(root_attrs())
        arrays = _create_arrays(em, shapes, canvas.depth, settings, canvas.dtype, attrs)
        ckpt = {"stamp": stamp, "done": []}
    else:
        group = zarr.open_group(str(em), mode="r+")
        arrays = [group[str(n)] for n in range(len(shapes))]
    done = set(ckpt["done"]) - set(todo)
    _write_checkpoint(em, stamp, done)
    _write_planes(plan, arrays, shapes, todo, settings, done, em, stamp, progress)
    mpx = sum(h * w for h, w in shapes) * len(todo) / 1e6
    return {"levels": [(canvas.depth, h, w) for h, w in shapes], "planes": todo,
            "megapixels": mpx, "seconds": time.perf_counter() - t0, "path": str(folder.volume_path)}


def _planes_to_do(em: Path, stamp: dict, depth: int, planes, overwrite: bool) -> list[int]:
    """Return the planes to render, refusing to overwrite a volume that was not asked for."""
    if planes is not None:
        bad = [p for p in planes if not 0 <= int(p) < depth]
        if bad:
            raise InputError(f"planes {bad} are outside the volume (depth {depth})", file=em)
    exists = (em / "zarr.json").exists()
    if overwrite or not exists:
        return sorted({int(p) for p in planes}) if planes is not None else list(range(depth))
    ckpt = _read_checkpoint(em)
    if ckpt is None or ckpt.get("stamp") != stamp:
        if planes is not None and ckpt is not None and ckpt.get("stamp", {}).get("canvas") == stamp["canvas"] \
                and _same_layout(ckpt["stamp"]["render"], stamp["render"]):
            return sorted({int(p) for p in planes})
        raise BuildFolderError("a volume with a different canvas or settings already exists here; "
                               "pass overwrite to replace it", file=em.parent)
    if planes is not None:
        return sorted({int(p) for p in planes})
    missing = [z for z in range(depth) if z not in set(ckpt["done"])]
    if not missing:
        raise BuildFolderError("a finished volume already exists here; pass overwrite to replace it "
                               "or planes to re-render some planes", file=em.parent)
    return missing


def _same_layout(a: dict, b: dict) -> bool:
    keys = ("chunk", "shard", "codec", "clevel", "reducer")
    return all(a.get(k) == b.get(k) for k in keys)


def _write_checkpoint(em: Path, stamp: dict, done: set[int]) -> None:
    atomic_write_text(em / CHECKPOINT, json.dumps({"stamp": stamp, "done": sorted(done)}) + "\n")


def _write_planes(plan, arrays, shapes, todo, settings, done, em, stamp, progress) -> None:
    block = settings.chunk * settings.shard
    per_plane = math.ceil(shapes[0][0] / block) * math.ceil(shapes[0][1] / block)
    # Enough shards per graph that the upper levels of one plane overlap other planes' work;
    # each plane is checkpointed (and counted) as soon as it is finished.
    batch = max(1, min(64, math.ceil(BATCH_SHARDS / per_plane)))
    total, finished = len(todo), 0
    if progress is not None:
        progress(0, total)
    for group in (todo[i:i + batch] for i in range(0, total, batch)):
        def finish(k: int, group=group) -> None:
            nonlocal finished
            done.add(group[k])
            _write_checkpoint(em, stamp, done)
            finished += 1
            if progress is not None:
                progress(finished, total)

        compute_each(pyramid_writes(plan, arrays, shapes, group, settings.reducer, block), finish)
