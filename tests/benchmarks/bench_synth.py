"""Time of rendering one phantom section (both families), beside a plain Gaussian blur of the same image as a yardstick.

Run: ``python tests/benchmarks/bench_synth.py [--full]`` (default 1024 px, ``--full`` adds 2048 px).
"""
from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
from scipy.ndimage import gaussian_filter

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from stackbuild.synth import SynthParams, phantom_section  # noqa: E402


def _best(fn, repeat=3):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def main(argv):
    sizes = [1024, 2048] if "--full" in argv else [1024]
    for content in ("standard", "realistic"):
        params = SynthParams(seed=0, content=content)
        for n in sizes:
            render = _best(lambda: phantom_section(params, 4, (n, n)))
            image = np.random.default_rng(0).random((n, n), dtype=np.float32)
            blur = _best(lambda: gaussian_filter(image, 3.0))
            print(f"{content} {n}x{n}: phantom {render:.3f} s, scipy gaussian_filter(sigma=3) {blur:.3f} s, "
                  f"ratio {render / blur:.1f}")


if __name__ == "__main__":
    main(sys.argv[1:])
