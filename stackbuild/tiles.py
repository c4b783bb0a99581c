"""Reading raw tile pixels: the one place every stage decodes a tile, and the cache of prepared tiles.

Tiles are only ever read. Headers were checked when the manifest was read
(:func:`stackbuild.manifest.image_header`); here the decoded pixels are
checked against what was recorded, so a file that changed or broke since
then is named instead of silently rendered.

A tile shared by neighbouring output blocks is decoded and corrected once and
then served from a per-process cache (:data:`TILE_CACHE`). The cache is
bounded in bytes, sized from the tiles it serves (:func:`cache_bytes_for`: room
for :data:`TILES_KEPT` full-resolution prepared tiles of the largest tile size seen,
so more at a reduced scale), and
evicts the least recently used entry first. Entries are keyed by the file's
path, size and modification time, so a re-imaged tile is read afresh.

:class:`SectionTiles` is the tile provider that :func:`stackbuild.sampler.render_region`
takes; the sampler itself never touches files.
"""
from __future__ import annotations

import functools
import hashlib
import threading
from collections import Counter, OrderedDict
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
import tifffile

from .errors import InputError
from .tiffhead import plain_layout


def read_tile(path: str | Path, height: int, width: int, section: int | None = None, *,
              dtype: str | None = None, what: str = "tile", source: str = "stitch record") -> np.ndarray:
    """Return the pixels of one tile (its first TIFF page), checked against the recorded size and type.

    Parameters
    ----------
    path : str or Path
        The tile image.
    height, width : int
        The size recorded for it (manifest header or stitch record).
    section : int, optional
        Its section, for the error message.
    dtype : str, optional
        The pixel type recorded for it (``"u1"`` or ``"uint8"`` alike); not checked if None.
    what : str
        How the tile is named in messages (e.g. ``"tile 'r0c1' (manifest line 4)"``).
    source : str
        Where the recorded size came from, for messages (``"header"``, ``"stitch record"``).

    Raises
    ------
    InputError
        Naming the file when it is missing, cannot be decoded, or does not
        have the recorded shape or type.
    """
    img = _read_plain(path, height, width, section, dtype, what, source)
    if img is not None:
        return img
    try:
        img = tifffile.imread(path, key=0)
    except Exception as exc:  # tifffile and the codecs raise many exception types
        raise InputError(f"cannot read the pixels of {what}: {type(exc).__name__}: {exc}",
                         file=path, section=section) from None
    _check_pixels(img.shape, img.dtype, path, height, width, section, dtype, what, source)
    _count_read(path, img.size)
    return img


@functools.lru_cache(maxsize=4096)
def _plain_layout(path: str, size: int, mtime_ns: int):
    """Return ``(offset, shape, dtype)`` of the first page's pixels when they lie uncompressed in one run, else None.

    Such a tile (the usual output of an acquisition system) can have any window of it
    read without decoding the rest (``tifffile``'s ``is_memmappable``). Keyed by size and
    modification time, so a rewritten file is looked at again.
    """
    found = plain_layout(path)      # the header alone, for the usual plain tile; tifffile otherwise
    if found is not None:
        offset, shape, dt = found
    else:
        try:
            with tifffile.TiffFile(path) as tf:
                page = tf.pages[0]
                if not page.is_memmappable or page.ndim != 2:
                    return None
                dt = np.dtype(tf.byteorder + page.dtype.str[1:])
                offset = int(page.dataoffsets[0])
                shape = tuple(int(n) for n in page.shape)
        except Exception:  # any trouble: the whole-tile reader names it
            return None
    if offset + shape[0] * shape[1] * dt.itemsize > size:
        return None
    return offset, shape, dt


def _file_and_layout(path):
    """Return ``(path, its stat, its plain layout or None)`` (see :func:`_plain_layout`), or None if it cannot be stat'ed."""
    p = Path(path)
    try:
        st = p.stat()
    except OSError:
        return None
    return p, st, _plain_layout(str(p), st.st_size, st.st_mtime_ns)


def _read_plain(path, height: int, width: int, section, dtype, what: str, source: str) -> np.ndarray | None:
    """Return a whole tile stored uncompressed in one run (see :func:`_plain_layout`) with one read, or None.

    The layout is looked up once per file version, so reading such a tile again (a task's tile
    cache dropped it) skips parsing the TIFF structure: about a third of ``tifffile.imread``'s
    CPU for a 1024 px 8-bit tile. None for any other file, or any trouble: :func:`read_tile`
    then reads it with tifffile and names what is wrong.
    """
    found = _file_and_layout(path)
    if found is None or found[2] is None:
        return None
    p, _, (offset, shape, dt) = found
    _check_pixels(shape, dt.newbyteorder("="), p, height, width, section, dtype, what, source)
    try:
        img = np.fromfile(p, dtype=dt, count=shape[0] * shape[1], offset=offset).reshape(shape)
    except (OSError, ValueError):
        return None
    img = img.astype(dt.newbyteorder("="), copy=False)
    _count_read(p, img.size)
    return img


def read_window(path: str | Path, height: int, width: int, rows: tuple[int, int], cols: tuple[int, int],
                section: int | None = None, *, dtype: str | None = None, what: str = "tile",
                source: str = "stitch record") -> np.ndarray | None:
    """Return pixels ``[r0:r1, c0:c1]`` of a tile read without the rest of it, or None if its file does not allow that.

    Tiles stored uncompressed in one run (see :func:`_plain_layout`) are read by mapping
    only the window. Compressed tiles (see :func:`_segment_layout`) have only the strips or
    TIFF tiles under the window decoded (all of it when the image is one strip), through a
    small per-process cache of decoded raw segments (:data:`SEGMENT_CACHE`), so the
    neighbouring windows of one task decode each segment once. For others the caller reads
    the whole tile (:func:`read_tile`). The recorded size and type are checked as :func:`read_tile` checks them.
    """
    found = _file_and_layout(path)
    if found is None:
        return None
    p, st, layout = found
    if layout is None:
        segments = _segment_layout(str(p), st.st_size, st.st_mtime_ns)
        if segments is None:
            return None
        _check_pixels(segments.shape, segments.dtype, p, height, width, section, dtype, what, source)
        return _read_segments(p, (st.st_size, st.st_mtime_ns), segments, rows, cols)
    offset, shape, dt = layout
    _check_pixels(shape, dt.newbyteorder("="), p, height, width, section, dtype, what, source)
    (r0, r1), (c0, c1) = rows, cols
    try:
        mm = np.memmap(p, dtype=dt, mode="r", offset=offset, shape=shape)
        out = np.array(mm[r0:r1, c0:c1], dtype=dt.newbyteorder("="))
        del mm
    except (OSError, ValueError):
        return None
    _count_read(p, out.size)
    return out


@dataclass(frozen=True)
class Segments:
    """Where the first page's pixels lie when they are compressed in independently decoded parts (strips or tiles).

    Attributes
    ----------
    shape : (int, int)
        The image's rows and columns.
    dtype : numpy.dtype
        Its pixel type (native byte order, as decoded).
    size : (int, int)
        Rows and columns of one segment (a strip is ``(rows per strip, width)``).
    grid : (int, int)
        Segments down and across.
    offsets, counts : tuple of int
        File offset and byte count of every segment, row by row.
    """

    shape: tuple
    dtype: np.dtype
    size: tuple
    grid: tuple
    offsets: tuple
    counts: tuple


@functools.lru_cache(maxsize=4096)
def _segment_layout(path: str, size: int, mtime_ns: int) -> Segments | None:
    """Return the :class:`Segments` of the first page when it is compressed (one strip or several strips or tiles), else None.

    One strip for the whole image is one segment: decoded whole, but cached raw (a quarter of
    the prepared float32 tile for 8-bit pixels) and corrected window by window. Only
    single-channel 2-D pages qualify, with every segment present in the file (no sparse
    segments); keyed by size and modification time like :func:`_plain_layout`.
    """
    try:
        with tifffile.TiffFile(path) as tf:
            page = tf.pages[0]
            chunks, chunked = tuple(page.chunks), tuple(page.chunked)
            if page.ndim != 2 or page.samplesperpixel != 1 or len(chunks) != 2 or len(chunked) != 2:
                return None
            offsets = tuple(int(o) for o in page.dataoffsets)
            counts = tuple(int(c) for c in page.databytecounts)
            out = Segments(tuple(int(n) for n in page.shape), np.dtype(page.dtype.str[1:]).newbyteorder("="),
                           (int(chunks[0]), int(chunks[1])), (int(chunked[0]), int(chunked[1])), offsets, counts)
    except Exception:  # any trouble: the whole-tile reader names it
        return None
    if not offsets or len(offsets) != out.grid[0] * out.grid[1] or min(counts) <= 0:
        return None
    if max(o + c for o, c in zip(offsets, counts)) > size:
        return None
    return out


#: Decoded segments (strips or tiles of compressed TIFFs) kept per process, in tiles' worth of
#: raw pixels: a render task reads a band of rows of the tiles under its shard chunk by chunk,
#: and the neighbouring tasks the rest of them (common practice, no source; measured with
#: ``bench_render.py --reads``).
SEGMENT_TILES_KEPT = 6


def _read_segments(p: Path, stamp: tuple, seg: Segments, rows: tuple[int, int], cols: tuple[int, int]
                   ) -> np.ndarray | None:
    """Return pixels ``[r0:r1, c0:c1]`` assembled from the decoded segments under them (None if one cannot be decoded)."""
    (r0, r1), (c0, c1) = rows, cols
    (h, w), (sh, sw) = seg.shape, seg.size
    SEGMENT_CACHE.grow_to(SEGMENT_TILES_KEPT * h * w * seg.dtype.itemsize)
    out = np.empty((r1 - r0, c1 - c0), seg.dtype)
    wanted = [(i, j) for i in range(r0 // sh, (r1 - 1) // sh + 1) for j in range(c0 // sw, (c1 - 1) // sw + 1)]
    with _SEGMENT_LOCKS[hash(str(p)) % len(_SEGMENT_LOCKS)]:  # two threads never decode one segment
        parts = {ij: SEGMENT_CACHE.get((str(p), stamp, ij)) for ij in wanted}
        missing = [ij for ij, v in parts.items() if v is None]
        if missing:
            try:
                with tifffile.TiffFile(p) as tf:
                    page, fh = tf.pages[0], tf.filehandle
                    for i, j in missing:
                        k = i * seg.grid[1] + j
                        fh.seek(seg.offsets[k])
                        data = np.asarray(page.decode(fh.read(seg.counts[k]), k)[0])
                        part = data.reshape(data.shape[-3], data.shape[-2])[:min(sh, h - i * sh), :min(sw, w - j * sw)]
                        part = np.ascontiguousarray(part, dtype=seg.dtype)
                        part.setflags(write=False)
                        parts[(i, j)] = part
                        SEGMENT_CACHE.put((str(p), stamp, (i, j)), part)
                        _count_read(p, part.size)
            except Exception:  # a damaged segment: the whole-tile reader names the file
                return None
    for (i, j), part in parts.items():
        y0, x0 = i * sh, j * sw
        a, b = max(r0, y0), min(r1, y0 + part.shape[0])
        c, d = max(c0, x0), min(c1, x0 + part.shape[1])
        out[a - r0:b - r0, c - c0:d - c0] = part[a - y0:b - y0, c - x0:d - x0]
    return out


_SEGMENT_LOCKS = [threading.Lock() for _ in range(64)]


def decoded_part(path: str | Path, size: tuple[int, int]) -> tuple[int, int] | None:
    """Return the ``(rows, cols)`` :func:`read_window` decodes at once from this tile file, or None if it maps only the window.

    None for an uncompressed tile in one run; a strip's or TIFF tile's size for a compressed
    tile in parts (:func:`_segment_layout`); ``size`` (the tile's) for anything read whole.
    """
    p = Path(path)
    try:
        st = p.stat()
    except OSError:
        return None
    if _plain_layout(str(p), st.st_size, st.st_mtime_ns) is not None:
        return None
    seg = _segment_layout(str(p), st.st_size, st.st_mtime_ns)
    return (int(size[0]), int(size[1])) if seg is None else (int(seg.size[0]), int(seg.size[1]))


#: Pixels decoded per tile file by this process (path -> count), whole tiles and windows alike:
#: ``sum / (tiles x tile pixels)`` is how many times each tile was read (see ``bench_render.py --reads``).
PIXELS_READ: Counter = Counter()
_COUNT_LOCK = threading.Lock()


def _count_read(path, pixels: int) -> None:
    with _COUNT_LOCK:
        PIXELS_READ[str(path)] += int(pixels)


def _check_pixels(shape, dt: np.dtype, path, height: int, width: int, section, dtype, what: str,
                  source: str) -> None:
    """Raise :class:`InputError` naming ``path`` unless ``shape`` and ``dt`` are what was recorded."""
    if tuple(shape) != (height, width) or (dtype is not None and dt != np.dtype(dtype)):
        expected = f"({height}, {width})" + (f" {dtype}" if dtype is not None else "")
        kind = dt.str.lstrip("<>|=")
        raise InputError(f"{what} has shape {tuple(shape)} {kind}, but its {source} said {expected}",
                         file=path, section=section)


def _nbytes(value) -> int:
    return sum(int(v.nbytes) for v in value) if isinstance(value, tuple) else int(value.nbytes)


class ByteLRU:
    """A thread-safe least-recently-used mapping bounded by the total ``nbytes`` of its values."""

    def __init__(self, max_bytes: int):
        self.max_bytes = int(max_bytes)
        self._items: OrderedDict = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()

    def __contains__(self, key) -> bool:
        """Return whether ``key`` is held (without marking it recent)."""
        with self._lock:
            return key in self._items

    def get(self, key):
        """Return the value for ``key`` (marking it recent) or ``None``."""
        with self._lock:
            value = self._items.get(key)
            if value is not None:
                self._items.move_to_end(key)
            return value

    def put(self, key, value) -> None:
        """Store ``value`` (an array or a tuple of arrays); evict the oldest entries until the bound holds."""
        size = _nbytes(value)
        if size > self.max_bytes:
            return
        with self._lock:
            old = self._items.pop(key, None)
            if old is not None:
                self._bytes -= _nbytes(old)
            self._items[key] = value
            self._bytes += size
            while self._bytes > self.max_bytes:
                _, dropped = self._items.popitem(last=False)
                self._bytes -= _nbytes(dropped)

    @property
    def nbytes(self) -> int:
        """Bytes held now."""
        return self._bytes

    def clear(self) -> None:
        """Drop every entry."""
        with self._lock:
            self._items.clear()
            self._bytes = 0


    def grow_to(self, max_bytes: int) -> None:
        """Raise the bound to ``max_bytes`` if it is lower (it never shrinks)."""
        with self._lock:
            self.max_bytes = max(self.max_bytes, int(max_bytes))


#: Full-resolution prepared tiles' worth of bytes the per-process cache has room for: the 2 x 2
#: tiles under one output shard and those of the shard next to it (common practice, no source).
#: At 4096 x 4096 px tiles this is 8 x 64 MiB = 512 MiB per process. Tiles reduced by a scale
#: take about a scale squared times less room, so more fit in the same bytes (31 at scale 2):
#: the align stage's region tasks render every section of their window at a reduced scale.
TILES_KEPT = 8
#: Illumination profiles at tile size kept per process (a task renders one or two sections).
ILLUMINATIONS_KEPT = 2


def cache_bytes_for(height: int, width: int) -> int:
    """Return the cache bound for tiles of ``height x width`` px: :data:`TILES_KEPT` full-resolution prepared tiles.

    The same bytes whatever scale the tiles are read at, so the bound depends on the tile
    size only (and a process that reads reduced tiles holds no more than one that renders).
    """
    return TILES_KEPT * 4 * (height + 2) * (width + 2)


#: The per-process cache of prepared tiles; its bound grows with the tiles it serves.
TILE_CACHE = ByteLRU(0)
#: The per-process cache of decoded segments of compressed tiles (:func:`_read_segments`), bounded
#: at :data:`SEGMENT_TILES_KEPT` tiles' worth of raw pixels of the largest tile it served.
SEGMENT_CACHE = ByteLRU(0)


def block_mean(img: np.ndarray, factor: int) -> np.ndarray:
    """Return the mean of ``factor x factor`` blocks (float32), the last partial block edge-replicated.

    Notes
    -----
    Reduced pixel ``k`` covers full-resolution pixels ``k*factor ... k*factor+factor-1``,
    so its centre is at ``k*factor + (factor-1)/2``. With the size padded to a multiple
    of ``factor``, ``cv2.INTER_AREA`` computes exactly these block means.
    """
    if factor == 1:
        return img.astype(np.float32, copy=False)
    h, w = img.shape
    ph, pw = -h % factor, -w % factor
    if ph or pw:
        img = cv2.copyMakeBorder(img, 0, ph, 0, pw, cv2.BORDER_REPLICATE)
    return cv2.resize(img, ((w + pw) // factor, (h + ph) // factor), interpolation=cv2.INTER_AREA)


def _profile_key(profile: np.ndarray | None) -> str:
    if profile is None:
        return ""
    return hashlib.blake2b(np.ascontiguousarray(profile, np.float32).tobytes(), digest_size=8).hexdigest()


def feather_weight(height: int, width: int, scale: int = 1) -> np.ndarray:
    """Return the feather weight of a tile reduced by ``scale``: distance (level-0 pixels) to the tile's edge.

    Reduced pixel ``[j, k]`` has its centre at level-0 ``(k*scale + (scale-1)/2, j*scale + (scale-1)/2)``;
    its weight is the distance from there to the nearest edge of the ``width x height`` rectangle of
    pixel edges ``[-0.5, width - 0.5] x [-0.5, height - 0.5]``, and 0 outside it.
    """
    def ramp(n):
        c = np.arange(-(-n // scale), dtype=np.float32) * scale + (scale - 1) / 2.0
        return np.maximum(np.minimum(c + 0.5, n - 0.5 - c), 0.0)
    return np.minimum(ramp(height)[:, None], ramp(width)[None, :])


@functools.lru_cache(maxsize=16)
def _padded_weight(height: int, width: int, scale: int) -> np.ndarray:
    w = cv2.copyMakeBorder(feather_weight(height, width, scale), 1, 1, 1, 1, cv2.BORDER_CONSTANT, value=0)
    w.setflags(write=False)
    return w


def prepared_tile(tile, profile: np.ndarray | None, profile_key: str, scale: int,
                  section: int | None = None, dtype: str | None = None) -> np.ndarray:
    """Return one tile corrected, reduced by ``scale`` and paired with its feather weight, from the cache.

    Parameters
    ----------
    tile : TilePlacement
        Path, size, gain and offset of the tile.
    profile : ndarray or None
        The section's illumination profile (any size; upsampled to the tile size).
    profile_key : str
        A digest of ``profile`` (see :func:`profile_digest`), part of the cache key.
    scale : int
        Reduction factor (1 = full resolution).
    section : int, optional
        For error messages.
    dtype : str, optional
        The recorded pixel type; a file of another type is refused, naming it.

    Returns
    -------
    (value, weight) : two float32 arrays, shape (ceil(height/scale) + 2, ceil(width/scale) + 2)
        The corrected value and the weight (see :func:`feather_weight`), both with a one-pixel
        ring: the value repeats the edge pixel, the weight is 0 there. They are kept apart
        because OpenCV resamples one channel several times faster than two; the weight
        depends only on the tile's size and is shared, and only the value is cached.
        Reduced tile pixel ``(k, j)`` is element ``[j + 1, k + 1]``. Resampled bilinearly, the
        weight is the exact distance to the edge, falling to 0 one pixel beyond the outermost
        centres, and the value is never mixed with a border constant.
    """
    p = Path(tile.path)
    key = _cache_key(tile, profile_key, scale, section)
    TILE_CACHE.grow_to(cache_bytes_for(tile.height, tile.width))
    with _PREP_LOCKS[hash(key) % len(_PREP_LOCKS)]:  # two threads never prepare the same tile
        value = TILE_CACHE.get(key)
        if value is None:
            value = _prepare(p, tile, profile, scale, section, dtype)
            TILE_CACHE.put(key, value)
    return value, _padded_weight(tile.height, tile.width, scale)


_PREP_LOCKS = [threading.Lock() for _ in range(64)]


def _cache_key(tile, profile_key: str, scale: int, section: int | None = None) -> tuple:
    """Return the tile cache's key of ``tile`` prepared at ``scale``: its file's identity, corrections and scale."""
    p = Path(tile.path)
    try:
        st = p.stat()
    except OSError:
        raise InputError("tile is missing", file=p, section=section) from None
    return (str(p), st.st_size, st.st_mtime_ns, profile_key, float(tile.gain), float(tile.offset), scale)


def _prepare(p: Path, tile, profile, scale: int, section, dtype: str | None = None) -> np.ndarray:
    """Return the corrected, reduced tile with its one-pixel edge ring (float32)."""
    raw = read_tile(p, tile.height, tile.width, section, dtype=dtype)
    return correct_tile(raw, tile, None if profile is None else _illumination(profile, tile.height, tile.width),
                        scale)


def correct_tile(raw: np.ndarray, tile, illumination: np.ndarray | None, scale: int) -> np.ndarray:
    """Return ``gain * raw / illumination + offset``, reduced by ``scale``, with a one-pixel edge ring (float32, read-only).

    Parameters
    ----------
    raw : ndarray
        The tile's pixels.
    tile : TilePlacement
        Its ``gain`` and ``offset`` (and size).
    illumination : ndarray or None
        The illumination at tile size (see :func:`illumination_at_tile_size`), floored above 0.
    scale : int
        Reduction factor (block means, :func:`block_mean`).
    """
    if scale != 1:
        img = np.empty(raw.shape, np.float32)
        _correct_into(img, raw, tile, illumination)   # the same float32 operations, without a converted copy
        value = cv2.copyMakeBorder(block_mean(img, scale), 1, 1, 1, 1, cv2.BORDER_REPLICATE)
    else:
        # Full resolution, the hot path of the render: gain * raw / illumination is
        # written straight into the ring's interior, in one or two passes instead of
        # converting, dividing, scaling and padding one after the other (about 4x faster).
        value = np.empty((tile.height + 2, tile.width + 2), np.float32)
        _correct_into(value[1:-1, 1:-1], raw, tile, illumination)
        _repeat_edges(value, True, True, True, True)
    value.setflags(write=False)
    return value


def _correct_into(inner: np.ndarray, raw: np.ndarray, tile, illumination: np.ndarray | None) -> None:
    """Write ``gain * raw / illumination + offset`` (float32) into ``inner``, pixel by pixel."""
    if illumination is not None:
        np.divide(raw, illumination, out=inner, dtype=np.float32)
        if tile.gain != 1.0:
            inner *= np.float32(tile.gain)
    else:
        np.multiply(raw, np.float32(tile.gain), out=inner, dtype=np.float32)
    if tile.offset != 0.0:
        inner += np.float32(tile.offset)


def _repeat_edges(value: np.ndarray, top: bool, bottom: bool, left: bool, right: bool) -> None:
    """Fill the named outer rows and columns of ``value`` with the row or column next to them."""
    if top:
        value[0] = value[1]
    if bottom:
        value[-1] = value[-2]
    if left:
        value[:, 0] = value[:, 1]
    if right:
        value[:, -1] = value[:, -2]


def prepared_window(tile, profile: np.ndarray | None, window: tuple[int, int, int, int],
                    section: int | None = None, dtype: str | None = None, scale: int = 1) -> np.ndarray | None:
    """Return rows ``r0:r1``, columns ``c0:c1`` of the prepared tile at ``scale``, reading only the pixels under them.

    Equal, pixel for pixel, to the same slice of ``prepared_tile(tile, profile, key, scale)[0]``
    (the ring included), but only the raw pixels under the window are read and corrected, so a
    render task reads each tile about once however large the tiles and whatever the order of
    the tasks. At a reduced scale a pixel is the mean of its own ``scale x scale`` full-resolution
    pixels (:func:`block_mean`), so the full-resolution window is cut at multiples of ``scale``
    and reduced by itself (``tests/test_tiles_window.py`` compares the two): an align region task
    at production size (regions of about 2,200 px, tiles of 4,096 px) then reads about its region,
    not every tile it touches whole. Returns None when the tile's file cannot be read by window
    (compressed or scattered pixels; see :func:`read_window`) or the window holds no interior
    pixel: the caller then prepares the whole tile through the cache.
    """
    r0, r1, c0, c1 = window
    h, w = tile.height, tile.width
    nr, nc = -(-h // scale), -(-w // scale)
    jr0, jr1 = max(r0 - 1, 0), min(r1 - 1, nr)
    jc0, jc1 = max(c0 - 1, 0), min(c1 - 1, nc)
    if jr0 >= jr1 or jc0 >= jc1:
        return None
    # reduced: columns widened to multiples of _LANES reduced pixels (or the tile's edge), so OpenCV's
    # vectorised block mean groups the pixels of a row as it does for the whole tile, and rounds them alike
    lanes = _LANES if scale > 1 else 1
    kc0, kc1 = jc0 // lanes * lanes, min(-(-jc1 // lanes) * lanes, nc)
    a, b, c, d = jr0 * scale, min(jr1 * scale, h), kc0 * scale, min(kc1 * scale, w)
    raw = read_window(tile.path, h, w, (a, b), (c, d), section, dtype=dtype)
    if raw is None:
        return None
    illum = None if profile is None else _illumination(profile, h, w)[a:b, c:d]
    top, left = int(r0 == 0), int(c0 == 0)
    value = np.empty((r1 - r0, c1 - c0), np.float32)
    inner = value[top:top + jr1 - jr0, left:left + jc1 - jc0]
    if scale == 1:      # the render's hot path: corrected straight into the window
        _correct_into(inner, raw, tile, illum)
    else:
        img = np.empty(raw.shape, np.float32)
        _correct_into(img, raw, tile, illum)
        inner[...] = block_mean(img, scale)[:, jc0 - kc0:jc1 - kc0]
    _repeat_edges(value, bool(top), r1 == nr + 2, bool(left), c1 == nc + 2)
    value.setflags(write=False)
    return value


#: reduced pixels of a row that OpenCV's block mean handles together, at most (16 float32 lanes: AVX-512)
_LANES = 16
#: a reduced tile the cache does not hold is read by window when the window holds at most this share of
#: its pixels; a larger window prepares the whole tile into the cache, which the regions next to it then
#: read from (rule of thumb, no source). Either way the pixels are the same, so a run's results do not
#: depend on the order its tasks ran in
WINDOW_SHARE = 0.5


_ILLUMINATION = ByteLRU(0)


def _illumination(profile: np.ndarray, height: int, width: int) -> np.ndarray:
    """Return the section's illumination at tile size, floored at 1e-6 (cached: tiles of a section share it)."""
    key = (_profile_key(profile), height, width)
    _ILLUMINATION.grow_to(ILLUMINATIONS_KEPT * 4 * height * width)
    illum = _ILLUMINATION.get(key)
    if illum is None:
        illum = np.maximum(illumination_at_tile_size(profile, height, width), np.float32(1e-6))
        illum.setflags(write=False)
        _ILLUMINATION.put(key, illum)
    return illum


profile_digest = _profile_key


def tile_weight(height: int, width: int, scale: int) -> np.ndarray:
    """Return the feather weight of a tile reduced by ``scale`` with its zero ring (read-only, shared)."""
    return _padded_weight(height, width, scale)


def illumination_at_tile_size(profile: np.ndarray, height: int, width: int) -> np.ndarray:
    """Return the illumination profile upsampled to a ``height x width`` tile, float32.

    Exactly ``cv2.resize(profile, (width, height), interpolation=cv2.INTER_LINEAR)``: the
    profile, stored at one sample per ``illumination_step`` tile pixels (see
    :mod:`stackbuild.stitch.intensity`), is stretched over the tile.
    """
    prof = np.asarray(profile, dtype=np.float32)
    if prof.ndim != 2:
        raise ValueError(f"profile must be 2-D, got shape {prof.shape}")
    return cv2.resize(prof, (int(width), int(height)), interpolation=cv2.INTER_LINEAR)


def _small(window: tuple[int, int, int, int], tile, scale: int) -> bool:
    """Return True when ``window`` holds at most :data:`WINDOW_SHARE` of the reduced tile's pixels (ring included)."""
    r0, r1, c0, c1 = window
    return (r1 - r0) * (c1 - c0) <= WINDOW_SHARE * (-(-tile.height // scale) + 2) * (-(-tile.width // scale) + 2)


class SectionTiles:
    """The tile provider of one section: ``tiles(tile, scale) -> (value, weight)`` for the sampler.

    Serves each tile of ``stitch`` corrected (illumination, gain, offset), reduced by
    ``scale`` and with its feather weight, as :func:`prepared_tile` does, through
    the per-process cache.
    """

    #: The sampler may ask for a window (rows ``r0:r1``, columns ``c0:c1`` of the ringed tile).
    windows = True

    def __init__(self, stitch):
        self.stitch = stitch
        self._key = profile_digest(stitch.illumination)

    def __call__(self, tile, scale: int, window: tuple[int, int, int, int] | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
        """Return ``(value, weight)`` of ``tile`` reduced by ``scale``, whole or only ``window``.

        At full resolution a window is read by itself when the file allows it
        (:func:`prepared_window`), and is not cached: neighbouring regions read
        neighbouring windows, so each tile is read about once. At a reduced scale a
        window of at most :data:`WINDOW_SHARE` of a tile the cache does not hold is
        read the same way (the align stage's region tasks at production size).
        Otherwise the whole prepared tile comes from the cache and is sliced.
        """
        s = self.stitch
        if window is not None and (scale == 1 or (_small(window, tile, scale)
                                                  and _cache_key(tile, self._key, scale, s.section) not in TILE_CACHE)):
            value = prepared_window(tile, s.illumination, window, s.section, s.dtype, scale)
            if value is not None:
                r0, r1, c0, c1 = window
                return value, _padded_weight(tile.height, tile.width, scale)[r0:r1, c0:c1]
        value, weight = prepared_tile(tile, s.illumination, self._key, scale, s.section, s.dtype)
        if window is None:
            return value, weight
        r0, r1, c0, c1 = window
        return value[r0:r1, c0:c1], weight[r0:r1, c0:c1]
