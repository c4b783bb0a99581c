"""Benchmark of the align stage: seconds per section pair, and how the global solves scale.

Run: ``python tests/benchmarks/bench_align.py`` (1024 px working size) or ``--full``
(4096 px, the size the brief names). Everything is measured in one run and
printed side by side. ``--tradeoff`` instead sweeps ``elastic_chain`` over the
ground-truth stacks of the align tests (invented data; about two minutes):
random-warp residual against slant kept. ``--memory`` builds standard stacks of 3x3 and
7x7 tiles of 1024 px and prints the align process's peak memory and CPU beside render's
on the same volume, then the modelled production size (``--production`` alone).
``--accuracy [FAMILY/VARIANT ...] --seeds 0,1,2`` prints the identifiable residual
(stackbuild.synth.residual) of align on the named synthetic stacks. ``--steps [FAMILY/VARIANT ...]``
prints the CPU of each step of one align run (where the time goes). ``--speed [FAMILY/VARIANT ...]``
prints align CPU beside two render CPUs on the same volume, each in its own process (one thread;
default realistic/base seed 0; issue #13 target: align <= 0.5 x render). With ``--baseline DIR`` (a
source tree of another commit: ``git archive COMMIT stackbuild | tar -x -C DIR``) ``--speed`` and
``--accuracy`` also run align with that code in a child process, on the same stacks, beside this tree's:

* ``stage``: the render stage as ``stackbuild build`` runs it (``run.stages.render_stage`` with the
  in-process mapper: level 0, the pyramid, the codec and the writes of ``volume.zarr``);
* ``level 0``: level 0 of every plane from the tiles only (no pyramid, no codec, no writes), the
  strict reading.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

# --baseline's child process imports the stackbuild of another source tree
if os.environ.get("BENCH_ALIGN_SOURCE"):
    sys.path.insert(0, os.environ["BENCH_ALIGN_SOURCE"])

import cv2
import numpy as np
from scipy import ndimage

from stackbuild.align.blockmatch import block_match, filter_vectors, grid_nodes
from stackbuild.align.coarse import PairResult, match_pair
from stackbuild.align.elastic import solve_fields
from stackbuild.align.features import detect_features
from stackbuild.align.settings import AlignSettings
from stackbuild.align.solve import solve_affines
from stackbuild.transforms.types import Affine2D


def _texture(rng, n):
    a = ndimage.gaussian_filter(rng.standard_normal((n, n)).astype(np.float32), 6)
    b = ndimage.gaussian_filter(rng.standard_normal((n, n)).astype(np.float32), 1.5)
    return np.exp(-(a / a.std() / 0.25) ** 2) + 0.1 * b / b.std()


def _pair(n, rng):
    img = _texture(rng, n)
    m = Affine2D.similarity(1.01, np.deg2rad(1.5), 7.0, -5.0, center=(n / 2, n / 2))
    return img, cv2.warpAffine(img, m.matrix, (n, n), flags=cv2.INTER_LINEAR)


def _clock(fn, repeat=1):
    best = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def bench_pair(n, s: AlignSettings):
    rng = np.random.default_rng(0)
    a, b = _pair(n, rng)
    t_feat, (fa, fb) = _clock(lambda: (detect_features(a, s.detector, s.max_features),
                                       detect_features(b, s.detector, s.max_features)))
    t_match, res = _clock(lambda: match_pair(fa, fb, 0, 1, model=s.model, ratio=s.ratio,
                                             threshold=s.ransac_threshold, min_inliers=s.min_inliers))
    step = s.grid_spacing / s.elastic_scale
    m = int((s.match_half_size + s.match_max_shift + 2))
    k = int((n - 2 * m) // step) + 1
    nodes = grid_nodes((m, m), step, (k, k))
    shifted = ndimage.shift(a, (1.3, -2.2), order=1)
    t_block, (sh, pk) = _clock(lambda: block_match(a, shifted, nodes, s.match_half_size, s.match_max_shift))
    ok = filter_vectors(sh.reshape(k, k, 2), pk.reshape(k, k), s.min_block_ncc, s.max_neighbour_deviation)
    return {"features_per_section": t_feat / 2, "match_ransac": t_match, "inliers": res.stats["inliers"],
            "coarse_per_pair": t_feat / 2 + t_match, "block_nodes": k * k,
            "elastic_per_pair": t_block, "trusted": int(ok.sum())}


def bench_solve(n_sections, rng, nodes=16):
    zs = list(range(n_sections))
    raw = {z: Affine2D.similarity(1 + rng.uniform(-.02, .02), rng.uniform(-.05, .05),
                                  *rng.uniform(-100, 100, 2)) for z in zs}
    pairs = []
    for a in zs:
        for b in (a + 1, a + 2):
            if b in raw:
                pb = rng.uniform(0, 4000, (300, 2))
                pa = raw[a].apply(raw[b].inverse().apply(pb)) + rng.normal(0, 0.3, pb.shape)
                pairs.append(PairResult(a, b, pa, pb, None, {}))
    t_aff, _ = _clock(lambda: solve_affines(zs, pairs, "affine"))
    shape = (nodes, nodes)
    seen = {z: rng.normal(0, 2, (*shape, 2)) for z in zs}
    matches = {(a, b): (seen[b] - seen[a], np.ones(shape)) for a in zs for b in (a + 1, a + 2) if b in seen}
    t_el, _ = _clock(lambda: solve_fields(zs, shape, matches, smoothness_weight=0.002, pull=1e-3))
    return t_aff, t_el


def tradeoff(weights=(0.0, 0.01, 0.02, 0.03, 0.1)):
    """Print residual RMS / p95 of random warps beside the slant change, per ``elastic_chain``."""
    import sys
    from dataclasses import replace
    from pathlib import Path
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from align_builders import make_stack, p95, residuals, rms, small_settings
    from stackbuild.align.sources import ArraySource
    from stackbuild.align.stage import align_sections
    stacks = {"random": (make_stack(n=20, size=768, seed=0, offset=40.0), 150),
              "slant": (make_stack(n=20, size=512, seed=3, offset=30.0, warp=0.0, slant=0.5), 100),
              "slant+warp": (make_stack(n=20, size=512, seed=3, offset=30.0, warp=3.0, slant=0.5), 100)}
    print("  chain   random rms  p95    slant change  slant+warp change   (px; 20 sections)")
    for c in weights:
        out = []
        for name, (st, border) in stacks.items():
            al = align_sections(ArraySource(st.images), replace(small_settings(), elastic_chain=c))
            r = residuals(st, al, border=border)
            out.append((rms(np.stack(list(r.values()))), p95(np.stack(list(r.values()))))
                       if name == "random" else rms(r[19] - r[0]))
        print(f"  {c:5.3f}   {out[0][0]:10.3f}  {out[0][1]:5.3f}  {out[1]:12.3f}  {out[2]:17.3f}")


def _true_stitch(sample: Path, build: Path) -> None:
    """Write stitch records with the TRUE tile positions (isolates alignment from stitching)."""
    from stackbuild.manifest import read_tile_manifest
    from stackbuild.synth import load_truth
    from stackbuild.transforms import SectionStitch, TilePlacement, TransformStore
    manifest = read_tile_manifest(sample / "tiles.csv")
    truth = load_truth(sample)
    store = TransformStore(build / "transforms")
    for z in manifest.sections:
        pos = truth.tile_positions(z)
        tiles = [TilePlacement(t.tile, str(t.path), t.width, t.height, t.x, t.y, *pos[t.tile])
                 for t in manifest.section_tiles(z)]
        store.save_stitch(SectionStitch(z, manifest.section_tiles(z)[0].dtype, tiles))


def _child(fn, *args):
    """Run ``fn(*args)`` in a fresh process; return (its result, CPU seconds, peak RSS bytes)."""
    import multiprocessing as mp
    ctx = mp.get_context("spawn")
    with ctx.Pool(1, maxtasksperchild=1) as pool:
        return pool.apply(_measured, (fn, args))


def _peak_bytes() -> int:
    """Return this process's peak resident memory: VmHWM (ru_maxrss is carried over exec from the parent
    that forked it, here the benchmark process that made the mosaics, which showed its size instead)."""
    import resource

    from stackbuild.run.plan_measure import status_bytes

    return status_bytes("VmHWM") or resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _measured(fn, args):
    import resource
    from stackbuild.run.plan_speed import one_thread
    r0 = resource.getrusage(resource.RUSAGE_SELF)
    with one_thread():      # one OpenCV, BLAS and Blosc thread: process CPU is then the work's own
        out = fn(*args)
    r1 = resource.getrusage(resource.RUSAGE_SELF)
    cpu = (r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime)
    return out, cpu, _peak_bytes()


def _align_only(build):
    from stackbuild.align.stage import run_align
    al = run_align(build, AlignSettings())
    return {z: a.flags for z, a in al.items() if a.flags}


def _baseline_align(source, build) -> tuple[dict, float]:
    """Return the flags and CPU seconds of align run on ``build`` by the stackbuild in ``source`` (a child process)."""
    env = {**os.environ, "BENCH_ALIGN_SOURCE": str(source)}
    out = subprocess.run([sys.executable, __file__, "--align-child", str(build)], env=env, check=True,
                         capture_output=True, text=True).stdout
    res = json.loads(out.splitlines()[-1])
    return res["flags"], res["cpu"]


def _align_child(build) -> None:
    """Print (JSON) the flags and CPU seconds of align on ``build``, measured in this process (one thread)."""
    import stackbuild
    flags, cpu, _ = _measured(_align_only, (str(build),))
    print(json.dumps({"flags": {str(z): f for z, f in flags.items()}, "cpu": cpu, "source": stackbuild.__file__}))


def _render_only(build):
    """Render level 0 of every plane from the tiles (the render stage's pixel work), in this process."""
    from stackbuild.render.canvas import compute_canvas
    from stackbuild.render.lazy import RenderPlan, level0
    from stackbuild.render.settings import RenderSettings
    from stackbuild.transforms import TransformStore
    store = TransformStore(Path(build) / "transforms")
    zs = store.sections_with("stitch")
    canvas = compute_canvas(store, zs, [], 4.0, 40.0)
    vol = level0(RenderPlan.from_canvas(store.root, canvas, RenderSettings()))
    for z in range(vol.shape[0]):           # plane by plane, as the writer goes
        vol[z].compute(scheduler="synchronous")
    return list(vol.shape)


def _render_stage(build):
    """Run the render stage on the build folder in this process (in-process mapper), as ``stackbuild build`` does."""
    from stackbuild.folder import BuildFolder
    from stackbuild.run.cluster import serial_mapper
    from stackbuild.run.stages import render_stage
    facts = render_stage(BuildFolder(build), overwrite=True, mapper=serial_mapper())
    return len(facts.get("planes", []))


def memory(grids=((3, 3), (7, 7)), tile=1024, sections=4, root="/tmp/bench_align_memory"):
    """Print the align process's peak memory and CPU beside render's, for sections of ``grids`` tiles."""
    from stackbuild.synth import generate
    from stackbuild.synth.variants import variant_params
    rows = []
    for g in grids:
        base = Path(root) / f"{g[0]}x{g[1]}"
        if not (base / "sample" / "tiles.csv").exists():
            generate(base / "sample", variant_params("standard", "base", 0, grid=g, tile_size=tile,
                                                     sections=sections))
        import shutil
        shutil.rmtree(base / "build", ignore_errors=True)
        _true_stitch(base / "sample", base / "build")
        flags, a_cpu, a_rss = _child(_align_only, str(base / "build"))
        shape, r_cpu, r_rss = _child(_render_only, str(base / "build"))
        rows.append((g, a_rss, a_cpu, r_rss, r_cpu, shape, flags))
    print(f"sections of n x n tiles of {tile} px, {sections} sections, standard phantom, true tile positions;"
          " every stage in its own process (mapper = map: the whole stage in one process)")
    print("  tiles   align peak MB  align CPU s   render peak MB  render CPU s   align/render CPU")
    for g, a_rss, a_cpu, r_rss, r_cpu, shape, flags in rows:
        print(f"  {g[0]}x{g[1]}   {a_rss / 1e6:13.0f}  {a_cpu:11.1f}   {r_rss / 1e6:14.0f}  {r_cpu:12.1f}"
              f"   {a_cpu / r_cpu:16.2f}   {flags or ''}")
    print(f"  align peak memory {grids[-1][0]}x{grids[-1][1]} / {grids[0][0]}x{grids[0][1]}: "
          f"{rows[-1][1] / rows[0][1]:.2f} (issue target <= 1.3)")


def production(section_px=130_000, n_sections=400, tile=4096):
    """Print the modelled task kinds of align at production size (stackbuild.align.budget)."""
    from stackbuild.align.budget import align_budget
    r = align_budget(section_px, n_sections, tile)
    print(f"production: {n_sections} sections of {section_px} px (tiles {tile} px, 16-bit); "
          f"grid {r['grid_nodes']} x {r['grid_nodes']} nodes, {r['node_blocks']} node blocks x "
          f"{r['windows']} section windows")
    print("  task kind        count     GB each   holds")
    for t in r["tasks"]:
        print(f"  {t.name:15s} {t.count:8d}  {t.bytes_each / 1e9:8.2f}   {t.note}")
    print(f"  largest task {r['largest_task_bytes'] / 1e9:.2f} GB (target < 4); "
          f"driver {r['driver_bytes'] / 1e9:.2f} GB (target < 8)")


def _build_canvas(build):
    """Store in ``build`` the canvas its first render would make (tight footprint, then the render stage's
    margin and padding: ``render.canvas.settle_canvas`` with the default chunk and shard), as ``render`` does."""
    from stackbuild.render.canvas import compute_canvas, settle_canvas
    from stackbuild.render.settings import RenderSettings
    from stackbuild.transforms import TransformStore
    store = TransformStore(Path(build) / "transforms")
    rs = RenderSettings()
    fresh = compute_canvas(store, store.sections_with("stitch"), [], 4.0, 40.0)
    store.save_canvas(settle_canvas(None, fresh, shard=rs.chunk * rs.shard, chunk=rs.chunk)[0])


def accuracy(cases, seeds, root="/tmp/bench_align_accuracy", baseline=None):
    """Print the identifiable residual (stackbuild.synth.residual) of align on named synthetic stacks.

    Each build is measured on two grids of 128 px blocks (only blocks covered in every plane count):
    ``extent``, centred on the sections' aligned extent (what ``identifiable_residual`` uses before
    render), and ``canvas``, centred on the canvas a render would store (5 % margin and padding; what
    a real build and ``bench_accuracy.py`` measure). On sections of 2 x 2 tiles the two keep different
    blocks near the edge of the common area (realistic/long seed 1: 36 against 25 blocks), where the
    residual is largest, so the two differ by up to a third; neither is the other's regression.
    """
    from stackbuild.align.stage import run_align
    from stackbuild.synth.residual import identifiable_residual
    print("  case                     extent grid: rms   p95    max  last | canvas grid: rms   p95    max  last"
          " | flags   (px; true tile positions)")

    def measured(base):
        cols = []
        for grid in ("extent", "canvas"):
            if grid == "canvas":
                _build_canvas(base / "build")
            r = identifiable_residual(base / "build", base / "sample")
            last = r.per_section[max(r.per_section)]["rms"]
            cols.append(f"{r.rms:6.2f} {r.p95:6.2f} {r.max:6.2f} {last:5.2f} ({len(r.points):3d} blocks)")
        return cols

    def bad(flags):
        return {z: f for z, f in flags.items() if set(f) & {"damaged", "interpolated"}}

    for family, variant in cases:
        for seed in seeds:
            name = family + '/' + variant + '/' + str(seed)
            if baseline:
                base = _fresh_case(root, family, variant, seed)
                flags, _ = _baseline_align(baseline, base / "build")
                cols = measured(base)
                print(f"  {name + ' base':22s} {cols[0]} | {cols[1]} | {bad(flags) or ''}", flush=True)
            base = _fresh_case(root, family, variant, seed)
            al = run_align(base / "build", AlignSettings())
            cols = measured(base)
            flags = bad({z: a.flags for z, a in al.items()})
            print(f"  {name:22s} {cols[0]} | {cols[1]} | {flags or ''}", flush=True)


def _fresh_case(root, family: str, variant: str, seed: int, folder: bool = False) -> Path:
    """Return the folder of one synthetic case (made once) with a new build stitched at the true tile positions.

    ``folder``: the build is a whole build folder (``run.start.start_build``: manifest, settings), so
    the render stage can run on it; otherwise only its transform records.
    """
    import shutil
    from stackbuild.synth import generate
    from stackbuild.synth.variants import variant_params
    base = Path(root) / f"{family}-{variant}-{seed}"
    if not (base / "sample" / "tiles.csv").exists():
        generate(base / "sample", variant_params(family, variant, seed))
    shutil.rmtree(base / "build", ignore_errors=True)
    if folder:
        from stackbuild.run.start import start_build
        start_build(base / "build", base / "sample" / "tiles.csv")
    _true_stitch(base / "sample", base / "build")
    return base


def speed(cases, seeds, root="/tmp/bench_align_speed", baseline=None):
    """Print align CPU beside the render stage's CPU and level 0's on the same volume (true tile positions).

    With ``baseline`` (a source tree), the same align by that code, in a child process run
    right before this tree's, on the same build: a row ``... base`` above each case.
    """
    print("  case                   align CPU s   render stage CPU s  level 0 CPU s   align/stage  align/level 0"
          "   (each in its own process, one thread; target <= 0.5)")
    for family, variant in cases:
        for seed in seeds:
            base = _fresh_case(root, family, variant, seed, folder=True)
            b_cpu = _baseline_align(baseline, base / "build")[1] if baseline else None
            _, a_cpu, _ = _child(_align_only, str(base / "build"))
            _, s_cpu, _ = _child(_render_stage, str(base / "build"))
            _, r_cpu, _ = _child(_render_only, str(base / "build"))
            name = family + '/' + variant + '/' + str(seed)
            if b_cpu is not None:
                print(f"  {name + ' base':22s} {b_cpu:11.1f}   {s_cpu:18.1f}  {r_cpu:13.1f}"
                      f"   {b_cpu / s_cpu:11.2f}  {b_cpu / r_cpu:13.2f}", flush=True)
            print(f"  {name:22s} {a_cpu:11.1f}   {s_cpu:18.1f}  {r_cpu:13.1f}"
                  f"   {a_cpu / s_cpu:11.2f}  {a_cpu / r_cpu:13.2f}", flush=True)


def steps(cases, seeds, root="/tmp/bench_align_speed"):
    """Print the CPU of each step of one align run (the mapped task function, in call order), one thread, in-process.

    Where the align stage's time goes (issue #13's speed bar): on realistic/base seed 0 (12 sections of
    3 x 3 tiles of 512 px) the coarse step's pair matching is about 38 %, the last elastic round about 35 %.
    Also how many times each tile was read (pixels decoded / pixels of all tiles): 3 on that stack, about
    the least for three scales (overview, early round, last round) with a cache that cannot hold a stack.
    """
    import time
    from stackbuild import tiles
    from stackbuild.align.stage import run_align
    from stackbuild.run.plan_speed import one_thread
    from stackbuild.transforms import TransformStore
    for family, variant in cases:
        for seed in seeds:
            base = _fresh_case(root, family, variant, seed)
            rows = []

            def mapper(fn, items):
                items = list(items)
                t = time.process_time()
                out = list(map(fn, items))
                rows.append((fn.__name__, len(items), time.process_time() - t))
                return out
            tiles.TILE_CACHE.clear()
            tiles.PIXELS_READ.clear()
            with one_thread():
                t = time.process_time()
                run_align(str(base / "build"), AlignSettings(), mapper=mapper)
                total = time.process_time() - t
            store = TransformStore(base / "build" / "transforms")
            pixels = sum(t.width * t.height for z in store.sections_with("stitch") for t in store.load_stitch(z).tiles)
            print(f"  {family}/{variant}/{seed}: align CPU {total:.2f} s (one thread, in-process); each tile read "
                  f"{sum(tiles.PIXELS_READ.values()) / pixels:.1f} times")
            print("    step              tasks   CPU s   share")
            for name, n, cpu in rows:
                print(f"    {name:16s} {n:6d}  {cpu:6.3f}  {cpu / total:6.1%}")
            print(f"    {'driver (rest)':16s} {'':6s}  {total - sum(r[2] for r in rows):6.3f}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="4096 px working size (default 1024)")
    ap.add_argument("--tradeoff", action="store_true", help="sweep elastic_chain on ground-truth stacks")
    ap.add_argument("--memory", action="store_true",
                    help="align peak memory and CPU beside render's, 3x3 and 7x7 tiles of 1024 px")
    ap.add_argument("--production", action="store_true", help="modelled task memory at production size")
    ap.add_argument("--accuracy", nargs="*", metavar="FAMILY/VARIANT",
                    help="identifiable residual on synthetic stacks (default: every family and variant)")
    ap.add_argument("--speed", nargs="*", metavar="FAMILY/VARIANT",
                    help="align CPU beside render CPU on the same volume (default realistic/base)")
    ap.add_argument("--steps", nargs="*", metavar="FAMILY/VARIANT",
                    help="CPU of each step of one align run (default realistic/base)")
    ap.add_argument("--baseline", type=Path, default=None, metavar="DIR",
                    help="with --speed or --accuracy: a source tree (holding stackbuild/) run beside this one")
    ap.add_argument("--align-child", type=Path, default=None, help=argparse.SUPPRESS)
    ap.add_argument("--seeds", default=None, help="seeds, e.g. 0,1,2 (default: 0,1,2 for --accuracy, 0 for --speed)")
    args = ap.parse_args()
    if args.align_child:
        _align_child(args.align_child)
        return
    if args.tradeoff:
        tradeoff()
        return
    if args.memory:
        memory()
        production()
        return
    if args.production:
        production()
        return
    if args.steps is not None:
        steps([tuple(c.split("/")) for c in args.steps] or [("realistic", "base")],
              [int(x) for x in (args.seeds or "0").split(",")])
        return
    if args.speed is not None:
        speed([tuple(c.split("/")) for c in args.speed] or [("realistic", "base")],
              [int(x) for x in (args.seeds or "0").split(",")], baseline=args.baseline)
        return
    if args.accuracy is not None:
        cases = [tuple(c.split("/")) for c in args.accuracy] or [
            (f, v) for f in ("standard", "realistic") for v in ("base", "dense", "small", "long")]
        accuracy(cases, [int(x) for x in (args.seeds or "0,1,2").split(",")], baseline=args.baseline)
        return
    n = 4096 if args.full else 1024
    s = AlignSettings()
    r = bench_pair(n, s)
    print(f"working size {n} x {n}, detector {s.detector}, max_features {s.max_features}, "
          f"grid_spacing {s.grid_spacing} at elastic_scale {s.elastic_scale}")
    print(f"  coarse : {r['features_per_section']:.3f} s features per section + {r['match_ransac']:.3f} s "
          f"match + RANSAC = {r['coarse_per_pair']:.3f} s per pair ({r['inliers']} inliers)")
    print(f"  elastic: {r['elastic_per_pair']:.3f} s block matching per pair "
          f"({r['block_nodes']} nodes, {r['trusted']} trusted); elastic/coarse = "
          f"{r['elastic_per_pair'] / r['coarse_per_pair']:.2f}")
    rng = np.random.default_rng(1)
    rows = [(k, *bench_solve(k, rng)) for k in (20, 50, 100, 200)]
    base = rows[0]
    print("  global solves (z+1 and z+2 links; affine: 300 points per pair; elastic: 16 x 16 nodes)")
    print("  sections  affine s  ratio   elastic s  ratio   (ratio to 20 sections; linear would be k/20)")
    for k, ta, te in rows:
        print(f"  {k:8d}  {ta:8.3f}  {ta / base[1]:5.1f}   {te:9.3f}  {te / base[2]:5.1f}")


if __name__ == "__main__":
    main()
