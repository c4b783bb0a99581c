"""Planes of the output volume at a chosen pyramid level, for measuring and plotting.

The report looks at what was written, not at what the aligner believed:
first the OME-Zarr pyramid ``DIR/volume.zarr`` (read through its
``multiscales`` metadata, OME-Zarr 0.5), else the renderer's lazy volume
(:func:`stackbuild.render.lazy.open_volume`), else nothing.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np

from ..folder import BuildFolder


@dataclass
class PlaneSource:
    """One pyramid level of the output volume.

    Attributes
    ----------
    data : array-like, shape (z, y, x)
        A :class:`~stackbuild.render.levelread.StoredLevel` (the render's shards), a zarr array or a dask
        array; planes are read one at a time.
    factor : float
        Pixel size of this level over that of level 0.
    offset : (float, float)
        ``(x, y)`` level-0 output pixel of this level's pixel ``(0, 0)`` centre.
    origin : str
        ``"volume.zarr"`` or ``"lazy"``: where the planes come from.
    level : int
        Index of the level.
    bin : int
        Planes are further reduced by a ``bin x bin`` mean when the volume has
        no level as coarse as asked for (``factor`` and ``offset`` include it).
    """

    data: object
    factor: float
    offset: tuple[float, float]
    origin: str
    level: int
    bin: int = 1

    @property
    def depth(self) -> int:
        """Number of planes."""
        return int(self.data.shape[0])

    def plane(self, z: int) -> np.ndarray:
        """Return plane ``z`` as float32."""
        p = self.data[int(z)]
        if hasattr(p, "compute"):
            p = p.compute()
        p = np.asarray(p, dtype=np.float32)
        if self.bin > 1:
            b = self.bin
            h, w = (p.shape[0] // b) * b, (p.shape[1] // b) * b
            p = p[:h, :w].reshape(h // b, b, w // b, b).mean(axis=(1, 3), dtype=np.float32)
        return p

    def window(self, z: int, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        """Return rows ``y0:y1``, columns ``x0:x1`` (this level's pixels, after binning) of plane ``z`` as float32.

        Only the chunks under the window are read (or rendered, for the lazy volume).
        """
        b = self.bin
        p = self.data[int(z), y0 * b:y1 * b, x0 * b:x1 * b]
        if hasattr(p, "compute"):
            p = p.compute()
        p = np.asarray(p, dtype=np.float32)
        if b > 1:
            h, w = (p.shape[0] // b) * b, (p.shape[1] // b) * b
            p = p[:h, :w].reshape(h // b, b, w // b, b).mean(axis=(1, 3), dtype=np.float32)
        return p

    def raw_window(self, z: int, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        """Return the same window as :meth:`window` in the stored dtype when there is no binning (no float copy)."""
        if self.bin > 1:
            return self.window(z, y0, y1, x0, x1)
        p = self.data[int(z), y0:y1, x0:x1]
        return np.asarray(p.compute() if hasattr(p, "compute") else p)

    def to_level0(self, points: np.ndarray) -> np.ndarray:
        """Map ``(N, 2)`` ``(x, y)`` pixels of this level to level-0 output pixels."""
        return np.asarray(points, float) * self.factor + np.asarray(self.offset, float)


def data_mask(plane: np.ndarray) -> np.ndarray:
    """Return where ``plane`` holds data: everything but sizeable runs of exact zero (the empty fill).

    Isolated zero pixels inside the tissue are kept (a 5 x 5 morphological
    opening removes them from the empty mask; common practice, no source).
    """
    empty = (plane == 0).view(np.uint8)
    if not empty.any():  # no zero at all (most windows inside the tissue): the opening would keep nothing either
        return np.ones(plane.shape, bool)
    empty = cv2.morphologyEx(empty, cv2.MORPH_OPEN, np.ones((5, 5), np.uint8))
    return empty == 0


def _ome_levels(volume: Path) -> tuple[Path, list[dict]] | None:
    """Return the image group's folder and its ``multiscales[0]`` datasets, per OME-Zarr 0.5.

    The group's attributes are read from its ``zarr.json`` (zarr v3 specification, "group metadata"),
    not through zarr-python: a report whose levels are the render's shards never imports it.
    """
    import json

    for sub in ("em", ""):
        path = volume / sub if sub else volume
        if not (path / "zarr.json").exists():
            continue
        try:
            meta = json.loads((path / "zarr.json").read_text(encoding="utf-8"))
            attrs = meta.get("attributes") or {} if meta.get("node_type") == "group" else None
        except (OSError, ValueError, AttributeError):
            continue
        if not isinstance(attrs, dict):
            continue
        ms = (attrs.get("ome") or {}).get("multiscales") or attrs.get("multiscales")
        if ms:
            return path, ms[0]["datasets"]
    return None


def _open_level(group: Path, name: str, label: str):
    """Return level ``name`` of the image group: read from its shard files, or through zarr for another layout."""
    from ..render.levelread import StoredLevel

    level = StoredLevel.open(group / name, label)
    if level is not None:
        return level
    import zarr

    return zarr.open_array(str(group / name), mode="r")


def _scale_translation(ds: dict) -> tuple[np.ndarray, np.ndarray]:
    scale = translation = None
    for t in ds.get("coordinateTransformations", []):
        if t.get("type") == "scale":
            scale = np.asarray(t["scale"], float)
        elif t.get("type") == "translation":
            translation = np.asarray(t["translation"], float)
    if scale is None:
        raise ValueError(f"dataset {ds.get('path')!r} has no scale transform")
    return scale, np.zeros_like(scale) if translation is None else translation


def _choose(factors: list[float], max_factor: float | None, max_px: int | None, extent: int) -> int:
    """Return the level index: the coarsest with factor <= max_factor, but no finer than fits max_px."""
    ok = [i for i, f in enumerate(factors) if f <= (max_factor or 1) + 1e-9]
    level = ok[-1] if (ok and max_factor is not None) else 0
    if max_px is not None:
        fits = next((i for i, f in enumerate(factors) if extent / f <= max_px), len(factors) - 1)
        level = max(level, fits)
    return level


def open_planes(build_dir: str | Path, *, max_factor: float | None = None,
                max_px: int | None = None, written: bool = True) -> PlaneSource | None:
    """Return the output volume at a chosen level, or ``None`` if there is no volume yet.

    Parameters
    ----------
    build_dir : str or Path
        The build folder.
    max_factor : float, optional
        Choose the coarsest level whose pixel is at most this many level-0 pixels.
    max_px : int, optional
        But no level finer than the first whose larger plane side fits in this many pixels
        (alone: the finest level that fits).
    written : bool
        Prefer the written ``volume.zarr``; False goes straight to the lazy volume.
    """
    build_dir = Path(build_dir)
    found = _ome_levels(BuildFolder(build_dir).volume_path) if written else None
    if found is not None:
        grp, datasets = found
        st = [_scale_translation(d) for d in datasets]
        factors = [float(s[-1] / st[0][0][-1]) for s, _ in st]
        arr0 = _open_level(grp, datasets[0]["path"], "volume.zarr level 0")
        i = _choose(factors, max_factor, max_px, max(arr0.shape[-2:]))
        s, t = st[i]
        s0, t0 = st[0]
        off = ((t[-1] - t0[-1]) / s0[-1], (t[-2] - t0[-2]) / s0[-2])
        arr = arr0 if i == 0 else _open_level(grp, datasets[i]["path"], f"volume.zarr level {i}")
        if arr.ndim > 3:  # leading channel/time axes of size 1
            arr = arr[(0,) * (arr.ndim - 3)]
        return PlaneSource(arr, factors[i], off, "volume.zarr", i)
    return _lazy_planes(build_dir, max_factor, max_px)


def _lazy_planes(build_dir: Path, max_factor, max_px) -> PlaneSource | None:
    """Return a level of the renderer's lazy volume (level ``n`` has pixels ``2**n`` wide)."""
    try:
        from ..render.lazy import open_volume
    except ImportError:
        return None
    try:
        base = open_volume(build_dir, 0, True)
    except Exception:  # no stitch records or canvas yet: nothing to look at
        return None
    level = max(0, int(np.floor(np.log2(max(max_factor or 1, 1)))))
    if max_px is not None:
        extent = max(base.data.shape[-2:])
        level = max(level, int(np.ceil(np.log2(max(extent / max_px, 1.0)))))
    wanted = level
    while level > 0:
        try:
            vol = open_volume(build_dir, level, True)
            break
        except ValueError:  # fewer levels than asked for
            level -= 1
    else:
        vol = base
    s0, t0 = np.asarray(base.scale_nm, float), np.asarray(base.translation_nm, float)
    s, t = np.asarray(vol.scale_nm, float), np.asarray(vol.translation_nm, float)
    factor = float(s[-1] / s0[-1])
    b = max(1, int(round(2 ** wanted / factor)))
    off = ((t[-1] - t0[-1]) / s0[-1] + factor * (b - 1) / 2, (t[-2] - t0[-2]) / s0[-2] + factor * (b - 1) / 2)
    return PlaneSource(vol.data, factor * b, off, "lazy", level, b)


def reslice_planes(source: PlaneSource, x: float, y: float) -> tuple[np.ndarray, np.ndarray]:
    """Return the ``(z, x)`` slice at level-0 row ``y`` and the ``(z, y)`` slice at column ``x``."""
    lines = reslice_lines(source, x, y, range(source.depth))
    if not lines:
        b = source.bin
        return (np.zeros((0, source.data.shape[-1] // b), np.float32),
                np.zeros((0, source.data.shape[-2] // b), np.float32))
    return np.stack([lines[z][0] for z in sorted(lines)]), np.stack([lines[z][1] for z in sorted(lines)])


def reslice_lines(source: PlaneSource, x: float, y: float, planes) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """Return ``{z: (row, column)}``: plane ``z``'s pixels along level-0 row ``y`` and along column ``x``.

    Consecutive planes are read in one call; each plane is reduced on its own, so its lines are
    the same numbers however the planes are grouped (a re-report reads only the planes that changed).
    """
    b = source.bin
    lx = source.data.shape[-1] // b
    ly = source.data.shape[-2] // b
    col = int(np.clip(round((x - source.offset[0]) / source.factor), 0, lx - 1))
    row = int(np.clip(round((y - source.offset[1]) / source.factor), 0, ly - 1))

    def read(key):
        a = source.data[key]
        return np.asarray(a.compute() if hasattr(a, "compute") else a, np.float32)

    zs = sorted({int(z) for z in planes})
    runs = [[z] for z in zs[:1]]
    for z in zs[1:]:
        if z == runs[-1][-1] + 1:
            runs[-1].append(z)
        else:
            runs.append([z])
    out = {}
    for run in runs:
        z0, z1 = run[0], run[-1] + 1
        xz = read((slice(z0, z1), slice(row * b, row * b + b), slice(0, lx * b)))
        yz = read((slice(z0, z1), slice(0, ly * b), slice(col * b, col * b + b)))
        for k in range(z1 - z0):
            out[z0 + k] = (xz[k].reshape(b, lx, b).mean(axis=(0, 2)), yz[k].reshape(ly, b, b).mean(axis=(1, 2)))
    return out


def window(source: PlaneSource, z: int, x: float, y: float, half: int) -> np.ndarray:
    """Return a ``2 * half`` square of plane ``z`` around level-0 point ``(x, y)`` (clipped to the plane).

    Only the chunks under the square are read, never the whole plane.
    """
    h, w = source.data.shape[-2] // source.bin, source.data.shape[-1] // source.bin
    cx = int(round((x - source.offset[0]) / source.factor))
    cy = int(round((y - source.offset[1]) / source.factor))
    y0, x0 = max(0, cy - half), max(0, cx - half)
    y1, x1 = min(h, max(y0, cy + half)), min(w, max(x0, cx + half))
    return source.window(z, y0, y1, x0, x1)
