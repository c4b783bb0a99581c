"""The input contract: tile and channel manifests -> validated records.

Tile manifest (CSV with a header)
    ``section`` integer cutting order (gaps mean lost sections);
    ``tile`` identifier unique within the section (optional, default the file stem);
    ``path`` image file, relative to the manifest's folder or absolute;
    ``x``, ``y`` nominal stage position of the tile's top-left corner, in
    full-resolution pixels (floats).

Channel manifest (CSV with a header)
    ``section``, ``channel`` (a name), ``path``, ``pixel_size`` (nm per pixel of
    that image) and optional ``x``, ``y`` (approximate top-left, section pixels).

Landmark file (CSV with a header; optional, for checking marker registration)
    ``section``, ``channel``: a row of the channel manifest;
    ``tile`` a tile of that section (its ``tile`` id in the tile manifest) and
    ``tile_x``, ``tile_y`` a spot on that raw tile (pixels, ``(0, 0)`` the centre
    of its top-left pixel); ``marker_x``, ``marker_y`` the same spot on the
    marker image (its pixels, same convention); optional ``name``. Spots on raw
    images do not depend on any build, so one file serves every re-run.

Tile headers are checked (single channel, 8 or 16 bit, 2-D) when the manifest
is read, before any pixels are allocated, so a bad file is named up front.
"""
from __future__ import annotations

import csv
import logging
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import tifffile

from .errors import InputError
from .transforms.records import MAX_COORDINATE

log = logging.getLogger(__name__)

TILE_COLUMNS = ("section", "path", "x", "y")
CHANNEL_COLUMNS = ("section", "channel", "path", "pixel_size")
LANDMARK_COLUMNS = ("section", "channel", "tile", "tile_x", "tile_y", "marker_x", "marker_y")
#: Smallest side (pixels) of a marker image that can be registered.
MIN_CHANNEL_SIDE = 8
#: Most pixels one tile or marker image may claim in its header (default 2**30, 1 Gpx: a production
#: tile is 16.8 Mpx); a larger claim is taken for a damaged header rather than allocated. Set the
#: environment variable STACKBUILD_MAX_IMAGE_PIXELS to change it.
MAX_IMAGE_PIXELS = int(os.environ.get("STACKBUILD_MAX_IMAGE_PIXELS", 2 ** 30))
_NAME_OK = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")


@dataclass(frozen=True)
class TileEntry:
    """One row of a tile manifest, checked."""

    section: int
    tile: str
    path: Path
    x: float
    y: float
    width: int
    height: int
    dtype: str
    row: int = 0


@dataclass(frozen=True)
class ChannelEntry:
    """One row of a channel manifest, checked."""

    section: int
    channel: str
    path: Path
    pixel_size: float
    x: float | None
    y: float | None
    width: int
    height: int
    dtype: str
    row: int = 0


@dataclass
class TileManifest:
    """All tiles of a volume, grouped by section."""

    source: Path
    tiles: list[TileEntry] = field(default_factory=list)
    #: Per tile file, as checked: ``{path: (size, mtime_ns, lossy compression name or None)}``.
    files: dict[str, tuple[int, int, str | None]] = field(default_factory=dict)

    def known_headers(self) -> dict[str, tuple]:
        """Return ``{path: (size, mtime_ns, height, width, dtype, lossy)}`` of every tile file checked.

        Pass it as ``known`` to :func:`read_tile_manifest` so files unchanged since
        (same size and modification time) are not opened again.
        """
        out = {}
        for t in self.tiles:
            f = self.files.get(str(t.path))
            if f is not None:
                out[str(t.path)] = (f[0], f[1], t.height, t.width, t.dtype, f[2])
        return out

    @property
    def sections(self) -> list[int]:
        """Sorted section numbers that have at least one tile."""
        return sorted({t.section for t in self.tiles})

    def section_tiles(self, section: int) -> list[TileEntry]:
        """Tiles of one section, in manifest order."""
        return [t for t in self.tiles if t.section == section]

    @property
    def lost_sections(self) -> list[int]:
        """Section numbers missing between the first and last section."""
        present = set(self.sections)
        if not present:
            return []
        return [s for s in range(min(present), max(present) + 1) if s not in present]

    @property
    def dtype(self) -> str:
        """The tiles' common pixel type."""
        return self.tiles[0].dtype

    def to_json(self) -> dict:
        """Return the checked entries as a JSON-ready dict, one list per field (compact for 1M tiles)."""
        cols = {name: [getattr(t, name) for t in self.tiles] for name in _ENTRY_FIELDS}
        cols["path"] = [str(p) for p in cols["path"]]
        doc = {"source": str(self.source), "count": len(self.tiles), "columns": cols}
        if self.files and all(str(t.path) in self.files for t in self.tiles):
            facts = [self.files[str(t.path)] for t in self.tiles]
            doc["files"] = {"size": [f[0] for f in facts], "mtime_ns": [f[1] for f in facts],
                            "lossy": [f[2] for f in facts]}
        return doc

    @classmethod
    def from_json(cls, doc: dict) -> "TileManifest":
        """Rebuild a manifest written by :meth:`to_json`, without opening any tile.

        Raises
        ------
        ValueError
            If ``doc`` is not what :meth:`to_json` writes (missing or ragged
            columns, values of the wrong type).
        """
        try:
            n, cols, source = doc["count"], doc["columns"], Path(doc["source"])
            values = [_json_column(cols[name], kind, n, name) for name, kind in _ENTRY_FIELDS.items()]
        except (KeyError, TypeError) as exc:
            raise ValueError(f"not a tile manifest record ({type(exc).__name__}: {exc})") from None
        files = {}
        kept = doc.get("files")  # per-file facts (optional: older snapshots lack them)
        if isinstance(kept, dict) and all(isinstance(kept.get(k), list) and len(kept[k]) == n
                                          for k in ("size", "mtime_ns", "lossy")):
            files = {p: (int(a), int(b), c) for p, a, b, c in
                     zip(values[_PATH_AT], kept["size"], kept["mtime_ns"], kept["lossy"])}
        values[_PATH_AT] = [Path(p) for p in values[_PATH_AT]]
        return cls(source, [TileEntry(*row) for row in zip(*values)], files)


#: TileEntry fields in constructor order, with the JSON type each column holds.
_ENTRY_FIELDS = {"section": int, "tile": str, "path": str, "x": float, "y": float,
                 "width": int, "height": int, "dtype": str, "row": int}
_PATH_AT = list(_ENTRY_FIELDS).index("path")


def _json_column(values, kind: type, n: int, name: str) -> list:
    """Return one column of :meth:`TileManifest.to_json` output, checked for length and type."""
    if not isinstance(values, list) or len(values) != n:
        raise ValueError(f"column {name!r} is not a list of {n} values")
    if kind is float:  # JSON writes 3.0 as 3.0, but accept integers written by hand
        if not all(type(v) in (float, int) for v in values):
            raise ValueError(f"column {name!r} holds a value that is not a number")
        return [float(v) for v in values]
    if not all(type(v) is kind for v in values):
        raise ValueError(f"column {name!r} holds a value that is not {kind.__name__}")
    return values


def _read_rows(path: Path, required: tuple[str, ...]):
    if not path.is_file():
        raise InputError("manifest not found", file=path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("manifest is not a UTF-8 text file", file=path) from None
    reader = csv.DictReader(text.splitlines())
    header = [h.strip() for h in (reader.fieldnames or [])]
    if not header:
        raise InputError("manifest is empty (no header line)", file=path)
    reader.fieldnames = header
    missing = [c for c in required if c not in header]
    if missing:
        raise InputError(f"missing column(s) {', '.join(missing)}; header is {', '.join(header)}",
                         file=path, row=1)
    rows = []
    for i, row in enumerate(reader, start=2):
        if not any((v or "").strip() for v in row.values() if isinstance(v, str)):
            continue  # blank line
        if None in row:
            raise InputError("more fields than header columns", file=path, row=i)
        rows.append((i, {k: (v or "").strip() for k, v in row.items()}))
    if not rows:
        raise InputError("manifest has a header but no rows", file=path)
    return rows


def _int(value: str, name: str, path: Path, row: int) -> int:
    try:
        return int(value)
    except ValueError:
        raise InputError(f"column {name!r} must be an integer, got {value!r}", file=path, row=row) from None


def _float(value: str, name: str, path: Path, row: int) -> float:
    try:
        f = float(value)
    except ValueError:
        raise InputError(f"column {name!r} must be a number, got {value!r}", file=path, row=row) from None
    if not math.isfinite(f):
        raise InputError(f"column {name!r} must be finite, got {value!r}", file=path, row=row)
    return f


def _section(value: str, path: Path, row: int) -> int:
    section = _int(value, "section", path, row)
    if section < 0:
        raise InputError("column 'section' must be >= 0", file=path, row=row)
    return section


def _claim(seen: dict, section: int, name: str, what: str, path: Path, row: int) -> None:
    """Record ``(section, name)`` as used on ``row``; refuse a second use."""
    key = (section, name)
    if key in seen:
        raise InputError(f"duplicate {what} {name!r} in section {section} (first on line {seen[key]})",
                         file=path, row=row)
    seen[key] = row


def _resolve(value: str, manifest: Path, row: int) -> Path:
    if not value:
        raise InputError("column 'path' is empty", file=manifest, row=row)
    p = Path(value)
    if not p.is_absolute():
        p = manifest.parent / p
    if not p.is_file():
        raise InputError(f"image file not found: {p}", file=manifest, row=row)
    return p.resolve()


def image_header(path: Path, manifest: Path | None = None, row: int | None = None):
    """Return ``(height, width, dtype)`` of a single-channel 8/16-bit TIFF, reading the header only."""
    return _header(path, manifest, row)[:3]


#: TIFF compression schemes that lose information (or may: JPEG 2000, WebP,
#: JPEG XL and LERC have lossless modes that the header does not tell apart).
LOSSY_COMPRESSION = frozenset({
    "OJPEG", "JPEG", "JPEG_99", "JPEG_LOSSY", "ALT_JPEG", "JPEG_2000_LOSSY", "APERIO_JP2000_YCBC",
    "APERIO_JP2000_RGB", "JPEGXR_NDPI", "JPEGXR", "JPEG2000", "WEBP", "WEBP_DEPRECATED", "JPEGXL",
    "JPEGXL_DNG", "LERC"})


def _header(path: Path, manifest: Path | None = None, row: int | None = None):
    """Return ``(height, width, dtype, lossy)`` of a single-page, single-channel 8/16-bit TIFF.

    ``lossy`` is the name of the lossy compression scheme of its pixels, or
    None. A file of several pages is refused, naming the pages: which page is
    the image (a thumbnail first, a stack of frames) cannot be guessed safely.
    """
    where = dict(file=manifest or path, row=row)
    subject = f"{path} " if manifest else ""  # without a manifest the line already starts with the path
    quiet = logging.getLogger("tifffile")
    level = quiet.level
    quiet.setLevel(logging.CRITICAL)  # its complaints about a bad header are said once, below
    try:
        with tifffile.TiffFile(path) as tif:
            page = tif.pages.first
            shape, dtype = tuple(page.shape), page.dtype
            check_pixel_data(page, Path(path), os.fstat(tif.filehandle.fileno()).st_size, where)
            compression = getattr(page.compression, "name", str(page.compression))
            pages = len(tif.pages)
            sizes = [tuple(p.shape) for p in tif.pages[:4]] if pages > 1 else []
    except InputError:
        raise
    except OSError as exc:  # missing, unreadable: the system's reason, without the path said twice
        raise InputError(f"{subject}cannot be read ({exc.strerror or type(exc).__name__})", **where) from None
    except Exception as exc:  # tifffile raises many types for non-TIFF data
        raise InputError(f"{subject}is not a readable TIFF image ({type(exc).__name__}: {exc})", **where) from None
    finally:
        quiet.setLevel(level)
    if pages > 1:
        listed = ", ".join(f"page {i}: {' x '.join(map(str, s))}" for i, s in enumerate(sizes))
        more = ", ..." if pages > len(sizes) else ""
        raise InputError(f"{path} holds {pages} pages ({listed}{more}); a tile or marker image must be "
                         "a single-page TIFF: save the full-resolution image alone", **where)
    if len(shape) != 2:
        raise InputError(f"{path} must be a single-channel 2-D image, has shape {shape}", **where)
    if dtype.kind != "u" or dtype.itemsize not in (1, 2):
        raise InputError(f"{path} must be 8- or 16-bit unsigned, is {dtype}", **where)
    return shape[0], shape[1], dtype.str.lstrip("<>|="), (compression if compression in LOSSY_COMPRESSION
                                                          else None)


def check_pixel_data(page, path: Path, file_size: int, where: dict) -> None:
    """Raise :class:`InputError` if a TIFF page's header promises pixels the file cannot hold.

    Checked from the header alone, before any pixel is allocated: the claimed size
    against :data:`MAX_IMAGE_PIXELS`; every strip or tile of pixel data lying inside
    the file (a truncated copy fails here); and, for uncompressed data, the stored
    bytes covering every claimed pixel (a header whose size was damaged).
    """
    shape = tuple(page.shape)
    pixels = math.prod(shape)
    claim = " x ".join(map(str, shape))
    if pixels > MAX_IMAGE_PIXELS:
        raise InputError(f"{path}: header claims {claim} pixels ({pixels / 1e6:.0f} Mpx), more than the "
                         f"limit of {MAX_IMAGE_PIXELS} per image (a damaged header? the environment "
                         "variable STACKBUILD_MAX_IMAGE_PIXELS raises the limit)", **where)
    ends = [o + n for o, n in zip(page.dataoffsets, page.databytecounts)]
    if ends and max(ends) > file_size:
        raise InputError(f"{path} is truncated: its header places pixel data up to byte {max(ends)}, "
                         f"but the file has {file_size} bytes", **where)
    needed = pixels * page.dtype.itemsize if page.dtype is not None else 0
    if int(page.compression) == 1 and sum(page.databytecounts) < needed:
        raise InputError(f"{path}: header claims {claim} pixels ({needed} bytes uncompressed), but the "
                         f"file stores {sum(page.databytecounts)} bytes of pixel data (a damaged header?)",
                         **where)


def lossy_compression(path: str | Path) -> str | None:
    """Return the name of the lossy compression scheme of a TIFF's pixels, or None (header only)."""
    try:
        with tifffile.TiffFile(path) as tif:
            comp = tif.pages.first.compression
    except Exception:  # an unreadable file is named by the reader, not here
        return None
    name = getattr(comp, "name", str(comp))
    return name if name in LOSSY_COMPRESSION else None


#: Tile files checked at once: header reads wait on the disk (a network file system most of
#: all), so many in flight overlap their latency; threads suffice since tifffile parses little.
CHECK_THREADS = 16


def _check_file(job) -> tuple[Path, int, int, tuple]:
    """Return ``(path, size, mtime_ns, (height, width, dtype, lossy))`` of one tile file.

    The header is read unless ``known`` holds the file with the same size and mtime.
    """
    value, manifest, row, known = job
    image = _resolve(value, manifest, row)
    try:
        st = image.stat()
    except OSError:
        raise InputError(f"image file not found: {image}", file=manifest, row=row) from None
    k = known.get(str(image)) if known else None
    if k is not None and (k[0], k[1]) == (st.st_size, st.st_mtime_ns):
        return image, st.st_size, st.st_mtime_ns, tuple(k[2:])
    return image, st.st_size, st.st_mtime_ns, _header(image, manifest, row)


def _check_files(jobs: list, threads: int) -> list:
    """Run :func:`_check_file` over ``jobs`` on a thread pool; raise the first failure in row order."""
    if threads <= 1 or len(jobs) < 2:
        return [_check_file(j) for j in jobs]
    from concurrent.futures import ThreadPoolExecutor

    pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="stackbuild-check")
    try:
        return list(pool.map(_check_file, jobs, chunksize=1))
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def read_tile_manifest(path: str | Path, *, known: dict | None = None,
                       threads: int = CHECK_THREADS) -> TileManifest:
    """Read and check a tile manifest.

    Parameters
    ----------
    path : str or Path
        The CSV file.
    known : dict, optional
        Files checked before (:meth:`TileManifest.known_headers`): a file whose size and
        modification time are unchanged is not opened again.
    threads : int
        Tile files checked at once (see :data:`CHECK_THREADS`).

    Returns
    -------
    TileManifest
        Checked entries; every image exists and has a valid header.

    Raises
    ------
    InputError
        Naming the file and line for a missing column, a non-numeric value, a
        duplicate tile, one image file on two lines (both named), a missing
        file, a file that is not a single-page 8/16-bit single-channel TIFF
        (a multi-page file is refused, its pages listed), or tiles of mixed
        pixel type.

    Notes
    -----
    Tiles stored with lossy compression (JPEG and kin, see
    :data:`LOSSY_COMPRESSION`) are accepted with one logged warning; the
    stitch record flags each of them ``lossy_compression``.
    """
    path = Path(path)
    rows = _read_rows(path, TILE_COLUMNS)
    seen: dict[tuple[int, str], int] = {}
    files: dict[Path, int] = {}
    lossy: list[tuple[int, Path, str]] = []
    tiles = []
    parsed = [(row, rec, _section(rec["section"], path, row), _coordinate(rec["x"], "x", path, row),
               _coordinate(rec["y"], "y", path, row)) for row, rec in rows]
    checked = _check_files([(rec["path"], path, row, known) for row, rec, *_ in parsed], threads)
    facts = {}
    for (row, rec, section, x, y), (image, size, mtime, header) in zip(parsed, checked):
        if image in files:
            raise InputError(f"image file {image} is listed twice, on lines {files[image]} and {row}; "
                             "each tile must be its own file", file=path, row=row)
        files[image] = row
        tile = rec.get("tile") or image.stem
        _claim(seen, section, tile, "tile", path, row)
        h, w, dtype, lossy_name = header
        facts[str(image)] = (size, mtime, lossy_name)
        if lossy_name:
            lossy.append((row, image, lossy_name))
        tiles.append(TileEntry(section, tile, image, x, y, w, h, dtype, row))
    if lossy:
        row, image, name = lossy[0]
        log.warning("%s: %d tile(s) are stored with lossy %s compression (first: %s, line %d); they are "
                    "used as they are, and the stitch record flags them lossy_compression",
                    path, len(lossy), name, image, row)
    dtypes = {t.dtype for t in tiles}
    if len(dtypes) > 1:
        odd = next(t for t in tiles if t.dtype != tiles[0].dtype)
        raise InputError(f"tiles mix pixel types {sorted(dtypes)}; all tiles must share one",
                         file=path, row=odd.row)
    _check_layout(tiles, path)
    return TileManifest(path.resolve(), tiles, facts)


def _coordinate(value: str, name: str, path: Path, row: int) -> float:
    f = _float(value, name, path, row)
    if abs(f) > MAX_COORDINATE:
        raise InputError(f"column {name!r} is {f:g}, beyond +-{MAX_COORDINATE:g} pixels; stage positions "
                         "must be in full-resolution pixels", file=path, row=row)
    return f


#: A section may spread its tiles over at most this many times the area they cover ...
_MAX_SPREAD = 64
#: ... once its extent exceeds this many pixels (32768 x 32768): below it a sparse layout is cheap.
_SPREAD_FLOOR = 2 ** 30


def _check_layout(tiles: list[TileEntry], path: Path) -> None:
    """Refuse a section whose stage positions put its tiles absurdly far apart.

    Every stage works on a section's whole mosaic, so tiles scattered over a
    huge, nearly empty extent (positions in nanometres rather than pixels, a
    mistyped coordinate) would exhaust memory deep in a stage instead of
    being named here.
    """
    by_section: dict[int, list[TileEntry]] = {}
    for t in tiles:
        by_section.setdefault(t.section, []).append(t)
    for section, group in by_section.items():
        width = max(t.x + t.width for t in group) - min(t.x for t in group)
        height = max(t.y + t.height for t in group) - min(t.y for t in group)
        covered = sum(t.width * t.height for t in group)
        if width * height > max(_SPREAD_FLOOR, _MAX_SPREAD * covered):
            cx = sorted(t.x for t in group)[len(group) // 2]
            cy = sorted(t.y for t in group)[len(group) // 2]
            far = max(group, key=lambda t: abs(t.x - cx) + abs(t.y - cy))
            raise InputError(f"the stage positions spread the section's {len(group)} tile(s) over "
                             f"{width:.0f} x {height:.0f} pixels, {width * height / covered:.0f} times the area "
                             f"they cover (tile {far.tile!r} is farthest out); x and y must be in "
                             "full-resolution pixels", file=path, row=far.row, section=section)


def read_channel_manifest(path: str | Path) -> list[ChannelEntry]:
    """Read and check a channel manifest (see the module docstring for columns)."""
    path = Path(path)
    rows = _read_rows(path, CHANNEL_COLUMNS)
    seen: dict[tuple[int, str], int] = {}
    entries = []
    for row, rec in rows:
        section = _section(rec["section"], path, row)
        name = rec["channel"]
        if not _NAME_OK.match(name):
            raise InputError(f"channel name {name!r} must be letters, digits, '_', '-' or '.'",
                             file=path, row=row)
        pixel_size = _float(rec["pixel_size"], "pixel_size", path, row)
        if pixel_size <= 0:
            raise InputError("column 'pixel_size' must be > 0", file=path, row=row)
        x = _coordinate(rec["x"], "x", path, row) if rec.get("x") else None
        y = _coordinate(rec["y"], "y", path, row) if rec.get("y") else None
        image = _resolve(rec["path"], path, row)
        _claim(seen, section, name, "channel", path, row)
        h, w, dtype = image_header(image, path, row)
        if min(h, w) < MIN_CHANNEL_SIDE:  # the registration's smallest image (channels.mutual_info)
            raise InputError(f"{image} is {h} x {w} pixels; a marker image must be at least "
                             f"{MIN_CHANNEL_SIDE} x {MIN_CHANNEL_SIDE}", file=path, row=row)
        entries.append(ChannelEntry(section, name, image, pixel_size, x, y, w, h, dtype, row))
    return entries


@dataclass(frozen=True)
class LandmarkEntry:
    """One row of a landmark file, checked: the same spot on a raw tile and on a marker image."""

    section: int
    channel: str
    tile: str
    tile_x: float
    tile_y: float
    marker_x: float
    marker_y: float
    name: str
    row: int = 0


def read_landmarks(path: str | Path, tiles: TileManifest, channels: list[ChannelEntry]) -> list[LandmarkEntry]:
    """Read and check a landmark file against the build's tile and channel manifests.

    Raises
    ------
    InputError
        Naming the file and line for a missing column, a non-finite number, a
        section/channel pair not in the channel manifest, a tile not in that
        section, or a spot outside its tile or its marker image.
    """
    path = Path(path)
    rows = _read_rows(path, LANDMARK_COLUMNS)
    by_tile = {(t.section, t.tile): t for t in tiles.tiles}
    by_channel = {(c.section, c.channel): c for c in channels}
    out = []
    for row, rec in rows:
        section = _section(rec["section"], path, row)
        chan = by_channel.get((section, rec["channel"]))
        if chan is None:
            raise InputError(f"section {section} has no channel {rec['channel']!r} in the channel manifest",
                             file=path, row=row)
        tile = by_tile.get((section, rec["tile"]))
        if tile is None:
            raise InputError(f"section {section} has no tile {rec['tile']!r} in the tile manifest",
                             file=path, row=row)
        v = {k: _float(rec[k], k, path, row) for k in LANDMARK_COLUMNS[3:]}
        for what, (x, y), (w, h) in (("tile", (v["tile_x"], v["tile_y"]), (tile.width, tile.height)),
                                     ("marker", (v["marker_x"], v["marker_y"]), (chan.width, chan.height))):
            if not (-0.5 <= x <= w - 0.5 and -0.5 <= y <= h - 0.5):
                raise InputError(f"{what} spot ({x:g}, {y:g}) lies outside the {w} x {h} {what} image",
                                 file=path, row=row)
        name = rec.get("name") or f"row{row}"
        out.append(LandmarkEntry(section, chan.channel, tile.tile, v["tile_x"], v["tile_y"],
                                 v["marker_x"], v["marker_y"], name, row))
    return out
