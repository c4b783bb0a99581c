"""The task graph that renders planes and writes every pyramid level in one pass.

One task per shard and level. A level-0 task renders its shard from the raw tiles
(chunk by chunk, exactly as the lazy volume does), writes it, and hands up its
2x2 reduction; a level-``n`` task joins the (up to) 2 x 2 quarters handed up by
the level below into its shard, writes it, and hands up its own reduction. So

* every shard of every level is written by exactly one task, whole (no
  read-modify-write of a shard, no two tasks on one shard);
* what travels between tasks is a quarter of a shard, already reduced, while
  the block it came from is still hot in cache (between worker processes that
  is 4x less data than handing up whole blocks);
* the graph is a quadtree per plane, so the scheduler finishes each quad before
  rendering far ahead and memory stays bounded by a few shards per level.

Reductions go through :func:`stackbuild.render.reduce.reduce2x2` one block at a
time, exactly as :func:`stackbuild.render.lazy.reduce_level` does, so the
written levels equal the lazy ones byte for byte.
"""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from .lazy import RenderPlan, block_edges, records_token, render_block
from .reduce import reduce2x2
from .shardfile import shard_writer

if TYPE_CHECKING:  # dask is imported where a graph is made: render tasks never import it
    from dask.delayed import Delayed


def write_block(target, z: int, y0: int, x0: int, block: np.ndarray, stored: dict | None = None) -> None:
    """Write ``block`` (shape ``(1, h, w)``, chunk-aligned at ``y0, x0``) into ``target[z, y0:, x0:]``.

    zarr leaves out a chunk that holds only the fill value, and to know it compares every
    chunk with a full array of the fill value (``numpy.array_equal`` on a new array: about
    half of what zarr spends on writing a shard, measured on 4096 px shards of a build).
    When no chunk of ``block`` is all fill value (a cheaper test: one ``any`` per chunk),
    that comparison cannot leave anything out, so the write skips it
    (``write_empty_chunks``); the bytes written are the same either way. A block that is
    exactly one shard of an array laid out as the render stage lays it out is encoded and
    written by :mod:`stackbuild.render.shardfile` instead (the same file, a third less CPU);
    ``stored`` (``{chunk coords in the shard: bytes}``, :func:`_read_back`) gives chunks already
    encoded, written as they are.
    """
    _, h, w = block.shape
    writer = shard_writer(target) if target.shards is not None else None
    if writer is not None and _whole_shard(target, z, y0, x0, block.shape):
        writer.write((z, y0, x0), block, stored)  # the same file, without zarr's per-chunk machinery
        return
    cy, cx = target.chunks[1], target.chunks[2]
    fill = target.fill_value
    full = all((block[0, a:a + cy, b:b + cx] != fill).any() for a in range(0, h, cy) for b in range(0, w, cx))
    out = target.with_config({"write_empty_chunks": True}) if full else target
    out[z:z + 1, y0:y0 + h, x0:x0 + w] = block


def _whole_shard(target, z: int, y0: int, x0: int, shape) -> bool:
    """Return True if a block of ``shape`` at ``[z, y0, x0]`` is exactly one shard of ``target`` (clipped to the array)."""
    sz, sy, sx = target.shards
    _, hh, ww = target.shape
    return sz == 1 and y0 % sy == 0 and x0 % sx == 0 and \
        tuple(shape) == (1, min(sy, hh - y0), min(sx, ww - x0))


def render_shard(plan: RenderPlan, target, z: int, y0: int, y1: int, x0: int, x1: int,
                 reducer: str | None, changed: list | None = None) -> np.ndarray | None:
    """Render level-0 pixels ``[z, y0:y1, x0:x1]`` (one shard), write them to ``target``, hand up their reduction.

    The shard is rendered in the lazy volume's blocks (:func:`stackbuild.render.lazy.render_block`
    on the same edges) straight into one buffer, so the written level 0 equals the lazy one byte
    for byte. Returns ``reduce2x2(shard, reducer)``, or None when ``reducer`` is None (no level above).

    ``changed`` (a patch of a written volume, :mod:`stackbuild.render.patch`): level-0 pixel boxes
    ``[x0, y0, x1, y1]`` (end exclusive) holding every pixel whose value can have changed; a chunk
    outside all of them keeps its stored pixels, read back (lossless codecs: the shard gets the
    bytes a full render gives). Reading a 1024 px chunk costs a few milliseconds; rendering it, tens.
    A kept chunk's stored bytes go back into the shard as they are (:func:`_read_back`): encoding
    its pixels again gives the same bytes, at about 5 ms per 1024 px chunk.
    """
    out = np.empty((1, y1 - y0, x1 - x0), np.dtype(plan.dtype))
    c = plan.chunk
    kept = [] if changed is None else [
        (a, b) for a in range(y0, y1, c) for b in range(x0, x1, c)
        if not any(bx0 < min(b + c, x1) and b < bx1 and by0 < min(a + c, y1) and a < by1
                   for bx0, by0, bx1, by1 in changed)]
    back = _read_back(target, z, y0, x0, kept)
    for a in range(y0, y1, c):
        for b in range(x0, x1, c):
            a1, b1 = min(a + c, y1), min(b + c, x1)
            if (a, b) in back:
                out[:, a - y0:a1 - y0, b - x0:b1 - x0] = back[(a, b)][1][:, :a1 - a, :b1 - b]
            elif (a, b) in kept:  # a layout the shard reader does not handle: through zarr
                out[:, a - y0:a1 - y0, b - x0:b1 - x0] = np.asarray(target[z:z + 1, a:a1, b:b1])
            else:
                out[:, a - y0:a1 - y0, b - x0:b1 - x0] = render_block(plan, z, a, a1, b, b1)
    stored = {(0, (a - y0) // c, (b - x0) // c): data for (a, b), (data, _) in back.items() if data is not None}
    write_block(target, z, y0, x0, out, stored)
    return None if reducer is None else reduce2x2(out, reducer)


def _read_back(target, z: int, y0: int, x0: int, corners: list) -> dict:
    """Return ``{(a, b): (stored bytes or None, pixels (1, c, c))}`` of the stored chunks at level-0 corners ``corners``.

    Read straight from the shard file at ``(z, y0, x0)`` when :mod:`stackbuild.render.shardfile`
    handles the array's layout (each chunk read once, CRC-32C checked; its bytes then go back into
    the shard unchanged instead of being encoded again); empty otherwise, and without a chunk whose
    bytes do not check out (the caller reads those through zarr, which raises for damaged bytes).
    """
    writer = shard_writer(target) if corners and target.shards is not None else None
    if writer is None or writer.chunk[0] != 1 or y0 % writer.shard[1] or x0 % writer.shard[2]:
        return {}
    cy, cx = writer.chunk[1], writer.chunk[2]
    coords = {(0, (a - y0) // cy, (b - x0) // cx): (a, b) for a, b in corners}
    return {coords[k]: v for k, v in writer.stored((z, y0, x0), list(coords)).items()}


def join_shard(quarters: list[list[np.ndarray]], target, z: int, y0: int, x0: int,
               reducer: str | None) -> np.ndarray | None:
    """Join the quarters handed up from the level below into one shard at ``[z, y0:, x0:]``, write it, hand up its reduction."""
    block = quarters[0][0] if len(quarters) == 1 and len(quarters[0]) == 1 else np.block(quarters)
    write_block(target, z, y0, x0, block)
    return None if reducer is None else reduce2x2(block, reducer)


def _plane_done(*_ignored) -> None:
    """A plane's last task: all its top-level shards (and so every shard below them) are written."""
    return None


def pyramid_writes(plan: RenderPlan, targets: list, shapes: list[tuple[int, int]], planes: list[int],
                   reducer: str, shard: int) -> list[Delayed]:
    """Return one delayed task per plane of ``planes`` that renders it and writes all levels of its pyramid.

    Parameters
    ----------
    plan : RenderPlan
        The canvas and render options (small and picklable: it travels with every task).
    targets : list of zarr.Array
        One array per level, shape ``(depth, *shapes[n])``, sharded with shard edge ``shard``.
    shapes : list of (int, int)
        Each level's height and width (see :func:`stackbuild.render.reduce.level_shapes`).
    planes : list of int
        Output planes (0-based z) to render.
    reducer : str
        The 2x2 reducer (see :data:`stackbuild.render.reduce.REDUCERS`).
    shard : int
        Shard edge in pixels (chunk x chunks per shard), the same at every level: a level-n
        shard is made of the 2 x 2 level-(n-1) shards below it, each reduced to a quarter.

    Returns
    -------
    list of dask.delayed.Delayed
        One per plane, all sharing one graph; computing them together (with any scheduler)
        writes everything, and a plane's item finishes once all its shards are written.
    """
    from dask.base import tokenize
    from dask.delayed import Delayed

    token = tokenize(plan, planes, [str(t.store_path) for t in targets], shapes, reducer, shard,
                     records_token(plan, planes))
    top = len(targets) - 1
    dsk: dict = {}
    below = None
    for n, (target, (h, w)) in enumerate(zip(targets, shapes)):
        name = f"stackbuild-pyramid-{n}-{token}"
        up = reducer if n < top else None
        ys, xs = block_edges(h, shard), block_edges(w, shard)
        for k, z in enumerate(planes):
            for i, (a, b) in enumerate(ys):
                for j, (c, d) in enumerate(xs):
                    if n == 0:
                        dsk[(name, k, i, j)] = (render_shard, plan, target, z, a, b, c, d, up)
                    else:
                        quarters = [[(below, k, ii, jj) for jj in (2 * j, 2 * j + 1) if (below, k, ii, jj) in dsk]
                                    for ii in (2 * i, 2 * i + 1) if (below, k, ii, 2 * j) in dsk]
                        dsk[(name, k, i, j)] = (join_shard, quarters, target, z, a, c, up)
        below = name
    tops = [key for key in dsk if key[0] == below]
    finals = []
    for k in range(len(planes)):
        final = (f"stackbuild-plane-done-{token}", k)
        dsk[final] = (_plane_done, *[key for key in tops if key[1] == k])
        finals.append(final)
    return [Delayed(final, dsk) for final in finals]


def compute_locally(items: list, on_done) -> None:
    """Compute dask collections ``items`` on this process's dask scheduler, calling ``on_done(i)`` as item ``i`` finishes.

    ``on_done`` runs in the calling thread's callback, so it may write files (the plane
    records). The first task error is re-raised in the caller. A mapper that runs on a
    cluster brings its own ``compute_each`` (see :func:`compute_each`).
    """
    import dask
    from dask.callbacks import Callback
    from dask.threaded import get as threaded_get

    keys = {item.key: i for i, item in enumerate(items)}

    class _Finished(Callback):
        def _posttask(self, key, result, dsk, state, worker_id):
            if key in keys:
                on_done(keys[key])

    # The threaded scheduler here, even with a distributed client as the default. Passed as the
    # function, not as "threads": dask then does not import distributed (0.4 s) to look for a client.
    with _Finished():
        dask.compute(*items, scheduler=threaded_get)


def compute_each(mapper):
    """Return ``mapper``'s way to compute dask collections with a per-item callback, or :func:`compute_locally`.

    A mapper made by :func:`stackbuild.run.cluster.client_mapper` computes on its own
    client (never on a global default one); any other mapper, or None, computes here.
    """
    return getattr(mapper, "compute_each", None) or compute_locally
