"""Settings of the stitch stage (TOML table ``[stitch]``)."""
from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError


@dataclass
class StitchSettings:
    """How tiles of one section are registered, placed and corrected.

    Attributes
    ----------
    max_stage_error : float
        Largest expected error of one tile's stage position, pixels (each
        axis). Two neighbours may be off in opposite directions, so a pair's
        offset is searched up to twice this from its nominal value, and
        tiles are paired when their footprints could overlap that far.
    min_overlap : int
        Pairs whose overlap, even at the most favourable stage error, is
        narrower than this (pixels) are skipped.
    min_ncc : float
        Pairs whose normalised cross-correlation after the shift is lower are rejected.
    min_peak_margin : float
        Pairs whose correlation peak is not this many times the next peak are rejected.
    upsample : int
        Sub-pixel refinement factor of the upsampled-DFT method (1/upsample px).
    spectral_exponent : float
        Exponent of the spectral normalisation in the pair correlation: 1 is
        classical phase correlation, 0 plain cross-correlation; 0.8 keeps a
        sharp peak while tolerating noisy tiles.
    spectrum_sigma : float
        Sigma (cycles per pixel) of the Gaussian weight on the cross-power
        spectrum that damps noise-dominated frequencies; 0 for none.
    prior_weight : float
        Weight of the pull of each tile toward its stage position, relative to a pair of weight 1.
    max_residual : float
        Pairs whose residual after the placement solve exceeds this (pixels) are rejected
        and the solve repeated.
    illumination : bool
        Estimate and divide out the section's shared illumination profile.
    illumination_step : int
        The profile is stored at one sample per ``illumination_step`` tile
        pixels (shape ``ceil(h / step) x ceil(w / step)``).
    intensity : bool
        Solve per-tile gain and offset from the overlaps.
    blank_contrast_to_noise : float
        Tiles whose structure contrast (robust spread of 8-pixel block means)
        is less than this many times the noise left in such a block mean (the
        tile's own pixel noise / 8) are flagged blank; pure noise gives about 1.
        Independent of bit depth and grey-level range.
    focus_min : float
        Tiles whose focus measure (variance of the Laplacian, relative to the section median)
        is below this are flagged out of focus.
    saturated_max : float
        Tiles with a larger fraction of pixels piled up at their highest (or
        lowest) value are flagged saturated.
    max_gain_change : float
        Solved tile gains are kept within ``[1 / (1 + m), 1 + m]`` of the
        section's typical tile, and offsets within ``m`` times its median grey.
    intensity_pull : float
        Weight of the pull of each tile's gain and offset toward the section's
        typical tile (gain 1, offset 0), relative to one pair's equations.
    """

    max_stage_error: float = 50.0
    min_overlap: int = 16
    min_ncc: float = 0.3
    min_peak_margin: float = 1.3
    upsample: int = 100
    spectral_exponent: float = 0.8
    spectrum_sigma: float = 0.1
    prior_weight: float = 1e-3
    max_residual: float = 1.5
    illumination: bool = True
    illumination_step: int = 16
    intensity: bool = True
    blank_contrast_to_noise: float = 3.0
    focus_min: float = 0.2
    saturated_max: float = 0.05
    max_gain_change: float = 0.3
    intensity_pull: float = 0.05


def check_settings(s: StitchSettings) -> None:
    """Raise InputError naming the ``[stitch]`` key whose value cannot work."""
    rules = [
        ("max_stage_error", s.max_stage_error > 0, "> 0"), ("min_overlap", s.min_overlap >= 1, ">= 1"),
        ("upsample", s.upsample >= 1, ">= 1"), ("prior_weight", s.prior_weight > 0, "> 0"),
        ("max_residual", s.max_residual > 0, "> 0"), ("illumination_step", s.illumination_step >= 1, ">= 1"),
        ("spectral_exponent", 0 <= s.spectral_exponent <= 1, "between 0 and 1"),
        ("spectrum_sigma", s.spectrum_sigma >= 0, ">= 0"),
        ("blank_contrast_to_noise", s.blank_contrast_to_noise >= 0, ">= 0"),
        ("max_gain_change", s.max_gain_change > 0, "> 0"),
        ("intensity_pull", s.intensity_pull > 0, "> 0"),
    ]
    for key, ok, want in rules:
        if not ok:
            raise InputError(f"[stitch] {key} must be {want}, got {getattr(s, key)!r}")
