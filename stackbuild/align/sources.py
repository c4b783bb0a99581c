"""Where the align stage gets section pixels from.

A *source* is a small, picklable object with three methods:

* ``sections()`` -> sorted list of present section numbers;
* ``bbox(z)`` -> ``(x0, y0, x1, y1)``, the section-pixel extent (pixel edges);
* ``region(z, alignment, x0, y0, width, height, scale)`` -> float32 image of
  the aligned frame (the section frame when ``alignment`` is None), with the
  pixel-centre convention of :func:`stackbuild.sampler.render_region`,
  and NaN where the section has no data.

:class:`BuildSource` reads stitch records and raw tiles of a build folder;
:class:`ArraySource` serves in-memory mosaics (tests, benchmarks).
"""
from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

from ..folder import BuildFolder
from ..transforms.records import SectionAlignment
from ..transforms.store import TransformStore


def _centres(x0, y0, width, height, scale):
    half = (scale - 1) / 2.0
    return x0 + half + scale * np.arange(width), y0 + half + scale * np.arange(height)


def _box(img: np.ndarray, s: int) -> np.ndarray:
    """Return the ``s x s`` block mean of ``img`` sampled at every pixel, centred (odd kernel)."""
    k = np.ones(s + 1 - s % 2, np.float32)
    if s % 2 == 0:
        k[0] = k[-1] = 0.5
    k /= s
    return cv2.sepFilter2D(img, -1, k, k, borderType=cv2.BORDER_REPLICATE)


class BuildSource:
    """Sections of a build folder, rendered from raw tiles through the stored stitch records.

    Parameters
    ----------
    build_dir : str or Path
        The build folder; stitch records are read from ``DIR/transforms``.
    """

    def __init__(self, build_dir: str | Path):
        self.build_dir = str(build_dir)
        self._cache: dict = {}

    def __getstate__(self):
        return {"build_dir": self.build_dir, "_cache": {}}

    @property
    def store(self) -> TransformStore:
        """The build's transform store."""
        return BuildFolder(self.build_dir).store

    def sections(self) -> list[int]:
        """Return the sections that have a stitch record."""
        return self.store.sections_with("stitch")

    #: stitch records kept: a region task renders the sections of its window (region_sections +
    #: neighbours, 10 at the defaults) in turn, several times each; a record is small
    STITCH_KEPT = 16

    def _stitch(self, z: int):
        rec = self._cache.get(z)
        if rec is None:
            rec = self.store.load_stitch(z)
            if len(self._cache) >= self.STITCH_KEPT:
                self._cache.clear()
            self._cache[z] = rec
        return rec

    def bbox(self, z: int) -> tuple[float, float, float, float]:
        """Return the section's tile extent."""
        return self._stitch(z).bbox()

    def region(self, z: int, alignment: SectionAlignment | None, x0: int, y0: int,
               width: int, height: int, scale: int) -> np.ndarray:
        """Render a region through ``render_region``; uncovered pixels become NaN."""
        from ..sampler import render_region
        from ..tiles import SectionTiles

        stitch = self._stitch(z)
        img, weight = render_region(stitch, alignment, int(x0), int(y0), int(width),
                                    int(height), scale=int(scale), order=1, return_weight=True,
                                    tiles=SectionTiles(stitch))
        img = img.astype(np.float32, copy=False)
        img[weight <= 0] = np.nan
        return img


class ArraySource:
    """In-memory mosaics, one per section, in their own section frame (array pixels).

    Parameters
    ----------
    images : dict[int, ndarray]
        Section number -> 2-D image.
    """

    def __init__(self, images: dict[int, np.ndarray]):
        self.images = {int(z): np.asarray(im, np.float32) for z, im in images.items()}

    def sections(self) -> list[int]:
        """Return the section numbers."""
        return sorted(self.images)

    def bbox(self, z: int) -> tuple[float, float, float, float]:
        """Return the image extent (pixel edges)."""
        h, w = self.images[z].shape
        return -0.5, -0.5, w - 0.5, h - 0.5

    def region(self, z: int, alignment: SectionAlignment | None, x0: int, y0: int,
               width: int, height: int, scale: int) -> np.ndarray:
        """Sample the image at the region's pixel centres (box-filtered for ``scale > 1``)."""
        img = self.images[z]
        if scale > 1:
            img = _box(img, int(scale))
        xs, ys = _centres(x0, y0, width, height, scale)
        if alignment is not None:
            gx, gy = alignment.aligned_to_section_grid(xs, ys)
        else:
            gx, gy = np.meshgrid(xs, ys)
        mx, my = gx.astype(np.float32), gy.astype(np.float32)
        out = cv2.remap(img, mx, my, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                        borderValue=float("nan"))
        h, w = img.shape
        out[(mx < -0.5) | (my < -0.5) | (mx > w - 0.5) | (my > h - 0.5)] = np.nan
        return out
