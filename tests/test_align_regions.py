"""What one align task reads: bounded by the settings, never by the section (issue #13, bounded per-task memory).

Invented stacks (tests/align_builders.py); the check is structural: every request for pixels is recorded.
"""
from __future__ import annotations

from align_builders import make_stack, small_settings
from stackbuild.align.blockmatch import block_reach
from stackbuild.align.sources import ArraySource
from stackbuild.align.stage import align_sections


class RecordingSource(ArraySource):
    """An in-memory source that remembers the size of every region asked of it."""

    def __init__(self, images):
        super().__init__(images)
        self.asked = []

    def region(self, z, alignment, x0, y0, width, height, scale):
        self.asked.append((width, height, scale, alignment is not None))
        return super().region(z, alignment, x0, y0, width, height, scale)


def _run(size, **kw):
    st = make_stack(n=5, size=size, seed=2, offset=10.0, warp=2.0)
    src = RecordingSource(st.images)
    settings = small_settings(overview_size=160, region_nodes=3, region_sections=2, **kw)
    aligns = align_sections(src, settings)
    return src, settings, aligns


def _side(s, scale, half_size, max_shift):
    """Return the largest region a task of ``s`` may render at ``scale``: its node block plus the matcher's reach."""
    return (s.region_nodes - 1) * s.grid_spacing / scale + 2 * (block_reach(half_size, max_shift) + 1) + 3


def test_every_read_is_bounded_by_the_settings_not_the_section():
    for size in (384, 768):
        src, s, aligns = _run(size, early_round_coarsening=2, elastic_rounds=2)
        f = s.early_round_coarsening
        overviews = [a for a in src.asked if not a[3]]
        regions = [a for a in src.asked if a[3]]
        assert overviews and regions
        # an overview is at most overview_size across (plus the rounding of one pixel)
        assert max(max(w, h) for w, h, _, _ in overviews) <= s.overview_size + 1
        # a region task renders its node block plus the matcher's reach: the last round at
        # elastic_scale, the early round at f times that with blocks and search f times smaller
        last = [(w, h) for w, h, sc, _ in regions if sc == s.elastic_scale]
        early = [(w, h) for w, h, sc, _ in regions if sc == f * s.elastic_scale]
        assert last and early and len(last) + len(early) == len(regions)
        assert max(max(wh) for wh in last) <= _side(s, s.elastic_scale, s.match_half_size, s.match_max_shift)
        assert max(max(wh) for wh in early) <= _side(s, f * s.elastic_scale, s.match_half_size // f,
                                                     s.match_max_shift // f)
        assert sorted(aligns) == list(range(5))


def test_early_rounds_at_elastic_scale_when_not_coarsened():
    src, s, _ = _run(384, early_round_coarsening=1)
    assert {sc for _, _, sc, warped in src.asked if warped} == {s.elastic_scale}


def test_aligned_regions_resample_the_section_image_as_scipy_does(tiny_build):
    """An aligned region of a build is the section-frame image at the same scale, resampled at the
    alignment's points: reference scipy.ndimage.map_coordinates (order 1) on that image."""
    import numpy as np
    from scipy import ndimage

    from stackbuild.align.sources import BuildSource
    from stackbuild.transforms.records import SectionAlignment
    from stackbuild.transforms.types import Affine2D, DisplacementField

    src = BuildSource(tiny_build)
    z = src.sections()[1]
    x0, y0, x1, y1 = src.bbox(z)
    s, fx, fy = 2, int(x0) + 1, int(y0) + 1
    w, h = int((x1 - fx) // s) - 1, int((y1 - fy) // s) - 1
    frame = src.region(z, None, fx, fy, w, h, s)
    rng = np.random.default_rng(0)
    field = DisplacementField(rng.normal(0, 2.0, (3, 3, 2)).astype(np.float32), (x0, y0), (x1 - x0) / 2)
    al = SectionAlignment(z, Affine2D.similarity(1.0, 0.02, 6.3, -4.7, center=(w, h)), field)
    rx, ry, rw, rh = fx + 40, fy + 40, w // 2, h // 2
    got = src.region(z, al, rx, ry, rw, rh, s)
    half = (s - 1) / 2.0
    sx, sy = al.aligned_to_section_grid(rx + half + s * np.arange(rw), ry + half + s * np.arange(rh))
    want = ndimage.map_coordinates(frame, [(sy - fy - half) / s, (sx - fx - half) / s], order=1, cval=np.nan)
    ok = np.isfinite(want)
    assert ok.mean() > 0.9 and np.isfinite(got[ok]).all()
    # OpenCV quantises bilinear weights to 1/32 px (its documented INTER_BITS = 5): a tolerance of that order
    assert np.abs(got[ok] - want[ok]).max() <= 0.05 * float(np.ptp(frame[np.isfinite(frame)]))


def test_a_sections_tiles_are_prepared_once_per_align_run(tiny_build, tmp_path, monkeypatch):
    """Every region of every elastic round and window is resampled from one kept section image per
    section: each tile is prepared twice per run (overview and that image; it was three times, once
    more per round)."""
    import shutil

    from stackbuild import tiles as tiles_mod
    from stackbuild.align.settings import AlignSettings
    from stackbuild.align.sources import BuildSource
    from stackbuild.align.stage import align_sections

    build = tmp_path / "b"
    shutil.copytree(tiny_build / "transforms", build / "transforms")
    prepared = []
    real = tiles_mod._prepare

    def counting(p, tile, *args, **kw):
        prepared.append(str(p))
        return real(p, tile, *args, **kw)

    monkeypatch.setattr(tiles_mod, "_prepare", counting)
    # a tile cache of one tile (production tiles are large): a tile read again is prepared again
    monkeypatch.setattr(tiles_mod, "TILES_KEPT", 1)
    monkeypatch.setattr(tiles_mod, "TILE_CACHE", tiles_mod.ByteLRU(0))
    src = BuildSource(build)
    align_sections(src, AlignSettings(elastic_rounds=2))
    n_tiles = sum(len(src._stitch(z).tiles) for z in src.sections())
    assert len(prepared) == 2 * n_tiles == 2 * len(set(prepared))
