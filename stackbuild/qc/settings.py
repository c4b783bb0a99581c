"""Settings of the report stage (TOML table ``[report]``)."""
from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError


@dataclass
class ReportSettings:
    """Thresholds of the quality verdict.

    Attributes
    ----------
    stitch_rms : float
        A section passes stitching if its seam residual RMS (pixels) is at most this.
    align_p95 : float
        The volume passes alignment if the 95th percentile of the sections' estimated alignment
        error (``align_error_px``, level-0 pixels) is at most this.
    align_max : float
        Sections whose estimated alignment error (pixels) exceeds this are flagged ``error_over_bar``,
        and the verdict fails.
    worst : int
        How many worst sections, seams and channels the report lists.
    measure_scale : int
        The alignment-error probe reads the coarsest pyramid level whose pixel is at most
        this many full-resolution pixels, and never one coarser than a quarter of ``align_p95``
        (so it resolves the bar it checks).
    measure_max_px : int
        Figures read the finest level whose plane side fits in this many pixels.
    probe_spacing : int
        Smallest grid step of the alignment-error probe's blocks, full-resolution pixels.
    probe_blocks : int
        The probe's grid step grows so that a plane holds about this many blocks (bounds the
        work per plane: about 15 ms of CPU per block; 150 blocks give a plane's RMS error to
        about 6 % from sampling, and kept the estimate within the bar on both phantom families,
        tests/benchmarks/bench_qc.py --agreement).
    probe_half_size : int
        Template half size of that block matching, full-resolution pixels.
    probe_max_shift : int
        Largest shift that block matching searches, full-resolution pixels.
    probe_reach : int
        A first pass on 4x reduced blocks finds shifts up to this (full-resolution pixels);
        the fine match then searches ``probe_max_shift`` around it.
    probe_neighbourhood : int
        Each block's estimated error is the median over this many x this many neighbouring
        blocks (1: none): errors of the alignment are smooth over several blocks, a block
        following content of its own is not.
    probe_fine_sigma : float
        Band-pass of the probe, fine side: Gaussian sigma (full-resolution pixels) that removes
        what does not persist between sections (noise, vesicle-sized dots, cytoplasm texture).
    probe_coarse_sigma : float
        Band-pass of the probe, coarse side: sigma of the shading removed (full-resolution pixels).
    probe_min_confidence : float
        Probe blocks whose refined match has a lower correlation (0..1) are refused.
    probe_spans : int
        Each plane is matched with the next ``probe_spans`` planes (2: the redundancy measures
        the matching noise).
    slow_window : int
        Planes of the local straight-line fit that defines slow change along z; what a plane
        deviates from it is its estimated error. The identifiable residual counts as unknowable
        only what is linear in z over the whole stack, so a stack of up to ``(slow_window + 1) / 2``
        planes (37 at 73) is judged against its whole-stack line, a longer one against the line
        through the planes within ``slow_window // 2`` of each plane (drift and tissue bends slower
        than that are not counted). With 9, the slow drift of a chained alignment was missed on
        36-section stacks (realistic/long, 3 seeds, outliers replaced as in qc/runs.py: 35 % of
        sections within the bar at 9, 81 % at 73; tests/benchmarks/bench_qc.py --agreement). Each
        run task of the probe reads the pairs of ``slow_window // 2 + probe_spans`` planes on each
        side of its own.
    region_size : int
        Edge of the region one probe task follows down the stack, full-resolution pixels
        (bounds the task's memory).
    probe_task_regions : int
        Regions one probe task measures (with its run of planes); a report of many regions
        is spread over more, shorter tasks. The numbers do not depend on it (each region is
        measured on its own); only the task count and the part files merged per run change.
    blocks_per_region : int
        Probe blocks per region written to ``blocks.csv`` (a sample; -1 writes all).
    min_block_ncc : float
        Blocks (seams and sections) with a weaker correlation peak are not counted.
    seam_spacing : int
        Grid step of the block matching inside tile overlaps, pixels.
    seam_half_size : int
        Template half size inside tile overlaps, pixels.
    seam_max_shift : int
        Largest residual shift searched inside tile overlaps, pixels.
    seam_smooth : float
        Gaussian sigma (pixels) applied to both sides of an overlap before matching, against
        the independent noise of two exposures; 0 disables it.
    field_section : int
        Section whose elastic displacement field is drawn; -1 picks the one with the largest displacement.
    reslice_px : int
        The orthogonal re-slice uses the finest level whose plane side fits in this many pixels.
    """

    stitch_rms: float = 0.5
    align_p95: float = 2.0
    align_max: float = 5.0
    worst: int = 10
    measure_scale: int = 2
    measure_max_px: int = 8192
    probe_spacing: int = 128
    probe_blocks: int = 150
    probe_half_size: int = 64
    probe_max_shift: int = 12
    probe_reach: int = 64
    probe_neighbourhood: int = 3
    probe_fine_sigma: float = 3.0
    probe_coarse_sigma: float = 16.0
    probe_min_confidence: float = 0.5
    probe_spans: int = 2
    slow_window: int = 73
    region_size: int = 2048
    probe_task_regions: int = 4
    blocks_per_region: int = 4
    min_block_ncc: float = 0.3
    seam_spacing: int = 16
    seam_half_size: int = 12
    seam_max_shift: int = 6
    seam_smooth: float = 1.0
    field_section: int = -1
    reslice_px: int = 1536


def check_settings(s: ReportSettings) -> None:
    """Raise :class:`InputError` naming the ``[report]`` key whose value cannot work."""
    for key in ("worst", "measure_scale", "measure_max_px", "probe_spacing", "probe_half_size",
                "probe_max_shift", "probe_task_regions", "seam_spacing", "seam_half_size", "seam_max_shift", "reslice_px"):
        if not getattr(s, key) >= 1:
            raise InputError(f"[report] {key} must be >= 1, got {getattr(s, key)!r}")
    if not s.seam_smooth >= 0:
        raise InputError(f"[report] seam_smooth must be >= 0, got {s.seam_smooth!r}")
