"""Stack-level accuracy of the align stage on ground-truth stacks (invented data, see align_builders).

Residuals follow the brief: for aligned points p, r = section_to_true(aligned_to_section(p)) - p,
minus the per-point mean over sections (one common warp).
"""
from __future__ import annotations

import numpy as np
import pytest
from skimage import data

from stackbuild.align.sources import ArraySource
from stackbuild.align.stage import align_sections
from stackbuild.errors import InputError
from align_builders import Stack, make_stack, p95, residuals, rms, small_settings, split_linear


@pytest.fixture(scope="module")
def random_stack():
    # rotation 3 deg, scale 2 %, warps up to 8 px as in the brief; offsets scaled down
    # from 100 px to 40 px because these sections are 768 px wide, not several thousand
    st = make_stack(n=20, size=768, seed=0, offset=40.0)
    return st, align_sections(ArraySource(st.images), small_settings())


def test_random_distortions_are_removed(random_stack):
    st, al = random_stack
    r = residuals(st, al, border=150)
    coarse = residuals(st, {z: type(a)(z, a.affine) for z, a in al.items()}, border=150)
    lin, rest = split_linear(r)
    allr = np.stack(list(r.values()))
    # what a second-difference elastic solve is answerable for: the part not linear in z
    # issue targets 1.0 / 2.0; measured 0.59 / 1.14 (0.56 / 1.08 with the old matcher and SIFT)
    assert rms(rest) <= 0.75 and p95(rest) <= 1.4
    # the plain residual also holds the straight-line-in-z part of the random warps, which
    # second differences cannot tell from a steady slant; the weak first-difference term
    # (elastic_chain) takes most of it out. The measure removes this part (step 4 of the
    # identifiable residual); this bound is ours. Measured 1.01 / 1.88 (0.89 / 1.66 with the
    # old integer-peak matcher and SIFT coarse stage; 1.25 / 2.36 without the term)
    assert rms(allr) <= 1.1 and p95(allr) <= 2.0
    assert rms(allr) < 0.5 * rms(np.stack(list(coarse.values())))
    assert all("residual_next" in al[z].stats for z in range(19))
    assert all(not a.flags for a in al.values())


def test_no_drift_over_fifty_sections():
    # smaller, faster: coarse stage only, no warps, 384 px sections
    st = make_stack(n=50, size=384, seed=5, offset=20.0, warp=0.0)
    al = align_sections(ArraySource(st.images), small_settings(elastic=False, max_features=800))
    r = residuals(st, al, border=60, step=24)
    # issue target 1.5 px; measured 0.03 / 0.02 px (no warps since warp=0 gives a zero field)
    assert rms(r[49]) <= 0.2 and rms(r[0]) <= 0.2
    # and the whole stage on 4 px random warps: issue target for the last section 1.5 px;
    # measured 0.88 / 1.02 px at the two ends (0.75 / 0.72 with the old matcher and SIFT)
    st = make_stack(n=50, size=384, seed=5, offset=20.0, warp=4.0)
    al = align_sections(ArraySource(st.images), small_settings(max_features=800))
    r = residuals(st, al, border=60, step=24)
    assert rms(r[49]) <= 1.5 and rms(r[0]) <= 1.5


def test_steady_slant_is_kept():
    # structures drift sideways up to 0.5 px per section (affine part over the section box
    # removed); sections get random affines and no warp (warp=0 now gives a zero field; it used
    # to give an unscaled ~3 px one), so a change of the slant is the aligner's
    st = make_stack(n=20, size=512, seed=3, offset=30.0, warp=0.0, slant=0.5)
    al = align_sections(ArraySource(st.images), small_settings())
    r = residuals(st, al, border=100)
    change = r[19] - r[0]                 # how much of the slant was taken out over the block
    ys, xs = np.mgrid[100:412:32, 100:412:32]
    design = np.column_stack([xs.ravel(), ys.ravel(), np.ones(xs.size)])
    affine_part = design @ np.linalg.lstsq(design, change, rcond=None)[0]
    # the coarse first-difference chain takes out whatever affine part the slant has over each
    # section pair's overlap (by design: it cannot be told from drift); the elastic stage must
    # keep the rest. Issue target: 1 px. Measured 0.41 px non-affine, 0.79 px in all (the
    # correlation coarse stage follows the slant's affine part more closely than SIFT did:
    # 0.39 / 0.52 then; an affine trend linear in z is unknowable, step 1 of the measure)
    assert rms(change - affine_part) <= 0.6
    assert rms(change) <= 1.0
    # the check can fail: straightening would remove a slant of up to 19 * 0.5 = 9.5 px, as a
    # strong first-difference term does (measured 2.68 px non-affine with elastic_chain=10)
    assert rms(change - affine_part) < 0.25 * _straightened_change(st)


def _non_affine(change: np.ndarray) -> np.ndarray:
    """Return ``change`` (on the 100..412 px, 32 px grid of these tests) minus its least-squares affine part."""
    ys, xs = np.mgrid[100:412:32, 100:412:32]
    design = np.column_stack([xs.ravel(), ys.ravel(), np.ones(xs.size)])
    return change - design @ np.linalg.lstsq(design, change, rcond=None)[0]


def _straightened_change(st) -> float:
    """RMS of the non-affine change over the block when a strong first-difference term straightens the slant."""
    al = align_sections(ArraySource(st.images), small_settings(elastic_chain=10.0))
    r = residuals(st, al, border=100)
    return rms(_non_affine(r[19] - r[0]))


def test_slant_through_random_warps_is_mostly_kept():
    # slant and 3 px random warps together: the straight-line-in-z part of the warps cannot be
    # told from slant, so the first-difference term trades one for the other. Measured change
    # over the block 1.55 px RMS non-affine, 2.76 px in all (2.07 in all with the old matcher
    # and SIFT); a strong first-difference term straightens the slant and leaves far more
    # (measured 4.16 px non-affine)
    st = make_stack(n=20, size=512, seed=3, offset=30.0, warp=3.0, slant=0.5)
    al = align_sections(ArraySource(st.images), small_settings())
    r = residuals(st, al, border=100)
    assert rms(_non_affine(r[19] - r[0])) <= 2.0 and rms(r[19] - r[0]) <= 3.0
    assert rms(_non_affine(r[19] - r[0])) < 0.5 * _straightened_change(st)


def test_damaged_and_lost_sections():
    st = make_stack(n=12, size=512, seed=4, offset=30.0, warp=4.0, lost=(5,), damaged=(8,))
    al = align_sections(ArraySource(st.images), small_settings())
    assert 5 not in al
    assert "damaged" in al[8].flags
    assert "lost_neighbour" in al[4].flags and "lost_neighbour" in al[6].flags
    r = residuals(st, al, border=100, skip=(8,))
    lin, rest = split_linear(r)
    zs = sorted(r)
    for z in (4, 6, 7, 9):
        k = zs.index(z)
        assert rms(rest[k]) <= 1.0 and p95(rest[k]) <= 2.0, z


def test_known_warp_of_camera_is_recovered():
    # scikit-image's bundled camera image; the middle of three sections carries a known smooth
    # warp of up to 4 px, the outer two are the image itself
    img = data.camera().astype(np.float32)
    h, w = img.shape
    ys, xs = np.mgrid[0:h, 0:w].astype(np.float32)
    warp = np.stack([3.0 * np.sin(2 * np.pi * ys / 300.0), 2.5 * np.cos(2 * np.pi * xs / 260.0)], -1)
    import cv2
    moved = cv2.remap(img, xs + warp[..., 0], ys + warp[..., 1], cv2.INTER_LINEAR,
                      borderMode=cv2.BORDER_REFLECT)
    st = Stack({0: img, 1: moved, 2: img.copy()},
               affines={z: np.eye(2, 3) for z in range(3)},
               warps={0: np.zeros_like(warp), 1: warp, 2: np.zeros_like(warp)})
    al = align_sections(ArraySource(st.images), small_settings(grid_spacing=32, match_half_size=12))
    r = residuals(st, al, border=96, step=16)
    assert rms(r[1]) <= 0.5
    assert al[1].displacement.magnitude_stats()["max"] > 2.0


def test_bad_input_is_flagged_not_crashed():
    st = make_stack(n=6, size=384, seed=6, offset=15.0, warp=2.0, blank=(2,), sizes={4: 192})
    al = align_sections(ArraySource(st.images), small_settings(max_features=1000))
    assert {"few_features", "interpolated"} <= set(al[2].flags)
    assert "odd_size" in al[4].flags
    for z in (0, 1, 3, 5):
        assert "interpolated" not in al[z].flags
    one = align_sections(ArraySource({7: st.images[0]}), small_settings())
    assert one[7].flags == ["single_section"] and np.allclose(one[7].affine.matrix, np.eye(2, 3))
    with pytest.raises(InputError):
        align_sections(ArraySource({}), small_settings())
    with pytest.raises(InputError):
        align_sections(ArraySource(st.images), small_settings(neighbours=0))


def test_coarse_scratch_holds_a_window_of_overviews_not_the_stack(tmp_path):
    # Scratch is bounded by the window (region_sections, or 4 x neighbours), not by the number of
    # sections (issue #15: scratch bounded by a region size). Counted: overview files on disk
    # whenever a task starts. Rule of thumb, no source: this is the project's own bound.
    st = make_stack(n=12, size=256, seed=3, offset=10.0, warp=0.0)
    settings = small_settings(elastic=False, max_features=400, region_sections=3, neighbours=2)
    seen = []

    def counting_map(fn, items):
        for item in items:
            seen.append(len(list(tmp_path.glob("overview_*.npy"))))
            yield fn(item)

    align_sections(ArraySource(st.images), settings, mapper=counting_map, scratch=tmp_path)
    window = max(settings.region_sections, 4 * settings.neighbours)
    assert max(seen) <= window + settings.neighbours < len(st.images)
