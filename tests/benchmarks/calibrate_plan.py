"""Measure the plan's per-task factors on this machine and write stackbuild/run/plan_rates.json.

Synthesises two small stacks (the project's invented phantom), builds each
three times in one process with one thread (and all that ``--runs`` times, one
calibration after another, keeping the median of each measurement)
(:func:`stackbuild.run.plan_measure.measure_build`): memory traced in one
build, CPU the least of the two others, untraced (tracing costs CPU); and for every kind of task fits a line through the two measurements against
what the plan's model says that task holds and does at each shape: memory =
fixed + slope x modelled bytes (tracemalloc peak, minus the model's cache), CPU
per task = fixed + slope x modelled work. Two sizes, so per-task start-up costs
do not scale up with the volume.

Also measured: the CPU time of each part of the reference workload
(:mod:`stackbuild.run.plan_speed`), so a plan can be scaled to another machine; the memory of an idle worker process (a fresh interpreter that
imports what a worker imports; its resident size) and the compression ratio of the
written level 0 with the default codec.

    python tests/benchmarks/calibrate_plan.py                # 3 x (3 x 3 x 384 px) and 4 x (2 x 2 x 1024 px)
    python tests/benchmarks/calibrate_plan.py --small 3,2,512 --large 5,4,1024 --dry-run
"""
from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from stackbuild.config import PipelineConfig  # noqa: E402
from stackbuild.run.plan import RATES_PATH  # noqa: E402
from stackbuild.run.plan_measure import median_of  # noqa: E402
from stackbuild.run.plan_models import STAGES  # noqa: E402
from stackbuild.run.plan_speed import reference_cpu_parts  # noqa: E402
from stackbuild.run.plan_shape import VolumeShape  # noqa: E402
from stackbuild.synth import SynthParams, generate  # noqa: E402

# Resident memory after the imports (psutil), not ru_maxrss: Linux carries a forked child's
# maxrss over from its parent, so the child would report this script's own peak.
WORKER_IMPORTS = ("import psutil, numpy, cv2, dask, distributed, zarr, stackbuild.render.write, "
                  "stackbuild.align.stage, stackbuild.stitch.section; "
                  "print(psutil.Process().memory_info().rss)")


def machine() -> str:
    """Return a one-line description of this machine."""
    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
        mem = next(int(line.split()[1]) for line in Path("/proc/meminfo").read_text().splitlines()
                   if line.startswith("MemTotal"))
    except (OSError, StopIteration):
        mem = 0
    return (f"{os.cpu_count()} cores ({model or platform.processor()}), {mem / 2 ** 20:.0f} GiB RAM, "
            f"{platform.system()} {platform.release()}, Python {platform.python_version()}; shared with other work")


def stored_ratio(volume: Path) -> float:
    """Return raw bytes / stored bytes of level 0 of the written EM pyramid."""
    import zarr

    arr = zarr.open_array(str(volume / "em" / "0"), mode="r")
    raw = arr.nbytes
    stored = sum(p.stat().st_size for p in (volume / "em" / "0").rglob("*") if p.is_file() and p.name != "zarr.json")
    return raw / max(1, stored)


def _line(x1: float, y1: float, x2: float, y2: float, flat_slope: float | None) -> tuple[float, float]:
    """Return ``(intercept, slope)`` of a line through two measurements ``(x, y)``.

    When the two sizes do not differ enough in ``x`` (1.5x) or ``y`` does not grow with it,
    the cost is taken as fixed at the larger measurement, plus ``flat_slope`` per unit of ``x``
    (1 for memory: the modelled bytes at face value; 0 for a driver's CPU); with ``flat_slope``
    None, the cost is proportional to ``x`` at the larger of the two rates.
    """
    (xa, ya), (xb, yb) = sorted([(x1, y1), (x2, y2)])
    if xb > 1.5 * xa and yb > ya:
        slope = (yb - ya) / (xb - xa)
        return max(0.0, yb - slope * xb), slope
    if flat_slope is None:  # proportional: the larger measurement's cost per unit
        return 0.0, max(ya / max(xa, 1e-12), yb / max(xb, 1e-12)) if xb > 0 else 0.0
    return max(ya, yb), flat_slope


def _two_terms(k1, c1: float, k2, c2: float) -> tuple[float, float] | None:
    """Return ``(per work, per item)`` solving CPU = work x a + items x b at both sizes, if both are positive."""
    if not (k1.items and k2.items):
        return None
    det = k1.work * k2.items - k2.work * k1.items
    if abs(det) < 1e-12:
        return None
    a = (c1 * k2.items - c2 * k1.items) / det
    b = (k1.work * c2 - k2.work * c1) / det
    return (a, b) if a > 0 and b > 0 else None


def factors(small: dict, large: dict, shapes: tuple, cfg) -> dict:
    """Return per kind the fixed part and the slope of memory and CPU, fitted through two measured builds.

    Memory of a task = ``memory_fixed_bytes + memory_per_held * held`` (plus the model's fixed cache);
    CPU of a task = ``cpu_fixed_s + cpu_s_per_work * work``.
    """
    out = {}
    for name, fn in STAGES.items():
        for k1, k2 in zip(fn(shapes[0], cfg), fn(shapes[1], cfg)):
            m1, m2 = small["kinds"].get(k1.name), large["kinds"].get(k2.name)
            if m1 is None or m2 is None or not m1["tasks"] or not m2["tasks"]:
                continue
            # Without a clear line: a driver's memory is fixed plus the modelled bytes at face value,
            # a task's is proportional to what the model says it holds (at the larger measured ratio).
            mem_a, mem_b = _line(k1.held, max(0.0, m1["peak_bytes"] - k1.fixed),
                                 k2.held, max(0.0, m2["peak_bytes"] - k2.fixed), 1.0 if k1.driver else None)
            c1, c2 = m1["cpu_robust_s"] / m1["tasks"], m2["cpu_robust_s"] / m2["tasks"]  # median task
            per_item = _two_terms(k1, c1, k2, c2)
            if per_item is not None:  # CPU = work x rate + items x rate, no fixed part
                cpu_a, cpu_b, cpu_c = 0.0, per_item[0], per_item[1]
            elif k1.driver:  # a driver's CPU that does not grow measurably is taken as fixed
                (cpu_a, cpu_b), cpu_c = _line(k1.work, c1, k2.work, c2, 0.0), 0.0
            else:  # a task's CPU grows with its pixels: without a clear line, proportional to the larger
                (cpu_a, cpu_b), cpu_c = _line(k1.work, c1, k2.work, c2, None), 0.0
            out[k1.name] = {
                "memory_fixed_bytes": round(mem_a), "memory_per_held": round(mem_b, 4),
                "cpu_fixed_s": round(cpu_a, 5), "cpu_s_per_work": cpu_b, "cpu_s_per_item": cpu_c,
                "measured": [{"tasks": m["tasks"], "modelled_tasks": k.count, "held_mb": round(k.held / 1e6, 3),
                              "peak_mb": round(m["peak_bytes"] / 1e6, 3), "work": round(k.work, 4),
                              "items": k.items, "cpu_s": round(m["cpu_s"], 3),
                              "cpu_median_task_s": round(m["cpu_robust_s"] / m["tasks"], 4)}
                             for m, k in ((m1, k1), (m2, k2))]}
    return out


def refit(doc: dict, cfg) -> dict:
    """Return new factors from the measurements kept in a rates document (no build is run).

    For a change of the models (what a task is said to hold or do) that needs no new measurement.
    """
    shapes = tuple(VolumeShape(**{k: v for k, v in sh.items() if k in VolumeShape.__dataclass_fields__})
                   for sh in doc["calibration_shapes"])
    runs = ({"kinds": {}}, {"kinds": {}})
    for name, entry in doc["kinds"].items():
        for run, m in zip(runs, entry.get("measured", [])):
            run["kinds"][name] = {"tasks": m["tasks"], "peak_bytes": m["peak_mb"] * 1e6,
                                  "cpu_robust_s": m["cpu_median_task_s"] * m["tasks"], "cpu_s": m["cpu_s"]}
    return factors(runs[0], runs[1], shapes, cfg)


def measure_size(tmp: Path, name: str, sections: int, grid: int, tile: int,
                 config: Path | None = None) -> tuple[dict, VolumeShape, Path]:
    """Synthesise and build one size in a fresh process; return the measurements, the shape and the build folder.

    A fresh process for each size, so neither build pays (or skips) first-call costs for the other.
    ``config``: a settings file for the builds (the defaults if None).
    """
    params = SynthParams(seed=5, sections=sections, grid=(grid, grid), tile_size=tile, channels=0, compress=False)
    tiles = tmp / f"data-{sections}-{grid}-{tile}" / "tiles.csv"
    if not tiles.exists():
        tiles = generate(tiles.parent, params)
    out = tmp / f"measured-{name}.json"
    code = ("import json, sys; from stackbuild.run.plan_measure import fastest, measure_build; "
            "cfg = sys.argv[4] or None; "
            "m = fastest(measure_build(sys.argv[1], sys.argv[2] + '0', cfg), "
            "*(measure_build(sys.argv[1], sys.argv[2] + str(i), cfg, trace_memory=False) for i in (1, 2))); "
            "open(sys.argv[3], 'w').write(json.dumps(m))")  # memory from a traced build, CPU the least of two untraced
    subprocess.run([sys.executable, "-c", code, str(tiles), str(tmp / f"build-{name}"), str(out),
                    str(config or "")], check=True, cwd=str(REPO))
    measured = json.loads(out.read_text())
    for stage, err in measured["errors"].items():
        print(f"NOT MEASURED ({name}): {stage} failed: {err}", file=sys.stderr)
    return measured, VolumeShape.from_manifest(tiles), tmp / f"build-{name}1"


#: Settings under which the larger size is built again, for kinds the two sizes cannot calibrate:
#: the align driver's bookkeeping grows with node blocks x sections, and both sizes fit in one block
#: of the default 16 x 16 nodes (4 x 4 nodes: 16 blocks); the report's merge task joins the part files
#: of a plane's regions, and both sizes fit in one region of the default 2048 px (512 px: 4 tasks).
PROBES = {"align.driver": "[align]\nregion_nodes = 4\n",
          "report.merge": "[report]\nregion_size = 512\n"}


def probe_kinds(tmp: Path, large: dict, shape, size: tuple, cfg) -> dict:
    """Return new factors for the kinds of :data:`PROBES`, from the larger size built again under the
    probe's settings.

    A kind measured at both settings gets its CPU line through the two (its memory stays as the
    two sizes fitted it); a kind only the probe runs is taken as proportional to its modelled bytes
    and work, at the probe's measured ratios.
    """
    from stackbuild.config import load_config

    out = {}
    for kind, toml in PROBES.items():
        path = tmp / f"probe-{kind}.toml"
        path.write_text(toml, encoding="utf-8")
        probed, _, _ = measure_size(tmp, f"probe-{kind}", *size, config=path)
        stage = kind.split(".")[0]
        k2 = next((k for k in STAGES[stage](shape, load_config(path)) if k.name == kind), None)
        m1, m2 = large["kinds"].get(kind), probed["kinds"].get(kind)
        if k2 is None or m2 is None or not m2["tasks"]:
            continue
        c2 = m2["cpu_robust_s"] / m2["tasks"]
        entry = {"probe": {"settings": toml.strip(), "tasks": m2["tasks"], "modelled_tasks": k2.count,
                           "work": round(k2.work, 4), "cpu_median_task_s": round(c2, 4),
                           "peak_mb": round(m2["peak_bytes"] / 1e6, 3), "held_mb": round(k2.held / 1e6, 3)}}
        k1 = next((k for k in STAGES[stage](shape, cfg) if k.name == kind), None)
        if k1 is not None and m1 is not None and m1["tasks"]:
            c1 = m1["cpu_robust_s"] / m1["tasks"]
            fixed, slope = _line(k1.work, c1, k2.work, c2, 0.0 if k1.driver else None)
            entry.update(cpu_fixed_s=round(fixed, 5), cpu_s_per_work=slope)
            entry["probe"]["default_work_cpu_s"] = [round(k1.work, 4), round(c1, 4)]
        else:
            entry.update(cpu_fixed_s=0.0, cpu_s_per_work=c2 / max(k2.work, 1e-12), cpu_s_per_item=0.0,
                         memory_fixed_bytes=0,
                         memory_per_held=round(max(0.0, m2["peak_bytes"] - k2.fixed) / max(k2.held, 1.0), 4))
        out[kind] = entry
    return out


def _disagreements(small: list, large: list, max_spread: float) -> list[str]:
    """Return one line per size and stage whose CPU differs by more than ``max_spread`` between runs.

    Two calibrations 15 minutes apart on a shared 2-core machine once put the production render at 85
    and 116 CPU-hours; the plan's test against a measured build then read its render check at 1.8x
    and 2.3-3.2x of its 2x bar. Rates from runs that disagree that much are not worth writing.
    """
    out = []
    for name, runs in (("small", small), ("large", large)):
        for stage in runs[0]["stage_cpu_s"]:
            cpu = [m["stage_cpu_s"].get(stage, 0.0) for m in runs]
            if min(cpu) > 0 and max(cpu) / min(cpu) > max_spread:
                out.append(f"{name} build, {stage}: CPU {' / '.join(f'{c:.2f}' for c in cpu)} s across runs "
                           f"({max(cpu) / min(cpu):.2f}x, more than {max_spread}x)")
    return out


def _size(text: str) -> tuple[int, int, int]:
    sections, grid, tile = (int(v) for v in text.split(","))
    return sections, grid, tile


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", type=_size, default=(3, 3, 384), metavar="S,G,T",
                    help="smaller build: sections, tiles per side, tile side (default 3,3,384)")
    ap.add_argument("--large", type=_size, default=(4, 2, 1024), metavar="S,G,T",
                    help="larger build (default 4,2,1024)")
    ap.add_argument("--runs", type=int, default=3, metavar="N",
                    help="calibrate N times, one after the other, and fit the median of each measurement "
                         "(default 3; one calibration takes about 2 minutes on 2 cores)")
    ap.add_argument("--dry-run", action="store_true", help="print, do not write plan_rates.json")
    ap.add_argument("--max-spread", type=float, default=1.3, metavar="X",
                    help="refuse to write plan_rates.json when a stage's CPU differs by more than this factor "
                         "between the runs of one size (a busy machine; default 1.3)")
    ap.add_argument("--force", action="store_true", help="write plan_rates.json even when the runs disagree")
    ap.add_argument("--refit", action="store_true",
                    help="no builds: refit the factors from the measurements kept in plan_rates.json")
    ap.add_argument("--commit", default="",
                    help="the code's commit, for a run outside a git checkout (a git archive); default: git's HEAD")
    args = ap.parse_args(argv)
    cfg = PipelineConfig()
    if args.refit:
        doc = json.loads(RATES_PATH.read_text(encoding="utf-8"))
        kept = {k: v for k, v in doc["kinds"].items() if "probe" in v}
        doc["kinds"].update(refit(doc, cfg))
        for name, entry in kept.items():  # a probed kind's factors come from its probe, not the two sizes
            doc["kinds"].setdefault(name, {}).update(entry)
        doc["how"] = doc["how"].rstrip(".") + "; factors refitted from the kept measurements (--refit)"
        text = json.dumps(doc, indent=1) + "\n"
        print(text)
        if not args.dry_run:
            RATES_PATH.write_text(text, encoding="utf-8")
        return
    with tempfile.TemporaryDirectory(prefix="calibrate_plan_") as tmp:
        tmp = Path(tmp)
        small, large = [], []
        for i in range(args.runs):  # one size after the other, so a slow spell meets both
            m, shape1, _ = measure_size(tmp, f"small-{i}", *args.small)
            small.append(m)
            m, shape2, folder = measure_size(tmp, f"large-{i}", *args.large)
            large.append(m)
        noisy = _disagreements(small, large, args.max_spread)
        small, large = median_of(*small), median_of(*large)
        ratio = stored_ratio(folder / "volume.zarr")
        kinds = factors(small, large, (shape1, shape2), cfg)
        for kind, probed in probe_kinds(tmp, large, shape2, args.large, cfg).items():
            kinds.setdefault(kind, {}).update(probed)
    runs = [reference_cpu_parts() for _ in range(3)]
    parts = {name: min(r[name] for r in runs) for name in runs[0]}  # the least: other work only adds time
    baseline = int(subprocess.run([sys.executable, "-c", WORKER_IMPORTS], capture_output=True, text=True,
                                  check=True).stdout.strip())
    commit = args.commit or subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"], capture_output=True,
                            text=True).stdout.strip() or "unknown (not a git checkout)"
    doc = {
        "format": "stackbuild.plan-rates", "version": 1,
        "measured": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "machine": machine(), "commit": commit,
        "how": ("tests/benchmarks/calibrate_plan.py: two synthetic stacks (sections, tiles per side, tile px: "
                f"{args.small} and {args.large}) built in one process, one thread, three times; per task: "
                "process CPU time (the least of two builds without allocation tracing; the median of "
                f"{args.runs} such calibrations run one after another) and the "
                "tracemalloc peak above the task's start (a third, traced build); per kind a line (fixed + slope) "
                "through the two, against what stackbuild/run/plan_models.py says the task holds and does; "
                "a kind the two sizes cannot calibrate (PROBES) gets its factors from the larger size built "
                "again under settings that change its work"),
        "calibration_shapes": [shape1.to_json(), shape2.to_json()],
        "reference_cpu_s": round(sum(parts.values()), 5),
        "reference_parts_s": {name: round(t, 5) for name, t in parts.items()},
        "worker_baseline_bytes": baseline, "driver_baseline_bytes": baseline,
        "compression_ratio": {f"{cfg.render.codec} level {cfg.render.clevel}": round(ratio, 3)},
        "kinds": kinds,
        "stage_cpu_s": [{k: round(v, 3) for k, v in m["stage_cpu_s"].items()} for m in (small, large)],
        "not_measured": {**large["errors"], **small["errors"]},
    }
    try:  # a kind this run could not measure (its stage failed) keeps its last measurement, marked so
        old = json.loads(RATES_PATH.read_text(encoding="utf-8"))
        for name, entry in old.get("kinds", {}).items():
            if name not in doc["kinds"]:
                doc["kinds"][name] = {**entry, "carried_from": entry.get("carried_from", old.get("measured"))}
    except (OSError, ValueError):
        pass
    text = json.dumps(doc, indent=1) + "\n"
    print(text)
    for line in noisy:
        print(f"runs disagree: {line}")
    if noisy and not args.force:
        print("not written: the machine was too busy for rates worth keeping (--force writes them anyway)")
    elif not args.dry_run:
        RATES_PATH.write_text(text, encoding="utf-8")
        print(f"wrote {RATES_PATH}")


if __name__ == "__main__":
    main()
