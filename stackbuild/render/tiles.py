"""Reading tiles, with a small per-process cache of prepared (corrected, reduced) tiles.

A tile shared by neighbouring output blocks is decoded and corrected once and
then served from the cache. The cache is bounded in bytes (default 128 MiB per
process; the environment variable ``STACKBUILD_TILE_CACHE_MB`` overrides it)
and evicts the least recently used entry first. Entries are keyed by the
file's path, size and modification time, so a re-imaged tile is read afresh.
"""
from __future__ import annotations

import functools
import hashlib
import os
import threading
from collections import OrderedDict
from pathlib import Path

import cv2
import numpy as np

from ..errors import InputError

from ..stitch.intensity import illumination_at_tile_size
from ..tiles import read_tile  # a module global, so tests can count the reads


def _nbytes(value) -> int:
    return sum(int(v.nbytes) for v in value) if isinstance(value, tuple) else int(value.nbytes)


class ByteLRU:
    """A thread-safe least-recently-used mapping bounded by the total ``nbytes`` of its values."""

    def __init__(self, max_bytes: int):
        self.max_bytes = int(max_bytes)
        self._items: OrderedDict = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()

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


TILE_CACHE = ByteLRU(int(float(os.environ.get("STACKBUILD_TILE_CACHE_MB", "128")) * 2 ** 20))


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
    try:
        st = p.stat()
    except OSError:
        raise InputError("tile is missing", file=p, section=section) from None
    key = (str(p), st.st_size, st.st_mtime_ns, profile_key, float(tile.gain), float(tile.offset), scale)
    with _PREP_LOCKS[hash(key) % len(_PREP_LOCKS)]:  # two threads never prepare the same tile
        value = TILE_CACHE.get(key)
        if value is None:
            value = _prepare(p, tile, profile, scale, section, dtype)
            TILE_CACHE.put(key, value)
    return value, _padded_weight(tile.height, tile.width, scale)


_PREP_LOCKS = [threading.Lock() for _ in range(64)]


def _prepare(p: Path, tile, profile, scale: int, section, dtype: str | None = None) -> np.ndarray:
    """Return the corrected, reduced tile with its one-pixel edge ring (float32)."""
    raw = read_tile(p, tile.height, tile.width, section, dtype=dtype)
    if scale != 1:
        img = raw.astype(np.float32)
        if profile is not None:
            img = img / _illumination(profile, tile.height, tile.width)
        if tile.gain != 1.0 or tile.offset != 0.0:
            img = np.float32(tile.gain) * img + np.float32(tile.offset)
        value = cv2.copyMakeBorder(block_mean(img, scale), 1, 1, 1, 1, cv2.BORDER_REPLICATE)
    else:
        # Full resolution, the hot path of the render: gain * raw / illumination is
        # written straight into the ring's interior, in one or two passes instead of
        # converting, dividing, scaling and padding one after the other (about 4x faster).
        value = np.empty((tile.height + 2, tile.width + 2), np.float32)
        inner = value[1:-1, 1:-1]
        if profile is not None:
            np.divide(raw, _illumination(profile, tile.height, tile.width), out=inner, dtype=np.float32)
            if tile.gain != 1.0:
                inner *= np.float32(tile.gain)
        else:
            np.multiply(raw, np.float32(tile.gain), out=inner, dtype=np.float32)
        if tile.offset != 0.0:
            inner += np.float32(tile.offset)
        value[0, 1:-1], value[-1, 1:-1] = value[1, 1:-1], value[-2, 1:-1]
        value[:, 0], value[:, -1] = value[:, 1], value[:, -2]
    value.setflags(write=False)
    return value


_ILLUMINATION = ByteLRU(64 * 2 ** 20)


def _illumination(profile: np.ndarray, height: int, width: int) -> np.ndarray:
    """Return the section's illumination at tile size, floored at 1e-6 (cached: tiles of a section share it)."""
    key = (_profile_key(profile), height, width)
    illum = _ILLUMINATION.get(key)
    if illum is None:
        illum = np.maximum(illumination_at_tile_size(profile, height, width), np.float32(1e-6))
        illum.setflags(write=False)
        _ILLUMINATION.put(key, illum)
    return illum


profile_digest = _profile_key
