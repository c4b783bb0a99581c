"""Plain-language meaning of every flag and total the report shows (one line each)."""
from __future__ import annotations

#: flag -> (where it is set, what it means)
FLAGS = {
    # tiles (stitch stage, report)
    "blank": ("tile / channel", "no structure above the noise: empty resin, or a detector that saw nothing"),
    "out_of_focus": ("tile", "much less fine detail than the section's other tiles"),
    "saturated": ("tile", "a large share of pixels at the darkest or brightest value"),
    "lossy_compression": ("tile", "the tile file is lossy-compressed: fine detail may be altered"),
    "missing_file": ("tile", "the tile file is missing or unreadable now (report time); its seams were not measured"),
    # sections (stitch stage)
    "no_overlaps": ("section", "no two tiles overlap enough to be registered"),
    "disconnected": ("section", "the accepted tile pairs split the section into parts placed independently"),
    "unplaced_tiles": ("section", "some tiles could not be placed and kept their stage positions"),
    "lossy_tiles": ("section", "some tiles are lossy-compressed"),
    # sections (align stage)
    "few_features": ("section", "too few image features for a reliable coarse alignment"),
    "lost_neighbour": ("section", "the section next to it is missing from the stack"),
    "odd_size": ("section", "its imaged area is under half or over twice the stack's median"),
    "damaged": ("section", "a large part could not be matched to its neighbours (fold, tear, dirt)"),
    "interpolated": ("section", "no usable match: its transform was interpolated from its neighbours"),
    # sections (report)
    "error_over_bar": ("section", "its estimated alignment error is over the align_max bar"),
    "beyond_probe_reach": ("section", "over a quarter of its blocks moved more than the probe searches "
                                      "(probe_reach) from a neighbour: its error is at least that large"),
    "not_measured": ("section", "no probe block could be measured on it: its alignment error is unknown"),
    "blank_section": ("section", "every tile is blank: the section holds no image"),
    # channels
    "too_small": ("channel", "the marker image covers under 8 marker pixels of the section"),
    "low_mi": ("channel", "the registered marker shares little information with the EM (weak registration)"),
    "ambiguous": ("channel", "two different placements of the marker fit almost equally well"),
    "at_search_limit": ("channel", "the best placement lies at the edge of the searched range"),
}

#: total -> (unit, one-line meaning)
TOTALS = {
    "align.rms": ("px", "RMS over sections of the estimated alignment error (each section's deviation from "
                        "where its neighbours put it)"),
    "align.p95": ("px", "95th percentile over sections of the estimated alignment error"),
    "align.max": ("px", "largest estimated alignment error of any section"),
    "motion.p95": ("px", "largest 95th-percentile block shift between adjacent planes: apparent motion, "
                         "tissue change included (for information, not an error)"),
    "stitch.rms": ("px", "worst section's RMS seam misfit between overlapping tiles"),
    "stitch.p95": ("px", "worst section's 95th-percentile seam misfit"),
    "stitch.max": ("px", "largest seam misfit of any tile pair"),
    "elastic.max": ("px", "largest elastic correction the aligner applied anywhere"),
    "sections.blank": ("sections", "sections whose tiles are all blank"),
    "tiles.missing": ("tiles", "tiles whose files are missing or unreadable at report time"),
    "sections.unmeasured": ("sections", "present sections whose alignment error could not be measured at all"),
    "channels.failed": ("registrations", "marker images that could not be registered"),
    "flagged": ("items", "flagged sections plus flagged tiles"),
    "flagged.sections": ("sections", "sections carrying at least one flag"),
    "flagged.tiles": ("tiles", "tiles carrying at least one flag"),
    "lost": ("sections", "sections missing from the stack (planes left empty)"),
    "rejected": ("pairs", "tile pairs the stitcher did not trust"),
    "rejected.fraction": ("fraction", "rejected tile pairs over all tile pairs"),
    "channels.flagged": ("registrations", "marker registrations flagged or not registered"),
    "channels.landmark_rms": ("px", "RMS distance between landmark spots on the EM and on the registered marker"),
    "channels.landmark_max": ("px", "largest such landmark distance"),
    "landmarks": ("landmarks", "landmarks listed in the build's landmark file"),
    "tiles": ("tiles", "tiles in the build"),
    "pairs": ("pairs", "overlapping tile pairs measured"),
    "sections": ("sections", "sections in the stack"),
    "channels": ("registrations", "marker images registered or attempted"),
}


def flag_meaning(flag: str) -> str:
    """Return the one-line meaning of ``flag`` (the flag itself when unknown)."""
    return FLAGS.get(flag, ("", flag))[1]
