"""Benchmark of per-section stitching, and of our pair correlation against scikit-image's.

Synthesises a grid of tiles of an invented specimen (granular texture,
vignetting, per-tile gain, noise at SNR 5, sub-pixel stage jitter) into a
temporary folder, stitches it, and reports tile pairs per second and
megapixels of tile area per CPU-second. Then, on the same true-overlap strips
of every direct neighbour pair, it times our ``phase_correlate`` (pipeline
settings) and ``skimage.registration.phase_cross_correlation(upsample_factor=100)``
side by side in one run, and prints the speed ratio and both accuracies
against the known offsets.

    python tests/benchmarks/bench_stitch.py            # 4x4 tiles of 2048 px
    python tests/benchmarks/bench_stitch.py --full     # 10x10 tiles of 2048 px
    python tests/benchmarks/bench_stitch.py --grid 3 --tile 1024
    python tests/benchmarks/bench_stitch.py --memory   # peak RSS of a stitch task, 3x3 vs 7x7 tiles of 1024 px
    python tests/benchmarks/bench_stitch.py --accuracy --baseline /tmp/old  # vs truth, beside another source tree
    python tests/benchmarks/bench_stitch.py --accuracy --narrow --seeds 11,12  # small overlaps, large stage error

``--accuracy`` stitches every section of the named synthetic stacks of both
families (``standard``, ``realistic``; variants ``base`` and ``bits12``, one blank
tile in section 1; seeds 0-2 unless ``--seeds``) and prints each section's
placement error against the synthetic truth (non-blank tiles, common translation
removed) and its stitch CPU time. ``--narrow`` stitches instead realistic 12-bit stacks
(one blank tile) with small overlaps and large stage errors (``NARROW_CASES``: 5 % at
+-20 px, 6 % at +-30 px, 8 % at +-40 px of 512 px tiles). With ``--baseline DIR`` (a source tree of
another commit, e.g. ``git archive COMMIT stackbuild | tar -x -C DIR``) the same
sections are stitched by that code in a child process, the two runs alternating
case by case, and printed side by side.

``--memory`` runs each stitch task in a fresh process (multiprocessing,
spawn) and reports its peak resident set size (``VmHWM``) beside the same
process's peak right before the task, so the interpreter and libraries are
told apart from what the task itself holds.
"""
from __future__ import annotations

import argparse
import multiprocessing
import os
import resource
import sys
import tempfile
import time
import warnings
from pathlib import Path

# One BLAS thread per process, set before numpy loads: on a shared, busy machine
# OpenBLAS's own threads turn the small matrix products of both upsampled-DFT
# implementations into waits (measured: 0.1 ms vs ~90 ms per product).
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import cv2  # noqa: E402
import numpy as np  # noqa: E402
import tifffile  # noqa: E402

# --accuracy's baseline child imports the stackbuild of another source tree.
sys.path.insert(0, os.environ.get("BENCH_STITCH_SOURCE") or str(Path(__file__).resolve().parents[2]))

from skimage.registration import phase_cross_correlation  # noqa: E402

from stackbuild.manifest import read_tile_manifest  # noqa: E402
from stackbuild.stitch.section import stitch_section
from stackbuild.stitch.settings import StitchSettings  # noqa: E402
from stackbuild.stitch.phasecorr import phase_correlate  # noqa: E402


def scene(height: int, width: int, rng) -> np.ndarray:
    """Return an invented granular specimen in [0.15, 0.85], float32 (cheap, cv2-based)."""
    img = np.zeros((height, width), np.float32)
    for sigma, amp, shrink in ((1.5, 0.5, 1), (4.0, 1.0, 2), (12.0, 1.0, 4)):
        small = rng.standard_normal((height // shrink + 1, width // shrink + 1), dtype=np.float32)
        small = cv2.GaussianBlur(small, (0, 0), sigma / shrink)
        layer = cv2.resize(small, (width, height), interpolation=cv2.INTER_CUBIC)
        img += amp * layer / layer.std()
    lo, hi = np.percentile(img[::7, ::7], [0.5, 99.5])
    return (0.15 + 0.7 * np.clip((img - lo) / (hi - lo), 0, 1)).astype(np.float32)


def make_tiles(folder: Path, n: int, tile: int, overlap: float, jitter: float, seed: int = 0):
    """Write an ``n x n`` grid of uint16 tiles and a manifest; return entries and true positions."""
    rng = np.random.default_rng(seed)
    step = int(round(tile * (1 - overlap)))
    margin = int(np.ceil(jitter)) + 8
    size = (n - 1) * step + tile + 2 * margin
    sc = scene(size, size, rng)
    yy, xx = np.mgrid[:tile, :tile].astype(np.float32)
    r2 = (yy - (tile - 1) / 2) ** 2 + (xx - (tile - 1) / 2) ** 2
    vig = 1 - 0.2 * r2 / r2.max()
    lines, truth = ["section,tile,path,x,y"], []
    for r in range(n):
        for c in range(n):
            gx, gy = c * step, r * step
            tx, ty = gx + rng.uniform(-jitter, jitter), gy + rng.uniform(-jitter, jitter)
            truth.append((tx, ty))
            m = np.float32([[1, 0, tx + margin], [0, 1, ty + margin]])
            img = cv2.warpAffine(sc, m, (tile, tile), flags=cv2.INTER_CUBIC | cv2.WARP_INVERSE_MAP)
            sig = img * vig * rng.uniform(0.85, 1.15)
            sig += rng.normal(0, sig.std() / 5, sig.shape).astype(np.float32)
            name = f"t{r:02d}{c:02d}"
            tifffile.imwrite(folder / f"{name}.tif", np.clip(sig * 40000, 0, 65535).astype(np.uint16))
            lines.append(f"0,{name},{name}.tif,{gx},{gy}")
    (folder / "tiles.csv").write_text("\n".join(lines) + "\n")
    return read_tile_manifest(folder / "tiles.csv").section_tiles(0), np.array(truth)


def pair_strips(tiles, truth, n: int):
    """Yield ``(strip_a, strip_b, residual_xy)`` for direct neighbours, cut at the rounded true offset."""
    imgs = [tifffile.imread(t.path).astype(np.float32) for t in tiles]
    for i in range(n * n):
        for j in (i + 1, i + n):
            if (j == i + 1 and j % n == 0) or j >= n * n:
                continue
            d = truth[j] - truth[i]
            di = np.round(d).astype(int)
            h, w = imgs[i].shape
            x0, y0 = max(0, di[0]), max(0, di[1])
            x1, y1 = min(w, di[0] + w), min(h, di[1] + h)
            a = imgs[i][y0:y1, x0:x1]
            b = imgs[j][y0 - di[1]:y1 - di[1], x0 - di[0]:x1 - di[0]]
            yield a, b, d - di


def _timed(fn, repeat: int):
    """Return ``fn()`` and its smallest CPU time over ``repeat`` calls (CPU time: the machine is shared)."""
    best = np.inf
    for _ in range(repeat):
        t0 = time.process_time()
        out = fn()
        best = min(best, time.process_time() - t0)
    return out, best


def compare_pairwise(strips, settings: StitchSettings, repeat: int = 3):
    """Time both methods on the same strips, interleaved; return CPU times and errors."""
    t_ours = t_ref = 0.0
    e_ours, e_ref = [], []
    for a, b, e in strips:
        ((sx, sy), _), t1 = _timed(lambda: phase_correlate(
            a, b, upsample=100, max_shift=settings.max_stage_error,
            spectral_exponent=settings.spectral_exponent, lowpass=settings.spectrum_sigma), repeat)
        ref, t2 = _timed(lambda: phase_cross_correlation(a, b, upsample_factor=100)[0], repeat)
        t_ours += t1
        t_ref += t2
        # b = a moved by -e: ours reports -e (x, y); skimage reports +e as (row, col).
        e_ours.append(np.hypot(sx + e[0], sy + e[1]))
        e_ref.append(np.hypot(ref[1] - e[0], ref[0] - e[1]))
    return t_ours, t_ref, np.array(e_ours), np.array(e_ref)


def _peak_rss_mib() -> float:
    """Return this process's peak resident set size, MiB (Linux ``VmHWM``; else ``ru_maxrss``).

    ``VmHWM`` belongs to the process's own address space; ``ru_maxrss`` is
    carried over from the parent through fork and exec, so a child started
    by a parent holding a big synthetic scene would report the parent's peak.
    """
    from stackbuild.run.plan_measure import status_bytes

    return status_bytes("VmHWM") / 2 ** 20 or resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _task_peak(tiles) -> tuple[float, float, float]:
    """Stitch one section in this (fresh) process; return peak RSS before and after (MiB) and wall seconds."""
    before = _peak_rss_mib()
    t0 = time.perf_counter()
    stitch_section(tiles, StitchSettings(), 0)
    wall = time.perf_counter() - t0
    return before, _peak_rss_mib(), wall


def memory(tile: int, grids=(3, 7)) -> None:
    """Print the peak RSS of a stitch task for each grid size, and their ratio."""
    peaks = {}
    ctx = multiprocessing.get_context("spawn")
    with tempfile.TemporaryDirectory() as tmp:
        for n in grids:
            folder = Path(tmp) / str(n)
            folder.mkdir()
            tiles, _ = make_tiles(folder, n, tile, 0.1, 20.0, seed=n)
            with ctx.Pool(1) as pool:
                before, after, wall = pool.apply(_task_peak, (tiles,))
            peaks[n] = after
            tile_mib = tile * tile * 2 / 2 ** 20
            print(f"{n}x{n} tiles of {tile} px: peak RSS {after:.0f} MiB ({before:.0f} MiB before the task, "
                  f"task adds {after - before:.0f} MiB = {(after - before) / tile_mib:.1f} uint16 tiles); "
                  f"{wall:.1f} s")
    a, b = grids
    print(f"peak ratio {b}x{b} / {a}x{a}: {peaks[b] / peaks[a]:.2f}")


ACCURACY_CASES = [(f, v) for f in ("standard", "realistic") for v in ("base", "bits12")]
#: ``--narrow``: (overlap fraction, stage jitter +- px) of realistic 12-bit stacks of 512 px tiles.
NARROW_CASES = [(0.05, 20.0), (0.06, 30.0), (0.08, 40.0)]


def _accuracy_stack(data: Path, family: str, variant: str, seed: int, narrow: tuple | None = None) -> Path:
    """Return the folder of one named stack (2 sections, a blank tile in section 1), synthesising it once.

    ``narrow`` is ``(overlap, jitter)`` to replace the variant's (see ``NARROW_CASES``).
    """
    import dataclasses

    from stackbuild.synth import generate
    from stackbuild.synth.variants import variant_params
    name = f"{family}-{variant}-{seed}" + (f"-overlap{narrow[0]:g}-jitter{narrow[1]:g}" if narrow else "")
    folder = data / name
    if not (folder / "tiles.csv").exists():
        params = variant_params(family, variant, seed, sections=2, blank_tiles="1:r1c1")
        if narrow:
            params = dataclasses.replace(params, overlap=narrow[0], jitter=narrow[1])
        generate(folder, params)
    return folder


def accuracy_rows(folder: Path) -> list[dict]:
    """Return, per section of ``folder``, the placement error against the truth and the stitch CPU time."""
    from stackbuild.synth import load_truth
    truth = load_truth(folder)
    manifest = read_tile_manifest(folder / "tiles.csv")
    rows = []
    for s in manifest.sections:
        c0 = time.process_time()
        res = stitch_section(manifest.section_tiles(s), StitchSettings(), s)
        cpu = time.process_time() - c0
        true = truth.tile_positions(s)
        keep = [t for t in res.tiles if "blank" not in t.flags]
        d = np.array([(t.x - true[t.tile][0], t.y - true[t.tile][1]) for t in keep])
        d -= d.mean(axis=0)
        err = np.hypot(d[:, 0], d[:, 1])
        rows.append({"section": s, "rms": float(np.sqrt(np.mean(err ** 2))), "max": float(err.max()),
                     "accepted": res.stats["pairs_accepted"], "pairs": res.stats["pairs"], "cpu": cpu})
    return rows


def _baseline_rows(source: Path, folder: Path) -> list[dict]:
    import json
    import subprocess
    env = {**os.environ, "BENCH_STITCH_SOURCE": str(source)}
    out = subprocess.run([sys.executable, __file__, "--accuracy-child", str(folder)], env=env,
                         check=True, capture_output=True, text=True).stdout
    return json.loads(out.splitlines()[-1])


def accuracy(data: Path, seeds: list[int], baseline: Path | None, narrow: bool = False) -> None:
    """Print placement errors against the truth per section, beside ``baseline``'s when given."""
    cases = [("realistic", "bits12", n) for n in NARROW_CASES] if narrow else \
        [(f, v, None) for f, v in ACCURACY_CASES]
    head = f"{'stack':44s} {'sec':>3s} {'rms px':>7s} {'max px':>7s} {'acc/pairs':>9s} {'CPU s':>6s}"
    print(head + ("   | baseline: rms, max, acc/pairs, CPU s" if baseline else ""))
    tot = {"ours": [], "base": []}
    for family, variant, cut in cases:
        for seed in seeds:
            folder = _accuracy_stack(data, family, variant, seed, cut)
            ours = accuracy_rows(folder)
            base = _baseline_rows(baseline, folder) if baseline else [None] * len(ours)
            for o, b in zip(ours, base):
                line = (f"{folder.name:44s} {o['section']:3d} {o['rms']:7.3f} {o['max']:7.3f} "
                        f"{o['accepted']:4d}/{o['pairs']:<4d} {o['cpu']:6.2f}")
                if b:
                    line += (f"   | {b['rms']:7.3f} {b['max']:7.3f} {b['accepted']:4d}/{b['pairs']:<4d} "
                             f"{b['cpu']:6.2f}")
                    tot["base"].append(b)
                tot["ours"].append(o)
                print(line, flush=True)
    for name, rows in tot.items():
        if rows:
            print(f"{name}: mean rms {np.mean([r['rms'] for r in rows]):.3f} px, worst max "
                  f"{max(r['max'] for r in rows):.3f} px, pairs accepted {sum(r['accepted'] for r in rows)}, "
                  f"stitch CPU {sum(r['cpu'] for r in rows):.2f} s")


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--grid", type=int, default=4, help="tiles per side (default 4)")
    p.add_argument("--tile", type=int, default=2048, help="tile side in pixels (default 2048)")
    p.add_argument("--overlap", type=float, default=0.1, help="nominal overlap fraction (default 0.1)")
    p.add_argument("--jitter", type=float, default=20.0, help="stage jitter, +- pixels (default 20)")
    p.add_argument("--full", action="store_true", help="10x10 tiles of 2048 px")
    p.add_argument("--skimage-strip-warnings", action="store_true",
                   help="show skimage's float32 overflow warnings (hidden by default)")
    p.add_argument("--memory", action="store_true",
                   help="peak RSS of a stitch task at 3x3 and 7x7 tiles of 1024 px, each in a fresh process")
    p.add_argument("--accuracy", action="store_true",
                   help="placement error vs the synthetic truth on both families (see the module docstring)")
    p.add_argument("--narrow", action="store_true",
                   help="with --accuracy: realistic 12-bit stacks with small overlaps and large stage errors")
    p.add_argument("--seeds", default="0,1,2", help="seeds of --accuracy (default 0,1,2)")
    p.add_argument("--data", type=Path, default=None, help="folder that keeps --accuracy's stacks between runs")
    p.add_argument("--baseline", type=Path, default=None, metavar="DIR",
                   help="with --accuracy: a source tree (holding stackbuild/) to run beside this one")
    p.add_argument("--accuracy-child", type=Path, default=None, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.accuracy_child:
        import json
        print(json.dumps(accuracy_rows(args.accuracy_child)))
        return
    if args.accuracy:
        seeds = [int(v) for v in args.seeds.split(",")]
        if args.data is not None:
            args.data.mkdir(parents=True, exist_ok=True)
            accuracy(args.data, seeds, args.baseline, args.narrow)
        else:
            with tempfile.TemporaryDirectory() as tmp:
                accuracy(Path(tmp), seeds, args.baseline, args.narrow)
        return
    if args.memory:
        memory(1024 if args.tile == 2048 else args.tile)
        return
    n, tile = (10, 2048) if args.full else (args.grid, args.tile)
    settings = StitchSettings()
    if not args.skimage_strip_warnings:
        # skimage's optional error estimate overflows float32 on 16-bit strips; harmless here.
        warnings.filterwarnings("ignore", category=RuntimeWarning, module="skimage")
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        tiles, truth = make_tiles(Path(tmp), n, tile, args.overlap, args.jitter)
        print(f"synthesised {n}x{n} tiles of {tile} px in {time.perf_counter() - t0:.1f} s")
        w0, c0 = time.perf_counter(), time.process_time()
        res = stitch_section(tiles, settings, 0)
        wall, cpu = time.perf_counter() - w0, time.process_time() - c0
        mpx = n * n * tile * tile / 1e6
        pos = np.array([(t.x, t.y) for t in res.tiles])
        err = pos - truth
        err -= err.mean(axis=0)
        err = np.hypot(err[:, 0], err[:, 1])
        print(f"stitch_section: {wall:.2f} s wall, {cpu:.2f} s CPU; {len(res.pairs)} pairs "
              f"({res.stats['pairs_accepted']} accepted)")
        print(f"  {len(res.pairs) / cpu:.1f} pairs per CPU-second ({len(res.pairs) / wall:.1f} pairs/s wall), "
              f"{mpx / cpu:.1f} Mpx of tile area per CPU-second (one core)")
        print(f"  placement error vs truth: rms {np.sqrt(np.mean(err ** 2)):.3f} px, max {err.max():.3f} px")
        t_ours, t_ref, e_ours, e_ref = compare_pairwise(pair_strips(tiles, truth, n), settings)
    k = len(e_ours)
    print(f"pairwise on the same {k} true-overlap strips (upsample 100; best of 3 CPU times):")
    print(f"  ours    phase_correlate        {1e3 * t_ours / k:8.2f} ms/pair  "
          f"error rms {np.sqrt(np.mean(e_ours ** 2)):.3f} px, max {e_ours.max():.3f} px")
    print(f"  skimage phase_cross_correlation {1e3 * t_ref / k:7.2f} ms/pair  "
          f"error rms {np.sqrt(np.mean(e_ref ** 2)):.3f} px, max {e_ref.max():.3f} px")
    print(f"  speed ratio skimage / ours: {t_ref / t_ours:.2f}x")


if __name__ == "__main__":
    main()
