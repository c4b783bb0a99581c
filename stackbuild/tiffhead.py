"""Where the pixels of a TIFF's first image lie, read from its header alone (no decoding library).

Tiles straight from an acquisition system are usually one uncompressed grey
image per file, its rows stored in one run of bytes. For such a file every
stage reads the pixels with one ``numpy.fromfile`` at the right offset; this
module finds that offset, shape and type from the first image file directory
(IFD) of a classic TIFF or a BigTIFF, in a few tens of microseconds, where
opening the file with ``tifffile`` costs about half a millisecond (a tenth of
the align stage's tile reading on 512 px tiles).

It answers only for the plain case and says "don't know" (None) for anything
else (compressed, tiled, several samples per pixel, a predictor, a bit order
or depth it does not map, strips out of order), so the caller can ask
``tifffile``, which decides. Layout from the TIFF 6.0 specification (Adobe,
1992: header, IFD entries, the baseline tags 256-279 and 284, SampleFormat
339 and Predictor 317) and the BigTIFF extension (8-byte offsets, tag type
16); ``tests/test_tiffhead.py`` compares every answer with ``tifffile``'s.
"""
from __future__ import annotations

import struct

import numpy as np

#: tags read (TIFF 6.0 numbering)
_WIDTH, _LENGTH, _BITS, _COMPRESSION, _FILL_ORDER = 256, 257, 258, 259, 266
_STRIP_OFFSETS, _SAMPLES, _STRIP_COUNTS, _PLANAR, _PREDICTOR, _SAMPLE_FORMAT = 273, 277, 279, 284, 317, 339
#: tags whose presence means a layout this module does not map (tiles, SGI image depth)
_REFUSED = {322, 323, 324, 325, 32997, 32998}
#: entry types: struct code of one value
_TYPES = {1: "B", 3: "H", 4: "I", 16: "Q"}
#: SampleFormat -> numpy kind
_KINDS = {1: "u", 2: "i", 3: "f"}
#: the first IFD is read in one piece of at most this many bytes (a tile's holds a dozen entries)
_HEAD_BYTES = 4096


def plain_layout(path: str) -> tuple[int, tuple[int, int], np.dtype] | None:
    """Return ``(offset, (height, width), dtype)`` of the first image of a plain TIFF, or None.

    Plain: one sample per pixel of 8, 16, 32 or 64 bits, uncompressed, no
    predictor, first bit first, in strips that follow each other in the file.
    ``dtype`` carries the file's byte order. None for any other file, and
    for anything unreadable (the caller then asks ``tifffile``).
    """
    try:
        with open(path, "rb") as f:
            head = f.read(16)
            if len(head) < 8 or head[:2] not in (b"II", b"MM"):
                return None
            order = "<" if head[:2] == b"II" else ">"
            magic = struct.unpack(order + "H", head[2:4])[0]
            if magic == 42:
                big, first = False, struct.unpack(order + "I", head[4:8])[0]
            elif magic == 43 and len(head) == 16 and struct.unpack(order + "HH", head[4:8]) == (8, 0):
                big, first = True, struct.unpack(order + "Q", head[8:16])[0]
            else:
                return None
            tags = _first_ifd(f, order, big, first)
    except (OSError, struct.error, ValueError):
        return None
    if tags is None or _REFUSED & tags.keys():
        return None
    return _layout(tags, order)


def _first_ifd(f, order: str, big: bool, offset: int) -> dict[int, tuple] | None:
    """Return ``{tag: values}`` of the IFD at ``offset`` (values read where they lie), or None."""
    count_fmt, entry, inline = ("Q", 20, 8) if big else ("H", 12, 4)
    f.seek(offset)
    raw = f.read(_HEAD_BYTES)
    n_size = struct.calcsize(count_fmt)
    if len(raw) < n_size:
        return None
    n = struct.unpack(order + count_fmt, raw[:n_size])[0]
    if len(raw) < n_size + n * entry:
        return None
    tags = {}
    for k in range(n):
        e = raw[n_size + k * entry:n_size + (k + 1) * entry]
        if big:
            tag, typ, cnt = struct.unpack(order + "HHQ", e[:12])
            field = e[12:20]
        else:
            tag, typ, cnt = struct.unpack(order + "HHI", e[:8])
            field = e[8:12]
        code = _TYPES.get(typ)
        if code is None:
            tags[tag] = None          # a type this module does not read; harmless unless the tag is needed
            continue
        size = struct.calcsize(code) * cnt
        if size <= inline:
            data = field[:size]
        else:
            where = struct.unpack(order + ("Q" if big else "I"), field)[0]
            f.seek(where)
            data = f.read(size)
            if len(data) < size:
                return None
        tags[tag] = struct.unpack(order + code * cnt, data)
    return tags


def _one(tags: dict, tag: int, default: int | None = None) -> int | None:
    """Return a tag's single value (all its values equal), ``default`` if absent, None if unreadable."""
    v = tags.get(tag, None if default is None else (default,))
    if not v or len(set(v)) != 1:
        return None
    return int(v[0])


def _layout(tags: dict, order: str) -> tuple[int, tuple[int, int], np.dtype] | None:
    """Return the plain layout described by the first IFD's ``tags``, or None."""
    width, height = _one(tags, _WIDTH), _one(tags, _LENGTH)
    bits, fmt = _one(tags, _BITS, 1), _one(tags, _SAMPLE_FORMAT, 1)
    if not width or not height or bits not in (8, 16, 32, 64) or fmt not in _KINDS:
        return None
    if (_one(tags, _SAMPLES, 1) != 1 or _one(tags, _COMPRESSION, 1) != 1 or _one(tags, _PREDICTOR, 1) != 1
            or _one(tags, _FILL_ORDER, 1) != 1 or _one(tags, _PLANAR, 1) not in (1, 2)):
        return None
    if fmt == 3 and bits == 8:
        return None
    offsets, counts = tags.get(_STRIP_OFFSETS), tags.get(_STRIP_COUNTS)
    if not offsets or not counts or len(offsets) != len(counts):
        return None
    # the strips must follow each other, so the image is one run of bytes
    if any(o + c != nxt for o, c, nxt in zip(offsets, counts, offsets[1:])):
        return None
    dtype = np.dtype(order + _KINDS[fmt] + str(bits // 8))
    if sum(counts) < height * width * dtype.itemsize:
        return None
    return int(offsets[0]), (height, width), dtype
