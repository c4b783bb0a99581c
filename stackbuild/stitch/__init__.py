"""Per-section stitching: overlaps, phase correlation, placement solve, intensity correction.

The entry point is :func:`stackbuild.stitch.section.stitch_section`; the modules
below it are pure compute kernels (arrays in, arrays out). This file imports
nothing, so that reading the settings (``stitch.settings``) loads no stage code.

``overlaps``    which tiles overlap and the strips to compare
``phasecorr``   phase correlation with upsampled-DFT sub-pixel refinement
``pairs``       one pair: coarse shift, re-cut, refine, score
``placement``   sparse least-squares tile translations with outlier rejection
``intensity``   illumination profile, per-tile gain and offset
``inspect``     per-tile statistics and quality flags
"""
