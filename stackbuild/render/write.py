"""The render stage: write the registered volume as a multiscale OME-Zarr 0.5 pyramid (zarr v3).

All levels are written in the same pass: level ``n+1`` is computed from level
``n`` in the same dask graph (see :func:`written_pyramid`), and every level's
dask blocks are that level's shards, so no two tasks ever write the same shard. Planes are written in
small batches; after each batch the list of finished planes is saved to
``volume.zarr/em/.stackbuild_done.json``, so a killed render resumes with the
planes not yet done, and ``planes=[...]`` re-renders only those planes.
"""
from __future__ import annotations

import json
import math
import shutil
import time
from dataclasses import asdict
from pathlib import Path

import dask.array as da
import numpy as np
import zarr
from dask.base import tokenize
from dask.highlevelgraph import HighLevelGraph
from zarr.codecs import BloscCodec

from ..errors import BuildFolderError, InputError
from ..run.folder import BuildFolder
from ..transforms.store import atomic_write_text
from .canvas import compute_canvas
from .contrast import DOC_KIND, contrast_record, measure_range
from .lazy import RenderPlan, records_token, reduce_level, render_block, section_records
from .ngff import multiscales_attrs, root_attrs
from .reduce import REDUCERS, level_shapes
from .sampler import interpolation_order

CHECKPOINT = ".stackbuild_done.json"
#: Level-0 shards rendered per dask graph (whole planes; the checkpoint is saved after each graph).
BATCH_SHARDS = 16


def check_settings(settings) -> None:
    """Raise :class:`InputError` if render settings are out of range."""
    where = "[render]"
    if settings.chunk < 16:
        raise InputError(f"{where} chunk must be >= 16, got {settings.chunk}")
    if settings.shard < 1:
        raise InputError(f"{where} shard must be >= 1, got {settings.shard}")
    if settings.reducer not in REDUCERS:
        raise InputError(f"{where} reducer must be one of {', '.join(REDUCERS)}, got {settings.reducer!r}")
    try:
        interpolation_order(settings.interpolation)
    except ValueError as exc:
        raise InputError(f"{where} {exc}") from None
    lo, hi = settings.contrast_percentiles
    if not 0 <= lo < hi <= 100:
        raise InputError(f"{where} contrast_percentiles must satisfy 0 <= low < high <= 100")
    if settings.contrast_scale < 1:
        raise InputError(f"{where} contrast_scale must be >= 1, got {settings.contrast_scale}")


def _compressors(settings):
    if settings.codec == "none":
        return None
    return [BloscCodec(cname=settings.codec, clevel=settings.clevel, shuffle="shuffle")]


def _validate_records(folder: BuildFolder, sections: list[int]) -> None:
    """Load every transform record up front, so bad input is refused before anything is written."""
    for s in sections:
        section_records(str(folder.store.root), s)


def _prepare_contrast(folder, settings, sections, planes_sections) -> None:
    store = folder.store
    old = store.load_doc(DOC_KIND) or {}
    ranges = {int(k): (v["low"], v["high"]) for k, v in old.get("sections", {}).items()
              if old.get("percentiles") == list(settings.contrast_percentiles)
              and old.get("scale") == settings.contrast_scale}
    for s in sections:
        if s in planes_sections or s not in ranges:
            stitch, _ = section_records(str(store.root), s)
            ranges[s] = measure_range(stitch, settings.contrast_percentiles, settings.contrast_scale)
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
                  progress=None) -> dict:
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
    em = folder.volume_path / "em"
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
        _prepare_contrast(folder, settings, manifest.sections, {canvas.first_section + z for z in todo})
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


def _write_through(block: np.ndarray, target, z: int, block_info=None) -> np.ndarray:
    """Write one block to its place in ``target`` (plane ``z`` on), and pass it on to the next level."""
    (k0, k1), (y0, y1), (x0, x1) = block_info[0]["array-location"]
    target[z + k0:z + k1, y0:y1, x0:x1] = block
    return block


def _render_shard(plan: RenderPlan, target, z: int, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
    """Render level-0 pixels ``[z, y0:y1, x0:x1]`` (one shard) chunk by chunk, write them to ``target``, return them.

    The chunks are exactly the lazy volume's blocks (:func:`stackbuild.render.lazy.render_block`
    on the same edges), so the written level 0 equals the lazy one byte for byte; rendering
    them straight into one shard-sized buffer spares a rechunk (a graph layer and a copy).
    """
    out = np.empty((1, y1 - y0, x1 - x0), np.dtype(plan.dtype))
    c = plan.chunk
    for a in range(y0, y1, c):
        for b in range(x0, x1, c):
            out[:, a - y0:min(a + c, y1) - y0, b - x0:min(b + c, x1) - x0] = \
                render_block(plan, z, a, min(a + c, y1), b, min(b + c, x1))
    target[z:z + 1, y0:y1, x0:x1] = out
    return out


def written_level0(plan: RenderPlan, target, planes: list[int], block: int) -> da.Array:
    """Return level 0 of ``planes`` in ``1 x block x block`` blocks, each written to ``target`` by the task that renders it."""
    ys = [(a, min(a + block, plan.height)) for a in range(0, plan.height, block)]
    xs = [(a, min(a + block, plan.width)) for a in range(0, plan.width, block)]
    name = "stackbuild-written-level0-" + tokenize(plan, planes, str(target.store_path), block,
                                                   records_token(plan, planes))
    dsk = {(name, k, i, j): (_render_shard, plan, target, z, a, b, c, d)
           for k, z in enumerate(planes) for i, (a, b) in enumerate(ys) for j, (c, d) in enumerate(xs)}
    chunks = ((1,) * len(planes), tuple(b - a for a, b in ys), tuple(d - c for c, d in xs))
    return da.Array(HighLevelGraph.from_collections(name, dsk, dependencies=[]), name, chunks,
                    dtype=np.dtype(plan.dtype))


def written_pyramid(plan: RenderPlan, targets: list, planes: list[int], reducer: str, block: int) -> da.Array:
    """Return the top level of the pyramid of ``planes``, each level's blocks written to ``targets`` on the way.

    Every level-``n`` block is written by the task that makes it and then feeds the
    level ``n+1`` reduction, so the graph is a tree: the scheduler finishes each quad of
    blocks before rendering far ahead, and memory stays bounded by a few blocks per level
    instead of growing with the width of a plane. ``block`` is the shard edge, so no two
    tasks write the same shard. ``planes`` must be consecutive (they are written from
    ``planes[0]`` on).
    """
    if list(planes) != list(range(planes[0], planes[0] + len(planes))):
        raise ValueError(f"planes must be consecutive, got {planes}")
    level = written_level0(plan, targets[0], planes, block)
    for target in targets[1:]:
        level = reduce_level(level, reducer, block)
        level = level.map_blocks(_write_through, target, planes[0], dtype=level.dtype,
                                 name="stackbuild-write-" + tokenize(level.name, str(target.store_path)))
    return level


def _batches(todo: list[int], size: int) -> list[list[int]]:
    """Split sorted plane numbers into runs of consecutive planes, each at most ``size`` long."""
    runs: list[list[int]] = []
    for z in todo:
        if runs and z == runs[-1][-1] + 1 and len(runs[-1]) < size:
            runs[-1].append(z)
        else:
            runs.append([z])
    return runs


def _write_planes(plan, arrays, shapes, todo, settings, done, em, stamp, progress) -> None:
    block = settings.chunk * settings.shard
    per_plane = math.ceil(shapes[0][0] / block) * math.ceil(shapes[0][1] / block)
    # Enough shards per batch that the upper levels of one plane overlap other planes' work.
    batch = max(1, min(16, math.ceil(BATCH_SHARDS / per_plane)))
    total, finished = len(todo), 0
    if progress is not None:
        progress(0, total)
    for group in _batches(todo, batch):
        written_pyramid(plan, arrays, group, settings.reducer, block).compute()
        done.update(group)
        _write_checkpoint(em, stamp, done)
        finished += len(group)
        if progress is not None:
            progress(finished, total)
