"""Measurements of the output: seam residuals and section-to-section residuals.

Seams: the final placement of each tile pair against the offset the stitcher measured for it
(no tile read), checked against the raw tiles on a few pairs per section and on every pair that
matters to the verdict; a section whose stitcher offsets disagree with the raw tiles is
re-measured from the tiles whole (:func:`seams_of`). Alignment is estimated independently of
the aligner, from block shifts between nearby planes of the rendered volume
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
    """Residuals of one tile pair (points in section pixels), re-measured from the raw tiles or from the stitcher's pair.

    ``source`` is ``"tiles"`` (block matches over the overlap at the final placements) or
    ``"stitcher"`` (one point, the overlap's centre: the final placement against the offset the
    stitcher measured for the pair, see :func:`seams_of`).
    """

    a: str
    b: str
    blocks: BlockMatches
    error: str = ""
    source: str = "tiles"


#: pairs per section re-measured from the raw tiles to check the stitcher's pair offsets (spread over the section)
SEAM_CHECKS = 4
#: a checked pair whose stitcher-derived misfit differs from its re-measured one by more than this (px) sends the
#: whole section to the raw tiles (rule of thumb: a few times the re-measure's own spread on the phantoms)
SEAM_CHECK_TOLERANCE = 0.5


def seams_of(stitch: SectionStitch, settings: ReportSettings) -> list[SeamBlocks]:
    """Return the residual of every tile pair of one section, reading raw tiles only where needed.

    An accepted pair whose offset the stitcher measured (phase correlation of the raw overlap,
    ``PairMatch.dx, dy``) has the misfit ``(b - a)`` of the final placement minus that offset;
    that is what re-measuring the overlap at the final placement gives when the stitcher's
    offset is right, without reading a tile. Re-measured from the raw tiles
    (:func:`measure_seams`): every pair without such an offset (rejected, unrecorded), every pair
    whose misfit exceeds half the ``stitch_rms`` bar (the pairs that decide the verdict and the
    worst rows), and :data:`SEAM_CHECKS` pairs spread over the section as an independent check of
    the stitcher's offsets. When a checked or re-measured pair disagrees with its stitcher-derived
    misfit by more than :data:`SEAM_CHECK_TOLERANCE`, the stitcher's offsets of that section are not
    trusted and every pair is re-measured from the tiles.

    On 4 sections of 7 x 7 tiles of 1024 px this read 12 tile pairs' overlaps per section instead of
    156 (bench_qc.py --memory).
    """
    r, s = settings.seam_half_size, settings.seam_max_shift
    pairs = _pair_order(stitch, _seam_pairs(stitch, 2 * (r + s) + 1))
    recorded = {(p.a, p.b): p for p in stitch.pairs}
    derived: dict[int, SeamBlocks] = {}
    for k, (a, b) in enumerate(pairs):
        p = recorded.get((a, b))
        if p is None or not p.accepted or not (np.isfinite(p.dx) and np.isfinite(p.dy)):
            continue
        ta, tb = stitch.tile(a), stitch.tile(b)
        box = overlap_box((ta.x, ta.y), (ta.height, ta.width), (tb.x, tb.y), (tb.height, tb.width))
        if box is None:
            continue
        vec = np.array([[tb.x - ta.x - p.dx, tb.y - ta.y - p.dy]])
        centre = np.array([[(box[0] + box[2] - 1) / 2, (box[1] + box[3] - 1) / 2]])
        derived[k] = SeamBlocks(a, b, BlockMatches(centre, vec, np.array([p.ncc], float)), source="stitcher")
    over = {k for k, sb in derived.items() if float(np.hypot(*sb.blocks.shifts[0])) > settings.stitch_rms / 2}
    spread = set(np.unique(np.linspace(0, len(pairs) - 1, SEAM_CHECKS).round().astype(int)).tolist()) if pairs else set()
    todo = sorted((set(range(len(pairs))) - set(derived)) | over | (spread & set(derived)))
    raw = dict(zip(todo, measure_seams(stitch, settings, pairs=[pairs[k] for k in todo])))
    trusted = True
    for k, sb in raw.items():
        if k in derived and len(sb.blocks.ncc):
            if np.hypot(*(np.median(sb.blocks.shifts, axis=0) - derived[k].blocks.shifts[0])) > SEAM_CHECK_TOLERANCE:
                trusted = False
    if not trusted:
        rest = [k for k in range(len(pairs)) if k not in raw]
        raw.update(zip(rest, measure_seams(stitch, settings, pairs=[pairs[k] for k in rest])))
    return [raw.get(k) or derived[k] for k in range(len(pairs))]


@dataclass
class Measurements:
    """What the driver keeps of a build's measurements: per-section counts, the probe's per-plane and per-pair sums, notes."""

    seams: dict[int, int] = field(default_factory=dict)  # section -> tile pairs measured
    section_fps: dict[int, str] = field(default_factory=dict)  # section -> fingerprint of its stored measurement
    probe: object = None  # stackbuild.qc.probe.ProbeResult once the probe ran
    build: str = ""
    sections: list[int] = field(default_factory=list)  # sections whose rows are stored (see metrics.stored_rows)
    reused: dict[str, int] = field(default_factory=lambda: {"sections": 0})
    straightened: dict[int, float] = field(default_factory=dict)
    source: PlaneSource | None = None
    notes: list[str] = field(default_factory=list)


def section_to_output(points: np.ndarray, alignment: SectionAlignment | None, canvas: Canvas | None) -> np.ndarray:
    """Map ``(N, 2)`` section-pixel ``(x, y)`` points to level-0 output pixels.

    The stored alignment maps aligned -> section (pull-back); it is inverted by
    :meth:`~stackbuild.transforms.records.SectionAlignment.section_to_aligned`.
    """
    p = np.asarray(points, float).reshape(-1, 2)
    if alignment is not None:
        p = alignment.section_to_aligned(p)
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


def _pair_order(stitch: SectionStitch, pairs: list[tuple[str, str]]) -> list[tuple[str, str]]:
    """Return the pairs row by row (by tile a's position), so consecutive pairs share tiles."""
    pos = {t.tile: (t.y, t.x) for t in stitch.tiles}
    return sorted(pairs, key=lambda ab: (pos.get(ab[0], (0, 0)), pos.get(ab[1], (0, 0))))


def measure_seams(stitch: SectionStitch, settings: ReportSettings, *, blocks_per_seam: int = 16,
                  pairs: list[tuple[str, str]] | None = None) -> list[SeamBlocks]:
    """Return re-measured residuals of every tile pair of one section (or of ``pairs``), at the final placements.

    Each tile is read once: what a later pair needs of it (the part over that pair's
    overlap, plus 2 px) is cut out and kept until the pair is measured; pairs are visited
    row by row, so about one row of tiles' overlap strips is held, never the section (and
    no whole tile beyond the one being read). The block grid of a long overlap is thinned to
    about ``blocks_per_seam`` blocks. A pair's residual is the median of its blocks' shifts:
    16 blocks give it to about 1.25 / 4 of one block's noise (the median's standard error for
    normal data, from memory), and cost a third of the 48 used before (bench_qc.py --memory).
    """
    r, s = settings.seam_half_size, settings.seam_max_shift
    if pairs is None:
        pairs = _pair_order(stitch, _seam_pairs(stitch, 2 * (r + s) + 1))
    pending: dict[str, list[int]] = {}
    for k, (a, b) in enumerate(pairs):
        pending.setdefault(a, []).append(k)
        pending.setdefault(b, []).append(k)
    crops: dict[tuple[int, str], tuple] = {}
    failed: dict[str, str] = {}

    def read(name: str) -> None:
        """Read a tile once; keep its crop for each pair not yet measured."""
        try:
            t = stitch.tile(name)
            img = read_tile(t.path, t.height, t.width, stitch.section, dtype=stitch.dtype)
        except Exception as exc:  # an unreadable tile leaves its seams unmeasured, not the report
            failed[name] = f"{name}: {type(exc).__name__}: {exc}"
            return
        for k in pending.pop(name, []):
            other = stitch.tile(pairs[k][1] if pairs[k][0] == name else pairs[k][0])
            crops[(k, name)] = _overlap_crop(img, (t.x, t.y), (other.x, other.y), (other.height, other.width))

    out = []
    for k, (a, b) in enumerate(pairs):
        for name in (a, b):
            if (k, name) not in crops and name not in failed and name in pending:
                read(name)
        if a in failed or b in failed:
            out.append(SeamBlocks(a, b, BlockMatches(np.zeros((0, 2)), np.zeros((0, 2)), np.zeros(0)),
                                  failed.get(a) or failed[b]))
            crops.pop((k, a), None), crops.pop((k, b), None)
            continue
        (ia, pa), (ib, pb) = crops.pop((k, a)), crops.pop((k, b))
        box = None if ia is None or ib is None else overlap_box(pa, ia.shape, pb, ib.shape)
        area = 0.0 if box is None else (box[2] - box[0]) * (box[3] - box[1])
        spacing = max(settings.seam_spacing, int(np.sqrt(area / max(blocks_per_seam, 1))))
        if box is None:
            m = BlockMatches(np.zeros((0, 2)), np.zeros((0, 2)), np.zeros(0))
        else:
            m = seam_residual(ia.astype(np.float32), pa, ib.astype(np.float32), pb, radius=r, search=s,
                              spacing=spacing, min_ncc=settings.min_block_ncc, smooth=settings.seam_smooth)
        out.append(SeamBlocks(a, b, m))
    return out


def _overlap_crop(img: np.ndarray, pos, other_pos, other_shape, pad: int = 2):
    """Return the part of a placed tile over its overlap with another (plus ``pad`` px) and that part's position.

    :func:`stackbuild.qc.seams.seam_residual` on such crops cuts the same pixels as on the
    whole tiles (the crop holds the overlap and the position is moved by the crop's corner).
    ``(None, pos)`` when the tiles do not overlap.
    """
    box = overlap_box(pos, img.shape, other_pos, other_shape)
    if box is None:
        return None, pos
    h, w = img.shape
    x0 = max(0, int(np.floor(box[0] - pos[0])) - pad)
    y0 = max(0, int(np.floor(box[1] - pos[1])) - pad)
    x1 = min(w, int(np.ceil(box[2] - pos[0])) + pad)
    y1 = min(h, int(np.ceil(box[3] - pos[1])) + pad)
    return np.array(img[y0:y1, x0:x1]), (pos[0] + x0, pos[1] + y0)
