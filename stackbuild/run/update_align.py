"""Appended sections join the stack where the held sections are: re-expressed through their anchor.

An append solves a window of sections: the new ones and the last existing ones that
anchor them. The existing sections keep their stored alignment (no plane of theirs may
move), but the window's solve puts them a little elsewhere: its end is free, and its
elastic fields differ from the stack's (measured on a 20-section synthetic stack: up to
2.9 px, not an affine apart, so one affine frame change fitted on them leaves about 1 px).
The new sections were solved against the re-solved anchors, so they are brought over by
the anchor's own change: a point of a new section goes, in the window's frame, to where
the anchor section's content lies, and from there to where the anchor's stored alignment
shows that content::

    W(P) = anchor_new.section_to_aligned(anchor_old.aligned_to_section(P))
    new'(P) = new.aligned_to_section(W(P))

so the new section keeps its solved relation to the anchor exactly, whatever the fields.
Stored as the new section's own field chain (displacement, then its affine). Pure
functions of records: no files, no Dask.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..transforms.hold import bbox_grid
from ..transforms.records import SectionAlignment
from ..transforms.types import DisplacementField

#: Node spacing (aligned pixels) of the field made for a new section solved without one.
SPACING = 64.0


def through_anchor(rec: SectionAlignment, anchor_old: SectionAlignment, anchor_new: SectionAlignment,
                   bbox: tuple[float, float, float, float]) -> SectionAlignment:
    """Return ``rec`` (solved with ``anchor_new``) re-expressed so it stands to ``anchor_old`` as it did to ``anchor_new``.

    Parameters
    ----------
    rec : SectionAlignment
        A new section's alignment from the window's solve.
    anchor_old, anchor_new : SectionAlignment
        The anchor section's stored alignment and its alignment from the same solve.
    bbox : (x0, y0, x1, y1)
        The new section's extent in section pixels (where the field must hold).

    Returns
    -------
    SectionAlignment
        The same affine, with a displacement field on ``rec``'s grid (or a grid of
        :data:`SPACING` over the section's footprint) that makes the chain equal
        ``rec.aligned_to_section(W(P))`` at every node.
    """
    grid = rec.displacement
    if grid is None:
        x0, y0, x1, y1 = bbox
        corners = rec.section_to_aligned(np.array([[x0, y0], [x1, y0], [x0, y1], [x1, y1]], float))
        lo, hi = corners.min(axis=0) - 2 * SPACING, corners.max(axis=0) + 2 * SPACING
        shape = (int(np.ceil((hi[1] - lo[1]) / SPACING)) + 1, int(np.ceil((hi[0] - lo[0]) / SPACING)) + 1)
        grid = DisplacementField.zeros(shape, (float(lo[0]), float(lo[1])), SPACING)
    ny, nx = grid.vectors.shape[:2]
    nodes = grid.nodes()
    moved = anchor_new.section_to_aligned(anchor_old.aligned_to_section(nodes))
    target = rec.aligned_to_section(moved)
    coarse = rec.affine.inverse().apply(target)
    vec = (coarse - nodes).reshape(ny, nx, 2).astype(np.float32)
    return replace(rec, displacement=DisplacementField(vec, grid.origin, grid.spacing))


def anchor_moves(rec: SectionAlignment, anchored: SectionAlignment, bbox, n: int = 9) -> float:
    """Return how far (section px) the anchoring moved a section's content: the largest over an ``n x n`` grid."""
    pts = bbox_grid(bbox, n)
    a = rec.section_to_aligned(pts)
    return float(np.hypot(*(anchored.section_to_aligned(pts) - a).T).max())
