"""Read the store's small arrays (illumination profiles, displacement fields) straight from their two files.

:meth:`stackbuild.transforms.store.TransformStore._write_array` writes each array
as a zarr v3 array of one chunk (``zarr.create_array(..., chunks=arr.shape)``:
codecs ``bytes`` then ``zstd``). Opening such an array through zarr-python costs
about 3 ms (metadata parsing into typed objects, its asynchronous codec pipeline),
for a few kB of data; an update reads 30-40 of them (each section's stitch and
alignment records are loaded by several steps), about 0.13 s of a 2-3 s update.
:func:`read_one_chunk` reads ``zarr.json`` and the one chunk file and decodes the
chunk as the zarr v3 specification says for exactly that layout, in about 0.1 ms.
:func:`write_one_chunk` writes that layout, the same files zarr-python writes for it, so an
update that stores a section's records never imports zarr-python (about 0.2 s of CPU).

Anything else (another codec, several chunks, a missing chunk, which zarr fills
with the fill value, a storage transformer, an unknown data type) returns None,
and the caller reads through zarr; ``tests/test_transforms_store.py`` checks the
result against zarr-python's own read.

References
----------
Zarr storage specification version 3: array metadata, ``bytes`` and ``zstd`` codecs,
the ``default`` chunk key encoding. https://zarr-specs.readthedocs.io/en/latest/v3/core/index.html
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

#: zarr v3 data type names read here (the numeric ones numpy names the same way).
_TYPES = frozenset({"int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64", "float32", "float64"})


def chunk_key_separator(meta: dict) -> str | None:
    """Return the separator of an array's ``default`` chunk key encoding ("/" or "."), or None for another encoding.

    Under the ``default`` encoding the chunk at grid position ``(i, j, ...)`` is stored under the key
    ``"c" + sep + "i" + sep + "j" ...`` (zarr v3 core specification, chunk key encoding).
    """
    enc = meta.get("chunk_key_encoding") or {}
    sep = (enc.get("configuration") or {}).get("separator", "/")
    return sep if enc.get("name") == "default" and sep in ("/", ".") else None


def _chunk_file(meta: dict, path: Path, ndim: int) -> Path | None:
    """Return the file of chunk ``(0, ..., 0)`` under the ``default`` chunk key encoding, or None for another one."""
    sep = chunk_key_separator(meta)
    return None if sep is None else path / sep.join(["c"] + ["0"] * ndim)


def read_one_chunk(path: str | Path) -> np.ndarray | None:
    """Return the array stored at ``path`` when it is one ``bytes`` + ``zstd`` chunk of a numeric type, else None.

    None means "read it through zarr" (another layout, or a chunk not stored); a file that
    cannot be read or decoded also gives None, so zarr reports the problem in its words.
    """
    # imagecodecs' zstd (the tile reader's codec library, already loaded in most processes), not numcodecs': the
    # same decoded bytes (checked against zarr-python's read, tests/test_transforms_store.py), without numcodecs'
    # import (about 0.07 s of CPU, paid by a report process for its first stitch record)
    from imagecodecs import zstd_decode

    path = Path(path)
    try:
        meta = json.loads((path / "zarr.json").read_text(encoding="utf-8"))
        shape = tuple(int(n) for n in meta["shape"])
        grid = meta.get("chunk_grid") or {}
        codecs = meta.get("codecs") or []
        if meta.get("zarr_format") != 3 or meta.get("node_type") != "array" or meta.get("storage_transformers") \
                or meta.get("data_type") not in _TYPES or grid.get("name") != "regular" \
                or tuple(grid.get("configuration", {}).get("chunk_shape", ())) != shape \
                or [c.get("name") for c in codecs] != ["bytes", "zstd"]:
            return None
        dtype = np.dtype(meta["data_type"])
        endian = (codecs[0].get("configuration") or {}).get("endian", "little")
        if dtype.itemsize > 1 and endian not in ("little", "big"):
            return None
        chunk = _chunk_file(meta, path, len(shape))
        if chunk is None or not chunk.is_file():
            return None
        raw = zstd_decode(chunk.read_bytes())
        order = "<" if endian == "little" else ">"
        if len(raw) != math.prod(shape) * dtype.itemsize:
            return None
        return np.frombuffer(raw, dtype=dtype.newbyteorder(order)).astype(dtype, copy=True).reshape(shape)
    except Exception:  # codecs raise many types for damaged bytes: zarr reads it and names the problem
        return None


def write_one_chunk(path: str | Path, arr: np.ndarray) -> bool:
    """Write ``arr`` to the new folder ``path`` as a zarr v3 array of one ``bytes`` + ``zstd`` chunk; False if not handled.

    The files are the ones ``zarr.create_array(store=path, shape=arr.shape, dtype=arr.dtype,
    chunks=arr.shape, zarr_format=3)`` followed by ``z[...] = arr`` writes with zarr-python's
    defaults (its ``zarr.json`` as it formats it, zstd level 0 without checksum, fill value 0,
    the chunk left out when it holds only the fill value); ``tests/test_transforms_store.py``
    compares them byte for byte. Only the numeric types of :func:`read_one_chunk` with at least
    one dimension; anything else returns False and writes nothing (the caller uses zarr).
    """
    from imagecodecs import zstd_encode  # the codec of read_one_chunk: numcodecs' Zstd gives the same bytes

    dtype = np.dtype(arr.dtype)
    if dtype.name not in _TYPES or arr.ndim == 0 or 0 in arr.shape:
        return False
    path = Path(path)
    shape = [int(n) for n in arr.shape]
    codecs = [{"name": "bytes", "configuration": {"endian": "little"}},
              {"name": "zstd", "configuration": {"level": 0, "checksum": False}}]
    if dtype.itemsize == 1:  # zarr-python leaves out the byte order of single bytes
        codecs[0] = {"name": "bytes"}
    meta = {"shape": shape, "data_type": dtype.name,
            "chunk_grid": {"name": "regular", "configuration": {"chunk_shape": shape}},
            "chunk_key_encoding": {"name": "default", "configuration": {"separator": "/"}},
            "fill_value": 0.0 if dtype.kind == "f" else 0, "codecs": codecs, "attributes": {}, "zarr_format": 3,
            "node_type": "array", "storage_transformers": []}
    path.mkdir(parents=True)
    (path / "zarr.json").write_text(json.dumps(meta, indent=2), encoding="utf-8")
    if (arr != 0).any():
        chunk = _chunk_file(meta, path, arr.ndim)
        chunk.parent.mkdir(parents=True)
        chunk.write_bytes(bytes(zstd_encode(np.ascontiguousarray(arr, dtype=dtype.newbyteorder("<")).tobytes())))
    return True
