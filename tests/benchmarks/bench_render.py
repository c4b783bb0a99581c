"""Benchmark of the render stage: rendering + pyramid throughput against the I/O floor.

Run as ``python tests/benchmarks/bench_render.py`` (modest default size) or with
``--full``. Scheduler: dask's threaded scheduler with 2 threads by default, or
``--cluster`` for a ``dask.distributed.LocalCluster`` of 2 single-threaded
worker processes; either way OpenCV runs single-threaded inside each task, as in
the build's workers (:mod:`stackbuild.run.cluster`). Measured side by side in one
run, alternating, ``--repeat`` times each (the best of each is reported, since the
machine is shared):

* render + pyramid: ``render_volume`` wall time, all levels written together;
* I/O floor: reading every tile once (tifffile) + writing the level-0 pixels
  once with the same chunks, shards and codec (zarr);
* a random 1024 x 1024 window read from the lazy volume (cold and warm cache).

With ``--cold`` the operating system's page cache is dropped before every run
of either (root only), so both read the tiles from the disk, as a real build
does; by default the tiles come from memory after the first run, which leaves
the floor with almost no reading and is the harshest case for the ratio.

Targets: render + pyramid within 2x the I/O floor; a window within 0.5 s.

With ``--reads TILE`` (e.g. 2048 or 4096) it instead renders one section of 3 x 3
tiles of ``TILE`` px (slightly rotated, so regions meet tiles at a slant) on the
build's own LocalCluster of 2 worker processes, once with uncompressed tiles and
once for each layout of zlib-compressed ones (strips of 64 rows, tifffile's default;
TIFF tiles of 512 px; one strip for the whole image), and prints how many times each
tile's pixels were read (pixels decoded by all workers / pixels of all tiles; 1.0 is
reading each tile once) and the largest worker's peak resident size. A compressed
strip is decoded whole, so two tasks on different workers that need the two halves of
a tile's rows both decode them.
"""
from __future__ import annotations

import argparse
import contextlib
import os
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

import cv2
import dask
import numpy as np
import tifffile
import zarr

sys.path[:0] = [str(Path(__file__).resolve().parents[2]), str(Path(__file__).resolve().parents[1])]
from render_builders import make_build  # noqa: E402

from stackbuild import tiles as tiles_mod  # noqa: E402
from stackbuild.render.lazy import lazy_volume  # noqa: E402
from stackbuild.render.settings import RenderSettings  # noqa: E402
from stackbuild.render.write import _compressors, render_volume  # noqa: E402
from stackbuild.transforms import Affine2D  # noqa: E402


def _io_floor(folder, settings) -> tuple[float, float]:
    paths = [t.path for s in folder.store.sections_with("stitch") for t in folder.store.load_stitch(s).tiles]
    t0 = time.perf_counter()
    for p in paths:
        tifffile.imread(p)
    t_read = time.perf_counter() - t0
    level0 = zarr.open_array(str(folder.volume_path / "em" / "0"), mode="r")[...]
    target = folder.root / "floor.zarr"
    shutil.rmtree(target, ignore_errors=True)
    c, s = settings.chunk, settings.shard
    arr = zarr.create_array(str(target), shape=level0.shape, dtype=level0.dtype, chunks=(1, c, c),
                            shards=None if s == 1 else (1, c * s, c * s), compressors=_compressors(settings),
                            fill_value=0)
    t0 = time.perf_counter()
    arr[...] = level0
    return t_read, time.perf_counter() - t0


def _drop_page_cache() -> None:
    """Write dirty pages out and drop the page cache, so the next reads come from the disk (root only)."""
    os.sync()
    try:
        Path("/proc/sys/vm/drop_caches").write_text("3\n")
    except OSError as exc:
        sys.exit(f"--cold needs root to drop the page cache ({exc})")


def _windows(folder, n: int = 5) -> list[float]:
    rng = np.random.default_rng(0)
    vol = lazy_volume(folder.root)
    tiles_mod.TILE_CACHE.clear()
    times = []
    for _ in range(n):
        z = int(rng.integers(vol.shape[0]))
        y = int(rng.integers(vol.shape[1] - 1024))
        x = int(rng.integers(vol.shape[2] - 1024))
        t0 = time.perf_counter()
        vol[z, y:y + 1024, x:x + 1024].compute()
        times.append(time.perf_counter() - t0)
    return times


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="4 sections of 6 x 6 tiles instead of 4 of 4 x 4")
    ap.add_argument("--cluster", action="store_true", help="LocalCluster, 2 worker processes")
    ap.add_argument("--keep", type=Path, help="build in this folder and keep it")
    ap.add_argument("--repeat", type=int, default=4, help="alternating runs of render and floor (default 4)")
    ap.add_argument("--cold", action="store_true",
                    help="drop the page cache before every run (root only), so tiles are read from disk")
    ap.add_argument("--reads", type=int, metavar="TILE",
                    help="count reads per tile rendering 3 x 3 tiles of TILE px on 2 worker processes")
    args = ap.parse_args(argv)
    if args.reads:
        _reads_per_tile(args.reads, args.keep)
        return
    n_sections, grid = (4, 6) if args.full else (4, 4)
    root = args.keep or Path(tempfile.mkdtemp(prefix="bench_render_"))
    settings = RenderSettings()
    t0 = time.perf_counter()
    folder = make_build(root, n_sections=n_sections, grid=(grid, grid), tile=(1024, 1024), overlap=64,
                        affines={1: Affine2D.similarity(1.0, 0.01, 5.0, -3.0, center=(1500, 1500))},
                        settings=settings)
    print(f"synthetic build: {n_sections} sections of {grid}x{grid} tiles of 1024x1024, "
          f"written in {time.perf_counter() - t0:.1f} s")
    stack = contextlib.ExitStack()
    if args.cluster:
        from stackbuild.run.cluster import dask_client
        stack.enter_context(dask_client(2))
        print("scheduler: the build's own dask.distributed LocalCluster (stackbuild.run.cluster), "
              "2 worker processes x 1 thread")
    else:
        dask.config.set(scheduler="threads", num_workers=2)
        cv2.setNumThreads(1)
        print("scheduler: dask threaded, 2 threads; OpenCV single-threaded per task")
    with stack:
        _measure(folder, settings, args)
    if args.keep is None:
        shutil.rmtree(root, ignore_errors=True)


def _measure(folder, settings, args) -> None:
    """Render and measure the floor ``args.repeat`` times each, alternating; print the results."""
    renders, floors = [], []
    for _ in range(args.repeat):
        tiles_mod.TILE_CACHE.clear()
        if args.cold:
            _drop_page_cache()
        facts = render_volume(folder.root, settings, overwrite=True)
        renders.append(facts["seconds"])
        if args.cold:
            _drop_page_cache()
        floors.append(_io_floor(folder, settings))
    t_render = min(renders)
    t_read, t_write = min(floors, key=sum)
    floor = t_read + t_write
    l0 = facts["levels"][0]
    mpx0 = l0[0] * l0[1] * l0[2] / 1e6
    print(f"levels: {facts['levels']}")
    print(f"render + pyramid: {t_render:.2f} s (runs: {', '.join(f'{t:.2f}' for t in renders)}), "
          f"{mpx0 / t_render:.1f} Mpx/s of level 0, {facts['megapixels'] / t_render:.1f} Mpx/s all levels")
    print(f"I/O floor: read tiles {t_read:.2f} s + write level 0 {t_write:.2f} s = {floor:.2f} s "
          f"(runs: {', '.join(f'{sum(f):.2f}' for f in floors)})")
    print(f"ratio render+pyramid / I/O floor: {t_render / floor:.2f} (target <= 2)")
    times = _windows(folder)
    print(f"random 1024x1024 lazy window: cold {times[0]:.3f} s, median {statistics.median(times):.3f} s, "
          f"max {max(times):.3f} s (target <= 0.5 s)")


def _worker_reads() -> tuple[dict, int]:
    """On a worker: the pixels it read per tile file, and its peak resident size (bytes).

    The peak is ``VmHWM`` of ``/proc/self/status`` (Linux), not ``ru_maxrss``, which Linux
    carries over ``exec`` from the process that started the worker (here the benchmark,
    which has just made gigapixel mosaics).
    """
    from stackbuild import tiles
    from stackbuild.run.plan_measure import status_bytes

    return dict(tiles.PIXELS_READ), status_bytes("VmHWM")


def _reads_per_tile(tile: int, keep: Path | None) -> None:
    """Render 3 x 3 tiles of ``tile`` px on 2 worker processes; print reads per tile, uncompressed and compressed."""
    from stackbuild.run.cluster import client_mapper, dask_client

    settings = RenderSettings()
    grid, overlap = 3, tile // 12
    print(f"one section of {grid}x{grid} tiles of {tile}x{tile} px (overlap {overlap} px, rotated 0.3 deg); "
          f"chunk {settings.chunk}, shard {settings.chunk * settings.shard} px; 2 worker processes x 1 thread")
    layouts = (("uncompressed", {}),
               ("zlib, strips of 64 rows", {"compression": "zlib"}),       # tifffile's default layout
               ("zlib, TIFF tiles of 512", {"compression": "zlib", "tile": (512, 512)}),
               ("zlib, one strip", {"compression": "zlib", "rowsperstrip": tile}))
    for label, kwargs in layouts:
        root = (keep / label.replace(" ", "_").replace(",", "")) if keep else Path(tempfile.mkdtemp(prefix="bench_reads_"))
        centre = (grid * (tile - overlap) + overlap) / 2
        folder = make_build(root, n_sections=1, grid=(grid, grid), tile=(tile, tile), overlap=overlap,
                            affines={0: Affine2D.similarity(1.0, 0.005, 3.0, -2.0, center=(centre, centre))},
                            settings=settings, tiff_kwargs=kwargs)
        with dask_client(2) as client:
            t0 = time.perf_counter()
            render_volume(folder.root, settings, overwrite=True, mapper=client_mapper(client))
            wall = time.perf_counter() - t0
            got = client.run(_worker_reads)
        pixels = sum(sum(r.values()) for r, _ in got.values())
        files = {p for r, _ in got.values() for p in r}
        peak = max(m for _, m in got.values()) / 2 ** 20
        print(f"  {label:24s}: reads per tile {pixels / (grid * grid * tile * tile):.2f} "
              f"({len(files)} of {grid * grid} tiles read), largest worker peak {peak:.0f} MB, "
              f"render {wall:.1f} s")
        if keep is None:
            shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
