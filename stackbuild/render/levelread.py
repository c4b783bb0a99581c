"""A written pyramid level read straight from its shard files, without zarr-python.

The one reader of the render's shard layout (zarr v3 sharding, chunks one plane deep; the
layout from the array's ``zarr.json``, :func:`stackbuild.render.shardfile.shard_reader`):
a chunk is read with one ``pread`` from its shard and its CRC-32C checked, and its Blosc
stream is decoded only under the rows asked for (:mod:`stackbuild.render.bloscrows`).
zarr-python's import alone costs a process about 0.3 s of CPU, and through it a 1024 px
chunk costs about 4.7 ms of CPU (its asynchronous codec pipeline around a Blosc decode of
about 1.8 ms).

- :class:`LevelReader` reads single chunks (whole, or rows of them); the report's probe cuts
  its windows from them (:mod:`stackbuild.qc.windowread`).
- :class:`StoredLevel` reads numpy-style boxes of a level: the report's planes and lines.
- :class:`StoredArray` adds what a patch of a written volume needs (:mod:`stackbuild.render.patch`,
  the update's reach check): whole-shard writes and zarr-python for anything else, so that
  an update of a few tiles never imports zarr-python.

A chunk or shard index whose bytes do not check out raises the error that names array,
plane and chunk (:func:`stackbuild.render.audit.chunk_error`).
"""
from __future__ import annotations

import operator
from pathlib import Path

import numpy as np

from .bloscrows import LazyChunk
from .shardfile import ABSENT, ShardWriter, shard_reader, shard_writer


def _plane_deep(layout: ShardWriter | None) -> bool:
    """Return True for a 3-D layout whose chunks and shards are one plane deep (the render's levels)."""
    return layout is not None and len(layout.shape) == 3 and layout.chunk[0] == 1 and layout.shard[0] == 1


class LevelReader:
    """Reads whole chunks of one 3-D level ``(z, y, x)`` whose chunks are one plane deep.

    The index of each shard is read once and kept (a level that is not written to while it is read).
    ``by_block``: decode a chunk's Blosc blocks only under the rows asked for
    (:class:`~stackbuild.render.bloscrows.LazyChunk`); False decodes each chunk whole at its first
    read, through the codec that wrote it.
    """

    def __init__(self, layout: ShardWriter, label: str, by_block: bool = True):
        self.layout, self.label, self.by_block = layout, label, by_block
        self.chunk = tuple(int(c) for c in layout.chunk[1:])
        self.per_shard = tuple(int(s) for s in layout.per_shard)
        self.shape = tuple(int(s) for s in layout.shape)
        self.dtype, self.fill = layout.dtype, layout.fill
        self._index: dict[tuple, np.ndarray | None] = {}

    @classmethod
    def of(cls, array, label: str) -> "LevelReader | None":
        """Return a reader of ``array`` (a zarr array or a :class:`StoredLevel`; None when its layout is not the
        render's, or its chunks span planes)."""
        if isinstance(array, StoredLevel):
            return cls(array.layout, label)
        import zarr

        if not isinstance(array, zarr.Array) or array.ndim != 3:
            return None
        layout = shard_writer(array)
        return cls(layout, label) if _plane_deep(layout) else None

    def _path(self, shard: tuple) -> Path:
        return self.layout.folder / self.layout.key(shard)

    def _shard_index(self, shard: tuple) -> np.ndarray | None:
        """Return the shard's ``(..., 2)`` offsets and lengths (None: no shard file, every chunk the fill)."""
        if shard not in self._index:
            try:
                with open(self._path(shard), "rb") as fh:
                    self._index[shard] = self.layout.read_index(fh)
            except FileNotFoundError:
                self._index[shard] = None
            except ValueError as exc:
                raise self._damaged(shard[0], shard[1] * self.per_shard[1], shard[2] * self.per_shard[2],
                                    exc) from None
        return self._index[shard]

    def _damaged(self, z: int, row: int, col: int, exc: BaseException):
        from .audit import chunk_error

        return chunk_error(self.label, self.layout.folder, z, row, col, exc)

    def stream(self, z: int, row: int, col: int):
        """Return chunk ``(row, col)`` of plane ``z`` as a :class:`~stackbuild.render.bloscrows.LazyChunk` (its
        checksum checked, nothing decoded yet), or the full chunk of the fill value when it was never written."""
        shard = (z, row // self.per_shard[1], col // self.per_shard[2])
        index = self._shard_index(shard)
        entry = None if index is None else index[0, row % self.per_shard[1], col % self.per_shard[2]]
        if entry is None or entry[0] == ABSENT:
            return np.full(self.chunk, self.fill, self.dtype)
        try:
            with open(self._path(shard), "rb") as fh:
                data = self.layout.read_chunk(fh, entry)
            if self.layout.blosc is None:
                return np.frombuffer(data[:-4], self.dtype).reshape(self.chunk)
            return LazyChunk(data[:-4], self.chunk, self.dtype, self.layout.blosc.decode, self.by_block)
        except Exception as exc:  # codecs raise many types for damaged bytes
            raise self._damaged(z, row, col, exc) from None

    def rows(self, chunk, key: tuple, r0: int, r1: int) -> np.ndarray:
        """Return chunk ``key = (z, row, col)`` (from :meth:`stream`) with at least its rows ``r0:r1`` decoded."""
        if isinstance(chunk, np.ndarray):
            return chunk
        try:
            return chunk.rows(r0, r1)
        except Exception as exc:  # codecs raise many types for damaged bytes
            raise self._damaged(*key, exc) from None

    def read(self, z: int, row: int, col: int) -> np.ndarray:
        """Return chunk ``(row, col)`` of plane ``z`` (the full chunk, padded with the fill beyond the array)."""
        return self.rows(self.stream(z, row, col), (z, row, col), 0, self.chunk[0])

    def chunks_under(self, boxes: np.ndarray) -> set[tuple[int, int]]:
        """Return the ``(row, col)`` chunks that boxes ``(N, 4)`` ``[y0, y1, x0, x1)`` (clipped) meet."""
        ch, cw = self.chunk
        out = set()
        for y0, y1, x0, x1 in np.asarray(boxes, int).reshape(-1, 4):
            y0, x0, y1, x1 = max(0, y0), max(0, x0), min(self.shape[1], y1), min(self.shape[2], x1)
            if y1 > y0 and x1 > x0:
                out.update((r, c) for r in range(y0 // ch, (y1 - 1) // ch + 1) for c in range(x0 // cw, (x1 - 1) // cw + 1))
        return out


class StoredLevel:
    """A written 3-D level read straight from its shard files: ``shape``, ``dtype`` and numpy-style reads.

    Each chunk under a read is read with its CRC-32C checked and decoded only under the rows asked
    for. ``tests/test_render_levelread.py`` compares its reads with zarr-python's.
    """

    ndim = 3

    def __init__(self, layout: ShardWriter, label: str):
        self.layout, self.label = layout, label
        self.reader = LevelReader(layout, label)
        self.shape, self.dtype = self.reader.shape, self.reader.dtype

    @classmethod
    def open(cls, folder, label: str) -> "StoredLevel | None":
        """Return the level stored in ``folder`` (None when its layout is not the render's: read it through zarr)."""
        layout = shard_reader(folder)
        return cls(layout, label) if _plane_deep(layout) else None

    def _reader(self) -> LevelReader:
        """Return the chunk reader of one read (this level's own, its shard indexes kept)."""
        return self.reader

    def __getitem__(self, key) -> np.ndarray:
        """Return ``level[key]`` for integers and slices of step 1, as numpy (and zarr) index."""
        key = key if isinstance(key, tuple) else (key,)
        if len(key) > 3:
            raise IndexError(f"too many indices for a 3-D level: {key!r}")
        key = key + (slice(None),) * (3 - len(key))
        ranges, kept = [], []
        for k, n in zip(key, self.shape):
            if isinstance(k, slice):
                a, b, step = k.indices(n)
                if step != 1:
                    raise IndexError("only slices of step 1 are read")
                ranges.append((a, max(a, b)))
                kept.append(slice(None))
            else:
                i = operator.index(k)
                i = i + n if i < 0 else i
                if not 0 <= i < n:
                    raise IndexError(f"index {k} is out of bounds for an axis of size {n}")
                ranges.append((i, i + 1))
                kept.append(0)
        (z0, z1), (y0, y1), (x0, x1) = ranges
        out = np.empty((z1 - z0, y1 - y0, x1 - x0), self.dtype)
        rd = self._reader()
        ch, cw = rd.chunk
        for z in range(z0, z1):
            for r in range(y0 // ch, (y1 - 1) // ch + 1) if y1 > y0 else ():
                a0, a1 = max(y0, r * ch), min(y1, (r + 1) * ch)
                for c in range(x0 // cw, (x1 - 1) // cw + 1) if x1 > x0 else ():
                    b0, b1 = max(x0, c * cw), min(x1, (c + 1) * cw)
                    data = rd.rows(rd.stream(z, r, c), (z, r, c), a0 - r * ch, a1 - r * ch)
                    out[z - z0, a0 - y0:a1 - y0, b0 - x0:b1 - x0] = data[a0 - r * ch:a1 - r * ch, b0 - c * cw:b1 - c * cw]
        return out[tuple(kept)]


def _label(folder: Path) -> str:
    """Return how messages name the array in ``folder``: its path from its ``.zarr`` folder (``volume.zarr/em/0``)."""
    parts = folder.parts
    top = max((i for i, p in enumerate(parts) if p.endswith(".zarr")), default=len(parts) - 1)
    return "/".join(parts[top:])


class StoredArray(StoredLevel):
    """A written level of the render's layout, read and written shard by shard without zarr-python.

    What a patch of a written volume (:mod:`stackbuild.render.patch`) needs of a level: its shape,
    chunks, shards, fill value and data type, reads of boxes (:class:`StoredLevel`) and whole-shard
    writes (:class:`~stackbuild.render.shardfile.ShardWriter`, :func:`~stackbuild.render.shardfile.shard_writer`
    hands it out). An update of a few tiles thereby never imports zarr-python (about 0.2 s of CPU
    per process). Anything else (a key other than integers and slices of step 1, a write that is
    not one whole shard) goes through a zarr array opened on first need. Pickles as its folder
    (tasks on other processes open it again).
    """

    def __init__(self, folder, layout: ShardWriter):
        self.folder, self._zarr = Path(folder), None
        super().__init__(layout, _label(self.folder))
        self.dtype = np.dtype(layout.dtype).newbyteorder("=")
        self.chunks, self.shards, self.fill_value = tuple(layout.chunk), tuple(layout.shard), layout.fill

    @classmethod
    def open(cls, folder) -> "StoredArray | None":
        """Return the array stored in ``folder`` (None when its layout is not the one handled: open it with zarr)."""
        layout = shard_reader(folder)
        return cls(folder, layout) if _plane_deep(layout) else None

    def __reduce__(self):
        return (_reopen, (str(self.folder),))

    def zarr(self):
        """Return the array opened with zarr-python (once)."""
        if self._zarr is None:
            import zarr

            self._zarr = zarr.open_array(str(self.folder), mode="r+")
        return self._zarr

    def _reader(self) -> LevelReader:
        # A fresh reader per read: a patch rewrites shards between reads, so their indexes are not kept.
        # Chunks decoded whole: a patch reads whole shards, and numcodecs is loaded for its writes anyway.
        return LevelReader(self.layout, self.label, by_block=False)

    def __getitem__(self, key) -> np.ndarray:
        """Return ``array[key]``: from the shard files for integers and slices of step 1, otherwise through zarr."""
        parts = key if isinstance(key, tuple) else (key,)
        if len(parts) <= 3 and all(isinstance(k, (int, np.integer)) and not isinstance(k, bool) or
                                   isinstance(k, slice) and k.step in (None, 1) for k in parts):
            return super().__getitem__(key)
        return np.asarray(self.zarr()[key])

    def __setitem__(self, key, value) -> None:
        self.zarr()[key] = value

    def with_config(self, config):
        """Return the zarr array with ``config`` (a write that is not one whole shard)."""
        return self.zarr().with_config(config)


def _reopen(folder: str) -> StoredArray:
    out = StoredArray.open(folder)
    if out is None:
        raise ValueError(f"{folder}: its layout changed since the task was made")
    return out
