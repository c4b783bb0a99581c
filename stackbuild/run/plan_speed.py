"""This machine's speed against the one the plan's rates were measured on, per kind of work.

The plan's CPU figures come from a calibration build on one machine
(``plan_rates.json``). Another machine, or the same kind of machine with a
slower core, does the same work in a different time, and not by one factor:
machines differ more in FFTs than in remaps, say (a CI machine did the whole
reference workload 1.4x slower than the calibration machine but rendered only
1.1x slower). So the reference workload is timed in parts, each what some
stages spend their time on: FFT cross-power spectra (phase correlation, block
matching), a remap through a displacement field (render, align's regions), 2 x 2
area reduction (the pyramid), Blosc-zstd compression (the writer) and a loop of
small Python objects (the drivers), on fixed, seeded data, one thread. A stage's
factor is the time of its parts here over their time there.
"""
from __future__ import annotations

import contextlib
import time

import numpy as np

#: The reference workload's parts each stage's factor is made of.
STAGE_PARTS = {
    "manifest": ("python",),
    "stitch": ("fft", "python"),
    "align": ("fft", "remap"),
    "channels": ("fft", "remap"),
    "render": ("remap", "reduce", "compress"),
    "report": ("fft", "python"),
}


def _fft(f: np.ndarray) -> float:
    spectrum = np.fft.rfft2(f)
    cross = spectrum * np.conj(np.fft.rfft2(np.roll(f, (3, 5), axis=(0, 1))))
    return float(np.fft.irfft2(cross / (np.abs(cross) + 1e-6), s=f.shape).max())


def _remap(f: np.ndarray) -> np.ndarray:
    import cv2

    h, w = f.shape
    gy, gx = np.mgrid[0:h, 0:w].astype(np.float32)
    return cv2.remap(f, gx + 0.3 * np.sin(gy / 50), gy + 0.3 * np.cos(gx / 70), cv2.INTER_LINEAR)


# The parts below repeat their work so that each takes a few tens of milliseconds, like the FFT's.

def _reduce(f: np.ndarray) -> float:
    import cv2

    h, w = f.shape
    return sum(float(cv2.resize(f, (w // 2, h // 2), interpolation=cv2.INTER_AREA)[0, 0]) for _ in range(96))


def _compress(f: np.ndarray) -> int:
    import cv2
    from numcodecs import Blosc

    smooth = cv2.GaussianBlur(f, (0, 0), 2).astype(np.uint8)  # compressible, as EM is, unlike noise
    codec = Blosc(cname="zstd", clevel=3, shuffle=Blosc.BITSHUFFLE)
    return sum(len(codec.encode(smooth)) for _ in range(6))


def _python(f: np.ndarray) -> float:
    h, w = f.shape
    rows = [{"y": i, "x": j, "v": float(i * j)} for i in range(0, h, 2) for j in range(0, w, 16)]
    return sum(r["v"] for r in rows)


_PARTS = {"fft": _fft, "remap": _remap, "reduce": _reduce, "compress": _compress, "python": _python}


@contextlib.contextmanager
def one_thread():
    """Run the body with one OpenCV, one Blosc and one BLAS/OpenMP thread (where threadpoolctl is installed).

    Process CPU time counts every thread's time, and an idle BLAS thread pool spins: a build
    measured with the default pools was seen to take 2 to 3x the CPU of the same build with
    one thread (stitching, whose least-squares solves start the pool). Blosc's own threads, the
    other way round, hide their time from a thread's CPU clock (seen: 15x less for compression).
    """
    import cv2
    from numcodecs import blosc

    try:  # the test extras have threadpoolctl
        from threadpoolctl import threadpool_limits
        limits = threadpool_limits(limits=1)
    except ImportError:  # pragma: no cover
        limits = contextlib.nullcontext()
    threads, blosc_threads = cv2.getNumThreads(), blosc.use_threads
    cv2.setNumThreads(1)
    blosc.use_threads = False
    try:
        with limits:
            yield
    finally:
        cv2.setNumThreads(threads)
        blosc.use_threads = blosc_threads


def reference_cpu_parts(repeats: int = 12, size: int = 1024) -> dict[str, float]:
    """Return per part of the reference workload the least CPU time of ``repeats`` runs in this thread.

    Thread CPU time, not the process's: background threads (zarr's I/O loop, a thread pool left by a
    build) would otherwise add their time. The least of several runs: other work on a shared
    machine only ever adds time. The parts run interleaved, so a slow moment of the machine
    falls on all of them alike.
    """
    image = np.random.default_rng(0).integers(0, 256, (size, size), dtype=np.uint8).astype(np.float32)
    best = dict.fromkeys(_PARTS, float("inf"))
    with one_thread():
        for part in _PARTS.values():  # warm-up: imports, FFT plans, first-touch pages
            part(image)
        for _ in range(repeats):
            for name, part in _PARTS.items():
                c0 = time.thread_time()
                part(image)
                best[name] = min(best[name], time.thread_time() - c0)
    return best


def reference_cpu_seconds(repeats: int = 12, size: int = 1024) -> float:
    """Return the reference workload's CPU time in this thread: the sum of its parts' least times."""
    return sum(reference_cpu_parts(repeats, size).values())


def speed_factors(rates: dict, here_parts: dict[str, float] | None = None) -> dict[str, float]:
    """Return per stage its parts' CPU seconds here over on the calibration machine (1.0 when not known).

    Parameters
    ----------
    rates : dict
        The plan's rates document; its ``reference_parts_s`` are the parts' times at calibration
        (a document with only ``reference_cpu_s``, the whole workload's, gives every stage that ratio).
    here_parts : dict, optional
        The parts' times on this machine (:func:`reference_cpu_parts`); measured now when not given.
    """
    there = rates.get("reference_parts_s")
    if not there and not rates.get("reference_cpu_s"):
        return dict.fromkeys(STAGE_PARTS, 1.0)
    here = reference_cpu_parts() if here_parts is None else here_parts
    if not there:
        whole = sum(here.values()) / rates["reference_cpu_s"]
        return dict.fromkeys(STAGE_PARTS, whole)
    return {stage: sum(here[p] for p in parts) / sum(there[p] for p in parts) for stage, parts in STAGE_PARTS.items()}
