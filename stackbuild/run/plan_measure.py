"""Measure a small build in this process, task by task: what the plan's factors are made from and checked against.

Every stage runs here with one thread: mapped stages through a mapper that
times each task (process CPU time) and takes its memory peak as the larger of
:mod:`tracemalloc`'s (numpy reports its buffers to it: the arrays a task holds
above what the process held before it) and the growth of the resident size
(Linux ``VmHWM`` after ``clear_refs``, which also sees OpenCV's own buffers);
the render graph runs on
dask's synchronous scheduler under a callback that does the same per task.
Work outside tasks is the driver's: its CPU is the stage's CPU minus its
tasks', its memory the peak outside tasks above the stage's start, less what
tasks left behind in this process (caches a worker would keep, not the driver)
but plus the pickled size of the results the driver receives.
"""
from __future__ import annotations

import pickle
import time
import tracemalloc
from pathlib import Path

import numpy as np

#: Task function name -> plan kind.
KIND_OF = {"_stitch_one": "stitch.section", "features_job": "align.features", "pair_job": "align.pair",
           "render_job": "align.render", "block_job": "align.blocks",
           "region_job": "align.region", "solve_block_job": "align.solve", "residual_job": "align.residual", "render_shard": "render.shard",
           "join_shard": "render.join", "range_job": "render.contrast", "probe_pair": "report.probe", "merge_pair_parts": "report.merge",
           "jitter_run": "report.runs",
           "seam_job": "report.seams"}


def status_bytes(field: str, pid: int | str = "self") -> int:
    """Return a ``/proc/<pid>/status`` size field (``VmRSS``, ``VmHWM``) in bytes, or 0 where there is none
    (not Linux, or the process is gone)."""
    try:
        with open(f"/proc/{pid}/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def _reset_resident_peak() -> int:
    """Reset the process's peak resident size to its current size (Linux ``clear_refs``); return that size.

    Resident size sees what tracemalloc does not: buffers OpenCV allocates inside a call
    (a feature detector's scale space, for one). Memory freed by earlier tasks and kept by
    the allocator is reused without growing it, so it is a lower bound too; a task's peak is
    the larger of the two.
    """
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as fh:
            fh.write("5")
    except OSError:
        return 0
    return status_bytes("VmRSS")


class TaskMeter:
    """Per-kind task counts, CPU seconds and memory peaks, and the driver's peak outside tasks."""

    def __init__(self):
        self.kinds: dict[str, dict] = {}
        self._base = 0
        self._outside = 0
        self._cpu0 = 0.0

    def start_stage(self) -> None:
        """Begin a stage: the driver's memory is counted from here."""
        tracemalloc.reset_peak()
        self._base = tracemalloc.get_traced_memory()[0]
        self._outside = 0
        self._cpu0 = time.process_time()
        self._task_cpu = 0.0
        self._left = 0  # bytes tasks left behind in this process, less the results the driver holds

    def _driver_point(self, peak: int) -> None:
        """Note the driver's memory at a peak seen outside tasks."""
        self._outside = max(self._outside, peak - self._base - self._left)

    def _task_done(self, kind: str, cur: int, c0: float, result, rss0: int = 0) -> None:
        cpu = time.process_time() - c0
        self._task_cpu += cpu
        resident = status_bytes("VmHWM") - rss0 if rss0 else 0
        now, peak = tracemalloc.get_traced_memory()
        try:
            sent = len(pickle.dumps(result, protocol=pickle.HIGHEST_PROTOCOL))
        except Exception:  # an unpicklable result would fail on a cluster anyway; count nothing
            sent = 0
        self._left += max(0, now - cur - sent)
        k = self.kinds.setdefault(kind, {"tasks": 0, "cpu_s": 0.0, "peak_bytes": 0, "cpu_max_s": 0.0, "cpu_each": []})
        k["tasks"] += 1
        k["cpu_s"] += cpu
        k["cpu_each"].append(cpu)
        k["cpu_max_s"] = max(k["cpu_max_s"], cpu)
        k["peak_bytes"] = max(k["peak_bytes"], peak - cur, resident)
        tracemalloc.reset_peak()

    def end_stage(self, driver_kind: str) -> None:
        """End a stage: record its driver's CPU (outside tasks) and memory peak."""
        self._driver_point(tracemalloc.get_traced_memory()[1])
        cpu = time.process_time() - self._cpu0 - self._task_cpu
        self.kinds[driver_kind] = {"tasks": 1, "cpu_s": cpu, "peak_bytes": self._outside, "cpu_max_s": cpu,
                                   "cpu_each": [cpu]}

    def run(self, kind: str, fn, *args):
        """Run ``fn(*args)`` as one task of ``kind``; return its result."""
        cur, peak = tracemalloc.get_traced_memory()
        self._driver_point(peak)
        tracemalloc.reset_peak()
        rss0 = _reset_resident_peak()
        c0 = time.process_time()
        result = None
        try:
            result = fn(*args)
            return result
        finally:
            self._task_done(kind, cur, c0, result, rss0)

    def mapper(self, fn, items):
        """A serial mapper that measures every item as one task."""
        kind = KIND_OF.get(fn.__name__, fn.__name__)
        return [self.run(kind, fn, item) for item in items]


def _dask_meter(meter: TaskMeter):
    """Return a dask local-scheduler callback that measures every task (the graph runs synchronously)."""
    from dask.callbacks import Callback

    state = {}

    class _Meter(Callback):
        def _pretask(self, key, dsk, st):
            task = dsk[key]
            fn = getattr(task, "func", None)  # dask's Task objects; older dask keeps (fn, *args) tuples
            if fn is None and isinstance(task, tuple) and task and callable(task[0]):
                fn = task[0]
            name = getattr(fn, "__name__", "")
            if name in KIND_OF:
                cur, peak = tracemalloc.get_traced_memory()
                meter._driver_point(peak)
                tracemalloc.reset_peak()
                rss0 = _reset_resident_peak()
                state[key] = (KIND_OF[name], cur, time.process_time(), rss0)

        def _posttask(self, key, result, dsk, st, worker_id):
            if key in state:  # results stay on workers (quarters handed up), not in the driver
                kind, cur, c0, rss0 = state.pop(key)
                meter._task_done(kind, cur, c0, None, rss0)

    return _Meter()


def _clear_caches() -> None:
    from .. import tiles
    from ..render import lazy

    tiles.TILE_CACHE.clear()
    lazy._RECORDS.clear()


def _measure_stages(meter: TaskMeter, tiles_csv, out, config) -> tuple[dict, dict]:
    """Run every stage of a build under ``meter``; return CPU seconds per stage and the stages that failed."""
    import dask

    from ..manifest import read_tile_manifest
    from . import stages
    from .start import start_build

    cpu, errors = {}, {}
    meter.start_stage()
    c0 = time.process_time()
    read_tile_manifest(tiles_csv)
    meter.end_stage("manifest.driver")
    cpu["manifest"] = time.process_time() - c0
    build = start_build(out, tiles_csv, config=config)
    for name, call in (
            ("stitch", lambda: stages.stitch_stage(build, meter.mapper)),
            ("align", lambda: stages.align_stage(build, meter.mapper)),
            ("render", lambda: stages.render_stage(build)),
            ("report", lambda: stages.report_stage(build, mapper=meter.mapper))):
        _clear_caches()
        meter.start_stage()
        c0 = time.process_time()
        try:
            if name == "render":
                with dask.config.set(scheduler="sync"), _dask_meter(meter):
                    stages.render_stage(build, mapper=meter.mapper)
            else:
                call()
        except Exception as exc:  # a stage that fails is not measured; the rest still are
            errors[name] = f"{type(exc).__name__}: {exc}"
            continue
        meter.end_stage(f"{name}.driver")
        cpu[name] = time.process_time() - c0
    return cpu, errors


def measure_build(tiles_csv: str | Path, out: str | Path, config: str | Path | None = None, *,
                  trace_memory: bool = True) -> dict:
    """Build ``tiles_csv`` into ``out`` in this process, one thread, and return what each kind of task took.

    Parameters
    ----------
    trace_memory : bool
        Trace allocations (:mod:`tracemalloc`) for the memory peaks. Tracing costs CPU in
        Python-heavy code (a section's stitch measured 0.28 s traced against 0.11 s untraced),
        so CPU is best taken from a build measured without it (:func:`fastest` does); an
        untraced build's peaks are the resident size's growth only.

    Returns
    -------
    dict
        ``kinds``: ``{kind: {"tasks", "cpu_s", "cpu_robust_s", "cpu_each", "cpu_max_s", "peak_bytes"}}`` for every task kind
        and driver (``<stage>.driver``); ``stage_cpu_s``: CPU seconds per stage; ``errors``: stages
        that failed (not measured), with their error; ``cpu_traced``: whether CPU was measured under tracing.
    """
    from .plan_speed import one_thread

    # Import every stage first, so no stage's first import is counted as its driver's memory.
    import stackbuild.align.stage  # noqa: F401
    import stackbuild.qc.report  # noqa: F401
    import stackbuild.render.write  # noqa: F401
    import stackbuild.stitch.section  # noqa: F401

    started = tracemalloc.is_tracing()
    if started and not trace_memory:
        raise RuntimeError("measure_build(trace_memory=False) called while tracemalloc is tracing")
    if trace_memory and not started:
        tracemalloc.start()
    meter = TaskMeter()
    try:
        with one_thread():
            cpu, errors = _measure_stages(meter, tiles_csv, out, config)
    finally:
        if trace_memory and not started:
            tracemalloc.stop()
    for k in meter.kinds.values():
        # The median task's CPU times the tasks: a robust total on a shared machine, where a
        # task now and then stalls on memory bandwidth or caches other processes evict.
        k["cpu_robust_s"] = float(np.median(k["cpu_each"])) * k["tasks"]
    return {"kinds": meter.kinds, "stage_cpu_s": cpu, "errors": errors, "cpu_traced": trace_memory}


_CPU_KEYS = ("cpu_s", "cpu_robust_s", "cpu_max_s")


def fastest(*runs: dict) -> dict:
    """Return one measurement from several of the same build: per kind the least CPU and the largest peak.

    Other work on a shared machine only ever adds CPU time (caches and memory bandwidth taken
    away), so the least of a few runs is the closest to the build's own cost. CPU comes from the
    runs measured without tracing where there are any (tracing adds its own CPU).
    """
    any_untraced = any(not r.get("cpu_traced", True) for r in runs)
    out = {"kinds": {}, "errors": {}, "stage_cpu_s": {}}
    for run in runs:
        timed = not (any_untraced and run.get("cpu_traced", True))
        out["errors"].update(run["errors"])
        for name, k in run["kinds"].items():
            have = out["kinds"].setdefault(name, {**k, **dict.fromkeys(_CPU_KEYS, float("inf")), "peak_bytes": 0})
            have["peak_bytes"] = max(have["peak_bytes"], k["peak_bytes"])
            if timed:
                for key in _CPU_KEYS:
                    have[key] = min(have[key], k[key])
                have["cpu_each"] = k["cpu_each"]
        if timed:
            for stage, cpu in run["stage_cpu_s"].items():
                out["stage_cpu_s"][stage] = min(cpu, out["stage_cpu_s"].get(stage, cpu))
    return out


def median_of(*measurements: dict) -> dict:
    """Return one measurement from several independent ones (each from :func:`fastest`): per kind the
    median CPU and the largest peak.

    The least of a few builds run back to back removes another job's burst, not a slow spell of the
    whole machine lasting minutes (a virtual machine's neighbours): two calibrations minutes apart on a
    quiet machine measured every kind 1.3-1.7x apart. Calibrations taken one after another and reduced
    by their median are steadier.
    """
    out = {"kinds": {}, "errors": {}, "stage_cpu_s": {}}
    for m in measurements:
        out["errors"].update(m["errors"])
    for name in measurements[0]["kinds"]:
        got = [m["kinds"][name] for m in measurements if name in m["kinds"]]
        k = {**got[0], "peak_bytes": max(g["peak_bytes"] for g in got)}
        for key in _CPU_KEYS:
            k[key] = float(np.median([g[key] for g in got]))
        out["kinds"][name] = k
    for stage in measurements[0]["stage_cpu_s"]:
        out["stage_cpu_s"][stage] = float(np.median([m["stage_cpu_s"][stage] for m in measurements
                                                     if stage in m["stage_cpu_s"]]))
    return out
