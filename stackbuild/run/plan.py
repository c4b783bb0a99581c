"""The plan of a build before it starts: tasks, memory, CPU, bytes and wall time per stage.

Nothing is read but the tile manifest's CSV and one tile header (or nothing at
all for a described size), and nothing is written. Each stage's task graph is
counted by :mod:`stackbuild.run.plan_models` from the same sizes and settings
the stage uses; memory and CPU come from factors measured on a small build of
this machine and kept in ``plan_rates.json`` beside this module (date, machine,
code version and method inside; ``tests/benchmarks/calibrate_plan.py`` remakes it).

A task is *bounded* when its memory stays under :data:`TASK_LIMIT` and the
driver's under :data:`DRIVER_LIMIT`; a stage that is not says so and names the
kind of task that grows with the section.
"""
from __future__ import annotations

import json
from pathlib import Path

from .plan_models import STAGES, Kind, output_layout
from .plan_shape import VolumeShape

RATES_PATH = Path(__file__).with_name("plan_rates.json")
#: Largest memory of one task, and of the driver, that a production build may need (bytes).
TASK_LIMIT = 4e9
DRIVER_LIMIT = 8e9
MB = 1e6
#: The scheduler's own time per task, serial whatever the cores: Dask's documentation puts it
#: "somewhere between 200us and 1ms" (docs.dask.org, Dask Best Practices, "Avoid Very Large
#: Graphs"); the plan takes the upper end, as a graph of hundreds of thousands of tasks is large.
SCHEDULER_S_PER_TASK = 1e-3


def load_rates(path: str | Path | None = None) -> dict:
    """Return the measured rates document (see ``tests/benchmarks/calibrate_plan.py``)."""
    path = Path(path) if path else RATES_PATH
    doc = json.loads(path.read_text(encoding="utf-8"))
    if doc.get("format") != "stackbuild.plan-rates":
        raise ValueError(f"{path} is not a plan rates file")
    return doc


def _apply(kind: Kind, rates: dict, baseline: float, speed: float) -> dict:
    """Return one kind's figures: factors applied to what it holds and does, CPU scaled by ``speed``."""
    r = rates["kinds"].get(kind.name)
    if r is None:  # not measured: the modelled arrays alone, no CPU
        r, measured = {"memory_fixed_bytes": 0, "memory_per_held": 1.0, "cpu_fixed_s": 0.0,
                       "cpu_s_per_work": 0.0}, False
    else:
        measured = True
    working = r["memory_fixed_bytes"] + kind.held * r["memory_per_held"] + kind.fixed
    each = speed * max(0.0, r["cpu_fixed_s"] + kind.work * r["cpu_s_per_work"]
                       + kind.items * r.get("cpu_s_per_item", 0.0))
    return {"kind": kind.name, "tasks": kind.count, "working_bytes": working,
            "memory_bytes": working + (0 if kind.driver else baseline),
            "cpu_seconds_each": each, "cpu_seconds": kind.count * each,
            "bytes_read": kind.count * kind.reads, "bytes_written": kind.count * kind.writes,
            "driver": kind.driver, "measured": measured, "note": kind.note}


def plan_stage(name: str, kinds: list[Kind], rates: dict, cores: int, speed: float = 1.0) -> dict:
    """Return a stage's plan: its kinds, task and driver memory, CPU, bytes and wall time on ``cores``."""
    baseline = rates.get("worker_baseline_bytes", 0.0)
    rows = [_apply(k, rates, baseline, speed) for k in kinds if k.count > 0]
    tasks = [r for r in rows if not r["driver"]]
    drivers = [r for r in rows if r["driver"]]
    task_mem = max((r["memory_bytes"] for r in tasks), default=0.0)
    driver_mem = max((r["memory_bytes"] for r in drivers), default=0.0) + rates.get("driver_baseline_bytes", 0.0)
    # Each kind is a phase of the stage: its tasks spread over the cores, but no phase is
    # shorter than its longest task; driver work is serial.
    wall = sum(max(r["cpu_seconds"] / max(1, min(cores, r["tasks"])), r["cpu_seconds_each"]) if not r["driver"]
               else r["cpu_seconds"] for r in rows)
    scheduler = sum(r["tasks"] for r in tasks) * SCHEDULER_S_PER_TASK
    wall += scheduler
    worst = max(tasks, key=lambda r: r["memory_bytes"], default=None)
    over = [r for r in tasks if r["memory_bytes"] > TASK_LIMIT] + \
        [r for r in drivers if r["memory_bytes"] > DRIVER_LIMIT]
    return {
        "tasks": sum(r["tasks"] for r in tasks),
        "task_memory_mb": task_mem / MB,
        "driver_memory_mb": driver_mem / MB,
        "cpu_hours": sum(r["cpu_seconds"] for r in rows) / 3600.0,
        "bytes_read": sum(r["bytes_read"] for r in rows),
        "bytes_written": sum(r["bytes_written"] for r in rows),
        "wall_hours": wall / 3600.0,
        "scheduler_hours": scheduler / 3600.0,
        "bounded": not over,
        "largest_task": worst["kind"] if worst else None,
        "unbounded": [f"{r['kind']}: {r['memory_bytes'] / 1e9:.1f} GB ({r['note'] or 'grows with the volume'})"
                      for r in over],
        "unmeasured": [r["kind"] for r in rows if not r["measured"]],
        "kinds": {r["kind"]: {k: v for k, v in r.items() if k != "kind"} for r in rows},
    }


def make_plan(shape: VolumeShape, cfg, *, cores: int = 2, rates: dict | None = None,
              speed: float | dict = 1.0) -> dict:
    """Return the whole plan of a build of ``shape`` with settings ``cfg`` on ``cores`` cores.

    ``speed`` scales the CPU figures: a core's CPU seconds for a fixed workload over the
    calibration machine's, one factor for all stages or one per stage
    (:func:`stackbuild.run.plan_speed.speed_factors`; 1.0 = as measured there).

    Returns
    -------
    dict
        ``shape``; ``stages.<name>`` with ``tasks``, ``task_memory_mb``, ``driver_memory_mb``,
        ``cpu_hours``, ``bytes_read``, ``bytes_written``, ``wall_hours`` (with ``scheduler_hours``, the
        scheduler's time per task), ``bounded``, ``unbounded``;
        ``output_bytes``, ``output_files``, ``output`` (levels, shards, codec, ratio);
        ``cpu_hours``, ``wall_hours`` (on ``cores``), ``bounded``; ``rates`` (where the factors come from);
        ``speed_factors`` (per stage).
    """
    if cores < 1:
        raise ValueError(f"cores must be >= 1, got {cores}")
    rates = rates or load_rates()
    factors = speed if isinstance(speed, dict) else dict.fromkeys(STAGES, speed)
    for name, f in factors.items():
        if not f > 0:
            raise ValueError(f"speed must be > 0, got {f} for {name}")
    stages = {name: plan_stage(name, fn(shape, cfg), rates, cores, factors.get(name, 1.0))
              for name, fn in STAGES.items()}
    out = output_layout(shape, cfg)
    codec = f"{cfg.render.codec}" + ("" if cfg.render.codec == "none" else f" level {cfg.render.clevel}")
    ratio = rates.get("compression_ratio", {}).get(codec, 1.0) if cfg.render.codec != "none" else 1.0
    out_bytes = out["raw_bytes"] / ratio
    stages["render"]["bytes_written"] += out_bytes
    return {
        "shape": shape.to_json(),
        "cores": cores,
        "stages": stages,
        "output_bytes": out_bytes,
        "output_files": out["shards"] + out["metadata_files"],
        "output": {**out, "codec": codec, "compression_ratio": ratio},
        "cpu_hours": sum(s["cpu_hours"] for s in stages.values()),
        "wall_hours": sum(s["wall_hours"] for s in stages.values()),
        "bounded": all(s["bounded"] for s in stages.values()),
        "limits": {"task_memory_mb": TASK_LIMIT / MB, "driver_memory_mb": DRIVER_LIMIT / MB},
        "rates": {k: rates.get(k) for k in ("measured", "machine", "commit", "how")},
        "speed_factors": {name: factors.get(name, 1.0) for name in STAGES},
    }


def _size(n: float) -> str:
    for unit, f in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= f:
            return f"{n / f:.1f} {unit}"
    return f"{n:.0f} B"


def _hours(h: float) -> str:
    return f"{h * 60:.1f} min" if h < 1 else f"{h:.1f} h"


def plan_text(plan: dict) -> str:
    """Return the plan as a table for a terminal."""
    sh = plan["shape"]
    lines = [f"volume: {sh['planes']} planes ({sh['imaged']} imaged), {sh['tiles']} tiles of "
             f"{sh['tile_width']} x {sh['tile_height']} px ({8 * sh['itemsize']}-bit), largest section "
             f"{sh['rows']} x {sh['cols']} tiles = {sh['section_width']} x {sh['section_height']} px",
             "",
             f"{'stage':<9}{'tasks':>10}{'task mem':>11}{'driver mem':>12}{'CPU':>10}{'read':>10}"
             f"{'written':>10}{'wall':>10}  bounded"]
    for name, s in plan["stages"].items():
        lines.append(f"{name:<9}{s['tasks']:>10}{_size(s['task_memory_mb'] * MB):>11}"
                     f"{_size(s['driver_memory_mb'] * MB):>12}{_hours(s['cpu_hours']):>10}"
                     f"{_size(s['bytes_read']):>10}{_size(s['bytes_written']):>10}{_hours(s['wall_hours']):>10}"
                     f"  {'yes' if s['bounded'] else 'NO'}")
    lines.append(f"{'total':<9}{'':>10}{'':>11}{'':>12}{_hours(plan['cpu_hours']):>10}{'':>10}{'':>10}"
                 f"{_hours(plan['wall_hours']):>10}  (wall on {plan['cores']} cores)")
    o = plan["output"]
    lines += ["", f"output: {_size(plan['output_bytes'])} ({o['codec']}, ratio {o['compression_ratio']:.2f} as "
                  f"measured on the synthetic calibration build), {o['levels']} levels, {plan['output_files']} files "
                  f"({o['shards']} shards of {o['shard_edge_px']} px, chunks of {o['chunk_edge_px']} px)"]
    sched = sum(s["scheduler_hours"] for s in plan["stages"].values())
    lines.append(f"wall time includes the scheduler's {SCHEDULER_S_PER_TASK * 1e3:.0f} ms per task "
                 f"(Dask's documented upper end): {_hours(sched)} in all")
    shard = plan["stages"]["render"]["kinds"].get("render.shard")
    if shard:
        lines.append(f"render: {shard['note']}")
    limits = plan["limits"]
    for name, s in plan["stages"].items():
        for line in s["unbounded"]:
            lines.append(f"over the limit ({_size(limits['task_memory_mb'] * MB)} per task, "
                         f"{_size(limits['driver_memory_mb'] * MB)} driver) in {name}: {line}")
        if s["unmeasured"]:
            lines.append(f"{name}: no measured rate for {', '.join(s['unmeasured'])} (CPU counted as 0)")
    r = plan["rates"]
    lines.append(f"rates measured {r['measured']} on {r['machine']} (code {r['commit']})")
    factors = plan["speed_factors"]
    if all(f == 1.0 for f in factors.values()):
        lines.append("CPU and wall time as on that machine (--this-machine scales them to this one)")
    else:
        each = ", ".join(f"{name} {f:.2f}x" for name, f in factors.items())
        lines.append(f"CPU and wall time scaled to this machine, per stage its time over the calibration "
                     f"machine's for the same reference workload: {each}")
    return "\n".join(lines)
