"""Settings of the align stage (TOML table ``[align]``)."""
from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError


@dataclass
class AlignSettings:
    """How sections are aligned to each other.

    Attributes
    ----------
    work_scale : int
        Coarse alignment detects features on overviews of the sections
        reduced by at least this integer factor.
    overview_size : int
        ... and by enough that the overview's longer side is at most this
        many pixels, so the feature task's memory does not grow with the
        section (a small section keeps ``work_scale``).
    model : str
        ``"rigid"``, ``"similarity"`` or ``"affine"``: the section model of the coarse stage.
    neighbours : int
        Each section is matched to the next ``neighbours`` sections (1 = z+1 only; 2 = z+1, z+2).
    detector : str
        How section pairs are matched on the overviews: ``"correlation"``
        (blocks matched by phase correlation, coarse to fine: for content
        whose local features all look alike) or local features ``"sift"``,
        ``"akaze"``, ``"orb"`` (with ``ratio`` and ``max_features``).
    ratio : float
        Largest nearest / second-nearest descriptor distance ratio of a kept feature match.
    ransac_threshold : float
        RANSAC inlier threshold, working-resolution pixels.
    min_inliers : int
        Section pairs with fewer RANSAC inliers are not used; a section left with
        no usable pair is flagged and interpolated from its neighbours.
    elastic : bool
        Run the elastic refinement after the coarse stage.
    grid_spacing : float
        Spacing of the elastic grid, full-resolution pixels.
    match_half_size : int
        Half size of a block-matching template, elastic working pixels.
    match_max_shift : int
        Largest displacement searched by block matching, elastic working pixels.
    elastic_scale : int
        Elastic block matching works on mosaics downsampled by this factor.
        4 (blocks of 48 full-resolution px flat, searched 24 px) measures
        each round at a sixteenth of the pixels; 2 (with
        ``match_half_size`` 24, ``match_max_shift`` 12) measured the last
        round finer at about twice the align CPU, for an identifiable
        residual 0.02-0.04 px lower on the grid-path variants (held-out seeds
        7-9, ``tests/benchmarks/bench_accuracy.py``: realistic/base 0.52 /
        0.52 / 0.50 px RMS at 2 against 0.53 / 0.54 / 0.54 at 4; the last of
        36 sections of realistic/long seed 7 1.46 px at 2, 1.37 at 4).
    smoothness_weight : float
        Weight of the in-plane smoothness (membrane) of each displacement field,
        relative to the block-match data; its effect grows with ``grid_spacing``
        squared, since the term penalises differences between neighbouring nodes.
    min_block_ncc : float
        Block matches with a lower correlation (of the band-passed blocks)
        are discarded.
    min_match_confidence : float
        Block matches with a lower confidence (phase-correlation peak x peak
        margin x square root of the block's isotropy, each in [0, 1]) are
        discarded; the confidence is also the match's weight in the solve.
    match_blur : float
        Structure finer than about this (Gaussian sigma, full-resolution
        pixels) has little say in block matching: vesicle-sized dots and
        texture that change from section to section must not drive it.
    region_nodes : int
        Elastic region tasks cover square blocks of this many grid nodes on a
        side (a task's memory is bounded by this, not by the section).
    region_sections : int
        ... and runs of this many sections (plus the ``neighbours`` after).
    solve_halo : int
        Each node block is solved with this many nodes of its neighbours
        around it (the overlap of the block-by-block elastic solve).
    max_features : int
        Keep at most this many of the strongest features per section.
    max_neighbour_deviation : float
        Block-match vectors farther than this (full-resolution pixels) from the
        median of their grid neighbours are discarded.
    elastic_pull : float
        Weight of the weak pull of every displacement field toward zero (fixes
        only what the data leave free: fields that change linearly with z).
    elastic_chain : float
        Weight of a first-difference term in the elastic solve, relative to the
        second-difference data (0 = none). Larger values remove more of the
        straight-line-in-z part of random warps but also straighten structures
        that slant steadily through the block.
    elastic_affine_chain : float
        Weight of a first-difference term on the affine part of the elastic
        fields (relative to the second-difference data; 0 = none): the affine
        part of the block matches fixes the steady change of the section
        affines along z, which the coarse features measure less precisely.
    elastic_rounds : int
        Rounds of block matching and solving; each round measures what the
        fields so far have left.
    early_round_coarsening : int
        Every elastic round but the last renders and matches at
        ``elastic_scale`` times this (blocks, search and regions the same in
        full-resolution pixels, a quarter of the pixels at 2); the last one
        measures at ``elastic_scale``. 1 = every round at ``elastic_scale``
        (the default: at ``elastic_scale`` 4 the rounds already measure as
        coarsely as an early round did at 2 x 2).
    damaged_fraction : float
        A section whose share of trusted block matches (in the last elastic
        round) is below this fraction of the stack's median share is flagged
        ``"damaged"``.
    damaged_contrast : float
        Grid blocks whose contrast (standard deviation) is below this fraction
        of the stack's median at the same place count as damaged; they keep a
        tenth of their weight in the elastic solve, and a section with a tenth
        of its blocks damaged is flagged ``"damaged"``.
    """

    work_scale: int = 2
    overview_size: int = 2048
    model: str = "affine"
    neighbours: int = 2
    detector: str = "correlation"
    ratio: float = 0.8
    ransac_threshold: float = 3.0
    min_inliers: int = 12
    elastic: bool = True
    grid_spacing: float = 128.0
    match_half_size: int = 12
    match_max_shift: int = 6
    elastic_scale: int = 4
    smoothness_weight: float = 0.002
    min_block_ncc: float = 0.4
    min_match_confidence: float = 0.05
    match_blur: float = 3.0
    region_nodes: int = 16
    region_sections: int = 8
    solve_halo: int = 4
    max_features: int = 4000
    max_neighbour_deviation: float = 6.0
    elastic_pull: float = 1e-3
    elastic_chain: float = 0.02
    elastic_affine_chain: float = 0.0
    elastic_rounds: int = 2
    early_round_coarsening: int = 1
    damaged_fraction: float = 0.85
    damaged_contrast: float = 0.6


#: Section models of the coarse stage.
MODELS = ("rigid", "similarity", "affine")
#: Feature detectors (OpenCV).
DETECTORS = ("correlation", "sift", "akaze", "orb")


def check_settings(settings: AlignSettings) -> None:
    """Raise :class:`InputError` naming the ``[align]`` key whose value cannot work."""
    if settings.model not in MODELS:
        raise InputError(f"[align] model must be one of {', '.join(MODELS)}, got {settings.model!r}")
    if settings.detector not in DETECTORS:
        raise InputError(f"[align] detector must be one of {', '.join(DETECTORS)}, got {settings.detector!r}")
    if not 0 < settings.ratio <= 1:
        raise InputError(f"[align] ratio must be in (0, 1], got {settings.ratio}")
    if settings.ransac_threshold <= 0 or settings.max_features < 1 or settings.min_inliers < 3:
        # an affine needs 3 point pairs, so fewer inliers can never make a model
        raise InputError("[align] ransac_threshold must be > 0, max_features >= 1 and min_inliers >= 3")
    if settings.match_half_size < 1 or settings.match_max_shift < 1:
        raise InputError("[align] match_half_size and match_max_shift must be >= 1")
    if settings.work_scale < 1 or settings.elastic_scale < 1:
        raise InputError("[align] work_scale and elastic_scale must be >= 1")
    if settings.neighbours < 1:
        raise InputError("[align] neighbours must be >= 1")
    if settings.overview_size < 64 or settings.region_nodes < 1 or settings.region_sections < 1:
        raise InputError("[align] overview_size must be >= 64, region_nodes and region_sections >= 1")
    if settings.solve_halo < 0 or settings.match_blur < 0 or not 0 <= settings.min_match_confidence < 1:
        raise InputError("[align] solve_halo and match_blur must be >= 0, min_match_confidence in [0, 1)")
    if settings.elastic_rounds < 1:
        raise InputError("[align] elastic_rounds must be >= 1")
    if not 1 <= settings.early_round_coarsening <= settings.match_half_size // 2:
        # the early rounds' blocks keep a half size of at least 2 working pixels
        raise InputError("[align] early_round_coarsening must be in [1, match_half_size / 2]")
    if settings.grid_spacing < 2 * settings.elastic_scale * settings.early_round_coarsening:
        raise InputError("[align] grid_spacing must be at least twice elastic_scale x early_round_coarsening")
