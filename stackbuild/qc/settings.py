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
        A section passes alignment if its 95th-percentile residual (pixels) is at most this.
    align_max : float
        Residuals above this (pixels) are listed as hot spots.
    worst : int
        How many worst sections, seams and channels the report lists.
    measure_scale : int
        Section-to-section residuals are measured on the coarsest pyramid level
        whose pixel is at most this many full-resolution pixels.
    measure_max_px : int
        ... but never a level whose plane side exceeds this many pixels (memory bound).
    probe_spacing : int
        Grid step of the section-to-section block matching, full-resolution pixels.
    probe_half_size : int
        Template half size of that block matching, full-resolution pixels.
    probe_max_shift : int
        Largest shift that block matching searches, full-resolution pixels.
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
    probe_spacing: int = 96
    probe_half_size: int = 24
    probe_max_shift: int = 16
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
                "probe_max_shift", "seam_spacing", "seam_half_size", "seam_max_shift", "reslice_px"):
        if not getattr(s, key) >= 1:
            raise InputError(f"[report] {key} must be >= 1, got {getattr(s, key)!r}")
    if not s.seam_smooth >= 0:
        raise InputError(f"[report] seam_smooth must be >= 0, got {s.seam_smooth!r}")
