"""Benchmark of a stage start's tile manifest: full check versus the kept snapshot.

Writes N tiny (8 x 8, 8-bit) TIFF tiles of an invented specimen (a lattice of
rotifer-egg sections, 100 tiles per section) and their manifest into a
temporary folder, makes a build folder pointing at it, and times side by side
in one run:

* fresh  -- ``read_tile_manifest``: parse the CSV and open every tile header;
* first  -- ``BuildFolder.tile_manifest()`` with no snapshot (fresh check + write);
* kept   -- ``BuildFolder.tile_manifest()`` again (hash the CSV, load the snapshot).

Tiles sit in the page cache here, so the fresh time is a lower bound of what a
network file system costs per header.

    python tests/benchmarks/bench_manifest.py            # 5000 tiles
    python tests/benchmarks/bench_manifest.py --full     # 100000 tiles
    python tests/benchmarks/bench_manifest.py --tiles 20000 --repeat 5
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from stackbuild.manifest import read_tile_manifest  # noqa: E402
from stackbuild.folder import BuildFolder  # noqa: E402

PER_SECTION = 100


def make_tiles(folder: Path, n: int) -> Path:
    """Write ``n`` 8 x 8 tiles and their manifest; return the manifest's path."""
    raw = folder / "raw"
    raw.mkdir(parents=True)
    rng = np.random.default_rng(3)
    lines = ["section,tile,path,x,y"]
    for i in range(n):
        section, k = divmod(i, PER_SECTION)
        name = f"s{section:05d}_t{k:03d}"
        tifffile.imwrite(raw / f"{name}.tif", rng.integers(0, 255, (8, 8), dtype=np.uint8))
        lines.append(f"{section},{name},raw/{name}.tif,{(k % 10) * 7.5!r},{(k // 10) * 7.5!r}")
    csv = folder / "tiles.csv"
    csv.write_text("\n".join(lines) + "\n")
    return csv


def best_of(fn, repeat: int) -> float:
    """Return the shortest wall time of ``repeat`` calls of ``fn``."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tiles", type=int, default=5000, help="number of tiles (default 5000)")
    ap.add_argument("--full", action="store_true", help="100000 tiles")
    ap.add_argument("--repeat", type=int, default=3, help="timed repeats, best kept (default 3)")
    args = ap.parse_args(argv)
    n = 100_000 if args.full else args.tiles
    with tempfile.TemporaryDirectory(prefix="bench_manifest_") as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        csv = make_tiles(tmp, n)
        made = time.perf_counter() - t0
        build = BuildFolder(tmp / "out")
        build.root.mkdir()
        build.save_state({"tiles": str(csv.resolve()), "stages": {}})

        fresh = best_of(lambda: read_tile_manifest(csv), args.repeat)

        def first_call():
            build.snapshot_path.unlink(missing_ok=True)
            build.tile_manifest()

        first = best_of(first_call, args.repeat)
        kept = best_of(build.tile_manifest, args.repeat)
        assert build.tile_manifest().tiles == read_tile_manifest(csv).tiles
        size = build.snapshot_path.stat().st_size

    print(f"{n} tiles in {n // PER_SECTION or 1} sections (written in {made:.1f} s); "
          f"best of {args.repeat}; snapshot {size / 1e6:.2f} MB")
    print(f"{'':>28}{'seconds':>10}{'us/tile':>10}{'vs kept':>10}")
    for label, t in (("fresh check (every header)", fresh), ("first call (check + write)", first),
                     ("kept snapshot (hash + load)", kept)):
        print(f"{label:>28}{t:>10.3f}{t / n * 1e6:>10.1f}{t / kept:>9.1f}x")
    print(f"ratio fresh / kept: {fresh / kept:.1f}")


if __name__ == "__main__":
    main()
