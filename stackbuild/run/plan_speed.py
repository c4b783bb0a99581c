"""This machine's speed against the one the plan's rates were measured on.

The plan's CPU figures come from a calibration build on one machine
(``plan_rates.json``). Another machine, or the same kind of machine with a
slower core, does the same work in a different time. A fixed reference workload,
timed on both, gives the factor: CPU seconds here over CPU seconds there. The
workload mixes what the stages spend their time on (FFT cross-power spectra as
in phase correlation and block matching, a remap through a displacement field
as in render, 2 x 2 area reduction as in the pyramid, Blosc-zstd compression as
in the writer, and a loop of small Python objects as in the drivers), on
fixed, seeded data, one thread.
"""
from __future__ import annotations

import contextlib
import time

import numpy as np


def _workload(image: np.ndarray) -> float:
    """Run the reference workload once on ``image``; return a number that depends on all of it."""
    import cv2
    from numcodecs import Blosc

    f = image.astype(np.float32)
    spectrum = np.fft.rfft2(f)
    cross = spectrum * np.conj(np.fft.rfft2(np.roll(f, (3, 5), axis=(0, 1))))
    peak = np.fft.irfft2(cross / (np.abs(cross) + 1e-6), s=f.shape)
    h, w = f.shape
    gy, gx = np.mgrid[0:h, 0:w].astype(np.float32)
    warped = cv2.remap(f, gx + 0.3 * np.sin(gy / 50), gy + 0.3 * np.cos(gx / 70), cv2.INTER_LINEAR)
    half = cv2.resize(warped, (w // 2, h // 2), interpolation=cv2.INTER_AREA)
    packed = Blosc(cname="zstd", clevel=3, shuffle=Blosc.BITSHUFFLE).encode(warped.astype(np.uint8))
    rows = [{"y": i, "x": j, "v": float(i * j)} for i in range(0, h, 8) for j in range(0, w, 64)]
    return float(peak.max()) + float(half.mean()) + len(packed) + sum(r["v"] for r in rows)


def reference_cpu_seconds(repeats: int = 12, size: int = 1024) -> float:
    """Return the least CPU time of ``repeats`` runs of the reference workload in this thread (one thread).

    Thread CPU time, not the process's: background threads (zarr's I/O loop, a thread pool left by a
    build) would otherwise add their time.

    The least of several runs: other work on a shared machine only ever adds time.
    """
    import cv2

    image = np.random.default_rng(0).integers(0, 256, (size, size), dtype=np.uint8)
    try:  # one BLAS thread where threadpoolctl is installed (the test extras have it)
        from threadpoolctl import threadpool_limits
        one_thread = threadpool_limits(limits=1)
    except ImportError:  # pragma: no cover
        one_thread = contextlib.nullcontext()
    threads = cv2.getNumThreads()
    cv2.setNumThreads(1)
    best = float("inf")
    try:
        with one_thread:
            _workload(image)  # warm-up: imports, FFT plans, first-touch pages
            for _ in range(repeats):
                c0 = time.thread_time()
                _workload(image)
                best = min(best, time.thread_time() - c0)
    finally:
        cv2.setNumThreads(threads)
    return best


def speed_factor(rates: dict, here_seconds: float | None = None) -> float:
    """Return CPU seconds here over CPU seconds on the calibration machine (1.0 when it is not known).

    Parameters
    ----------
    rates : dict
        The plan's rates document; its ``reference_cpu_s`` is the workload's time at calibration.
    here_seconds : float, optional
        The workload's time on this machine; measured now when not given.
    """
    there = rates.get("reference_cpu_s")
    if not there:
        return 1.0
    here = reference_cpu_seconds() if here_seconds is None else here_seconds
    return here / there
