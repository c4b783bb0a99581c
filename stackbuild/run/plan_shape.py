"""The shape of a volume to plan for: sections, tiles, their size and layout.

Made from a described size (:meth:`VolumeShape.described`) or from a tile
manifest (:meth:`VolumeShape.from_manifest`), which reads the CSV and the
header of a single tile, never the pixels and never every header, so a plan
for 400 000 tiles starts at once.
"""
from __future__ import annotations

import csv
import math
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..manifest import image_header
from ..tiles import decoded_part

#: Tile overlap assumed for a described size, as a fraction of the tile side
#: (common practice for serial-section EM montages is 5-10 %, no source).
DESCRIBED_OVERLAP = 0.08


@dataclass(frozen=True)
class VolumeShape:
    """Counts and sizes that fix every stage's task graph.

    Attributes
    ----------
    planes : int
        Output planes (first to last section, lost ones included).
    imaged : int
        Sections that have tiles.
    tiles : int
        Tiles in the volume.
    rows, cols : int
        Tile grid of the largest section.
    tile_height, tile_width : int
        Tile size, pixels.
    itemsize : int
        Bytes per pixel (1 or 2).
    overlap_y, overlap_x : float
        Overlap of neighbouring tiles, pixels.
    segment : (int, int) or None
        Rows and columns of one independently decoded part of a compressed tile (a strip is
        ``(rows per strip, width)``, one strip for the whole image is the tile's size), as
        :func:`stackbuild.tiles.read_window` decodes them; None for uncompressed tiles, which
        are read by window. Taken from the first tile of a manifest; a described volume is
        uncompressed unless told.
    """

    planes: int
    imaged: int
    tiles: int
    rows: int
    cols: int
    tile_height: int
    tile_width: int
    itemsize: int
    overlap_y: float
    overlap_x: float
    segment: tuple | None = None

    @property
    def tiles_per_section(self) -> int:
        """Tiles of the largest section."""
        return self.rows * self.cols

    @property
    def section_height(self) -> int:
        """Height of the largest section's mosaic, pixels."""
        return int(math.ceil(self.rows * self.tile_height - (self.rows - 1) * self.overlap_y))

    @property
    def section_width(self) -> int:
        """Width of the largest section's mosaic, pixels."""
        return int(math.ceil(self.cols * self.tile_width - (self.cols - 1) * self.overlap_x))

    @property
    def tile_bytes(self) -> int:
        """Bytes of one raw tile's pixels."""
        return self.tile_height * self.tile_width * self.itemsize

    @property
    def pairs_per_section(self) -> int:
        """Overlapping neighbour pairs (left-right and top-bottom) of the largest section."""
        return self.rows * (self.cols - 1) + self.cols * (self.rows - 1)

    def to_json(self) -> dict:
        """Return the shape with its derived sizes."""
        return {**asdict(self), "tiles_per_section": self.tiles_per_section,
                "section_height": self.section_height, "section_width": self.section_width}

    @classmethod
    def described(cls, sections: int, tiles_per_section: int, tile_size: int, bits: int = 8,
                  overlap: float = DESCRIBED_OVERLAP, segment: tuple | None = None) -> "VolumeShape":
        """Return the shape of ``sections`` sections of ``tiles_per_section`` square tiles in a near-square grid."""
        if sections < 1 or tiles_per_section < 1 or tile_size < 16:
            raise InputError(f"need sections >= 1, tiles per section >= 1 and tile size >= 16; got "
                             f"{sections}, {tiles_per_section}, {tile_size}")
        if bits not in (8, 16):
            raise InputError(f"bits must be 8 or 16, got {bits}")
        cols = int(math.ceil(math.sqrt(tiles_per_section)))
        rows = int(math.ceil(tiles_per_section / cols))
        ov = overlap * tile_size
        return cls(sections, sections, sections * tiles_per_section, rows, cols, tile_size, tile_size,
                   bits // 8, ov, ov, None if segment is None else (int(segment[0]), int(segment[1])))

    @classmethod
    def from_manifest(cls, path: str | Path) -> "VolumeShape":
        """Return the shape of a tile manifest: positions from the CSV, tile size from the first tile's header.

        All tiles are taken to share the first tile's size and type (the build checks this).
        """
        path = Path(path)
        if not path.is_file():
            raise InputError("manifest not found", file=path)
        by_section: dict[int, list[tuple[float, float]]] = {}
        first = None
        with path.open(encoding="utf-8-sig", newline="") as fh:
            reader = csv.DictReader(fh)
            fields = [f.strip() for f in reader.fieldnames or []]
            missing = [c for c in ("section", "path", "x", "y") if c not in fields]
            if missing:
                raise InputError(f"missing column(s) {', '.join(missing)}", file=path, row=1)
            reader.fieldnames = fields
            for i, row in enumerate(reader, start=2):
                try:
                    s, x, y = int(row["section"]), float(row["x"]), float(row["y"])
                except (TypeError, ValueError):
                    raise InputError("section, x and y must be numbers", file=path, row=i) from None
                by_section.setdefault(s, []).append((x, y))
                if first is None:
                    p = Path(row["path"].strip())
                    first = (p if p.is_absolute() else path.parent / p, i)
        if first is None:
            raise InputError("manifest has a header but no rows", file=path)
        h, w, dtype = image_header(first[0], path, first[1])
        segment = decoded_part(first[0], (h, w))
        biggest = max(by_section.values(), key=len)
        xs, ys = np.array([p[0] for p in biggest]), np.array([p[1] for p in biggest])
        cols, step_x = _axis(xs, w)
        rows, step_y = _axis(ys, h)
        rows = max(rows, int(math.ceil(len(biggest) / cols)))
        return cls(max(by_section) - min(by_section) + 1, len(by_section),
                   sum(len(v) for v in by_section.values()), rows, cols, h, w, np.dtype(dtype).itemsize,
                   max(0.0, h - step_y), max(0.0, w - step_x), segment)


def _axis(pos: np.ndarray, size: int) -> tuple[int, float]:
    """Return the number of tile columns (or rows) along one axis and the median step between them.

    Positions closer than half a tile belong to one column (stage positions jitter by tens of pixels).
    """
    xs = np.sort(np.asarray(pos, np.float64))
    if len(xs) == 0:
        return 1, float(size)
    breaks = np.flatnonzero(np.diff(xs) > size / 2.0) + 1
    centres = np.array([g.mean() for g in np.split(xs, breaks)])
    if len(centres) < 2:
        return 1, float(size)
    return len(centres), float(np.median(np.diff(centres)))
