"""Rewrite only the dirty shards of a written volume, and the pyramid shards above them.

Used by ``update``: the caller says which level-0 shards of which planes may
have changed (see :mod:`stackbuild.render.dirty`); those are rendered from the
raw tiles exactly as :func:`stackbuild.render.pyramid.render_shard` renders
them for a full build, and every shard above them is joined from its four
quarters, the dirty ones handed up by the tasks below and the clean ones read
back from the level below and reduced (lossless codecs, so a stored shard
reduces to the same bytes as the freshly rendered one did). Every other shard
file is left alone: its bytes and modification time do not change. So the
result is byte-identical to rendering the whole volume again.

When the canvas grew (see :func:`stackbuild.render.canvas.settle_canvas`) the
arrays are resized in place; a pyramid level the volume did not have yet is
written whole for every plane, from the level below.
"""
from __future__ import annotations

import json
import math
import time
import uuid
from dataclasses import asdict
from pathlib import Path

import numpy as np

from ..folder import BuildFolder
from ..transforms.records import Canvas
from .dirty import all_shards, pyramid_shards
from .fingerprint import em_fingerprints, read_plane_record, write_plane_record
from .lazy import RenderPlan, block_edges
from .ngff import multiscales_attrs, root_attrs
from .pyramid import compute_each, join_shard, render_shard
from .reduce import level_shapes, reduce2x2
from .levelread import StoredArray


def stored_quarter(source, z: int, y0: int, y1: int, x0: int, x1: int, reducer: str) -> np.ndarray:
    """Return the 2x2 reduction of stored pixels ``source[z, y0:y1, x0:x1]`` (a clean shard of the level below)."""
    return reduce2x2(np.asarray(source[z:z + 1, y0:y1, x0:x1]), reducer)


def _plane_done(*_ignored) -> None:
    """A plane's last task: every dirty shard of it is written."""
    return None


def _attributes_hold(folder: Path, attrs: dict) -> bool:
    """Return True if the group in ``folder`` already has every attribute of ``attrs`` with that value (its ``zarr.json``)."""
    try:
        have = json.loads((Path(folder) / "zarr.json").read_text(encoding="utf-8")).get("attributes") or {}
    except (OSError, ValueError, AttributeError):
        return False
    return all(have.get(k) == v for k, v in json.loads(json.dumps(attrs)).items())


def _stored_levels(em: Path, canvas: Canvas, shapes, attrs: dict) -> list | None:
    """Return the levels as :class:`~stackbuild.render.levelread.StoredArray` when neither they nor the group's
    attributes need a change (no level to add, resize or describe anew); None otherwise (then zarr does it)."""
    if not _attributes_hold(em, attrs):
        return None
    levels = [StoredArray.open(em / str(n)) for n in range(len(shapes))]
    if any(a is None or a.shape != (canvas.depth, h, w) for a, (h, w) in zip(levels, shapes)):
        return None
    return levels


def _fit_arrays(em: Path, canvas: Canvas, shapes, settings, attrs: dict) -> tuple[list, dict[int, set]]:
    """Resize the level arrays to the canvas, create missing levels; return arrays and the extra dirty shards.

    When nothing about the arrays changes (an update within the canvas) nothing is written and the
    levels come back as :class:`~stackbuild.render.levelread.StoredArray` (no zarr-python import).
    """
    stored = _stored_levels(em, canvas, shapes, attrs)
    if stored is not None:
        return stored, {}
    import zarr

    group = zarr.open_group(str(em), mode="r+")
    arrays, extra = [], {}
    block = settings.chunk * settings.shard
    old_shapes = []
    for n, (h, w) in enumerate(shapes):
        if str(n) in group:
            a = group[str(n)]
            old_shapes.append(a.shape[1:])
            if a.shape != (canvas.depth, h, w):
                a.resize((canvas.depth, h, w))
        else:  # a level the volume did not have: the same layout and codecs as level 0
            a0 = group["0"]
            a = group.create_array(str(n), shape=(canvas.depth, h, w), dtype=a0.dtype, chunks=a0.chunks,
                                   shards=a0.shards, compressors=a0.compressors, fill_value=a0.fill_value,
                                   dimension_names=["z", "y", "x"])
            extra[n] = all_shards((h, w), block)
        arrays.append(a)
    # A level reduced from an odd edge that has since grown: its last shard row/column is stale.
    for n in range(1, len(old_shapes)):
        (ho, wo), (hn, wn) = old_shapes[n - 1], shapes[n - 1]
        h_up, w_up = shapes[n]
        if wo % 2 and wn != wo:
            j = ((wo + 1) // 2 - 1) // block
            extra.setdefault(n, set()).update((i, j) for i in range(math.ceil(h_up / block)))
        if ho % 2 and hn != ho:
            i = ((ho + 1) // 2 - 1) // block
            extra.setdefault(n, set()).update((i, j) for j in range(math.ceil(w_up / block)))
    group.update_attributes(attrs)
    return arrays, extra


def _graph(plan: RenderPlan, arrays, shapes, dirty: dict[int, list[set]], reducer: str, block: int,
           keep: dict[int, list] | None = None) -> list:
    """Return one delayed per plane of ``dirty`` (``{z: [level-0 set, level-1 set, ...]}``) writing its dirty shards.

    ``keep`` maps planes whose stored level 0 may be read back to the pixel boxes that can change
    (``changed`` of :func:`~stackbuild.render.pyramid.render_shard`); other planes' dirty shards
    are rendered whole.
    """
    from dask.delayed import Delayed

    keep = keep or {}
    token = uuid.uuid4().hex  # keys only need to be unique to this graph
    top = len(arrays) - 1
    dsk, finals = {}, []
    for z, levels in sorted(dirty.items()):
        keys = []
        for n, (target, (h, w)) in enumerate(zip(arrays, shapes)):
            up = reducer if n < top else None
            ys, xs = block_edges(h, block), block_edges(w, block)
            for i, j in sorted(levels[n]):
                (a, b), (c, d) = ys[i], xs[j]
                key = (f"stackbuild-patch-{n}-{token}", z, i, j)
                if n == 0:
                    dsk[key] = (render_shard, plan, target, z, a, b, c, d, up, keep.get(z))
                else:
                    below, (hb, wb) = arrays[n - 1], shapes[n - 1]
                    yb, xb = block_edges(hb, block), block_edges(wb, block)
                    rows = []
                    for ii in (2 * i, 2 * i + 1):
                        if ii >= len(yb):
                            continue
                        row = []
                        for jj in (2 * j, 2 * j + 1):
                            if jj >= len(xb):
                                continue
                            if (ii, jj) in levels[n - 1]:
                                row.append((f"stackbuild-patch-{n - 1}-{token}", z, ii, jj))
                            else:
                                part = (f"stackbuild-stored-{n - 1}-{token}", z, ii, jj)
                                dsk[part] = (stored_quarter, below, z, *yb[ii], *xb[jj], reducer)
                                row.append(part)
                        rows.append(row)
                    dsk[key] = (join_shard, rows, target, z, a, c, up)
                keys.append(key)
        final = (f"stackbuild-patch-done-{token}", z)
        dsk[final] = (_plane_done, *keys)
        finals.append(Delayed(final, dsk))
    return finals


def patch_volume(build_dir, settings, canvas: Canvas, dirty0: dict[int, set], *, previous: Canvas | None = None,
                 pixels: dict[int, list] | None = None, progress=None, mapper=None) -> dict:
    """Rewrite the dirty level-0 shards ``dirty0`` (``{z: {(i, j)}}``) and the pyramid above them; return facts.

    Parameters
    ----------
    build_dir : str or Path
        A build folder with a written volume (``volume.zarr/em``).
    settings : RenderSettings
        The settings the volume was written with (chunk, shard, codec, reducer, interpolation).
    canvas : Canvas
        The canvas to write (the stored one, or one grown from it; its origin must not have moved).
    dirty0 : dict
        Output plane -> level-0 shards (row, column of the shard grid) to render again.
    previous : Canvas, optional
        The canvas the volume was written on, when ``canvas`` grew from it: planes whose
        fingerprint matched under it are carried over as fresh (their pixels did not change).
    pixels : dict, optional
        Output plane -> level-0 pixel boxes ``[x0, y0, x1, y1]`` holding every pixel that can
        have changed. Chunks of a dirty shard outside them keep their stored pixels instead of
        being rendered again, on a plane that was fresh and undamaged before this call and a
        canvas of unchanged size (otherwise, or for a plane not named, dirty shards are rendered whole).
    progress : callable(done, total), optional

    Returns
    -------
    dict
        ``planes`` touched, ``shards`` rewritten per level, ``shards_total`` per level, ``seconds``.
    """
    t0 = time.perf_counter()
    folder = BuildFolder(Path(build_dir))
    em = folder.pyramid_path()
    store = folder.store
    block = settings.chunk * settings.shard
    shapes = level_shapes(canvas.height, canvas.width, settings.chunk)
    stamp = json.loads(json.dumps({"render": asdict(settings), "canvas": canvas.to_json()}))
    attrs = multiscales_attrs("em", len(shapes), canvas.pixel_size_nm, canvas.section_thickness_nm,
                              settings.reducer, extra=stamp)
    record = read_plane_record(em) or {"fingerprints": {}, "damaged": {}}
    if store.load_canvas() != canvas:
        store.save_canvas(canvas)
    if not _attributes_hold(folder.volume_path, root_attrs()):
        import zarr

        zarr.open_group(str(folder.volume_path), mode="a", zarr_format=3).update_attributes(root_attrs())
    arrays, extra = _fit_arrays(em, canvas, shapes, settings, attrs)
    planes = sorted(set(dirty0) | (set(range(canvas.depth)) if extra else set()))
    dirty = {z: pyramid_shards(dirty0.get(z, set()), shapes, block, extra) for z in planes}
    dirty = {z: v for z, v in dirty.items() if any(v)}
    fps = record["fingerprints"]
    if previous is not None and previous != canvas:
        # Untouched planes keep their pixels on a grown canvas: carry their freshness over.
        old = em_fingerprints(store, previous, settings, [z for z in range(previous.depth) if z not in dirty])
        new = em_fingerprints(store, canvas, settings, list(old))
        fps = {str(z): new[z] for z in old if fps.get(str(z)) == old[z]}
    same_size = not extra and (previous is None or (previous.width, previous.height) == (canvas.width, canvas.height))
    keep = {z: boxes for z, boxes in (pixels or {}).items()
            if same_size and z in dirty and str(z) in fps and str(z) not in record["damaged"]}
    for z in dirty:
        fps.pop(str(z), None)  # a plane counts as stale while it is being written
    damaged = {k: v for k, v in record["damaged"].items() if int(k) not in dirty}
    write_plane_record(em, stamp, fps, damaged)
    plan = RenderPlan.from_canvas(store.root, canvas, settings)
    order = sorted(dirty)
    fresh = em_fingerprints(store, canvas, settings, order)
    tasks = _graph(plan, arrays, shapes, dirty, settings.reducer, block, keep)
    finished = [0]
    if progress is not None:
        progress(0, len(order))

    def finish(k: int) -> None:
        fps[str(order[k])] = fresh[order[k]]
        write_plane_record(em, stamp, fps, damaged)
        finished[0] += 1
        if progress is not None:
            progress(finished[0], len(order))

    if tasks:
        compute_each(mapper)(tasks, finish)
    counts = [sum(len(v[n]) for v in dirty.values()) for n in range(len(shapes))]
    totals = [len(all_shards(s, block)) * canvas.depth for s in shapes]
    return {"planes": order, "shards": counts, "shards_total": totals, "seconds": time.perf_counter() - t0}
