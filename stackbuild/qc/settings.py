"""Settings of the report stage (TOML table ``[report]``)."""
from __future__ import annotations

from dataclasses import dataclass


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
    """

    stitch_rms: float = 0.5
    align_p95: float = 2.0
    align_max: float = 5.0
    worst: int = 10
