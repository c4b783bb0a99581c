"""The probe's region windows of a written pyramid level, cut from its chunks and decoded only where the probe cuts.

The probe reads each plane one region window at a time, and neighbouring windows overlap
by the probe's margin, so through zarr-python a chunk on a region's edge was decoded once
per window that touched it (on 7 x 7 tiles of 1024 px about 2.2 decodes per chunk, plus the
reduced level's few chunks once per window), at about 4.7 ms of CPU per 1024 px chunk. Here
the chunks come from the render's own reader of its shards
(:class:`stackbuild.render.levelread.LevelReader`: one ``pread`` and a CRC-32C check per
chunk); a window of the probe (:class:`LazyWindow`) then decodes only the Blosc blocks under
the rows its blocks are cut from (:mod:`stackbuild.render.bloscrows`: 38 % of the blocks on
7 x 7 tiles of 1024 px), and a chunk is kept while a later window of the same task still
needs it (:class:`ChunkKeeper`; the farthest-needed chunk is dropped first when over its
budget). A window holds only the chunks under the blocks it is asked for; elsewhere it holds
the fill value, which the probe never reads.

A chunk that cannot be decoded raises the error that names array, plane and chunk
(:func:`stackbuild.render.audit.chunk_error`).
"""
from __future__ import annotations

import numpy as np

from ..render.levelread import LevelReader


class ChunkKeeper:
    """Decoded chunks of one or more levels, each kept until no later window of the task needs it.

    The caller says which chunks each step will read (:meth:`plan`, steps in the order they
    run), then reads windows step by step (:meth:`window`). A chunk is decoded at its first
    use and dropped after its last; past ``budget`` bytes the chunk needed farthest ahead is
    dropped first (and decoded again when its turn comes).
    """

    def __init__(self, budget: int):
        self.budget = int(budget)
        self._held: dict[tuple, np.ndarray] = {}
        self._uses: dict[tuple, list[int]] = {}
        self.decoded = 0

    def plan(self, steps: list[list[tuple]]) -> None:
        """Record the chunk keys ``(reader id, z, row, col)`` each step reads, steps in order."""
        for i, keys in enumerate(steps):
            for key in keys:
                self._uses.setdefault(key, []).append(i)

    def _get(self, reader: LevelReader, key: tuple, step: int):
        """Return the chunk of ``key`` as :meth:`LevelReader.stream` gives it (read at its first use, then kept)."""
        uses = self._uses.get(key, [])
        while uses and uses[0] <= step:
            uses.pop(0)
        chunk = self._held.get(key)
        if chunk is None:
            chunk = reader.stream(*key[1:])
            self.decoded += 1
            if uses:
                self._held[key] = chunk
                self._trim(key)
        elif not uses:
            self._held.pop(key)
        return chunk

    def _trim(self, keep: tuple) -> None:
        size = sum(c.nbytes for c in self._held.values())
        while size > self.budget and len(self._held) > 1:
            far = max((k for k in self._held if k != keep), key=lambda k: self._uses[k][0])
            size -= self._held.pop(far).nbytes

    def _parts(self, reader: LevelReader, step: int, z: int, y0: int, y1: int, x0: int, x1: int, keys) -> tuple:
        """Return the window's array (the fill where no chunk of ``keys`` lies, unset elsewhere) and its parts.

        A part is ``[chunk, (z, row, col), a0, a1, b0, b1]``: the chunk and the window rows ``a0:a1``,
        columns ``b0:b1`` it covers.
        """
        ch, cw = reader.chunk
        every = {(r, c) for r in range(y0 // ch, (y1 - 1) // ch + 1) for c in range(x0 // cw, (x1 - 1) // cw + 1)}
        # filled with the fill value only when some part of it gets no chunk
        if every <= keys:
            out = np.empty((y1 - y0, x1 - x0), reader.dtype)
        else:
            out = np.full((y1 - y0, x1 - x0), reader.fill, reader.dtype)
        parts = []
        for r, c in sorted(keys):
            a0, b0 = max(y0, r * ch), max(x0, c * cw)
            a1, b1 = min(y1, (r + 1) * ch), min(x1, (c + 1) * cw)
            if a1 > a0 and b1 > b0:
                parts.append([self._get(reader, (id(reader), z, r, c), step), (z, r, c),
                              a0 - y0, a1 - y0, b0 - x0, b1 - x0])
        return out, parts

    def window(self, reader: LevelReader, step: int, z: int, y0: int, y1: int, x0: int, x1: int,
               keys: set[tuple[int, int]]) -> np.ndarray:
        """Return rows ``y0:y1``, columns ``x0:x1`` of plane ``z`` holding chunks ``keys`` (the fill elsewhere)."""
        return self.lazy_window(reader, step, z, y0, y1, x0, x1, keys).fill_all()

    def lazy_window(self, reader: LevelReader, step: int, z: int, y0: int, y1: int, x0: int, x1: int,
                    keys: set[tuple[int, int]]) -> "LazyWindow":
        """Return the same window as :meth:`window`, its chunks' rows decoded and copied in only when asked for."""
        out, parts = self._parts(reader, step, z, y0, y1, x0, x1, keys)
        return LazyWindow(reader, out, parts, (y0, x0))


class LazyWindow:
    """A window of one plane whose chunk rows are decoded and copied in on demand (:meth:`fill`).

    :attr:`array` holds the fill value where no chunk was asked for; rows of a chunk are
    valid only once :meth:`fill` has covered them. The probe cuts blocks around a fraction of a
    window's rows (about half at the defaults), so the rest of its chunks' Blosc blocks are
    never decoded.
    """

    def __init__(self, reader: LevelReader, array: np.ndarray, parts: list, corner: tuple[int, int]):
        self.reader, self.array, self.corner = reader, array, corner
        self._parts = [p + [np.zeros(p[3] - p[2], bool)] for p in parts]

    def fill(self, y0: int, y1: int, x0: int, x1: int) -> None:
        """Decode and copy in the chunk rows under window rows ``y0:y1``, columns ``x0:x1`` (clipped)."""
        ch, cw = self.reader.chunk
        for part in self._parts:
            chunk, key, a0, a1, b0, b1, copied = part
            lo, hi = max(y0, a0), min(y1, a1)
            if hi <= lo or min(x1, b1) <= max(x0, b0):
                continue
            missing = np.flatnonzero(~copied[lo - a0:hi - a0])
            if not missing.size:
                continue
            lo, hi = lo + int(missing[0]), lo + int(missing[-1]) + 1
            r0 = lo + self.corner[0] - key[1] * ch
            c0 = b0 + self.corner[1] - key[2] * cw
            if chunk is None:  # released (or every row copied): read again from the shard, not kept
                chunk = self.reader.stream(*key)
            data = self.reader.rows(chunk, key, r0, r0 + hi - lo)
            self.array[lo:hi, b0:b1] = data[r0:r0 + hi - lo, c0:c0 + b1 - b0]
            copied[lo - a0:hi - a0] = True
            if copied.all():
                part[0] = None  # every row is in the window: the chunk is not needed any more

    def release(self) -> None:
        """Drop the window's chunks: rows not copied in yet are read from the shard files again when asked for.

        The probe releases a window once its blocks are cut; only a block whose first-pass match
        moved it far reads more of the window after that (rarely).
        """
        for part in self._parts:
            part[0] = None

    def fill_all(self) -> np.ndarray:
        """Return :attr:`array` with every chunk row copied in (what :meth:`ChunkKeeper.window` returns)."""
        self.fill(0, self.array.shape[0], 0, self.array.shape[1])
        return self.array

    def any_data(self) -> bool:
        """Return whether the whole window holds a non-zero pixel, decoding only until the first one is found."""
        covered = sum((p[3] - p[2]) * (p[5] - p[4]) for p in self._parts)
        if covered < self.array.size and self.reader.fill != 0:
            return True  # some of the window is the fill value, and it is not zero
        step = 32  # rows at a time: a Blosc block of a 1024 px uint8 chunk
        for _, _, a0, a1, b0, b1, _ in self._parts:
            for lo in range(a0, a1, step):
                hi = min(a1, lo + step)
                self.fill(lo, hi, b0, b1)
                if self.array[lo:hi, b0:b1].any():
                    return True
        return False

#: bytes of chunks (stream and pixels) a probe task keeps for its later windows. A chunk read again costs a
#: ``pread``, its checksum and the rows it is cut from (about 0.6 ms at 1024 px); at 64 MB the kept chunks,
#: each with its stream, raised the report's peak on 7 x 7 tiles of 1024 px from 185 to 205 MB, at 16 MB 178 MB
#: with no CPU difference measurable (rule of thumb)
KEEP_BYTES = 16 << 20


class WindowReader:
    """The probe's region windows of one level (and of the level ``coarse_factor`` times coarser), read by chunks.

    ``steps`` lists the windows a task reads, in order: ``(z, box, centres)`` with the box of
    the region's block centres ``(x0, y0, x1, y1)`` and the centres ``(N, 2)`` ``(x, y)`` of the
    blocks measured there (level px). A window reaches ``margin`` beyond the box; of it, only
    the chunks under ``margin + 5`` px around a centre are read (the farthest the probe cuts a
    block, with the data mask's 4 px), or the whole window when ``whole`` (the reduced copy is
    then made from it). Without a :class:`LevelReader` (not the render's layout, or binned
    planes) windows are read through the array as before.
    """

    def __init__(self, source, coarse, margin: int, coarse_factor: int, whole: bool, steps: list, lazy: bool = True):
        self.source, self.coarse, self.margin, self.k, self.whole = source, coarse, margin, coarse_factor, whole
        self.lazy = lazy
        written = source.origin == "volume.zarr" and source.bin == 1
        self.fine = LevelReader.of(source.data, f"volume.zarr level {source.level}") if written else None
        self.small = (LevelReader.of(coarse.data, f"volume.zarr level {coarse.level}")
                      if coarse is not None and self.fine is not None else None)
        self.keeper = ChunkKeeper(KEEP_BYTES)
        self.steps = [self._extent(z, box, centres) for z, box, centres in steps]
        self.keeper.plan([[(id(self.fine), s["z"], *k) for k in s["fine"]] + [(id(self.small), s["z"], *k) for k in s["small"]]
                          for s in self.steps])

    def _extent(self, z: int, box, centres) -> dict:
        h, w = self.source.data.shape[-2] // self.source.bin, self.source.data.shape[-1] // self.source.bin
        x0, y0, x1, y1 = box
        m, k = self.margin, self.k
        wx0, wy0 = max(0, x0 - m), max(0, y0 - m)
        if self.coarse is not None:
            wx0, wy0 = wx0 - wx0 % k, wy0 - wy0 % k
        wx1, wy1 = min(w, x1 + m), min(h, y1 + m)
        out = {"z": z, "win": (wy0, wy1, wx0, wx1), "fine": set(), "small": set()}
        if self.fine is not None:
            if self.whole:
                boxes = np.array([[wy0, wy1, wx0, wx1]])
            else:
                c, r = np.asarray(centres, int).reshape(-1, 2), m + 5
                boxes = np.column_stack([np.maximum(c[:, 1] - r, wy0), np.minimum(c[:, 1] + r + 1, wy1),
                                         np.maximum(c[:, 0] - r, wx0), np.minimum(c[:, 0] + r + 1, wx1)])
            out["fine"] = self.fine.chunks_under(boxes)
        if self.small is not None:
            out["coarse"] = (wy0 // k, -(-wy1 // k), wx0 // k, -(-wx1 // k))
            out["small"] = self.small.chunks_under(np.array([out["coarse"]]))
        return out

    def read(self, step: int):
        """Return step ``step``'s window as read (its stored dtype), its coarse window (None without a coarse
        level) and its top-left ``(x, y)``.

        The window read by chunks of the written level is a :class:`LazyWindow` (its rows decoded
        where blocks are cut) unless the whole window is needed (``whole``) or ``lazy`` is False.
        """
        s = self.steps[step]
        wy0, wy1, wx0, wx1 = s["win"]
        if self.fine is not None and self.lazy and not self.whole:
            raw = self.keeper.lazy_window(self.fine, step, s["z"], wy0, wy1, wx0, wx1, s["fine"])
        elif self.fine is not None:
            raw = self.keeper.window(self.fine, step, s["z"], wy0, wy1, wx0, wx1, s["fine"])
        else:
            raw = self.source.raw_window(s["z"], wy0, wy1, wx0, wx1)
        small = None
        if self.coarse is not None:
            cy0, cy1, cx0, cx1 = (s["coarse"] if self.small is not None else
                                  (wy0 // self.k, -(-wy1 // self.k), wx0 // self.k, -(-wx1 // self.k)))
            small = (self.keeper.window(self.small, step, s["z"], cy0, min(cy1, self.small.shape[1]), cx0,
                                        min(cx1, self.small.shape[2]), s["small"])
                     if self.small is not None else self.coarse.raw_window(s["z"], cy0, cy1, cx0, cx1))
        return raw, small, np.array([wx0, wy0])
