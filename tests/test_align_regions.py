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
