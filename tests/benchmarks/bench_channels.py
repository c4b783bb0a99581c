"""Speed of the channel kernels, as ratios measured side by side in one run.

* normalised mutual information (``stackbuild.channels.mutual_info.mutual_information``)
  against ``skimage.metrics.normalized_mutual_information`` on the same images and bins;
* one cross-modality registration of ``skimage.data.camera()`` (known similarity),
  timed, with its error;
* the feature kernels (``stackbuild.channels.features``) against their reference
  computations: ``dark_blobs`` against ``skimage.feature.hessian_matrix`` +
  ``hessian_matrix_eigvals``, ``gradient_magnitude`` against
  ``scipy.ndimage.gaussian_gradient_magnitude``.

Run: ``python tests/benchmarks/bench_channels.py`` (256 px) or ``--full`` (512 px).
"""
from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage
from skimage import data, feature, metrics, transform

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from stackbuild.channels import features as F  # noqa: E402
from stackbuild.channels.mutual_info import mutual_information, register_mutual_information  # noqa: E402
from stackbuild.transforms import Affine2D  # noqa: E402


def _best_of(fn, n: int = 5) -> float:
    best = math.inf
    for _ in range(n):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="full-size camera image (512 px)")
    args = ap.parse_args()
    cam = data.camera().astype(np.float64)
    if not args.full:
        cam = transform.downscale_local_mean(cam, (2, 2))
    other = (1.0 - cam / 255.0) ** 0.5
    ours = _best_of(lambda: mutual_information(cam, other, bins=32))
    ref = _best_of(lambda: metrics.normalized_mutual_information(cam, other, bins=32))
    print(f"NMI {cam.shape}: stackbuild {ours * 1e3:.1f} ms, skimage {ref * 1e3:.1f} ms, "
          f"ratio skimage/stackbuild {ref / ours:.2f}")
    n = cam.shape[0]
    size, off = int(n * 0.8), n * 0.1
    c = (size - 1) / 2
    truth = Affine2D.similarity(1.0, math.radians(2.0), 7.3, -4.1, center=(c, c)).then(Affine2D.translation(off, off))
    mov = transform.warp(cam / 255.0, transform.AffineTransform(matrix=truth.homogeneous),
                         output_shape=(size, size), order=3)
    mov = (1 - np.clip(mov, 0, 1)) ** 0.5
    t0 = time.perf_counter()
    found, info = register_mutual_information(cam, mov, Affine2D.translation(off, off), bins=32,
                                              max_offset=12.0, max_rotation=4.0)
    dt = time.perf_counter() - t0
    g = np.stack(np.meshgrid(np.linspace(0, size - 1, 9), np.linspace(0, size - 1, 9)), -1).reshape(-1, 2)
    err = np.hypot(*(found.apply(g) - truth.apply(g)).T).max()
    print(f"registration {size} px onto {cam.shape}: {dt:.2f} s, max error {err:.3f} px, "
          f"NMI {info['before']:.3f} -> {info['after']:.3f}")

    _bench_features(cam)


def _bench_features(cam: np.ndarray) -> None:
    img32 = cam.astype(np.float32)
    ours = _best_of(lambda: F.dark_blobs(img32, 2.0))
    ref = _best_of(lambda: feature.hessian_matrix_eigvals(
        feature.hessian_matrix(cam, sigma=2.0, order="rc", use_gaussian_derivatives=True)))
    print(f"dark blobs {cam.shape}: stackbuild {ours * 1e3:.1f} ms, skimage Hessian eigenvalues "
          f"{ref * 1e3:.1f} ms, ratio skimage/stackbuild {ref / ours:.2f}")
    ours = _best_of(lambda: F.gradient_magnitude(img32, 2.0))
    ref = _best_of(lambda: ndimage.gaussian_gradient_magnitude(cam, 2.0))
    print(f"gradient magnitude {cam.shape}: stackbuild {ours * 1e3:.1f} ms, scipy {ref * 1e3:.1f} ms, "
          f"ratio scipy/stackbuild {ref / ours:.2f}")


if __name__ == "__main__":
    main()
