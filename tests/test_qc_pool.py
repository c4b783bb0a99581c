"""Pooling of per-plane error estimates along z (:func:`stackbuild.qc.zchain.pool_along_z`).

The checks are properties of the estimator on data drawn from its own noise model (a
chi-square mean square over ``2 n`` components, the model :func:`stackbuild.qc.zchain.section_error`
uses), not against an outside reference: there is none for this rule. The agreement with
ground truth is measured by ``tests/benchmarks/bench_accuracy.py`` (see DEVELOPERS.md).
"""
from __future__ import annotations

import numpy as np

from stackbuild.qc.zchain import mean_square, pool_along_z, pooled_errors


def _draw(rng, true_ms, n):
    """Mean squares of ``n`` blocks per plane, each block's |error|^2 a chi-square with 2 components."""
    return np.array([rng.chisquare(2, int(k)).mean() * t / 2.0 for t, k in zip(true_ms, n)])


def test_pooling_brings_noisy_planes_closer_to_a_slowly_varying_truth():
    rng = np.random.default_rng(3)
    z = np.arange(36.0)
    truth = 0.6 + 0.4 * np.cos(z / 35.0 * np.pi) ** 2          # higher at both ends, as on long stacks
    n = np.full(36, 28.0)
    own, pooled = [], []
    for _ in range(200):
        ms = _draw(rng, truth, n)
        var = 2.0 * ms ** 2 / n
        own.append(np.sqrt(np.mean((ms - truth) ** 2)))
        pooled.append(np.sqrt(np.mean((pool_along_z(z, ms, var, n) - truth) ** 2)))
    assert np.mean(pooled) < 0.75 * np.mean(own)


def test_a_single_bad_section_and_its_neighbours_keep_their_own_reading():
    z = np.arange(9.0)
    ms = np.array([0.5, 0.55, 0.45, 0.5, 6.5, 0.5, 0.52, 0.48, 0.5])   # plane 4: a planted error (2.55 px)
    n = np.full(9, 20.0)
    var = 2.0 * ms ** 2 / n
    out = pool_along_z(z, ms, var, n)
    assert out[4] == ms[4]
    # its neighbours are pulled up by it, but never by more than their own sampling sigma
    assert np.all(np.abs(out - ms) <= np.sqrt(var) + 1e-12)
    assert np.argmax(out) == 4 and out[4] > 5 * np.delete(out, 4).max()


def test_a_plane_moves_at_most_one_sigma_and_only_toward_its_neighbours():
    rng = np.random.default_rng(5)
    z = np.arange(20.0)
    n = np.full(20, 25.0)
    ms = _draw(rng, np.full(20, 0.6), n)
    var = 2.0 * ms ** 2 / n
    out = pool_along_z(z, ms, var, n)
    assert np.all(np.abs(out - ms) <= np.sqrt(var) + 1e-12)
    assert np.all(out.min() >= ms.min() - 1e-12) and np.all(out.max() <= ms.max() + 1e-12)


def test_sections_beyond_the_radius_are_not_pooled_across_a_gap():
    z = np.array([0.0, 1.0, 5.0, 6.0])          # sections 2-4 lost
    ms = np.array([1.0, 1.0, 0.5, 0.5])
    n = np.full(4, 1e6)                         # no gate: the planes would be far apart
    out = pool_along_z(z, ms, np.full(4, 1.0), n, radius=2, gate=1e9)
    assert np.allclose(out, ms)
    assert np.allclose(pool_along_z(z, ms, np.full(4, 1.0), n, radius=0), ms)


def test_pooled_errors_without_pooling_are_section_error():
    from stackbuild.qc.zchain import section_error
    planes = {0: {"n": 30, "sum_sq": 30 * 0.7, "sum_noise": 30 * 0.05}, 1: {"n": 0, "sum_sq": 0.0, "sum_noise": 0.0},
              2: {"n": 12, "sum_sq": 12 * 1.9, "sum_noise": 12 * 0.1}}
    got = pooled_errors(planes, radius=0)
    assert set(got) == {0, 2}
    for z in (0, 2):
        assert np.allclose(got[z], section_error(planes[z]["n"], planes[z]["sum_sq"], planes[z]["sum_noise"]))
    assert mean_square(30, 21.0, 1.5)[0] == 21.0 / 30 - 1.5 / 30
