"""Settings of the synthetic sample generator (``stackbuild synth``).

Every field is a plain ``int``, ``float``, ``str``, ``bool`` or a fixed tuple of
those, so the command line can offer each one as ``--field-name``. Lists of
sections or tiles are written as comma-separated strings (``"3,7"``,
``"2:r0c1,4:r1c1"``) for the same reason.
"""
from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass

from ..errors import InputError

_TILE_REF = re.compile(r"^(\d+):(r\d+c\d+)$")
_PAIR_REF = re.compile(r"^(\d+):(r\d+c\d+)-(r\d+c\d+)$")
#: The tissue families ``content`` may name.
CONTENTS = ("standard", "realistic")


@dataclass
class SynthParams:
    """What the synthetic serial-section sample looks like and how it is imaged.

    Attributes
    ----------
    seed : int
        Seed of every random choice; the same seed gives byte-identical files.
    content : str
        Which tissue family to draw: "standard" (smooth slant field, texture that
        decorrelates over about two sections) or "realistic" (every cell moves in
        its own direction plus a common drift, vesicles and cytoplasm texture new
        in every section, organelles that last a few sections, warps from a coarse
        5 x 5 control grid); see stackbuild.synth.tissue.
    sections : int
        Number of sections cut (numbered 0 .. sections-1, lost ones included).
    grid : tuple of int
        Tile rows and columns per section.
    tile_size : int
        Tile width and height in pixels.
    overlap : float
        Nominal overlap of neighbouring tiles, as a fraction of the tile size.
    irregularity : float
        Largest deviation of a true tile position from the regular grid, pixels.
    jitter : float
        Largest error of a reported stage position (uniform, each axis), pixels.
    rotation : float
        Largest rotation of a section relative to the tissue, degrees.
    offset : float
        Largest shift of a section relative to the tissue (each axis), pixels.
    scale : float
        Largest relative stretch or compression of a section (each axis independently).
    warp : float
        Largest non-affine (elastic) displacement of a section, pixels.
    slant : float
        Largest sideways drift of tissue structures between sections, pixels per section.
    slant_wavelength : float
        Spatial wavelength of the slant pattern, as a fraction of the tissue width.
    drift : tuple of float
        Common sideways drift (vx, vy) of all structures added to the slant, pixels per section.
    cell_size : float
        Mean spacing of cell centres, pixels.
    vignetting : float
        Fractional darkening at tile corners (radial, quadratic falloff).
    gain_spread : float
        Largest deviation of a tile's gain from 1.
    offset_spread : float
        Largest tile intensity offset, grey levels (8-bit scale).
    snr : float
        Signal-to-noise ratio: std of the clean tile signal / std of the Gaussian noise.
    dtype : str
        Pixel type of the tiles: uint8 or uint16 (uint16 = 8-bit scale times 256).
    bit_depth : int
        Significant bits of the tile values: 0 uses the pixel type's full range; 12 with
        uint16 writes 12-bit values (0..4095, 8-bit scale times 16) in 16-bit files, as
        many detectors do.
    compress : bool
        Write zlib-compressed TIFFs.
    pixel_size : float
        Nanometres per full-resolution pixel.
    section_thickness : float
        Nanometres per section.
    channels : int
        Number of marker channels (0, 1 or 2).
    channel_every : int
        Marker images are taken of every n-th section (section numbers divisible by n).
    channel_binning : int
        Marker pixel size as a multiple of the EM pixel size.
    channel_shift : float
        Largest unknown shift of a marker image relative to the section (each axis), section pixels.
    channel_rotation : float
        Largest unknown rotation of a marker image relative to the section, degrees.
    channel_blur : float
        Gaussian point-spread sigma of the marker microscope, marker pixels.
    channel_snr : float
        Signal-to-noise ratio of the marker images (std signal / std noise).
    landmarks : int
        Landmarks per marker image written to ``landmarks.csv`` (the same spot on a raw tile
        and on the marker image, exact from the truth); 0 writes none.
    blank_tiles : str
        Tiles that image empty resin, as "section:tile" comma-separated (e.g. "2:r1c1").
    lost_sections : str
        Sections missing from the manifest, comma-separated (e.g. "5").
    damaged_sections : str
        Sections with a fold covering about a fifth of the area, comma-separated.
    repetitive_pair : str
        One overlap filled with a periodic pattern, as "section:tileA-tileB" (e.g. "1:r0c0-r0c1").
    """

    seed: int = 0
    content: str = "standard"
    sections: int = 9
    grid: tuple[int, int] = (3, 3)
    tile_size: int = 512
    overlap: float = 0.15
    irregularity: float = 3.0
    jitter: float = 20.0
    rotation: float = 3.0
    offset: float = 100.0
    scale: float = 0.02
    warp: float = 8.0
    slant: float = 0.7
    slant_wavelength: float = 0.5
    drift: tuple[float, float] = (0.0, 0.0)
    cell_size: float = 90.0
    vignetting: float = 0.2
    gain_spread: float = 0.1
    offset_spread: float = 8.0
    snr: float = 5.0
    dtype: str = "uint8"
    bit_depth: int = 0
    compress: bool = True
    pixel_size: float = 4.0
    section_thickness: float = 40.0
    channels: int = 2
    channel_every: int = 1
    channel_binning: int = 8
    channel_shift: float = 30.0
    channel_rotation: float = 3.0
    channel_blur: float = 1.0
    channel_snr: float = 8.0
    landmarks: int = 6
    blank_tiles: str = ""
    lost_sections: str = ""
    damaged_sections: str = ""
    repetitive_pair: str = ""

    def to_json(self) -> dict:
        """Return the parameters as a plain dict (tuples become lists)."""
        return {k: list(v) if isinstance(v, tuple) else v for k, v in dataclasses.asdict(self).items()}

    @classmethod
    def from_json(cls, rec: dict) -> "SynthParams":
        """Rebuild parameters written by :meth:`to_json`."""
        names = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: tuple(v) if isinstance(v, list) else v for k, v in rec.items() if k in names})

    # -- parsed views of the list-valued strings ------------------------------

    def lost(self) -> list[int]:
        """Return the lost section numbers."""
        return _int_list(self.lost_sections, "lost_sections")

    def damaged(self) -> list[int]:
        """Return the damaged section numbers."""
        return _int_list(self.damaged_sections, "damaged_sections")

    def blank(self) -> list[tuple[int, str]]:
        """Return the blank tiles as ``(section, tile)`` pairs."""
        out = []
        for item in _items(self.blank_tiles):
            m = _TILE_REF.match(item)
            if not m:
                raise InputError(f"blank_tiles: expected 'section:rRcC', got {item!r}")
            out.append((int(m.group(1)), m.group(2)))
        return out

    def repetitive(self) -> tuple[int, str, str] | None:
        """Return the periodic-overlap pair as ``(section, tile_a, tile_b)``, or None."""
        if not self.repetitive_pair.strip():
            return None
        m = _PAIR_REF.match(self.repetitive_pair.strip())
        if not m:
            raise InputError(f"repetitive_pair: expected 'section:rRcC-rRcC', got {self.repetitive_pair!r}")
        return int(m.group(1)), m.group(2), m.group(3)

    def check(self) -> None:
        """Raise :class:`InputError` naming the first field with an impossible value."""
        rows, cols = self.grid
        rules = [
            (self.sections >= 1, "sections must be >= 1"),
            (rows >= 1 and cols >= 1, "grid must be at least (1, 1)"),
            (self.tile_size >= 32, "tile_size must be >= 32"),
            (0.0 <= self.overlap < 0.5, "overlap must be in [0, 0.5)"),
            (self.snr > 0 and self.channel_snr > 0, "snr and channel_snr must be > 0"),
            (self.dtype in ("uint8", "uint16"), "dtype must be uint8 or uint16"),
            (self.bit_depth == 0 or 8 <= self.bit_depth <= (8 if self.dtype == "uint8" else 16),
             "bit_depth must be 0, or 8 .. the pixel type's bits"),
            (self.content in CONTENTS, f"content must be one of {', '.join(CONTENTS)}"),
            (0 <= self.channels <= 2, "channels must be 0, 1 or 2"),
            (self.landmarks >= 0, "landmarks must be >= 0"),
            (self.channel_every >= 1 and self.channel_binning >= 1, "channel_every and channel_binning must be >= 1"),
            (0.0 <= self.vignetting < 1.0, "vignetting must be in [0, 1)"),
            (0.0 <= self.scale < 0.5, "scale must be in [0, 0.5)"),
            (self.cell_size >= 10, "cell_size must be >= 10"),
            (self.slant_wavelength > 0, "slant_wavelength must be > 0"),
            (min(self.irregularity, self.jitter, self.rotation, self.offset, self.warp, self.slant,
                 self.gain_spread, self.offset_spread, self.channel_shift, self.channel_rotation,
                 self.channel_blur) >= 0, "spreads and amplitudes must be >= 0"),
        ]
        for ok, reason in rules:
            if not ok:
                raise InputError(f"synth settings: {reason}")
        names = {f"r{r}c{c}" for r in range(rows) for c in range(cols)}
        for s in self.lost() + self.damaged() + [b[0] for b in self.blank()]:
            if not 0 <= s < self.sections:
                raise InputError(f"synth settings: section {s} is outside 0..{self.sections - 1}")
        for s, t in self.blank():
            if t not in names:
                raise InputError(f"synth settings: blank tile {t!r} is not in the {rows}x{cols} grid", section=s)
        rep = self.repetitive()
        if rep is not None:
            s, a, b = rep
            if a not in names or b not in names or not _neighbours(a, b):
                raise InputError(f"synth settings: repetitive_pair {a}-{b} must be two neighbouring tiles",
                                 section=s)


def tile_name(row: int, col: int) -> str:
    """Return the tile id of grid position ``(row, col)``, e.g. ``r0c1``."""
    return f"r{row}c{col}"


def tile_index(name: str) -> tuple[int, int]:
    """Return ``(row, col)`` of a tile id written by :func:`tile_name`."""
    r, c = name[1:].split("c")
    return int(r), int(c)


def _neighbours(a: str, b: str) -> bool:
    (ra, ca), (rb, cb) = tile_index(a), tile_index(b)
    return abs(ra - rb) + abs(ca - cb) == 1


def _items(text: str) -> list[str]:
    return [t.strip() for t in text.split(",") if t.strip()]


def _int_list(text: str, name: str) -> list[int]:
    try:
        return sorted({int(t) for t in _items(text)})
    except ValueError:
        raise InputError(f"{name}: expected comma-separated section numbers, got {text!r}") from None
