"""A fast guard on alignment accuracy: the identifiable residual of a small realistic stack.

The full table (every family and variant, 3 seeds, real builds) is
``tests/benchmarks/bench_accuracy.py --full``; this test runs one small case of
the realistic family (fresh dots and texture in every section, cells moving
obliquely each in its own direction, independent warps) through the align
stage on the true tile positions, and measures it with the issue's measure
(:func:`stackbuild.synth.residual.identifiable_residual`) against the synthetic
ground truth.
"""
from __future__ import annotations

from stackbuild.align.settings import AlignSettings
from stackbuild.align.stage import run_align
from stackbuild.synth import generate
from stackbuild.synth.residual import identifiable_residual
from stackbuild.synth.variants import variant_params
from align_builders import true_stitch


def test_small_realistic_stack_meets_the_identifiable_residual_bar(tmp_path):
    # the realistic family's small variant (2 x 2 tiles), cut to 6 sections of 384 px tiles
    params = variant_params("realistic", "small", 0, sections=6, tile_size=384)
    generate(tmp_path / "sample", params)
    true_stitch(tmp_path / "sample", tmp_path / "build")
    aligns = run_align(tmp_path / "build", AlignSettings())
    rep = identifiable_residual(tmp_path / "build", tmp_path / "sample")
    # issue bars: RMS <= 1.0 px, p95 <= 2.0 px, no intact section flagged damaged or interpolated
    assert rep.rms <= 1.0 and rep.p95 <= 2.0, (rep.rms, rep.p95)
    assert not any({"damaged", "interpolated"} & set(a.flags) for a in aligns.values())
    # our regression bound (measured 0.52 / 0.91 px on this case; seeds 1 and 2: 0.71 / 1.31, 0.65 / 1.24)
    assert rep.rms <= 0.65 and rep.p95 <= 1.15, (rep.rms, rep.p95)



def _edge_gap_error(continuation: float) -> float:
    """Return the RMS error of section 5's second difference along z at the nodes where it has no data.

    Closed form: every section's true field is its own random affine function of the node
    position (a per-section scale, shear and shift, as a coarse affine error leaves), matched
    exactly between sections; section 5 has no data on the outer ring of nodes (its edge). The
    second difference ``u_5 - (u_4 + u_6) / 2`` is what the data constrain (a field linear in z
    is invisible to them); it is affine too, so its exact value is known on the ring.
    """
    import numpy as np
    from stackbuild.align.elastic import solve_fields
    rng = np.random.default_rng(4)
    zs, (ny, nx) = list(range(12)), (9, 9)
    ys, xs = np.mgrid[0:ny, 0:nx].astype(float)
    true = {z: np.einsum("ij,jyx->yxi", rng.normal(0, 0.4, (2, 2)), np.stack([xs - 4, ys - 4]))
            + rng.normal(0, 2, 2) for z in zs}
    ring = np.ones((ny, nx), bool)
    ring[1:-1, 1:-1] = False
    matches = {}
    for a in zs:
        for b in (a + 1, a + 2):
            if b in true:
                w = np.where(ring & (5 in (a, b)), 0.0, 1.0)
                matches[(a, b)] = (np.where(w[..., None] > 0, true[b] - true[a], np.nan), w)
    # the membrane and pull weights of the align stage's defaults when this was written
    u = solve_fields(zs, (ny, nx), matches, smoothness_weight=0.002, pull=1e-3, continuation=continuation)
    err = (u[5] - (u[4] + u[6]) / 2) - (true[5] - (true[4] + true[6]) / 2)
    return float(np.sqrt((err[ring] ** 2).sum(-1).mean()))


def test_a_field_continues_across_nodes_where_its_section_has_no_data():
    # closed form (affine fields, exact matches: the right answer is the affine function itself).
    # Without the continuation term the membrane and the pull flatten section 5's field toward
    # its neighbours and toward zero at the nodes it has no data at, keeping the coarse error
    # there, which the blocks between those nodes and the section's inside then interpolate (the
    # edge ring of small sections, issue #13). Measured: 1.29 px without, 0.26 px with the default
    without, with_ = _edge_gap_error(0.0), _edge_gap_error(3.0)
    assert with_ < 0.5 * without and with_ <= 0.4, (with_, without)
