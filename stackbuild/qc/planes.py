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
import zarr


@dataclass
class PlaneSource:
    """One pyramid level of the output volume.

    Attributes
    ----------
    data : array-like, shape (z, y, x)
        A zarr array or a dask array; planes are read one at a time.
    factor : float
        Pixel size of this level over that of level 0.
    offset : (float, float)
        ``(x, y)`` level-0 output pixel of this level's pixel ``(0, 0)`` centre.
    origin : str
        ``"volume.zarr"`` or ``"lazy"``: where the planes come from.
    level : int
        Index of the level.
    """

    data: object
    factor: float
    offset: tuple[float, float]
    origin: str
    level: int

    @property
    def depth(self) -> int:
        """Number of planes."""
        return int(self.data.shape[0])

    def plane(self, z: int) -> np.ndarray:
        """Return plane ``z`` as float32."""
        p = self.data[int(z)]
        if hasattr(p, "compute"):
            p = p.compute()
        return np.asarray(p, dtype=np.float32)

    def to_level0(self, points: np.ndarray) -> np.ndarray:
        """Map ``(N, 2)`` ``(x, y)`` pixels of this level to level-0 output pixels."""
        return np.asarray(points, float) * self.factor + np.asarray(self.offset, float)


def data_mask(plane: np.ndarray) -> np.ndarray:
    """Return where ``plane`` holds data: everything but sizeable runs of exact zero (the empty fill).

    Isolated zero pixels inside the tissue are kept (a 5 x 5 morphological
    opening removes them from the empty mask; common practice, no source).
    """
    empty = (plane == 0).astype(np.uint8)
    empty = cv2.morphologyEx(empty, cv2.MORPH_OPEN, np.ones((5, 5), np.uint8))
    return empty == 0


def _ome_levels(volume: Path) -> tuple[zarr.Group, list[dict]] | None:
    """Return the image group and its ``multiscales[0]`` datasets, per OME-Zarr 0.5."""
    for sub in ("em", ""):
        path = volume / sub if sub else volume
        if not (path / "zarr.json").exists():
            continue
        try:
            grp = zarr.open_group(str(path), mode="r")
        except Exception:
            continue
        ms = grp.attrs.get("ome", {}).get("multiscales") or grp.attrs.get("multiscales")
        if ms:
            return grp, ms[0]["datasets"]
    return None


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
    """Return the level index: the coarsest with factor <= max_factor, or the finest fitting max_px."""
    if max_px is not None:
        for i, f in enumerate(factors):
            if extent / f <= max_px:
                return i
        return len(factors) - 1
    ok = [i for i, f in enumerate(factors) if f <= (max_factor or 1) + 1e-9]
    return ok[-1] if ok else 0


def open_planes(build_dir: str | Path, *, max_factor: float | None = None,
                max_px: int | None = None) -> PlaneSource | None:
    """Return the output volume at a chosen level, or ``None`` if there is no volume yet.

    Parameters
    ----------
    build_dir : str or Path
        The build folder.
    max_factor : float, optional
        Choose the coarsest level whose pixel is at most this many level-0 pixels.
    max_px : int, optional
        Instead, choose the finest level whose larger plane side fits in this many pixels.
    """
    build_dir = Path(build_dir)
    found = _ome_levels(build_dir / "volume.zarr")
    if found is not None:
        grp, datasets = found
        st = [_scale_translation(d) for d in datasets]
        factors = [float(s[-1] / st[0][0][-1]) for s, _ in st]
        arr0 = grp[datasets[0]["path"]]
        i = _choose(factors, max_factor, max_px, max(arr0.shape[-2:]))
        s, t = st[i]
        s0, t0 = st[0]
        off = ((t[-1] - t0[-1]) / s0[-1], (t[-2] - t0[-2]) / s0[-2])
        arr = grp[datasets[i]["path"]]
        if arr.ndim > 3:  # leading channel/time axes of size 1
            arr = arr[(0,) * (arr.ndim - 3)]
        return PlaneSource(arr, factors[i], off, "volume.zarr", i)
    return _lazy_planes(build_dir, max_factor, max_px)


def _lazy_planes(build_dir: Path, max_factor, max_px) -> PlaneSource | None:
    try:
        from ..render.lazy import open_volume
    except ImportError:
        return None
    base = open_volume(build_dir, 0, True)
    extent = max(base.data.shape[-2:])
    level, chosen = 0, base
    while True:  # walk down the pyramid until the next level would overshoot
        try:
            nxt = open_volume(build_dir, level + 1, True)
        except Exception:
            break
        f = float(np.asarray(nxt.scale_nm)[-1] / np.asarray(base.scale_nm)[-1])
        if (max_px is not None and extent / float(np.asarray(chosen.scale_nm)[-1]
                                                  / np.asarray(base.scale_nm)[-1]) <= max_px) or \
                (max_px is None and f > (max_factor or 1) + 1e-9) or nxt.data.shape[-1] < 2:
            break
        level, chosen = level + 1, nxt
    s0, t0 = np.asarray(base.scale_nm, float), np.asarray(base.translation_nm, float)
    s, t = np.asarray(chosen.scale_nm, float), np.asarray(chosen.translation_nm, float)
    off = ((t[-1] - t0[-1]) / s0[-1], (t[-2] - t0[-2]) / s0[-2])
    return PlaneSource(chosen.data, float(s[-1] / s0[-1]), off, "lazy", level)
