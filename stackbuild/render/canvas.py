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
    ``section -> aligned`` (:meth:`SectionAlignment.section_to_aligned`).
    """
    pts = _border_points(*stitch.bbox())
    if alignment is not None:
        pts = alignment.section_to_aligned(pts)
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


#: Margin added on every side of a fresh canvas, as a fraction of its larger side, so that an
#: update or appended sections rarely move content past the low edges (our choice, no source).
MARGIN_FRACTION = 0.05


def _even_levels(height: int, width: int, chunk: int) -> tuple[int, int]:
    """Return ``height, width`` padded up until every reduced level but the top has even sides.

    Then growing the canvas later never changes how an existing pixel of an upper level
    was reduced (an odd edge is reduced by repeating its last row or column).
    """
    from .reduce import level_shapes

    while True:
        step = 2 ** (len(level_shapes(height, width, chunk)) - 1)
        h, w = -(-height // step) * step, -(-width // step) * step
        if (h, w) == (height, width):
            return h, w
        height, width = h, w


def settle_canvas(previous: Canvas | None, fresh: Canvas, *, shard: int, chunk: int) -> tuple[Canvas, dict]:
    """Return the stable canvas that holds ``fresh``'s content, and what changed.

    Parameters
    ----------
    previous : Canvas or None
        The stored canvas of the build (None for a first render).
    fresh : Canvas
        The tight canvas of the current transforms (:func:`compute_canvas`).
    shard : int
        Level-0 shard edge in pixels (chunk x chunks per shard): the canvas grows in these steps.
    chunk : int
        Chunk edge (decides the number of pyramid levels).

    Returns
    -------
    canvas : Canvas
        Without ``previous``: ``fresh`` widened by :data:`MARGIN_FRACTION` on every side (rounded up
        to whole top-level pixels) and padded so every reduced level has even sides. With it: ``previous``'s origin and size,
        grown on the high side by whole shards where content leaves it; section range, lost and
        flagged sections, dtype and scale from ``fresh``.
    facts : dict
        ``grew`` ``(dx, dy)`` pixels added on the high side; ``moved`` ``(dx, dy)`` pixels the
        origin moved (content left the low side, so every plane is rendered again);
        ``first_moved`` True when the first section changed (also a full re-render).

    Notes
    -----
    Output pixel ``[row, col]`` is aligned point ``origin + (col, row)``: with a fixed
    origin, an update never moves an existing plane.
    """
    if previous is None:
        from .reduce import level_shapes

        m = math.ceil(MARGIN_FRACTION * max(fresh.width, fresh.height))
        # A whole number of top-level pixels: every level's pixel grid keeps its phase to the content.
        step = 2 ** (len(level_shapes(fresh.height + 2 * m, fresh.width + 2 * m, chunk)) - 1)
        m = -(-m // step) * step
        h, w = _even_levels(fresh.height + 2 * m, fresh.width + 2 * m, chunk)
        return _replace_geometry(fresh, fresh.origin_x - m, fresh.origin_y - m, w, h,
                                 fresh.first_section, fresh.last_section), \
            {"grew": (0, 0), "moved": (0, 0), "first_moved": False}
    ox, oy, w, h = previous.origin_x, previous.origin_y, previous.width, previous.height
    moved = [0, 0]
    lo = (fresh.origin_x, fresh.origin_y)
    for k, (o, f) in enumerate(zip((ox, oy), lo)):
        if f < o:
            steps = math.ceil((o - f) / shard)
            moved[k] = -steps * shard
    ox, oy = ox + moved[0], oy + moved[1]
    w, h = w - moved[0], h - moved[1]
    grew = [0, 0]
    for k, (o, size, fo, fs) in enumerate(((ox, w, fresh.origin_x, fresh.width),
                                           (oy, h, fresh.origin_y, fresh.height))):
        over = (fo + fs) - (o + size)
        if over > 0:
            grew[k] = math.ceil(over / shard) * shard
    w, h = w + grew[0], h + grew[1]
    h2, w2 = _even_levels(h, w, chunk)
    grew = [grew[0] + w2 - w, grew[1] + h2 - h]
    first = min(previous.first_section, fresh.first_section)
    last = max(previous.last_section, fresh.last_section)
    canvas = _replace_geometry(fresh, ox, oy, w2, h2, first, last)
    return canvas, {"grew": tuple(grew), "moved": tuple(moved),
                    "first_moved": first != previous.first_section}


def _replace_geometry(fresh: Canvas, ox: float, oy: float, w: int, h: int, first: int, last: int) -> Canvas:
    outside = set(range(first, last + 1)) - set(range(fresh.first_section, fresh.last_section + 1))
    return Canvas(width=int(w), height=int(h), origin_x=float(ox), origin_y=float(oy),
                  first_section=int(first), last_section=int(last), dtype=fresh.dtype,
                  pixel_size_nm=fresh.pixel_size_nm, section_thickness_nm=fresh.section_thickness_nm,
                  lost_sections=sorted(set(fresh.lost_sections) | outside),
                  flagged_sections=dict(fresh.flagged_sections))
