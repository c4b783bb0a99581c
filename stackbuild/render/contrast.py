"""Per-section contrast normalisation: match each section's robust range to the stack's median range.

Each section's low and high percentiles are measured on a coarse render of
its mosaic (section frame, ``scale`` x reduced, covered pixels only, rendered
strip by strip). Section
``s`` is then mapped linearly so that its range ``[lo_s, hi_s]`` lands on
``[median lo, median hi]`` over all sections: ``v -> gain_s * v + offset_s``.
The record is stored as the stack-level store document ``"contrast"``.

Each section is measured by its own task (:func:`range_job`, mapped over
sections by the render stage), which holds one strip of the coarse render and
at most ``max_samples`` kept values: about ``2 * strip * width / scale * 4``
bytes plus 4 MB at any section size, never the section.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..transforms.records import SectionStitch
from ..transforms.store import TransformStore
from ..sampler import render_region
from ..tiles import SectionTiles

DOC_KIND = "contrast"


@dataclass(frozen=True)
class RangeJob:
    """One section's range measurement: small and picklable (the task reads its own record)."""

    transforms: str
    section: int
    percentiles: tuple[float, float]
    scale: int


def range_job(job: RangeJob) -> tuple[int, float, float]:
    """Return ``(section, low, high)``: :func:`measure_range` of one section, reading its stitch record."""
    store = TransformStore(job.transforms)
    stitch = store.load_stitch(job.section)
    if stitch is None:
        raise InputError("section has tiles but no stitch record; run the stitch stage",
                         file=store.section_dir(job.section) / "stitch.json", section=job.section)
    lo, hi = measure_range(stitch, tuple(job.percentiles), job.scale)
    return job.section, lo, hi


def measure_range(stitch: SectionStitch, percentiles: tuple[float, float] = (1.0, 99.0),
                  scale: int = 4, max_samples: int = 1 << 20, strip: int = 256) -> tuple[float, float]:
    """Return the ``percentiles`` of a section's corrected intensities on a coarse render.

    The coarse mosaic is rendered in strips of ``strip`` rows, and at most about
    ``max_samples`` covered pixels are kept (every k-th, in a fixed order), so neither
    the section nor its coarse render is ever held whole.
    """
    x0, y0, x1, y1 = stitch.bbox()
    ox, oy = int(np.floor(x0 + 0.5)), int(np.floor(y0 + 0.5))
    w = int(np.ceil((x1 - 0.5 - ox + 1) / scale))
    h = int(np.ceil((y1 - 0.5 - oy + 1) / scale))
    step = max(1, -(-w * h // max_samples))
    kept, seen = [], 0
    for r0 in range(0, h, strip):
        rows = min(strip, h - r0)
        img, weight = render_region(stitch, None, ox, oy + r0 * scale, w, rows, scale=scale,
                                    return_weight=True, tiles=SectionTiles(stitch))
        vals = img[weight > 0]
        first = (-seen) % step
        kept.append(vals[first::step])
        seen += vals.size
    vals = np.concatenate(kept) if kept else np.zeros(0, np.float32)
    if vals.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(vals, percentiles)
    return float(lo), float(hi)


def contrast_record(ranges: dict[int, tuple[float, float]], percentiles: tuple[float, float],
                    scale: int = 4) -> dict:
    """Return the contrast document: per-section ranges, the target range, and each section's gain and offset."""
    if not ranges:
        return {"percentiles": list(percentiles), "scale": scale, "target": None, "sections": {}}
    lows = np.array([r[0] for r in ranges.values()])
    highs = np.array([r[1] for r in ranges.values()])
    t_lo, t_hi = float(np.median(lows)), float(np.median(highs))
    sections = {}
    for s, (lo, hi) in sorted(ranges.items()):
        gain = (t_hi - t_lo) / (hi - lo) if hi > lo else 1.0
        sections[str(s)] = {"low": lo, "high": hi, "gain": gain, "offset": t_lo - gain * lo}
    return {"percentiles": list(percentiles), "scale": scale, "target": [t_lo, t_hi], "sections": sections}


def section_contrast(record: dict | None, section: int) -> tuple[float, float] | None:
    """Return ``(gain, offset)`` of one section from a contrast document, or None."""
    if not record:
        return None
    entry = record.get("sections", {}).get(str(section))
    return None if entry is None else (float(entry["gain"]), float(entry["offset"]))
