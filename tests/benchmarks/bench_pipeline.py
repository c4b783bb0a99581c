"""The whole pipeline end to end, stage by stage, beside its I/O floor; marginal cost between two sizes.

For each size, synthesises a stack of the project's invented phantom, runs
``stackbuild build`` in a fresh process on a local cluster (``--workers``),
and samples every process of the build (psutil, every 0.2 s) to attribute CPU
time to the stage then running (from ``build.json``). Printed side by side:

* per stage: wall seconds (``build.json``), CPU seconds of all processes, and
  megapixels of tiles per CPU-second (per core);
* the peak memory of the largest process (the resident size of every process of
  the build, sampled; also per stage, to see which stage holds it);
* the I/O floor: read every tile once (tifffile) and write level 0 once with the
  build's default codec (zarr, same chunks and shards), on as many threads as
  workers, and the build's wall time over it.

Between the two sizes the *marginal* cost (extra wall / extra floor, and extra
CPU / extra floor CPU) cancels start-up costs (cluster start, imports, the
report's fixed work). With
``--memory`` it also builds 3 sections of 3 x 3 and of 7 x 7 tiles and compares the
peak memory of the largest process (with ``--baseline``, the baseline's beside it,
each size built by the baseline first); ``--memory-only`` does only that.

    python tests/benchmarks/bench_pipeline.py                      # 3 and 6 sections of 4 x 4 tiles of 1024 px
    python tests/benchmarks/bench_pipeline.py --sizes 5,10 --grid 5 --memory
    python tests/benchmarks/bench_pipeline.py --sizes 5,10 --grid 5 --keep-data /tmp/bench_stacks  # synthesise once
    python tests/benchmarks/bench_pipeline.py --sizes 5,10 --grid 5 --keep-data /tmp/bench_stacks --baseline /tmp/old
    python tests/benchmarks/bench_pipeline.py --memory-only --keep-data /tmp/bench_stacks --baseline /tmp/old
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import psutil
import tifffile

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from stackbuild.config import PipelineConfig  # noqa: E402
from stackbuild.synth import SynthParams, generate  # noqa: E402

STAGES = ("stitch", "align", "channels", "render", "report")


def synth(folder: Path, sections: int, grid: int, tile: int) -> Path:
    """Write a synthetic stack (or reuse one a kept folder already holds); return its tile manifest."""
    done = folder / ".bench_synth_done"
    if done.exists():
        return Path(done.read_text())
    tiles = generate(folder, SynthParams(seed=7, sections=sections, grid=(grid, grid), tile_size=tile,
                                         channels=0, compress=False))
    done.write_text(str(tiles))
    return tiles


def _running_stage(build: Path) -> str:
    try:
        stages = json.loads((build / "build.json").read_text()).get("stages", {})
    except (OSError, ValueError):
        return "start"
    running = [k for k, v in stages.items() if v.get("status") == "running"]
    return running[-1] if running else ("end" if stages else "start")


def run_build(tiles: Path, out: Path, workers: int, source: Path | None = None) -> dict:
    """Run ``stackbuild build`` in a child process; return wall and CPU per stage and the largest process's peak.

    ``source``: a source tree (holding ``stackbuild/``) whose code the build runs instead of this one's
    (put first on ``PYTHONPATH``, which the cluster's worker processes inherit).
    """
    cmd = [sys.executable, "-m", "stackbuild.cli", "build", str(tiles), "--out", str(out), "--quiet",
           "--workers", str(workers)]
    env = dict(os.environ)
    if source is not None:
        env["PYTHONPATH"] = os.pathsep.join([str(source), *filter(None, [env.get("PYTHONPATH")])])
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    # `python -m` puts the working directory first on sys.path (and the workers inherit it): run from the tree.
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env,
                            cwd=str(source if source is not None else REPO))
    top = psutil.Process(proc.pid)
    cpu_by_stage: dict[str, float] = {}
    seen: dict[int, float] = {}
    rss_max = 0
    rss_by_stage: dict[str, int] = {}
    while proc.poll() is None:
        stage = _running_stage(out)
        try:
            procs = [top, *top.children(recursive=True)]
        except psutil.NoSuchProcess:
            break
        for p in procs:
            try:
                t = p.cpu_times()
                total = t.user + t.system
                rss = p.memory_info().rss
                rss_max = max(rss_max, rss)
                rss_by_stage[stage] = max(rss_by_stage.get(stage, 0), rss)
            except psutil.NoSuchProcess:
                continue
            cpu_by_stage[stage] = cpu_by_stage.get(stage, 0.0) + total - seen.get(p.pid, 0.0)
            seen[p.pid] = total
        time.sleep(0.2)
    wall = time.perf_counter() - t0
    err = proc.stderr.read()
    if proc.returncode not in (0, 3):  # 3: the report missed a default bar, not a failure of the build
        raise RuntimeError(f"build failed ({proc.returncode}): {err[-2000:]}")
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    state = json.loads((out / "build.json").read_text())
    return {"wall": wall, "cpu_total": (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime),
            "stage_wall": {k: v.get("seconds") for k, v in state.get("stages", {}).items()},
            "stage_cpu": cpu_by_stage, "peak_rss": rss_max, "stage_rss": rss_by_stage}


def io_floor(tiles: Path, out: Path, threads: int) -> dict:
    """Return the seconds to read every tile once and to write level 0 once with the default codec."""
    import zarr
    from zarr.codecs import BloscCodec

    from stackbuild.render.settings import blosc_shuffle

    paths = sorted((tiles.parent / "tiles").rglob("*.tif"))
    os.sync()
    c0 = time.process_time()
    t0 = time.perf_counter()
    with ThreadPoolExecutor(threads) as pool:
        imgs = list(pool.map(tifffile.imread, paths))
    read = time.perf_counter() - t0
    # Level 0 of this build: one plane per section, the canvas the build wrote.
    level0 = zarr.open_array(str(out / "volume.zarr" / "em" / "0"), mode="r")
    depth, h, w = level0.shape
    r = PipelineConfig().render
    block = r.chunk * r.shard
    dtype = imgs[0].dtype
    codec = BloscCodec(cname=r.codec, clevel=r.clevel, shuffle=blosc_shuffle(r, dtype.itemsize))
    arr = zarr.open_group(str(out / "floor.zarr"), mode="w", zarr_format=3).create_array(
        "0", shape=(depth, h, w), dtype=dtype, chunks=(1, r.chunk, r.chunk), shards=(1, block, block),
        compressors=[codec], fill_value=0)
    plane = np.ascontiguousarray(level0[0])  # real rendered content, written to every plane
    jobs = [(z, a, b) for z in range(depth) for a in range(0, h, block) for b in range(0, w, block)]

    def write(job):
        z, a, b = job
        arr[z, a:a + block, b:b + block] = plane[a:a + block, b:b + block]

    t0 = time.perf_counter()
    with ThreadPoolExecutor(threads) as pool:
        list(pool.map(write, jobs))
    written = time.perf_counter() - t0
    cpu = time.process_time() - c0
    tile_mpx = sum(im.size for im in imgs) / 1e6
    codec_name = f"Blosc {r.codec} level {r.clevel} {blosc_shuffle(r, dtype.itemsize)}"
    return {"read": read, "write": written, "floor": read + written, "floor_cpu": cpu, "tile_mpx": tile_mpx,
            "level0_mpx": depth * h * w / 1e6, "codec": codec_name}


def one_size(tmp: Path, data: Path, sections: int, grid: int, tile: int, workers: int,
             baseline: Path | None = None) -> tuple[dict, dict | None]:
    """Build one size and measure its floor; with ``baseline``, build it first with that source tree too."""
    folder = data / f"data-{sections}-{grid}-{tile}"
    folder.mkdir(parents=True, exist_ok=True)
    tiles = synth(folder, sections, grid, tile)
    base = None
    if baseline is not None:
        base = run_build(tiles, tmp / f"base-{sections}-{grid}", workers, baseline)
        shutil.rmtree(tmp / f"base-{sections}-{grid}")
    out = tmp / f"build-{sections}-{grid}"
    res = run_build(tiles, out, workers)
    floor = io_floor(tiles, out, workers)
    for r in (res, base):
        if r is not None:
            r.update(floor, sections=sections)
    return res, base


def stage_table(ours: tuple[dict, dict], base: tuple[dict, dict]) -> None:
    """Print the marginal CPU per stage (larger size less smaller) of the baseline beside ours."""
    print(f"\n{'marginal CPU s by stage':<28}{'baseline':>10}{'this tree':>11}{'ratio':>8}")
    for stage in (*STAGES, "build"):
        def extra(pair):
            if stage == "build":
                return pair[1]["cpu_total"] - pair[0]["cpu_total"]
            return pair[1]["stage_cpu"].get(stage, 0.0) - pair[0]["stage_cpu"].get(stage, 0.0)
        b, o = extra(base), extra(ours)
        if b or o:
            print(f"{stage:<28}{b:>10.1f}{o:>11.1f}{(o / b if b else float('nan')):>8.2f}")


def report(a: dict, b: dict | None, workers: int) -> None:
    """Print the sizes side by side, and the marginal cost between them."""
    rows = [a] if b is None else [a, b]
    print(f"\n{'':<28}" + "".join(f"{str(r['sections']) + ' sections':>18}" for r in rows)
          + ("" if b is None else f"{'marginal':>14}"))
    for stage in STAGES:
        if not any(r["stage_wall"].get(stage) for r in rows):
            continue
        walls = [r["stage_wall"].get(stage) or 0.0 for r in rows]
        cpus = [r["stage_cpu"].get(stage, 0.0) for r in rows]
        line = f"{stage + ' wall / CPU s':<28}" + "".join(f"{w:>9.1f} /{c:>6.1f}" for w, c in zip(walls, cpus))
        if b is not None:
            dt = cpus[1] - cpus[0]
            dm = b["tile_mpx"] - a["tile_mpx"]
            line += f"{(dm / dt if dt > 0 else float('nan')):>9.1f} Mpx/CPU-s"
        print(line)
    print(f"{'build wall / CPU s':<28}" + "".join(f"{r['wall']:>9.1f} /{r['cpu_total']:>6.1f}" for r in rows))
    print(f"{'tiles Mpx':<28}" + "".join(f"{r['tile_mpx']:>18.0f}" for r in rows))
    print(f"{'Mpx per s per core':<28}" + "".join(f"{r['tile_mpx'] / r['wall'] / workers:>18.2f}" for r in rows))
    print(f"{'largest process peak MB':<28}" + "".join(f"{r['peak_rss'] / 1e6:>18.0f}" for r in rows))
    print(f"{'  by stage (MB)':<28}" + "".join(
        (" ".join(f"{k[:2]}{v / 1e6:.0f}" for k, v in r["stage_rss"].items() if k in STAGES)).rjust(18) for r in rows))
    print(f"{'I/O floor s (read + write)':<28}" + "".join(f"{r['floor']:>10.2f} ({r['read']:.2f}+{r['write']:.2f})"[-18:].rjust(18) for r in rows))
    print(f"{'build / floor':<28}" + "".join(f"{r['wall'] / r['floor']:>18.1f}" for r in rows), end="")
    if b is not None:
        extra_wall = b["wall"] - a["wall"]
        extra_floor = b["floor"] - a["floor"]
        print(f"{extra_wall / extra_floor:>14.1f}  (extra wall {extra_wall:.1f} s / extra floor {extra_floor:.2f} s)")
    else:
        print()
    print(f"{'CPU s: build / floor':<28}" + "".join(f"{r['cpu_total']:>8.1f} /{r['floor_cpu']:>6.2f}".rjust(18)
                                                   for r in rows), end="")
    if b is not None:
        extra_cpu = b["cpu_total"] - a["cpu_total"]
        extra_fcpu = b["floor_cpu"] - a["floor_cpu"]
        print(f"{extra_cpu / extra_fcpu:>14.1f}  (extra CPU {extra_cpu:.1f} s / extra floor CPU {extra_fcpu:.2f} s; "
              "CPU is what a shared machine disturbs least)")
    else:
        print()
    print(f"floor codec: {a['codec']}; tiles read with tifffile on {workers} threads from the page cache "
          "(just written), level 0 written once with zarr on the same threads")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="3,6", help="two section counts for the marginal cost (default 3,6)")
    ap.add_argument("--grid", type=int, default=4, help="tiles per side of a section (default 4)")
    ap.add_argument("--tile", type=int, default=1024, help="tile side, px (default 1024)")
    ap.add_argument("--workers", type=int, default=2, help="local worker processes (default 2)")
    ap.add_argument("--memory", action="store_true",
                    help="also compare the largest process's peak at 3 x 3 and 7 x 7 tiles per section")
    ap.add_argument("--memory-only", action="store_true", help="only the comparison of --memory (no marginal cost)")
    ap.add_argument("--keep-data", type=Path, default=None, metavar="DIR",
                    help="synthesise the stacks into DIR and reuse them on later runs (default: a temporary folder)")
    ap.add_argument("--baseline", type=Path, default=None, metavar="DIR",
                    help="also build each size with the source tree DIR (e.g. `git archive COMMIT stackbuild | "
                         "tar -x -C DIR`), before this tree's build, and print both with the stages side by side")
    args = ap.parse_args(argv)
    n1, n2 = (int(v) for v in args.sizes.split(","))
    with tempfile.TemporaryDirectory(prefix="bench_pipeline_", dir=os.environ.get("TMPDIR")) as tmp:
        tmp = Path(tmp)
        data = args.keep_data or tmp
        if not args.memory_only:
            marginal(tmp, data, n1, n2, args)
        if args.memory or args.memory_only:
            memory(tmp, data, args.workers, args.baseline)


def marginal(tmp: Path, data: Path, n1: int, n2: int, args) -> None:
    """Build both sizes (each with the baseline first, if any) and print the marginal cost tables."""
    a, base_a = one_size(tmp, data, n1, args.grid, args.tile, args.workers, args.baseline)
    b, base_b = one_size(tmp, data, n2, args.grid, args.tile, args.workers, args.baseline)
    print(f"{args.grid} x {args.grid} tiles of {args.tile} px per section, {args.workers} workers, "
          f"{os.cpu_count()} cores")
    if args.baseline is not None:
        print(f"\nbaseline ({args.baseline}):")
        report(base_a, base_b, args.workers)
        print("\nthis tree:")
    report(a, b, args.workers)
    if args.baseline is not None:
        stage_table((a, b), (base_a, base_b))


def memory(tmp: Path, data: Path, workers: int, baseline: Path | None) -> None:
    """Print the largest process's peak of 3 sections of 3 x 3 and of 7 x 7 tiles of 1024 px (baseline beside)."""
    runs: dict[str, dict] = {}
    for grid in (3, 7):
        (data / f"m{grid}").mkdir(parents=True, exist_ok=True)
        tiles = synth(data / f"m{grid}", 3, grid, 1024)
        if baseline is not None:
            runs[f"base{grid}"] = run_build(tiles, tmp / f"mbase{grid}", workers, baseline)
            shutil.rmtree(tmp / f"mbase{grid}")
        runs[f"this{grid}"] = run_build(tiles, tmp / f"mb{grid}", workers)
        shutil.rmtree(tmp / f"mb{grid}")
    trees = (["base"] if baseline is not None else []) + ["this"]
    print("\nlargest process peak, 3 sections of 3 x 3 vs 7 x 7 tiles of 1024 px, MB (ratio 7x7 / 3x3)")
    print(f"{'':<22}" + "".join(f"{('baseline' if t == 'base' else 'this tree'):>26}" for t in trees))
    cells = []
    for t in trees:
        small, big = runs[f"{t}3"]["peak_rss"], runs[f"{t}7"]["peak_rss"]
        cells.append(f"{small / 1e6:.0f} vs {big / 1e6:.0f} ({big / small:.2f})")
    print(f"{'whole build':<22}" + "".join(f"{c:>26}" for c in cells))
    for stage in STAGES:
        cells = []
        for t in trees:
            small, big = runs[f"{t}3"]["stage_rss"].get(stage, 0), runs[f"{t}7"]["stage_rss"].get(stage, 0)
            cells.append(f"{small / 1e6:.0f} vs {big / 1e6:.0f}" if small or big else "-")
        print(f"{'  while ' + stage:<22}" + "".join(f"{c:>26}" for c in cells))


if __name__ == "__main__":
    main()
