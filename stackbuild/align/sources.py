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

import uuid
from pathlib import Path

import cv2
import numpy as np

from ..folder import BuildFolder
from ..transforms.records import SectionAlignment
from ..tiles import ByteLRU
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


#: section-frame images each process keeps for later tasks of the same align run (the next elastic
#: round, the next window, the overview when it is at a working scale): a fixed bound, whatever the
#: section's size (a production region image at elastic scale is about 6 MB, a window of them 60 MB)
IMAGES_KEPT_BYTES = 256 * 2 ** 20
#: frame images are cut on a lattice of this many working pixels, so the requests of later rounds,
#: whose fields differ by a few pixels, land inside an image already made (common practice, no source)
_SNAP = 32
_IMAGES = ByteLRU(IMAGES_KEPT_BYTES)
#: ``(run tag, section, scale)`` -> keys of ``_IMAGES`` held for it, to find one that contains a request
_HELD: dict = {}


def _forget_other_runs(tag: str) -> None:
    """Drop the images of other align runs: a process keeps one run's images at most."""
    if any(k[0] != tag for k in _HELD):
        _IMAGES.clear()
        _HELD.clear()


class BuildSource:
    """Sections of a build folder, rendered from raw tiles through the stored stitch records.

    Aligned regions are resampled from section-frame images at the same
    scale (rendered from the tiles once and kept per process, see
    :data:`IMAGES_KEPT_BYTES`), so a section's tiles are read about once
    per process and align run instead of once per task and round.

    Parameters
    ----------
    build_dir : str or Path
        The build folder; stitch records are read from ``DIR/transforms``.
    """

    def __init__(self, build_dir: str | Path):
        self.build_dir = str(build_dir)
        self.tag = uuid.uuid4().hex        # one align run's images are never served to another
        self._cache: dict = {}

    def __getstate__(self):
        return {"build_dir": self.build_dir, "tag": self.tag, "_cache": {}}

    @property
    def store(self) -> TransformStore:
        """The build's transform store."""
        return BuildFolder(self.build_dir).store

    def sections(self) -> list[int]:
        """Return the sections that have a stitch record."""
        return self.store.sections_with("stitch")

    def _stitch(self, z: int):
        if z not in self._cache:
            self._cache.clear()
            self._cache[z] = self.store.load_stitch(z)
        return self._cache[z]

    def bbox(self, z: int) -> tuple[float, float, float, float]:
        """Return the section's tile extent."""
        return self._stitch(z).bbox()

    def region(self, z: int, alignment: SectionAlignment | None, x0: int, y0: int,
               width: int, height: int, scale: int) -> np.ndarray:
        """Return a region (NaN where no tile reaches): section-frame regions rendered from the tiles
        (and kept), aligned ones resampled bilinearly from a kept section-frame image at ``scale``."""
        x0, y0, width, height, scale = int(x0), int(y0), int(width), int(height), int(scale)
        if alignment is None:
            img = self._render(z, x0, y0, width, height, scale)
            if x0 % scale == 0 and y0 % scale == 0:     # on the lattice of every kept image (see _frame)
                self._keep(z, scale, x0, y0, img)
            return img.copy()
        return _resample(alignment, x0, y0, width, height, scale, lambda box: self._frame(z, scale, box))

    def _render(self, z, x0, y0, width, height, scale) -> np.ndarray:
        """Render a section-frame region from the tiles; NaN outside every tile's rectangle."""
        from ..sampler import render_region
        from ..tiles import SectionTiles

        stitch = self._stitch(z)
        img = render_region(stitch, None, x0, y0, width, height, scale=scale, order=1, tiles=SectionTiles(stitch))
        img = img.astype(np.float32, copy=False)
        half = (scale - 1) / 2.0
        xs, ys = x0 + half + scale * np.arange(width), y0 + half + scale * np.arange(height)
        covered = np.zeros((height, width), bool)
        for t in stitch.tiles:       # tiles are placed by translation: a pixel centre inside a tile's edges
            c = np.searchsorted(xs, [t.x - 0.5, t.x + t.width - 0.5], side="left")
            r = np.searchsorted(ys, [t.y - 0.5, t.y + t.height - 0.5], side="left")
            covered[r[0]:r[1], c[0]:c[1]] = True
        img[~covered] = np.nan
        return img

    def _keep(self, z, scale, x0, y0, img) -> tuple:
        """Keep ``img`` for :meth:`_frame` as ``(values with NaN at 0, coverage)``, or ``(values,)`` when it
        has no NaN; return that."""
        _forget_other_runs(self.tag)
        key = (self.tag, z, scale, x0, y0, img.shape)
        bad = ~np.isfinite(img)
        kept = (img,) if not bad.any() else (np.where(bad, np.float32(0), img), (~bad).astype(np.float32))
        _IMAGES.put(key, kept)
        _HELD.setdefault((self.tag, z, scale), []).append(key)
        return kept

    def _frame(self, z: int, scale: int, box) -> tuple[tuple, int, int]:
        """Return a kept section-frame image at ``scale`` holding the section points ``box``
        (``x0, y0, x1, y1``) and its first pixel ``(x0, y0)``; renders (and keeps) one if none does.

        The image is ``(values, coverage)`` as :meth:`_keep` keeps it. Every kept
        image starts on a multiple of ``scale`` and a pixel's value depends only on
        its centre, so whichever kept image serves a request (which depends on what
        ran before in this process) the result is the same. Beyond the section's
        extent nothing is covered, so the box is cut to it.
        """
        bb = self.bbox(z)
        box = (max(box[0], bb[0]), max(box[1], bb[1]), min(box[2], bb[2]), min(box[3], bb[3]))
        if box[0] > box[2] or box[1] > box[3]:      # the region lies outside the section
            box = (bb[0], bb[1], bb[0], bb[1])
        keys = _HELD.get((self.tag, z, scale), [])
        half = (scale - 1) / 2.0
        for key in list(keys):
            kept = _IMAGES.get(key)
            if kept is None:
                keys.remove(key)
                continue
            _, _, _, fx, fy, (h, w) = key
            if (fx + half <= box[0] and fy + half <= box[1]
                    and fx + half + scale * (w - 1) >= box[2] and fy + half + scale * (h - 1) >= box[3]):
                return kept, fx, fy
        step = scale * _SNAP
        fx, fy = int(np.floor(box[0] / step) * step), int(np.floor(box[1] / step) * step)
        w = int(np.ceil((box[2] - fx) / step)) * _SNAP + 1
        h = int(np.ceil((box[3] - fy) / step)) * _SNAP + 1
        return self._keep(z, scale, fx, fy, self._render(z, fx, fy, w, h, scale)), fx, fy


def _resample(alignment: SectionAlignment, x0: int, y0: int, width: int, height: int, scale: int,
              frame) -> np.ndarray:
    """Return the aligned region sampled bilinearly from a section-frame image at ``scale``.

    ``frame(box)`` gives ``(image, fx, fy)``: an image whose pixel ``[j, i]``
    has its centre at section point ``(fx, fy) + (scale - 1) / 2 + scale * (i, j)``
    and that holds every section point of ``box`` (``x0, y0, x1, y1``). A
    result pixel is NaN unless its four source pixels are mostly covered
    (their bilinear weights of covered pixels over one half).
    """
    half = (scale - 1) / 2.0
    xs = x0 + half + scale * np.arange(width, dtype=np.float64)
    ys = y0 + half + scale * np.arange(height, dtype=np.float64)
    if alignment.displacement is None:
        m = alignment.affine.matrix
        corners = np.array([[xs[0], ys[0]], [xs[-1], ys[0]], [xs[0], ys[-1]], [xs[-1], ys[-1]]])
        pts = corners @ m[:, :2].T + m[:, 2]
        lo, hi = pts.min(0), pts.max(0)
        maps = None
    else:
        from ..sampler import section_grid
        sx, sy, ref = section_grid(alignment, xs, ys)
        lo = np.array([sx.min() + ref[0], sy.min() + ref[1]])
        hi = np.array([sx.max() + ref[0], sy.max() + ref[1]])
        maps = (sx, sy, ref)
    # two source pixels of margin each side for the bilinear neighbours (and the cut to the section)
    img, fx, fy = frame((lo[0] - 2 * scale, lo[1] - 2 * scale, hi[0] + 2 * scale, hi[1] + 2 * scale))
    ox, oy = fx + half, fy + half
    if maps is None:
        # output pixel (c, r) -> source pixel ((m (x0 + half + s c, ...) - o) / s): one affine
        a = m[:, :2]
        t = (m[:, :2] @ np.array([x0 + half, y0 + half]) + m[:, 2] - np.array([ox, oy])) / scale
        mat = np.column_stack([a, t])

        def warp(src):
            return cv2.warpAffine(src, mat, (width, height), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
                                  borderMode=cv2.BORDER_CONSTANT, borderValue=0.0)
    else:
        sx, sy, ref = maps
        mx = (sx + np.float32(ref[0] - ox)) / np.float32(scale)
        my = (sy + np.float32(ref[1] - oy)) / np.float32(scale)

        def warp(src):
            return cv2.remap(src, mx, my, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=0.0)
    out = warp(img[0])
    if len(img) == 1:
        return out
    covered = warp(img[1])
    ok = covered > 0.5
    out[ok] /= covered[ok]
    out[~ok] = np.nan
    return out


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
