"""The output canvas: the union of every section's footprint in the aligned frame."""
from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..transforms.records import Canvas, SectionAlignment, SectionStitch
from ..transforms.store import TransformStore


def _border_points(x0: float, y0: float, x1: float, y1: float, n: int = 33) -> np.ndarray:
    t = np.linspace(0.0, 1.0, n)
    xs, ys = x0 + (x1 - x0) * t, y0 + (y1 - y0) * t
    return np.concatenate([np.column_stack([xs, np.full(n, y0)]), np.column_stack([xs, np.full(n, y1)]),
                           np.column_stack([np.full(n, x0), ys]), np.column_stack([np.full(n, x1), ys])])


def section_footprint(stitch: SectionStitch, alignment: SectionAlignment | None) -> tuple[float, float, float, float]:
    """Return ``(x0, y0, x1, y1)``: the aligned-frame extent (pixel edges) of a section's tiles.

    Notes
    -----
    Points along the border of the section's tile bounding box are mapped
    ``section -> coarse`` by the inverse affine, then ``coarse -> aligned`` by
    inverting the pull-back field ``q = p + d(p)`` with the fixed-point
    iteration ``p <- q - d(p)`` (converges for smooth fields with ``|grad d| < 1``).
    """
    pts = _border_points(*stitch.bbox())
    if alignment is not None:
        q = alignment.affine.inverse().apply(pts)
        p = q.copy()
        if alignment.displacement is not None:
            for _ in range(8):
                p = q - alignment.displacement.displacement(p)
        pts = p
    return float(pts[:, 0].min()), float(pts[:, 1].min()), float(pts[:, 0].max()), float(pts[:, 1].max())


def compute_canvas(store: TransformStore, sections: list[int], lost: list[int],
                   pixel_size_nm: float, section_thickness_nm: float) -> Canvas:
    """Return the canvas covering every section's aligned footprint, with an integer origin.

    Parameters
    ----------
    store : TransformStore
        Holds a stitch record for each of ``sections`` and, optionally, alignments.
    sections : list of int
        Sections that have tiles.
    lost : list of int
        Sections without tiles; they render as zero planes.
    pixel_size_nm, section_thickness_nm : float
        Physical scale of the output.

    Raises
    ------
    InputError
        If no section has a stitch record or the records mix pixel types.
    """
    boxes, dtypes, flagged = [], {}, {}
    lost = set(lost)
    for s in sorted(sections):
        st = store.load_stitch(s)
        if st is None or not st.tiles:
            lost.add(s)
            continue
        al = store.load_alignment(s)
        boxes.append(section_footprint(st, al))
        dtypes.setdefault(st.dtype, s)
        flags = list(st.flags) + ([] if al is None else list(al.flags))
        if flags:
            flagged[s] = flags
    if not boxes:
        raise InputError("no section has a stitch record; run the stitch stage first", file=store.root)
    if len(dtypes) > 1:
        raise InputError(f"sections mix pixel types {sorted(dtypes)}", file=store.root,
                         section=max(dtypes.values()))
    b = np.array(boxes)
    ox, oy = math.floor(b[:, 0].min() + 0.5), math.floor(b[:, 1].min() + 0.5)
    width = math.ceil(b[:, 2].max() - 0.5) - ox + 1
    height = math.ceil(b[:, 3].max() - 0.5) - oy + 1
    everything = set(sections) | lost
    return Canvas(width=int(width), height=int(height), origin_x=float(ox), origin_y=float(oy),
                  first_section=min(everything), last_section=max(everything),
                  dtype=next(iter(dtypes)), pixel_size_nm=float(pixel_size_nm),
                  section_thickness_nm=float(section_thickness_nm),
                  lost_sections=sorted(lost), flagged_sections=flagged)
