"""Speed of the quality measurements, as ratios measured side by side in one run.

* NCC block matching (``stackbuild.qc.blockmatch.match_blocks``) against
  scikit-image's ``phase_cross_correlation`` (upsample 20) on the same blocks;
* the whole report on the planted test build (volume.zarr, then lazy volume).

Run: ``python tests/benchmarks/bench_qc.py`` (modest size) or ``--full``
(a 4096 px plane pair).
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import ndimage
from skimage import data
from skimage.registration import phase_cross_correlation

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from stackbuild.qc.blockmatch import match_blocks  # noqa: E402
from stackbuild.qc.report import run_report  # noqa: E402
from stackbuild.qc.settings import ReportSettings  # noqa: E402
from test_qc_synthbuild import make_build  # noqa: E402


def _planes(size: int) -> tuple[np.ndarray, np.ndarray]:
    base = data.gravel().astype(np.float32)
    reps = -(-size // base.shape[0])
    big = np.tile(base, (reps, reps))[:size, :size]
    return big, ndimage.shift(big, (0.7, -1.4), order=1, mode="nearest")


def bench_blocks(size: int) -> None:
    a, b = _planes(size)
    radius, search, spacing = 24, 16, 96
    t0 = time.perf_counter()
    m = match_blocks(a, b, spacing=spacing, radius=radius, search=search)
    t_ncc = time.perf_counter() - t0
    t0 = time.perf_counter()
    for x, y in m.points.astype(int):
        phase_cross_correlation(a[y - radius:y + radius + 1, x - radius:x + radius + 1],
                                b[y - radius:y + radius + 1, x - radius:x + radius + 1], upsample_factor=20)
    t_pcc = time.perf_counter() - t0
    n = len(m.ncc)
    print(f"blocks: {n} on a {size} px plane pair")
    print(f"  match_blocks (NCC, search +-{search}px): {n / t_ncc:8.0f} blocks/s")
    print(f"  skimage phase_cross_correlation       : {n / t_pcc:8.0f} blocks/s")
    print(f"  ratio NCC / PCC speed                 : {t_pcc / t_ncc:8.2f}")
    err = np.median(np.abs(m.shifts - [-1.4, 0.7]), axis=0)
    print(f"  median |error| of NCC shifts (x, y)   : {err[0]:.3f}, {err[1]:.3f} px")


def bench_report() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        written = make_build(Path(tmp) / "w")
        lazy = make_build(Path(tmp) / "l", volume=False)
        t0 = time.perf_counter()
        run_report(written, ReportSettings())
        t_w = time.perf_counter() - t0
        t0 = time.perf_counter()
        run_report(lazy, ReportSettings())
        t_l = time.perf_counter() - t0
    print(f"report, 5 x 512 px planes: written volume {t_w:.2f} s, lazy volume {t_l:.2f} s "
          f"(ratio {t_l / t_w:.2f})")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="use a 4096 px plane pair")
    args = ap.parse_args()
    bench_blocks(4096 if args.full else 1024)
    bench_report()


if __name__ == "__main__":
    main()
