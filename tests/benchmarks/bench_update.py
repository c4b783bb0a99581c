"""Benchmark ``update`` against a full build (not collected by pytest).

    python tests/benchmarks/bench_update.py                 # 20 sections of 3 x 3 tiles of 384 px
    python tests/benchmarks/bench_update.py --sections 10 --kills
    python tests/benchmarks/bench_update.py --speed-only --baseline /tmp/old   # steps 1-2 with another tree too
    python tests/benchmarks/bench_update.py --speed-only --repeat 3     # the update 3 times, its median run
    python tests/benchmarks/bench_update.py --content realistic --grid 3 --tile 512   # the realistic phantom family

Measured side by side in one run, on one synthetic stack (``stackbuild.synth``, ground truth
unused here):

1. a full build of the first N sections (wall time, CLI, 2 workers);
2. ``update`` replacing 2 tiles of the middle section (wall time; in-process, as any update of a few
   tiles runs, and without re-solving the section when its new pixels show the old content): the
   ratio build / update, the peak resident size of the largest process of each (build: the
   command and its Dask scheduler and workers), the
   chunks rewritten of all chunks, that no chunk of another plane changed (bytes and mtime), and
   that the updated plane equals a render from scratch of the updated transforms (lazy renderer);
3. a second full build of the merged manifest: where the re-imaged tiles' pixels land in the
   updated volume and in that fresh build, after removing the frame change between the two
   builds (an affine fitted on the untouched sections' tiles): RMS and max, level-0 pixels;
4. ``update --append`` of sections N and N+1: planes of existing sections whose bytes changed,
   and how far the local re-solve would have moved the existing sections (the tolerance);
5. with ``--kills``: the update killed in its align, channels and render steps, run again, and
   compared byte for byte with the uninterrupted update.

After each update a child that only starts Python and imports what an update imports is timed too:
the part of the update that does not depend on the change (measured 2026-12-03 17:05, a loaded
machine: 1.4-1.5 s of an update of 3.5 s at 3 x 3 tiles of 1024 px).

With ``--baseline DIR`` steps 1-2 also run with the source tree DIR (its own build, before this
tree's; then the two trees' updates alternate), and the two are printed side by side. With
``--repeat N`` each tree's update runs N times, each on a fresh copy of its build, and the run of
median wall time is the one reported (one update takes a few seconds, so on this shared machine a
single run can be off by a second either way).

Every child runs with stackbuild's byte code compiled once beforehand, as a package install has it
(this environment sets PYTHONDONTWRITEBYTECODE and installs stackbuild editable, so otherwise every
process compiles the modules it imports: 0.4 s of an update); ``--no-bytecode`` measures without.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import os
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import NamedTuple

import numpy as np
import tifffile


#: Set by :func:`_keep_bytecode` for every child (builds, updates and their Dask workers).
_CHILD_ENV: dict[str, str] = {}


def _keep_bytecode(cache: Path, trees: list[Path]) -> None:
    """Give every child compiled byte code of ``trees`` in ``cache``, as an installed package has.

    This environment sets PYTHONDONTWRITEBYTECODE, and stackbuild is installed editable, so without
    this each process compiles every stackbuild module it imports from source (measured: 88 modules,
    0.4 s of an update's 4-5 s; libraries in site-packages have their byte code from pip). A
    ``pip install`` writes byte code, so a facility's runs do not pay this. Both trees of a
    ``--baseline`` run are compiled before anything is timed.
    """
    _CHILD_ENV.update(PYTHONPYCACHEPREFIX=str(cache), PYTHONDONTWRITEBYTECODE="")
    for tree in trees:
        subprocess.run([sys.executable, "-m", "compileall", "-q", "-j", "0", str(tree / "stackbuild")],
                       env={**os.environ, **_CHILD_ENV}, check=True, stdout=subprocess.DEVNULL)


class Run(NamedTuple):
    """One ``stackbuild`` command: wall time (s), exit status, peak resident size of its largest process (bytes)."""

    seconds: float
    status: int
    peak: int


def _cli(*args, env=None, check=True) -> Run:
    """Run ``stackbuild ARGS --quiet`` in a child process; return its :class:`Run`.

    The peak is the largest ``VmHWM`` (a process's own lifetime peak) over the child and every
    process it starts (Dask scheduler and workers), read every 0.1 s while they live, and the
    child's own peak from ``wait4`` (which also covers the descendants it waited for), so a peak
    reached just before a process exits is not missed.
    """
    import psutil

    from stackbuild.run.plan_measure import status_bytes

    t0 = time.perf_counter()
    # `python -m` puts the working directory first on sys.path: run from the tree given by PYTHONPATH.
    cwd = (env or {}).get("PYTHONPATH", "").split(os.pathsep)[0] or None
    with tempfile.TemporaryFile("w+") as err:
        proc = subprocess.Popen([sys.executable, "-m", "stackbuild.cli", *map(str, args), "--quiet"],
                                env={**os.environ, **_CHILD_ENV, **(env or {})}, start_new_session=True, cwd=cwd,
                                stdout=subprocess.DEVNULL, stderr=err, text=True)
        peak, done = [0], threading.Event()

        def sample() -> None:
            while not done.wait(0.1):
                try:
                    pids = [proc.pid] + [c.pid for c in psutil.Process(proc.pid).children(recursive=True)]
                except psutil.NoSuchProcess:
                    return
                peak[0] = max([peak[0]] + [status_bytes("VmHWM", pid) for pid in pids])
        watcher = threading.Thread(target=sample, daemon=True)
        watcher.start()
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - t0
        done.set()
        watcher.join()
        proc.returncode = os.waitstatus_to_exitcode(status)
        if check and proc.returncode not in (0, 3):
            err.seek(0)
            raise SystemExit(f"stackbuild {' '.join(map(str, args))} failed:\n{err.read()}")
    # Linux carries a parent's peak over into a child it forks: a child's ru_maxrss no higher than this
    # process's own peak may be this process's (seen: 2028 MB for a build and an update alike, after
    # the benchmark itself had grown to that), so then only the sampled peaks count.
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    waited = usage.ru_maxrss * 1024 if usage.ru_maxrss > own else 0
    return Run(seconds, proc.returncode, max(peak[0], waited))


#: What an update of a few tiles imports before its steps do any work (the matchers bring scipy.fft, the
#: placement solve scipy.sparse, the sampler OpenCV, the patch dask): the part of an update's time that
#: does not depend on the change.
_UPDATE_IMPORTS = ("import stackbuild.cli, stackbuild.run.update, stackbuild.stitch.section, stackbuild.stitch.pairs, "
                   "stackbuild.run.update_reach, stackbuild.align.blockmatch, stackbuild.render.patch, "
                   "stackbuild.qc.report, stackbuild.qc.probe, stackbuild.qc.sections, dask.delayed")


def _imports(env=None) -> float:
    """Return the wall s of a child that starts Python and imports what an update imports, nothing else."""
    cwd = (env or {}).get("PYTHONPATH", "").split(os.pathsep)[0] or None
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", _UPDATE_IMPORTS], env={**os.environ, **_CHILD_ENV, **(env or {})}, cwd=cwd,
                   check=True)
    return time.perf_counter() - t0


def _files(em: Path) -> dict[str, tuple[str, int]]:
    return {str(p.relative_to(em)): (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
            for p in sorted(em.glob("*/c/**/*")) if p.is_file()}


def _subset(src: Path, dst: Path, keep) -> Path:
    lines = src.read_text().splitlines()
    dst.write_text("\n".join([lines[0]] + [ln for ln in lines[1:] if keep(int(ln.split(",")[0]))]) + "\n")
    return dst


def _reimage(data: Path, out: Path, section: int, tiles: list[str]) -> Path:
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(3)
    rows = ["section,tile,path,x,y"]
    for line in (data / "tiles.csv").read_text().splitlines()[1:]:
        s, t, p, x, y = line.split(",")
        if int(s) == section and t in tiles:
            raw = tifffile.imread(data / p)
            img = raw.astype(np.float32) + rng.normal(0, 4, (1,))
            img = np.clip(img + rng.normal(0, 4, img.shape), 0, np.iinfo(raw.dtype).max).astype(raw.dtype)
            dst = out / f"{s}_{t}.tif"
            tifffile.imwrite(dst, img)
            rows.append(f"{s},{t},{dst},{float(x) + 1.5},{float(y) - 2.0}")
    (out / "tiles.csv").write_text("\n".join(rows) + "\n")
    return out / "tiles.csv"


def _landing(build: Path, section: int, tiles: list[str], others: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Return volume points of a grid of pixels of ``tiles`` of ``section``, and of every tile of ``others``."""
    from stackbuild.run.locate import locate_points
    from stackbuild.transforms import TransformStore

    store = TransformStore(build / "transforms")

    def grid(s, names):
        st = store.load_stitch(s)
        pts = []
        for t in st.tiles:
            if names is None or t.tile in names:
                g = np.linspace(8, min(t.width, t.height) - 9, 6)
                pts += [{"section": s, "tile": t.tile, "tile_x": float(a), "tile_y": float(b)} for a in g for b in g]
        return pts

    moved = locate_points(build, grid(section, set(tiles)), "tile")
    anchor = locate_points(build, [p for s in others for p in grid(s, None)], "tile")
    as_xyz = lambda rows: np.array([[r["x"], r["y"], r["z"]] for r in rows])  # noqa: E731
    return as_xyz(moved), as_xyz(anchor)


def _inset_tiles(build: Path, section: int, side: int, out: Path, tile: int = 320, overlap: int = 48):
    """Write finer tiles (2x, OpenCV cubic) of a ``side`` px square of ``section`` and return (manifest, x0, y0).

    Ground truth: fine pixel ``f`` of the enlarged square is section pixel ``(f + 0.5) / 2 - 0.5`` from its corner.
    """
    import cv2

    from stackbuild.sampler import render_region
    from stackbuild.tiles import SectionTiles
    from stackbuild.transforms import TransformStore

    st = TransformStore(build / "transforms").load_stitch(section)
    x0, y0, x1, y1 = st.bbox()
    cx, cy = int((x0 + x1) / 2 - side / 2), int((y0 + y1) / 2 - side / 2)
    img = render_region(st, None, cx, cy, side, side, tiles=SectionTiles(st))
    big = np.clip(cv2.resize(img, None, fx=2, fy=2, interpolation=cv2.INTER_CUBIC), 0, 255).astype(np.uint8)
    out.mkdir(parents=True, exist_ok=True)
    rows = ["section,tile,path,x,y,pixel_size"]
    step = tile - overlap
    # Tiles every `step` px, the last one flush with the far edge, so they cover the whole square.
    last = max(0, 2 * side - tile)
    starts = [v for v in range(0, last, step) if last - v >= step // 2] + [last]
    for i, r in enumerate(starts):
        for j, c in enumerate(starts):
            part = big[r:r + tile, c:c + tile]
            name = f"f{i}_{j}"
            tifffile.imwrite(out / f"{name}.tif", part)
            rows.append(f"{section},{name},{out / (name + '.tif')},{2 * cx - 0.5 + c},{2 * cy - 0.5 + r},2")
    (out / "tiles.csv").write_text("\n".join(rows) + "\n")
    return out / "tiles.csv", cx, cy


def inset_memory(root: Path, base: Path, section: int, sides=(384, 960)) -> None:
    """Peak traced memory of the inset's region and chunk tasks, and its landing error, at two inset sizes.

    Each task runs in this process with the tile cache emptied first (a cold worker), under
    ``tracemalloc``: its peak above what was held before it started. "whole call" is the peak of
    the whole ``add_inset`` (the driver's stitch and overview, plus one task at a time).
    """
    import tracemalloc

    from stackbuild.folder import BuildFolder
    from stackbuild.run.insets import add_inset
    from stackbuild.tiles import TILE_CACHE
    from stackbuild.transforms import Affine2D, TransformStore

    for k, side in enumerate((min(sides), *sides)):  # the first run only warms up (one-time allocations)
        TILE_CACHE.clear()
        work = root / f"inset-{side}"
        shutil.rmtree(work, ignore_errors=True)
        shutil.copytree(base, work / "b")
        manifest, cx, cy = _inset_tiles(work / "b", section, side, work / "fine")
        peaks: dict[str, float] = {}
        calls: dict[str, int] = {}

        def mapper(fn, items):
            out = []
            for item in items:
                TILE_CACHE.clear()  # a cold worker: the task's peak holds every tile it reads
                tracemalloc.reset_peak()
                start = tracemalloc.get_traced_memory()[0]
                out.append(fn(item))
                calls[fn.__name__] = calls.get(fn.__name__, 0) + 1
                peaks[fn.__name__] = max(peaks.get(fn.__name__, 0.0), tracemalloc.get_traced_memory()[1] - start)
            return out
        tracemalloc.start()
        t0 = time.perf_counter()
        lines = add_inset(BuildFolder(work / "b"), manifest, mapper=mapper)
        seconds = time.perf_counter() - t0
        whole = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        istore = TransformStore(work / "b" / "transforms" / "insets" / f"section{section}_2nm")
        rec, fine = istore.load_doc("inset"), istore.load_stitch(section)
        to_section = Affine2D.from_json(rec["inset_to_section"])
        u = np.array([[t.x + a, t.y + b] for t in fine.tiles for a in (20.0, 160.0, 300.0) for b in (20.0, 300.0)])
        truth = np.column_stack([cx + (u[:, 0] - (2 * cx - 0.5) + 0.5) / 2 - 0.5, cy + (u[:, 1] - (2 * cy - 0.5) + 0.5) / 2 - 0.5])
        # The stitched mosaic keeps the tiles' relative placement but not their stage origin: remove the common shift.
        got = to_section.apply(u)
        err = np.hypot(*(got - truth - np.median(got - truth, axis=0)).T)
        mb = 1 / 2 ** 20
        if k == 0:
            continue
        print(f"inset of {side} x {side} section px ({len(fine.tiles)} fine tiles, {(2 * side) ** 2 / 1e6:.2f} MP at 2 nm): "
              f"{seconds:.1f} s; peak per task: region registration {peaks.get('register_region', 0) * mb:.1f} MB "
              f"({calls.get('register_region', 0)} tasks), level-0 chunk {peaks.get('render_inset_block', 0) * mb:.1f} MB "
              f"({calls.get('render_inset_block', 0)} tasks of at most {BuildFolder(work / 'b').config.render.chunk} px "
              f"square), reduced chunk "
              f"{peaks.get('reduce_inset_block', 0) * mb:.1f} MB; whole call (driver + one task at a time) "
              f"{whole * mb:.1f} MB; regions {rec['regions_used']}/{rec['regions']}, fit residual RMS "
              f"{rec['residual_rms_px']:.3f} px; landing vs truth (common shift removed) RMS "
              f"{np.sqrt(np.mean(err ** 2)):.3f} max {err.max():.3f} px, scale {rec['scale']:.5f} (truth 0.5)")
        print("   " + lines[1].strip())
        shutil.rmtree(work, ignore_errors=True)


def _build(root: Path, first: Path, scale: list, env) -> Run:
    """Build ``first`` into ``root/build`` (removed first); return its :class:`Run`."""
    shutil.rmtree(root / "build", ignore_errors=True)
    os.sync()  # the generated tiles reach the disk before the clock starts (see :func:`_update`)
    return _cli("build", first, "--out", root / "build", *scale, env=env)


def _update(root: Path, again: Path, env) -> tuple:
    """Copy ``root/build`` to ``root/updated`` (afresh) and update that; return wall time, exit status, plan, peak."""
    upd = root / "updated"
    shutil.rmtree(upd, ignore_errors=True)
    shutil.copytree(root / "build", upd)
    # The copy is set-up, not the update: without this the update's first fsync (its plan record)
    # waits for the copy's hundreds of MB to reach the disk (ext4 orders data before metadata):
    # measured 0.25-0.5 s of an update of 2.6 s at 5 x 5 tiles of 1024 px (2026-12-03 21:50).
    # A facility's build was written long before its update.
    os.sync()
    run = _cli("update", upd, "--tiles", again, "--workers", "2", env=env)
    return run.seconds, run.status, json.loads((upd / "updates" / "0001" / "plan.json").read_text()), run.peak


def _median_update(runs: list[tuple]) -> tuple:
    """Return the run of median wall time (the lower middle one of an even count)."""
    return sorted(runs, key=lambda r: r[0])[(len(runs) - 1) // 2]


def _side_by_side(old: tuple, new: tuple, build: Path) -> None:
    """Print build and update times, the update's steps and the ratios of the baseline beside this tree's."""
    print(f"{'':<26}{'baseline':>12}{'this tree':>12}")
    rows = [("full build s", old[0], new[0]), ("update s", old[1], new[1]),
            ("build / update", old[0] / old[1], new[0] / new[1])]
    steps = sorted(set(old[3]["facts"].get("seconds", {})) | set(new[3]["facts"].get("seconds", {})))
    for k in steps:
        rows.append((f"  update step {k}", old[3]["facts"]["seconds"].get(k, 0.0),
                     new[3]["facts"]["seconds"].get(k, 0.0)))
    for tag, (t_build, t_update, _, plan, *_peaks) in (("baseline", old), ("this tree", new)):
        secs = plan["facts"].get("seconds", {})
        rest = t_update - sum(secs.values())
        if tag == "baseline":
            rest_old, nor_old = rest, old[0] / max(1e-9, t_update - secs.get("report", 0))
        else:
            rows.append(("  rest (start, imports)", rest_old, rest))
            rows.append(("build / update w/o report", nor_old, t_build / max(1e-9, t_update - secs.get("report", 0))))
    rows += [("largest process MB: build", old[5] / 2 ** 20, new[5] / 2 ** 20),
             ("  update", old[4] / 2 ** 20, new[4] / 2 ** 20)]
    for name, a, b in rows:
        print(f"{name:<26}{a:>12.2f}{b:>12.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sections", type=int, default=20)
    ap.add_argument("--grid", type=int, default=3)
    ap.add_argument("--tile", type=int, default=384)
    ap.add_argument("--content", choices=("standard", "realistic"), default="standard",
                    help="phantom family: the realistic one (the alignment issue's: content new in every section, "
                         "cells slanting each their own way, its rotations, shifts, scale and warps) or the "
                         "standard one")
    ap.add_argument("--kills", action="store_true", help="also kill the update in align, channels, render")
    ap.add_argument("--keep", metavar="DIR", help="work here and keep it (default: a temporary folder)")
    ap.add_argument("--inset-memory", action="store_true",
                    help="only the inset tasks' peak memory at two inset sizes (reuses DIR/build of --keep if there)")
    ap.add_argument("--baseline", metavar="DIR", type=Path,
                    help="also build and update with the source tree DIR (e.g. `git archive COMMIT stackbuild | "
                         "tar -x -C DIR`), before this tree, and print both side by side")
    ap.add_argument("--speed-only", action="store_true",
                    help="only steps 1-2: the full build and the update side by side, and their ratio")
    ap.add_argument("--repeat", type=int, default=1, metavar="N",
                    help="run the update N times, each on a fresh copy of the build (alternating with the "
                         "baseline's), and report the run of median wall time")
    ap.add_argument("--no-bytecode", action="store_true",
                    help="children compile stackbuild from source in every process, as this environment's "
                         "PYTHONDONTWRITEBYTECODE makes them (default: compiled once beforehand, as installed)")
    args = ap.parse_args()

    from stackbuild.synth import SynthParams, generate
    from stackbuild.synth.variants import variant_params

    root = Path(args.keep or tempfile.mkdtemp(prefix="bench-update-"))
    root.mkdir(parents=True, exist_ok=True)
    n = args.sections
    data = root / "data"
    if not (data / "tiles.csv").exists():
        if args.content == "realistic":
            params = variant_params("realistic", "base", seed=21, sections=n + 2, grid=(args.grid, args.grid),
                                    tile_size=args.tile)
        else:
            params = SynthParams(seed=21, sections=n + 2, grid=(args.grid, args.grid), tile_size=args.tile,
                                 offset=20.0, warp=4.0, channels=0, compress=False)
        generate(data, params)
    first = _subset(data / "tiles.csv", data / "first.csv", lambda s: s < n)
    later = _subset(data / "tiles.csv", data / "later.csv", lambda s: s >= n)
    scale = ["--pixel-size", "4", "--section-thickness", "40", "--workers", "2"]
    base, upd = root / "build", root / "updated"
    if args.inset_memory:
        if not (base / "build.json").exists():
            _cli("build", first, "--out", base, *scale)
        inset_memory(root, base, n // 2)
        return
    section, tiles = n // 2, ["r0c0", "r0c1"]
    again = _reimage(data, root / "again", section, tiles)
    if not args.no_bytecode:
        here = Path(__file__).resolve().parents[2]
        _keep_bytecode(root / "bytecode", [here] + ([Path(args.baseline).resolve()] if args.baseline else []))
    print("children: " + ("stackbuild compiled from source in each process (--no-bytecode)" if args.no_bytecode
                          else "stackbuild byte code compiled once beforehand, as a package install does"))
    for d in (base, upd, root / "fresh", root / "appended"):
        shutil.rmtree(d, ignore_errors=True)
    env = None
    if args.baseline:
        env = {"PYTHONPATH": os.pathsep.join([str(Path(args.baseline).resolve()),
                                              *filter(None, [os.environ.get("PYTHONPATH")])])}
        build_old = _build(root / "baseline", first, scale, env)
    build_run = _build(root, first, scale, None)
    t_build = build_run.seconds
    # The updates of the two trees alternate, so both meet the same load on this shared machine.
    mine, theirs, starts = [], [], {"this tree": []}
    for _ in range(max(1, args.repeat)):
        if args.baseline:
            theirs.append(_update(root / "baseline", again, env))
            starts.setdefault("baseline", []).append(_imports(env))
        mine.append(_update(root, again, None))
        starts["this tree"].append(_imports())
    t_update, status, plan, peak = _median_update(mine)
    if len(mine) > 1:
        print("update wall times (s), in run order: this tree " + ", ".join(f"{r[0]:.2f}" for r in mine)
              + ("; baseline " + ", ".join(f"{r[0]:.2f}" for r in theirs) if theirs else "")
              + "; the median run is reported")
    if args.baseline:
        old = (build_old.seconds, *_median_update(theirs), build_old.peak)
    before, after = _files(base / "volume.zarr" / "em"), _files(upd / "volume.zarr" / "em")
    changed = {k for k in before.keys() | after.keys() if before.get(k) != after.get(k)}
    planes = sorted({int(k.split(os.sep)[2]) for k in changed})
    level0 = [k for k in changed if k.startswith("0" + os.sep)]
    total0 = sum(1 for k in after if k.startswith("0" + os.sep))

    import stackbuild

    z = section - plan["render"]["canvas"]["first_section"]
    same = np.array_equal(stackbuild.open_volume(upd, level=0, lazy=False)[z].compute(),
                          stackbuild.open_volume(upd, level=0, lazy=True)[z].compute())
    print(f"full build of {n} sections: {t_build:.1f} s; update of 2 tiles: {t_update:.1f} s "
          f"(ratio {t_build / t_update:.1f}x; exit {status})")
    print(f"  largest process, peak resident size: full build {build_run.peak / 2 ** 20:.0f} MB, update "
          f"{peak / 2 ** 20:.0f} MB (section of {args.grid} x {args.grid} tiles of {args.tile} px)")
    checked = plan["facts"]["align"].get("checked", {})
    print(f"  update ran {plan['facts'].get('ran', '?')}; sections solved again {plan['facts']['align']['window']}; "
          + "; ".join(f"section {s}: {'kept' if c['kept_without_solve'] else 're-solved'} ({c['why']})"
                      for s, c in checked.items()))
    print(f"  planes with changed chunks: {planes} (re-imaged section's plane {z}; realigned "
          f"{plan['facts']['align']['realigned']}, existing sections moved up to "
          f"{plan['facts']['align']['largest_untouched_move_px']:.2f} px)")
    print(f"  level-0 chunk files changed: {len(level0)} of {total0}; shards rewritten per level "
          f"{plan['facts']['render']['shards']} of {plan['facts']['render']['shards_total']}")
    print(f"  updated plane equals a render from scratch of the updated transforms: {same}")
    secs = plan["facts"].get("seconds", {})
    print(f"  stitch: {plan['facts']['stitch'].get('pairs')} pairs registered again, "
          f"{plan['facts']['stitch'].get('pairs_kept')} kept from the build")
    print(f"  update steps (s): {secs}; the rest (process start, imports, summary) "
          f"{t_update - sum(secs.values()):.1f} s; without the report {t_update - secs.get('report', 0):.1f} s "
          f"(ratio {t_build / max(1e-9, t_update - secs.get('report', 0)):.1f}x)")
    state = json.loads((base / "build.json").read_text())["stages"]
    print(f"  full build stages (s): { {k: v.get('seconds') for k, v in state.items()} }")

    if args.baseline:
        _side_by_side(old, (t_build, t_update, status, plan, peak, build_run.peak), base)
    print("start-up and imports alone (a child that only imports what an update imports; median of "
          f"{len(starts['this tree'])}): " + ", ".join(f"{tag} {np.median(v):.2f} s" for tag, v in sorted(starts.items()))
          + f"; this tree's update {t_update:.2f} s, so {t_update - np.median(starts['this tree']):.2f} s of work")
    if args.speed_only:
        if not args.keep:
            shutil.rmtree(root, ignore_errors=True)
        return
    merged = Path(plan["tiles_after"])
    t_fresh = _cli("build", merged, "--out", root / "fresh", *scale).seconds
    others = [s for s in range(n) if s != section]
    mu, au = _landing(upd, section, tiles, others)
    mf, af = _landing(root / "fresh", section, tiles, others)
    a = np.column_stack([af[:, :2], np.ones(len(af))])
    m = np.linalg.lstsq(a, au[:, :2], rcond=None)[0]  # fresh build's frame -> updated build's frame
    frame = np.sqrt(np.mean(np.sum((a @ m - au[:, :2]) ** 2, 1)))
    d = np.hypot(*(np.column_stack([mf[:, :2], np.ones(len(mf))]) @ m - mu[:, :2]).T)
    print(f"second full build (merged manifest): {t_fresh:.1f} s; re-imaged tiles land within RMS "
          f"{np.sqrt(np.mean(d ** 2)):.3f} px, max {d.max():.3f} px of the fresh build "
          f"(frame fit on {len(au)} points of untouched sections: RMS {frame:.3f} px)")

    app = root / "appended"
    shutil.copytree(base, app)
    t_app = _cli("update", app, "--tiles", later, "--append", "--workers", "2").seconds
    aplan = json.loads((app / "updates" / "0001" / "plan.json").read_text())
    a_after = _files(app / "volume.zarr" / "em")
    touched = sorted({int(k.split(os.sep)[2]) for k in before if a_after.get(k) != before[k]})
    print(f"append 2 sections to {n}: {t_app:.1f} s; existing planes with changed chunks: {touched or 'none'} "
          f"(local re-solve moved existing sections up to {aplan['facts']['align']['largest_untouched_move_px']:.2f} "
          f"px; tolerance {aplan['hold_within']} px; beyond it: {aplan['facts']['align']['moved_beyond_tolerance']})")
    rep = aplan["facts"].get("report", {})
    print(f"  append steps (s): {aplan['facts'].get('seconds', {})}; sections solved {aplan['facts']['align']['window']}; "
          f"planes rendered {aplan['facts']['render'].get('planes')} (full re-render: "
          f"{aplan['facts']['render'].get('full')}); report measured {rep.get('sections', 0) - (rep.get('sections_reused') or 0)}"
          f" of {rep.get('sections')} sections again; full build / append {t_build / t_app:.1f}x")

    if args.kills:
        ref = {k: v[0] for k, v in after.items()}
        for step in ("align", "channels", "render"):
            work = root / f"killed-{step}"
            shutil.rmtree(work, ignore_errors=True)
            shutil.copytree(base, work)
            rc = _cli("update", work, "--tiles", again, "--workers", "2",
                      env={"STACKBUILD_UPDATE_KILL": step}, check=False).status
            _cli("update", work, "--resume", "--workers", "2")
            got = {k: v[0] for k, v in _files(work / "volume.zarr" / "em").items()}
            print(f"killed in {step} (exit {rc}, SIGKILL is {-signal.SIGKILL}), then --resume: "
                  f"byte-identical to the uninterrupted update: {got == ref}")
    if not args.keep:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
