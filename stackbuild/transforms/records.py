"""Typed, versioned records of what each stage found, as stored in ``DIR/transforms/``.

Each record converts to and from a JSON-ready ``dict`` (``to_json`` /
``from_json``); the store adds the envelope (format name, version, kind,
frames, units) and validates it on reading. Large arrays (illumination
profiles, displacement fields) are stored as zarr arrays beside the JSON.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields

import numpy as np

from .types import Affine2D, DisplacementField

#: Version of the on-disk transform format. Bump when a record changes shape;
#: readers refuse files from a newer version.
FORMAT_VERSION = 1


def _plain(cls, rec: dict):
    names = {f.name for f in fields(cls)}
    return cls(**{k: v for k, v in rec.items() if k in names})


#: Largest coordinate (pixels) a record may hold: far beyond any real mosaic (4 m at 4 nm),
#: yet small enough that float64 positions keep sub-pixel precision.
MAX_COORDINATE = 1e9
#: Largest scale factor (absolute matrix entry) and smallest |determinant| of a stored section affine:
#: sections are cut from one block and imaged at one pixel size, so their maps scale by about 1;
#: anything beyond is a damaged or hand-edited record (common practice, no source).
MAX_AFFINE_SCALE = 100.0
MIN_AFFINE_DETERMINANT = 1e-4


def check_section_affine(affine, what: str) -> None:
    """Raise ValueError if a stored section affine is finite but absurd (see :data:`MAX_AFFINE_SCALE`)."""
    m = affine.matrix
    if np.abs(m[:, :2]).max() > MAX_AFFINE_SCALE:
        raise ValueError(f"{what} scales by up to {np.abs(m[:, :2]).max():g}, beyond +-{MAX_AFFINE_SCALE:g}")
    if abs(np.linalg.det(m[:, :2])) < MIN_AFFINE_DETERMINANT:
        raise ValueError(f"{what} is (nearly) singular: determinant {np.linalg.det(m[:, :2]):g}")
    if np.abs(m[:, 2]).max() > MAX_COORDINATE:
        raise ValueError(f"{what} translates by {np.abs(m[:, 2]).max():g}, beyond +-{MAX_COORDINATE:g} pixels")


def _require_finite(obj, names: tuple[str, ...], what: str, limit: float | None = None) -> None:
    """Raise ValueError if an attribute of ``obj`` is not a finite number (or exceeds ``limit``)."""
    for name in names:
        v = getattr(obj, name)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v) \
                or (limit is not None and abs(v) > limit):
            bound = "" if limit is None else f" within +-{limit:g}"
            raise ValueError(f"{what} {name} must be a finite number{bound}, got {v!r}")


@dataclass
class TilePlacement:
    """Where one tile sits in its section mosaic, and how to correct its intensity.

    ``x, y`` is the solved ``tile -> section`` translation (the position of the
    tile's pixel (0, 0) centre in section pixels). Corrected intensity is
    ``gain * raw / illumination + offset``.
    """

    tile: str
    path: str
    width: int
    height: int
    stage_x: float
    stage_y: float
    x: float
    y: float
    gain: float = 1.0
    offset: float = 0.0
    flags: list[str] = field(default_factory=list)
    stats: dict = field(default_factory=dict)
    residual: float | None = None

    def to_json(self) -> dict:
        """Return a JSON-ready dict."""
        return asdict(self)

    @classmethod
    def from_json(cls, rec: dict) -> "TilePlacement":
        """Read a dict written by :meth:`to_json`; positions and corrections must be finite."""
        t = _plain(cls, rec)
        what = f"tile {t.tile!r}"
        _require_finite(t, ("stage_x", "stage_y", "x", "y"), what, MAX_COORDINATE)
        _require_finite(t, ("gain", "offset"), what)
        if not (isinstance(t.width, int) and isinstance(t.height, int) and t.width > 0 and t.height > 0):
            raise ValueError(f"{what} width and height must be positive integers, got {t.width!r}, {t.height!r}")
        return t


@dataclass
class PairMatch:
    """One registered tile pair: measured offset of tile ``b`` relative to tile ``a``.

    ``dx, dy`` = position of ``b`` minus position of ``a`` (section pixels)
    as measured by phase correlation; ``stage_dx, stage_dy`` the same from the
    stage positions. ``residual`` is filled in by the placement solve.
    """

    a: str
    b: str
    dx: float
    dy: float
    stage_dx: float
    stage_dy: float
    ncc: float
    peak_ratio: float
    accepted: bool
    reason: str = ""
    weight: float = 1.0
    residual: float | None = None

    def to_json(self) -> dict:
        """Return a JSON-ready dict."""
        return asdict(self)

    @classmethod
    def from_json(cls, rec: dict) -> "PairMatch":
        """Read a dict written by :meth:`to_json`."""
        return _plain(cls, rec)


@dataclass
class SectionStitch:
    """The stitching result of one section (``tile -> section``)."""

    section: int
    dtype: str
    tiles: list[TilePlacement]
    pairs: list[PairMatch] = field(default_factory=list)
    illumination: np.ndarray | None = None
    illumination_step: int = 1
    flags: list[str] = field(default_factory=list)
    stats: dict = field(default_factory=dict)

    def bbox(self) -> tuple[float, float, float, float]:
        """Return ``(x0, y0, x1, y1)``: the section-pixel extent covered by the tiles (pixel edges)."""
        x0 = min(t.x for t in self.tiles) - 0.5
        y0 = min(t.y for t in self.tiles) - 0.5
        x1 = max(t.x + t.width for t in self.tiles) - 0.5
        y1 = max(t.y + t.height for t in self.tiles) - 0.5
        return x0, y0, x1, y1

    def tile(self, name: str) -> TilePlacement:
        """Return the placement of tile ``name``."""
        for t in self.tiles:
            if t.tile == name:
                return t
        raise KeyError(name)

    def to_json(self) -> dict:
        """Return a JSON-ready dict (the illumination array is stored apart)."""
        return {
            "section": self.section, "dtype": self.dtype,
            "illumination_step": self.illumination_step,
            "has_illumination": self.illumination is not None,
            "flags": list(self.flags), "stats": self.stats,
            "tiles": [t.to_json() for t in self.tiles],
            "pairs": [p.to_json() for p in self.pairs],
        }

    @classmethod
    def from_json(cls, rec: dict, illumination: np.ndarray | None = None) -> "SectionStitch":
        """Read a dict written by :meth:`to_json`."""
        return cls(section=int(rec["section"]), dtype=rec["dtype"],
                   tiles=[TilePlacement.from_json(t) for t in rec["tiles"]],
                   pairs=[PairMatch.from_json(p) for p in rec.get("pairs", [])],
                   illumination=illumination,
                   illumination_step=int(rec.get("illumination_step", 1)),
                   flags=list(rec.get("flags", [])), stats=dict(rec.get("stats", {})))


@dataclass
class SectionAlignment:
    """The alignment of one section: ``aligned -> coarse`` field, then ``coarse -> section`` affine."""

    section: int
    affine: Affine2D = field(default_factory=Affine2D.identity)
    displacement: DisplacementField | None = None
    flags: list[str] = field(default_factory=list)
    stats: dict = field(default_factory=dict)

    def aligned_to_section(self, points: np.ndarray) -> np.ndarray:
        """Map ``(N, 2)`` aligned-frame ``(x, y)`` points to section pixels."""
        p = np.asarray(points, dtype=np.float64)
        if self.displacement is not None:
            p = self.displacement.apply(p)
        return self.affine.apply(p)

    def section_to_aligned(self, points: np.ndarray, *, tol: float = 1e-4, max_iterations: int = 100) -> np.ndarray:
        """Return the aligned-frame ``(N, 2)`` ``(x, y)`` points that this alignment maps to section ``points``.

        Inverts ``p -> affine(p + d(p))``: the affine exactly, the field by the
        fixed-point iteration ``p <- q - d(p)`` until a step moves no point by
        more than ``tol`` pixels. It converges when the field is a contraction
        (``|grad d| < 1``, true of smooth fields small against their grid spacing).

        Raises
        ------
        ValueError
            If ``max_iterations`` steps do not converge (a field too steep to invert).
        """
        q = self.affine.inverse().apply(np.asarray(points, dtype=np.float64))
        if self.displacement is None:
            return q
        p = q.copy()
        step = 0.0
        for _ in range(max_iterations):
            nxt = q - self.displacement.displacement(p)
            step = float(np.abs(nxt - p).max(initial=0.0))
            p = nxt
            if step <= tol:
                return p
        raise ValueError(f"section {self.section}: the section -> aligned inverse moved points by {step:.3g} px "
                         f"after {max_iterations} iterations (tolerance {tol:g} px); the field is too steep")

    def aligned_to_section_grid(self, xs: np.ndarray, ys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Return section-frame ``(sx, sy)`` (float64, ``len(ys) x len(xs)``) of the aligned grid ``xs`` x ``ys``."""
        xs, ys = np.asarray(xs, dtype=np.float64), np.asarray(ys, dtype=np.float64)
        m = self.affine.matrix
        if self.displacement is None:
            cx, cy = np.broadcast_to(xs[None, :], (len(ys), len(xs))), np.broadcast_to(ys[:, None], (len(ys), len(xs)))
        else:
            d = self.displacement.displacement_grid(xs, ys).astype(np.float64)
            cx = xs[None, :] + d[..., 0]
            cy = ys[:, None] + d[..., 1]
        return m[0, 0] * cx + m[0, 1] * cy + m[0, 2], m[1, 0] * cx + m[1, 1] * cy + m[1, 2]

    def to_json(self) -> dict:
        """Return a JSON-ready dict (the displacement array is stored apart)."""
        rec = {"section": self.section, "flags": list(self.flags), "stats": self.stats,
               "transforms": {
                   "type": "sequence",
                   "input": "aligned", "output": "section",
                   "transformations": [],
               }}
        seq = rec["transforms"]["transformations"]
        if self.displacement is not None:
            d = self.displacement
            seq.append({"type": "displacements", "input": "aligned", "output": "coarse",
                        "path": "displacement.zarr", "origin": list(d.origin),
                        "spacing": d.spacing, "shape": list(d.vectors.shape[:2]),
                        "components": ["dx", "dy"], "interpolation": "linear"})
        seq.append({**self.affine.to_json(), "input": "coarse", "output": "section"})
        return rec

    @classmethod
    def from_json(cls, rec: dict, vectors: np.ndarray | None = None) -> "SectionAlignment":
        """Read a dict written by :meth:`to_json`; ``vectors`` is the stored displacement array."""
        affine, fld = Affine2D.identity(), None
        for t in rec["transforms"]["transformations"]:
            if t["type"] == "affine":
                affine = Affine2D.from_json(t)
                check_section_affine(affine, "the coarse -> section affine")
            elif t["type"] == "displacements":
                if vectors is None:
                    raise ValueError("record refers to a displacement field but none was given")
                fld = DisplacementField(vectors, tuple(t["origin"]), t["spacing"])
                big = float(np.abs(fld.vectors).max(initial=0.0))
                if big > MAX_COORDINATE or max(map(abs, fld.origin)) > MAX_COORDINATE:
                    raise ValueError(f"displacement field holds a vector or origin beyond +-{MAX_COORDINATE:g} "
                                     f"pixels (largest vector {big:g})")
            else:
                raise ValueError(f"unknown transform type {t['type']!r}")
        return cls(int(rec["section"]), affine, fld, list(rec.get("flags", [])), dict(rec.get("stats", {})))


@dataclass
class Canvas:
    """The output volume's extent in the aligned frame, and its physical scale.

    Output pixel ``[row, col]`` of plane ``z`` is aligned point
    ``(origin_x + col, origin_y + row)`` of section ``first_section + z``.
    """

    width: int
    height: int
    origin_x: float
    origin_y: float
    first_section: int
    last_section: int
    dtype: str
    pixel_size_nm: float = 4.0
    section_thickness_nm: float = 40.0
    lost_sections: list[int] = field(default_factory=list)
    flagged_sections: dict = field(default_factory=dict)

    @property
    def depth(self) -> int:
        """Number of output planes (lost sections included)."""
        return self.last_section - self.first_section + 1

    def to_json(self) -> dict:
        """Return a JSON-ready dict."""
        d = asdict(self)
        d["flagged_sections"] = {str(k): v for k, v in self.flagged_sections.items()}
        return d

    @classmethod
    def from_json(cls, rec: dict) -> "Canvas":
        """Read a dict written by :meth:`to_json`."""
        c = _plain(cls, rec)
        c.flagged_sections = {int(k): v for k, v in c.flagged_sections.items()}
        _require_finite(c, ("origin_x", "origin_y"), "canvas", MAX_COORDINATE)
        _require_finite(c, ("pixel_size_nm", "section_thickness_nm"), "canvas")
        if not (isinstance(c.width, int) and isinstance(c.height, int) and c.width > 0 and c.height > 0) \
                or min(c.pixel_size_nm, c.section_thickness_nm) <= 0 or c.last_section < c.first_section:
            raise ValueError("canvas width, height, pixel_size_nm and section_thickness_nm must be > 0 "
                             "and last_section >= first_section")
        return c


#: The frames every channel registration maps between: marker-image pixels -> section pixels.
CHANNEL_FRAMES = ("channel", "section")


@dataclass
class ChannelRegistration:
    """One marker image registered to its EM section: the ``channel pixel -> section pixel`` affine and its facts.

    The typed form of a record of the channels stage (``transforms/sections/N/channels.json``,
    one per marker under ``"channels"``). Its maps say which frames they join
    (``"input": "channel", "output": "section"``); :meth:`from_json` refuses any other.
    ``facts`` keeps the whole stored record (measures, flags, timings) as written.
    """

    section: int
    channel: str
    path: str
    registered: bool
    to_section: Affine2D
    flags: list[str] = field(default_factory=list)
    facts: dict = field(default_factory=dict)

    @classmethod
    def from_json(cls, rec: dict, *, section: int | None = None, channel: str | None = None) -> "ChannelRegistration":
        """Return the registration stored as ``rec`` (``section``, ``channel``: where the record omits them).

        Raises
        ------
        ValueError
            If a stored map joins other frames than channel -> section, or there is no map.
        """
        for key in ("transform", "initial"):
            t = rec.get(key)
            if isinstance(t, dict) and ("input" in t or "output" in t) \
                    and (t.get("input"), t.get("output")) != CHANNEL_FRAMES:
                raise ValueError(f"channel record's {key} maps {t.get('input')} -> {t.get('output')}, "
                                 f"expected {CHANNEL_FRAMES[0]} -> {CHANNEL_FRAMES[1]}")
        if not isinstance(rec.get("transform"), dict):
            raise ValueError("channel record holds no transform")
        return cls(section=int(rec.get("section", section)), channel=str(rec.get("channel", channel)),
                   path=str(rec.get("path", "")), registered=rec.get("registered") is not False,
                   to_section=Affine2D.from_json(rec["transform"]), flags=list(rec.get("flags", [])),
                   facts=dict(rec))

    def to_json(self) -> dict:
        """Return the record as stored (its facts, with the map and its frames)."""
        frames = dict(zip(("input", "output"), CHANNEL_FRAMES))
        return {**self.facts, "section": self.section, "channel": self.channel, "path": self.path,
                "registered": self.registered, "transform": {**self.to_section.to_json(), **frames},
                "flags": list(self.flags)}
