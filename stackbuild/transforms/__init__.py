"""The shared language of the pipeline: coordinate frames, transforms, and their store.

Coordinate frames (every stored transform names the two it maps between)
-----------------------------------------------------------------------
``tile``     pixels of one raw tile.
``section``  the stitched mosaic of one section (stitching places tiles here).
``coarse``   a section after its affine alignment, before the elastic warp.
``aligned``  the common frame of the whole stack; output pixels live here.
``physical`` nanometres: x, y = aligned pixel * pixel size, z = plane * thickness.

Conventions
-----------
* Points are ``(x, y)`` pairs (x = column, y = row). Arrays are indexed numpy
  style ``[row, col]`` = ``[y, x]``. Every function that takes points says so.
* A pixel's integer index denotes its **centre**; pixel ``(0, 0)`` covers
  ``[-0.5, 0.5)`` in x and y. Physical coordinate of index ``i`` is
  ``i * scale + translation`` (the pixel centre), as in the OME-NGFF
  coordinate-transformations proposal (0.6).
* Units are pixels of full resolution (level 0) unless a record says
  ``"nanometer"``.
* Direction: rendering walks backwards from an output pixel to a tile pixel,
  ``aligned -> coarse -> section -> tile``. The elastic field and the section
  affine are stored in that (pull-back) direction; tile placements are stored
  as ``tile -> section`` translations (the tile's top-left position), whose
  inverse is a subtraction.
"""
from .types import Affine2D, DisplacementField
from .records import (
    FORMAT_VERSION, Canvas, ChannelRegistration, PairMatch, SectionAlignment, SectionStitch, TilePlacement,
)
from .store import TransformStore

__all__ = [
    "Affine2D", "ChannelRegistration", "DisplacementField", "FORMAT_VERSION", "Canvas", "PairMatch",
    "SectionAlignment", "SectionStitch", "TilePlacement", "TransformStore",
]
