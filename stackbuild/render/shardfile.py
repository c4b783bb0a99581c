"""Write one whole shard of a sharded zarr v3 array straight to its file, byte for byte as zarr-python does.

zarr-python writes a shard through its asynchronous codec pipeline: per chunk it
builds a full-size buffer, schedules tasks on an event loop and gathers them. For
the pyramid's shards (every chunk of a shard written at once, one shard per task)
that machinery cost about as much CPU as the compression itself (measured: 0.11 s
per 4096 px shard of sixteen 1024 px chunks, 0.07 s of it Blosc and CRC-32C). This
module encodes the chunks with the array's own Blosc settings and lays the shard out
as the zarr v3 sharding codec specifies (chunks in Morton order, then the index of
offsets and lengths with its CRC-32C; an all-fill chunk left out), so the file is the
one zarr writes; ``tests/test_render_codec.py`` compares them byte for byte.

Only the layout the render stage creates is handled (local store, ``sharding_indexed``
with the index at the end, inner codecs ``bytes`` -> optional ``blosc`` -> ``crc32c``,
index codecs ``bytes`` (little endian) -> ``crc32c``); :func:`shard_writer` returns None
for anything else, and the caller writes through zarr. Levels written so are read back without
zarr by :mod:`stackbuild.render.levelread`.
"""
from __future__ import annotations

import functools
import itertools
import math
import os
import uuid
from pathlib import Path

import google_crc32c
import numpy as np

from ..transforms.arrayfile import chunk_key_separator

#: The sharding codec's marker of a chunk that is not stored (offset and length).
ABSENT = np.uint64(2 ** 64 - 1)


def morton_order(grid: tuple[int, ...]) -> list[tuple[int, ...]]:
    """Return every position of a ``grid`` of chunks in Morton (Z-curve) order, the order zarr-python writes a shard in.

    The code of a position interleaves the bits of its coordinates, lowest bit first and the
    first axis first at each bit, skipping an axis once its extent needs no more bits
    ("compressed" Morton code, so a grid of any extents is ordered without gaps); positions are
    sorted by code. The sharding codec allows any order (zarr v3 sharding specification); this one
    makes the files byte-identical to zarr-python's (``tests/test_render_codec.py`` checks the
    order against ``zarr.core.indexing.morton_order_iter``), without importing zarr.

    References
    ----------
    G. M. Morton, "A computer oriented geodetic data base and a new technique in file sequencing",
    IBM technical report, 1966 (no DOI).
    """
    grid = tuple(int(n) for n in grid)
    bits = [(n - 1).bit_length() for n in grid]

    def code(coords) -> int:
        out, k = 0, 0
        for b in range(max(bits, default=0)):
            for axis, c in enumerate(coords):
                if b < bits[axis]:
                    out |= ((c >> b) & 1) << k
                    k += 1
        return out

    return sorted(itertools.product(*(range(n) for n in grid)), key=code)


class ShardWriter:
    """Encodes and writes whole shards of one array (see the module docstring)."""

    def __init__(self, folder: Path, key, blosc, chunk: tuple[int, ...], shard: tuple[int, ...], shape, dtype,
                 fill):
        self.folder, self.key, self.blosc = folder, key, blosc
        self.chunk, self.shard, self.shape = chunk, shard, shape
        self.dtype, self.fill = np.dtype(dtype).newbyteorder("<"), fill
        self.per_shard = tuple(s // c for s, c in zip(shard, chunk))

    @functools.cached_property
    def order(self) -> list:
        """Return the chunks of a shard in the order they are written (Morton order, as zarr-python writes them)."""
        return morton_order(self.per_shard)

    def _encode(self, chunk: np.ndarray) -> bytes:
        raw = np.ascontiguousarray(chunk, dtype=self.dtype).view(np.uint8).reshape(-1)
        data = raw.tobytes() if self.blosc is None else self.blosc.encode(raw)
        return bytes(data) + np.uint32(google_crc32c.value(data)).astype("<u4").tobytes()

    def read_index(self, fh) -> np.ndarray:
        """Return the ``(*per_shard, 2)`` offsets and lengths from the index at the end of open shard file ``fh``.

        Raises ValueError when the index does not check out (CRC-32C).
        """
        n = math.prod(self.per_shard) * 16 + 4
        fh.seek(-n, os.SEEK_END)
        raw = fh.read(n)
        if len(raw) != n or google_crc32c.value(raw[:-4]) != np.frombuffer(raw[-4:], "<u4")[0]:
            raise ValueError("shard index checksum mismatch")
        return np.frombuffer(raw[:-4], "<u8").reshape(*self.per_shard, 2)

    @staticmethod
    def read_chunk(fh, entry) -> bytes:
        """Return the stored bytes (checksum included) of the chunk at ``entry = (offset, length)`` of open shard
        file ``fh``; raises ValueError when they do not check out (CRC-32C)."""
        data = os.pread(fh.fileno(), int(entry[1]), int(entry[0]))
        if len(data) != int(entry[1]) or google_crc32c.value(data[:-4]) != np.frombuffer(data[-4:], "<u4")[0]:
            raise ValueError("chunk checksum mismatch")
        return data

    def stored(self, origin: tuple[int, ...], wanted) -> dict[tuple[int, ...], tuple[bytes | None, np.ndarray]]:
        """Return ``{coords: (stored bytes, pixels)}`` of the chunks ``wanted`` (coordinates within the shard) as stored.

        Reads the shard file at ``origin`` (its index, then each wanted chunk, CRC-32C checked) and
        decodes each chunk to its full chunk shape. The bytes are what :meth:`write` would encode for
        those pixels, so handing them back to it leaves the file as a fresh write makes it. A chunk
        not stored (all fill value) comes back as ``(None, fill)``. A chunk whose bytes do not check
        out is left out of the result (the caller reads it through zarr, which says what is wrong);
        with no shard file, or an index that does not check out, nothing is returned.
        """
        path = self.folder / self.key(tuple(o // s for o, s in zip(origin, self.shard)))
        out = {}
        try:
            with open(path, "rb") as fh:
                try:
                    index = self.read_index(fh)
                except ValueError:
                    return {}
                for coords in wanted:
                    start, length = index[tuple(coords)]
                    if start == ABSENT:
                        out[tuple(coords)] = (None, np.full(self.chunk, self.fill, self.dtype))
                        continue
                    try:
                        data = self.read_chunk(fh, (start, length))
                    except ValueError:
                        continue
                    body = data[:-4] if self.blosc is None else self.blosc.decode(data[:-4])
                    pixels = np.frombuffer(body, self.dtype)
                    if pixels.size == math.prod(self.chunk):
                        out[tuple(coords)] = (data, pixels.reshape(self.chunk))
        except (OSError, ValueError, RuntimeError):  # no file, or bytes the codec refuses: left to the caller
            return out
        return out

    def write(self, origin: tuple[int, ...], block: np.ndarray, stored: dict | None = None) -> None:
        """Write ``block`` as the whole shard whose first element is at ``origin`` (chunk-aligned, the shard's start).

        ``block`` must be the shard clipped to the array (the same rule as zarr's: chunks
        outside the array are absent, an edge chunk is padded with the fill value, a chunk
        holding only the fill value is left out; with no chunk left the file is removed).
        ``stored``: ``{coords: bytes}`` from :meth:`stored` for chunks of ``block`` that hold the
        pixels read back with them; those bytes are written as they are instead of encoding again.
        """
        stored = stored or {}
        index = np.full((*self.per_shard, 2), ABSENT, dtype="<u8")
        parts, start = [], 0
        for coords in self.order:
            lo = [k * c for k, c in zip(coords, self.chunk)]
            if any(a >= n for a, n in zip(lo, block.shape)):
                continue
            piece = block[tuple(slice(a, a + c) for a, c in zip(lo, self.chunk))]
            if piece.shape != self.chunk:
                full = np.full(self.chunk, self.fill, dtype=block.dtype)
                full[tuple(slice(0, n) for n in piece.shape)] = piece
                piece = full
            kept = stored.get(tuple(coords))
            if kept is None and not (piece != self.fill).any():
                continue
            data = kept if kept is not None else self._encode(piece)
            index[coords] = (start, len(data))
            parts.append(data)
            start += len(data)
        shard_coords = tuple(o // s for o, s in zip(origin, self.shard))
        path = self.folder / self.key(shard_coords)
        if not parts:
            path.unlink(missing_ok=True)
            return
        raw_index = index.tobytes()
        parts.append(raw_index + np.uint32(google_crc32c.value(raw_index)).astype("<u4").tobytes())
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(f".{uuid.uuid4().hex}.partial")  # as zarr's local store: write aside, then rename
        try:
            with tmp.open("wb") as fh:
                for part in parts:
                    fh.write(part)
            tmp.replace(path)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise


def shard_writer(array) -> ShardWriter | None:
    """Return a :class:`ShardWriter` for ``array`` (a zarr array, or a level read without zarr:
    :class:`~stackbuild.render.levelread.StoredArray`), or None if its layout is not the one handled.

    The layout is the one :func:`shard_reader` reads from the array's ``zarr.json`` (one parser of
    the layout for readers and writers); the array must live in a local folder and its metadata on
    disk must say its current shape and fill value.
    """
    if isinstance(getattr(array, "layout", None), ShardWriter):  # read without zarr: its layout is at hand
        return array.layout
    from zarr.storage import LocalStore

    store = array.store_path.store
    if getattr(array.metadata, "zarr_format", None) != 3 or not isinstance(store, LocalStore):
        return None
    writer = shard_reader(Path(store.root) / array.store_path.path)
    if writer is None or tuple(writer.shape) != tuple(array.shape) or writer.fill != array.fill_value:
        return None
    return writer


class _BloscOnDemand:
    """The numcodecs Blosc codec of a stored array, made at its first use (its import is skipped by readers that
    decode block by block, :mod:`stackbuild.render.bloscrows`)."""

    def __init__(self, config: dict):
        self.config, self._codec = config, None

    def _get(self):
        if self._codec is None:
            import numcodecs
            from numcodecs import Blosc

            cfg = dict(self.config)
            if tuple(int(v) for v in numcodecs.__version__.split(".")[:2]) < (0, 16):
                cfg.pop("typesize", None)  # as zarr-python makes it (numcodecs before 0.16 has no typesize)
            self._codec = Blosc.from_config(cfg)
        return self._codec

    def encode(self, buf):
        return self._get().encode(buf)

    def decode(self, buf, out=None):
        return self._get().decode(buf, out)


_SHUFFLE = {"noshuffle": 0, "shuffle": 1, "bitshuffle": 2}


def shard_reader(folder) -> ShardWriter | None:
    """Return the :class:`ShardWriter` layout of the array stored in ``folder`` from its ``zarr.json``, without zarr.

    The same layouts as :func:`shard_writer` (zarr v3, one sharding codec with its index at the end, bytes +
    CRC-32C index, bytes [+ Blosc] + CRC-32C inside, integer dtype, little-endian, the default chunk key
    encoding), read from the metadata document itself (zarr v3 specification, "array metadata"), so that a
    reader of the render's shards needs no zarr-python import (about 0.3 s of CPU per process). None for any
    other layout or a document that does not read: the caller then goes through zarr.
    """
    import json

    folder = Path(folder)
    try:
        meta = json.loads((folder / "zarr.json").read_text(encoding="utf-8"))
        if meta.get("zarr_format") != 3 or meta.get("node_type") != "array" or meta.get("storage_transformers"):
            return None
        codecs = meta["codecs"]
        if len(codecs) != 1 or codecs[0].get("name") != "sharding_indexed":
            return None
        conf = codecs[0]["configuration"]
        if conf.get("index_location", "end") != "end":
            return None
        index = conf["index_codecs"]
        if [c.get("name") for c in index] != ["bytes", "crc32c"] or \
                (index[0].get("configuration") or {}).get("endian", "little") != "little":
            return None
        inner = conf["codecs"]
        names = [c.get("name") for c in inner]
        if names not in (["bytes", "crc32c"], ["bytes", "blosc", "crc32c"]):
            return None
        dtype = np.dtype(meta["data_type"])
        if dtype.kind not in "ui" or (dtype.itemsize > 1 and
                                      (inner[0].get("configuration") or {}).get("endian") != "little"):
            return None
        sep = chunk_key_separator(meta)
        if sep is None:
            return None
        if meta["chunk_grid"].get("name") != "regular":
            return None
        shard = tuple(int(v) for v in meta["chunk_grid"]["configuration"]["chunk_shape"])
        chunk = tuple(int(v) for v in conf["chunk_shape"])
        shape = tuple(int(v) for v in meta["shape"])
        fill = meta["fill_value"]
        if not isinstance(fill, int) or isinstance(fill, bool) or len(shard) != len(shape) or len(chunk) != len(shape):
            return None
        blosc = None
        if len(inner) == 3:
            b = inner[1]["configuration"]
            blosc = _BloscOnDemand({"cname": b["cname"], "clevel": int(b["clevel"]), "shuffle": _SHUFFLE[b["shuffle"]],
                                    "blocksize": int(b.get("blocksize", 0)), "typesize": int(b.get("typesize") or 1)})
    except (OSError, ValueError, KeyError, TypeError, AttributeError, IndexError):
        return None
    if any(s % c for s, c in zip(shard, chunk)):
        return None

    def key(coords) -> str:
        return sep.join(["c", *(str(int(c)) for c in coords)])

    return ShardWriter(folder, key, blosc, chunk, shard, shape, dtype, dtype.type(fill))
