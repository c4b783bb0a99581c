"""Independent measurements of the output: seam residuals and section-to-section residuals.

Nothing here trusts the numbers the stitcher or the aligner stored: seams are
re-measured from the raw tiles at their final placements, and alignment is
estimated from block shifts between nearby planes of the rendered volume
(:mod:`stackbuild.qc.probe`).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from itertools import combinations

import numpy as np

from ..tiles import read_tile
from ..transforms.records import Canvas, SectionAlignment, SectionStitch
from .blockmatch import BlockMatches
from .planes import PlaneSource
from .seams import overlap_box, seam_residual
from .settings import ReportSettings


@dataclass
class SeamBlocks:
    """Re-measured residuals of one tile pair (points in section pixels)."""

    a: str
    b: str
    blocks: BlockMatches
    error: str = ""


@dataclass
class Measurements:
    """All block-level measurements of one build, kept in memory for the metrics and plots."""

    seams: dict[int, list[SeamBlocks]] = field(default_factory=dict)
    probe: list[dict] = field(default_factory=list)
    source: PlaneSource | None = None
    notes: list[str] = field(default_factory=list)


def section_to_output(points: np.ndarray, alignment: SectionAlignment | None, canvas: Canvas | None,
                      iterations: int = 8) -> np.ndarray:
    """Map ``(N, 2)`` section-pixel ``(x, y)`` points to level-0 output pixels.

    The stored alignment maps aligned -> section (pull-back); it is inverted
    here: exactly for the affine, by fixed-point iteration for the
    displacement field (which converges because the field is smooth and
    small against its grid spacing).
    """
    p = np.asarray(points, float).reshape(-1, 2)
    if alignment is not None:
        coarse = alignment.affine.inverse().apply(p)
        q = coarse.copy()
        if alignment.displacement is not None:
            for _ in range(iterations):
                q = coarse - alignment.displacement.displacement(q)
        p = q
    if canvas is not None:
        p = p - np.array([canvas.origin_x, canvas.origin_y])
    return p


def _seam_pairs(stitch: SectionStitch, min_side: int) -> list[tuple[str, str]]:
    if stitch.pairs:
        return [(p.a, p.b) for p in stitch.pairs]
    out = []  # the stitcher kept no pairs: measure every overlap of the final placement
    for ta, tb in combinations(stitch.tiles, 2):
        box = overlap_box((ta.x, ta.y), (ta.height, ta.width), (tb.x, tb.y), (tb.height, tb.width))
        if box and min(box[2] - box[0], box[3] - box[1]) >= min_side:
            out.append((ta.tile, tb.tile))
    return out


def measure_seams(stitch: SectionStitch, settings: ReportSettings) -> list[SeamBlocks]:
    """Return re-measured residuals of every tile pair of one section, at the final placements."""
    r, s = settings.seam_half_size, settings.seam_max_shift
    cache: dict[str, np.ndarray | str] = {}

    def tile(name: str):
        if name not in cache:
            try:
                t = stitch.tile(name)
                cache[name] = read_tile(t.path, t.height, t.width, stitch.section,
                                        dtype=stitch.dtype).astype(np.float32)
            except Exception as exc:  # an unreadable tile leaves its seams unmeasured, not the report
                cache[name] = f"{name}: {type(exc).__name__}: {exc}"
        return cache[name]

    out = []
    for a, b in _seam_pairs(stitch, 2 * (r + s) + 1):
        ia, ib = tile(a), tile(b)
        if isinstance(ia, str) or isinstance(ib, str):
            err = ia if isinstance(ia, str) else ib
            out.append(SeamBlocks(a, b, BlockMatches(np.zeros((0, 2)), np.zeros((0, 2)), np.zeros(0)), err))
            continue
        ta, tb = stitch.tile(a), stitch.tile(b)
        m = seam_residual(ia, (ta.x, ta.y), ib, (tb.x, tb.y), radius=r, search=s,
                          spacing=settings.seam_spacing, min_ncc=settings.min_block_ncc,
                          smooth=settings.seam_smooth)
        out.append(SeamBlocks(a, b, m))
    return out
