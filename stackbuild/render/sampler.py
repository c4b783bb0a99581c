"""Moved to :mod:`stackbuild.sampler` (layer 2, a pure function taking a tile provider).

A thin re-export for code written before the move; it will be removed. New code
imports :func:`stackbuild.sampler.render_region` and passes ``tiles=``
(:class:`stackbuild.tiles.SectionTiles`).
"""
from __future__ import annotations

from ..sampler import exclusive_boxes, interpolation_order, tile_footprints  # noqa: F401
from ..sampler import render_region as _render_region
from ..tiles import SectionTiles


def render_region(stitch, alignment, *args, **kw):
    """Return :func:`stackbuild.sampler.render_region` with the section's tiles read through the cache."""
    kw.setdefault("tiles", SectionTiles(stitch))
    return _render_region(stitch, alignment, *args, **kw)
