"""The identifiable residual (alignment issue, "How to measure"): closed-form cases of the kernel, and a
build folder made of the truth's own transforms (exact alignment up to the unknowable, so residual 0)."""
from __future__ import annotations

import numpy as np
import pytest

from stackbuild.synth import SynthParams, generate, load_truth
from stackbuild.synth.residual import bump_basis, identifiable_residual, identifiable_vectors
from stackbuild.transforms import (Canvas, DisplacementField, SectionAlignment, SectionStitch,
                                   TilePlacement, TransformStore)

GX, GY = np.meshgrid(np.arange(8) * 128.0 + 64, np.arange(6) * 128.0 + 64)
POINTS = np.column_stack([GX.ravel(), GY.ravel()])
ZS = np.arange(9.0)


def _stack(fn):
    return np.stack([fn(z) for z in ZS])


def test_a_whole_stack_trend_linear_in_z_is_unknowable():
    # drift, shear and scale change of the block, each linear in z, plus a constant affine:
    # step 1 removes them exactly (closed form: a line fits a line)
    a0 = np.array([[1.01, 0.02, 30.0], [-0.01, 0.99, -12.0]])
    a1 = np.array([[0.002, -0.001, 1.7], [0.0015, 0.001, -0.8]])
    mapped = _stack(lambda z: POINTS @ (a0 + z * a1)[:, :2].T + (a0 + z * a1)[:, 2])
    assert np.abs(identifiable_vectors(POINTS, mapped, ZS)).max() < 1e-9


def test_a_field_common_to_all_sections_and_a_smooth_slant_field_are_unknowable():
    common = np.column_stack([3 * np.sin(POINTS[:, 0] / 200), 2 * np.cos(POINTS[:, 1] / 150)])
    bump = bump_basis(POINTS, 4)[:, [5, 10]] @ np.array([[0.7, -0.4], [0.2, 0.9]])
    mapped = _stack(lambda z: POINTS + common + (z - ZS.mean()) * bump)
    assert np.abs(identifiable_vectors(POINTS, mapped, ZS)).max() < 1e-9


def test_one_section_displaced_keeps_its_share_off_the_line():
    # Closed form: a translation d of plane k alone leaves, after the line fit over z (step 1),
    # d * (e_k - H e_k) in every plane, H the hat matrix of [1, z]; uniform in space, so steps 3 and 4
    # remove nothing more. In plane k: d * (1 - 1/N - (k - mean z)^2 / sum (z - mean z)^2).
    d, k = np.array([3.0, -4.0]), 2
    mapped = _stack(lambda z: POINTS + (d if z == k else 0.0))
    r = identifiable_vectors(POINTS, mapped, ZS)
    zc = ZS - ZS.mean()
    leverage = 1 / len(ZS) + zc[k] ** 2 / (zc ** 2).sum()
    np.testing.assert_allclose(r[k], np.broadcast_to(d * (1 - leverage), r[k].shape), atol=1e-9)
    other = 5
    expected = -d * (1 / len(ZS) + zc[k] * zc[other] / (zc ** 2).sum())
    np.testing.assert_allclose(r[other], np.broadcast_to(expected, r[other].shape), atol=1e-9)


def test_a_local_jump_in_one_section_survives():
    # a 2 px displacement of a single block in one plane is not smooth in space: most of it stays
    d = np.zeros_like(POINTS)
    d[20] = [2.0, 0.0]
    mapped = _stack(lambda z: POINTS + (d if z == 4 else 0.0))
    r = identifiable_vectors(POINTS, mapped, ZS)
    assert 1.3 < np.hypot(*r[4, 20]) < 2.0
    assert np.median(np.hypot(r[..., 0], r[..., 1])) < 0.2


def test_a_plane_left_out_of_the_fits_is_judged_against_the_others():
    mapped = _stack(lambda z: POINTS + [0.5 * z, 0.0])
    mapped[3] += [5.0, 0.0]
    fit = ZS != 3
    r = identifiable_vectors(POINTS, mapped, ZS, fit)
    assert np.abs(r[fit]).max() < 1e-9
    np.testing.assert_allclose(r[3], np.broadcast_to([5.0, 0.0], r[3].shape), atol=1e-9)


def test_bad_shapes_are_refused():
    with pytest.raises(ValueError, match="mapped"):
        identifiable_vectors(POINTS, np.zeros((3, 5, 2)), ZS)
    with pytest.raises(ValueError, match="no plane"):
        identifiable_vectors(POINTS, _stack(lambda z: POINTS), ZS, np.zeros(len(ZS), bool))


# -- on a build folder -----------------------------------------------------------------

def _truth_build(root, truth, tile_error=None, canvas=True):
    """A build folder whose records are the truth's own transforms (section -> true, inverted on a grid)."""
    store = TransformStore(root / "transforms")
    h, w = truth.section_shape
    for s in truth.sections:
        tiles = []
        for name, (x, y) in sorted(truth.tile_positions(s).items()):
            dx, dy = (tile_error or {}).get((s, name), (0.0, 0.0))
            path = truth.folder.parent / "tiles" / str(s) / f"{name}.tif"
            tiles.append(TilePlacement(name, str(path), *truth.tile_shape[::-1], x, y, x + dx, y + dy))
        store.save_stitch(SectionStitch(s, "uint8", tiles))
        # aligned frame = true frame; aligned -> section through an affine and a field sampled from the truth
        spacing = 8.0
        ax, ay = np.meshgrid(np.arange(-64, truth.true_shape[1] + 64, spacing),
                             np.arange(-64, truth.true_shape[0] + 64, spacing))
        grid = np.column_stack([ax.ravel(), ay.ravel()])
        inv = truth.section_affine(s).inverse()
        q = truth.true_to_section(s, grid)
        # store d with aligned -> coarse = p + d(p), coarse -> section = inv
        coarse = truth.section_affine(s).apply(q)
        vec = (coarse - grid).reshape(*ax.shape, 2).astype(np.float32)
        store.save_alignment(SectionAlignment(s, inv, DisplacementField(vec, (-64.0, -64.0), spacing), []))
    th, tw = truth.true_shape
    if canvas:
        store.save_canvas(Canvas(tw - 200, th - 200, 100.0, 100.0, truth.sections[0], truth.sections[-1], "uint8"))
    return root


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    out = tmp_path_factory.mktemp("resid")
    generate(out / "sample", SynthParams(seed=3, sections=5, grid=(2, 2), tile_size=256, channels=0, landmarks=0,
                                         content="realistic", offset=30.0, warp=6.0, lost_sections="3",
                                         compress=False))
    return out, load_truth(out / "sample")


@pytest.fixture(scope="module")
def builds(sample):
    """Build folders made of the truth's transforms: exact, exact before render, and one tile 4 px off."""
    root, truth = sample
    return {"exact": _truth_build(root / "exact", truth), "early": _truth_build(root / "early", truth, canvas=False),
            "misplaced": _truth_build(root / "tile", truth, {(2, "r1c1"): (4.0, 0.0)})}


def test_a_build_with_the_true_transforms_has_no_residual(sample, builds):
    root, truth = sample
    rep = identifiable_residual(builds["exact"], truth, block=64)
    # an 8 px field reproduces the inverse of the truth's 64 px bilinear warp to about a hundredth
    assert rep.rms < 0.02 and rep.max < 0.05
    assert rep.excluded == {3: "lost"} and rep.sections == [0, 1, 2, 4]
    # before render there is no canvas: the grid lies on the sections' aligned extent instead
    early = identifiable_residual(builds["early"], truth, block=64)
    assert early.rms < 0.02 and len(early.points) >= len(rep.points) // 2


def test_a_misplaced_tile_shows_in_its_section_only(sample, builds):
    root, truth = sample
    rep = identifiable_residual(builds["misplaced"], truth, block=64)
    worst = max(rep.per_section, key=lambda s: rep.per_section[s]["rms"])
    assert worst == 2 and rep.per_section[2]["max"] > 2.0
    assert max(v["rms"] for s, v in rep.per_section.items() if s != 2) < 0.5 * rep.per_section[2]["rms"]


def test_the_chain_of_transforms_predicts_the_rendered_pixels(sample, builds):
    # the measure's own chain (aligned -> build section -> tile -> true section -> true frame) against the
    # renderer's pixels: the truth's undistorted section sampled where the chain points must look like the
    # rendered region, unshifted (skimage phase correlation on Hann-windowed blocks); the region spans
    # all four tiles of section 2, one of them misplaced in the build by 4 px
    from scipy.ndimage import map_coordinates
    from skimage.filters import window
    from skimage.registration import phase_cross_correlation

    from stackbuild.sampler import render_region
    from stackbuild.synth.residual import _section_to_truth_section
    from stackbuild.tiles import SectionTiles

    root, truth = sample
    s, x0, y0, n = 2, 280, 300, 128
    gx, gy = np.meshgrid(np.arange(x0, x0 + n, dtype=float), np.arange(y0, y0 + n, dtype=float))
    undistorted = truth.undistorted(s)
    w = window("hann", (n, n))

    def shift_and_ncc(predicted_at, image):
        pred = map_coordinates(undistorted, [predicted_at[:, 1], predicted_at[:, 0]], order=1).reshape(n, n)
        sh = phase_cross_correlation((pred - pred.mean()) * w, (image - image.mean()) * w, upsample_factor=20,
                                     normalization=None)[0]
        return np.abs(sh).max(), np.corrcoef(pred.ravel(), image.ravel())[0, 1]

    for name, bound in (("exact", 0.06), ("misplaced", 0.25)):
        store = TransformStore(builds[name] / "transforms")
        stitch, align = store.load_stitch(s), store.load_alignment(s)
        image = render_region(stitch, align, x0, y0, n, n, tiles=SectionTiles(stitch))
        q = align.aligned_to_section(np.column_stack([gx.ravel(), gy.ravel()]))
        q_true, covered = _section_to_truth_section(stitch, truth.tile_positions(s), q)
        assert covered.all()
        shift, ncc = shift_and_ncc(truth.section_to_true(s, q_true), image)
        # where two tiles disagree the render blends two copies, which no single position predicts
        # exactly; the feather-weighted mean offset comes within a quarter pixel of it
        assert shift <= bound and ncc > 0.9, (name, shift, ncc)
        if name == "misplaced":
            naive, _ = shift_and_ncc(truth.section_to_true(s, q), image)  # ignoring the tile placements
            assert naive >= 1.0
