"""The lazy volume: a dask array computed chunk by chunk from raw tiles and stored transforms.

Level 0 is rendered in ``1 x chunk x chunk`` blocks (so each block fits inside
one zarr shard); level ``n`` is level ``n-1`` reduced 2x2 by
:func:`stackbuild.render.reduce.reduce2x2`, the same function the writer uses,
so the lazy volume and the written one agree byte for byte. Every task takes
only small inputs (a :class:`RenderPlan`, a plane number and a slice) and
reads what it needs from the build folder itself; per process, decoded tiles
and loaded records are cached.
"""
from __future__ import annotations

import json
import threading
from collections import OrderedDict
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import cv2
import numpy as np

from ..errors import InputError
from ..folder import BuildFolder
from ..transforms.records import Canvas
from ..transforms.store import TransformStore
from .canvas import compute_canvas
from .contrast import DOC_KIND, section_contrast
from .ngff import AXES, level_transform
from .reduce import level_shapes, reduce2x2
from ..sampler import interpolation_order, render_region
from ..tiles import SectionTiles

if TYPE_CHECKING:  # dask is imported where a graph is made: render tasks and small updates never import it
    import dask.array as da


@dataclass(frozen=True)
class RenderPlan:
    """Everything a render task needs besides the records it reads: small and picklable."""

    transforms: str
    origin_x: float
    origin_y: float
    width: int
    height: int
    first_section: int
    depth: int
    dtype: str
    lost: tuple[int, ...]
    order: int = 1
    contrast: bool = False
    reducer: str = "mean"
    chunk: int = 1024

    @classmethod
    def from_canvas(cls, transforms: str | Path, canvas: Canvas, settings) -> "RenderPlan":
        """Return the plan of a canvas rendered with :class:`RenderSettings` ``settings``."""
        return cls(str(transforms), canvas.origin_x, canvas.origin_y, canvas.width, canvas.height,
                   canvas.first_section, canvas.depth, canvas.dtype, tuple(canvas.lost_sections),
                   interpolation_order(settings.interpolation), bool(settings.contrast),
                   settings.reducer, int(settings.chunk))


_RECORDS: OrderedDict = OrderedDict()
_RECORDS_LOCK = threading.Lock()


def _mtime(path: Path) -> int:
    try:
        return path.stat().st_mtime_ns
    except OSError:
        return -1


def _cached(key, load):
    with _RECORDS_LOCK:
        if key in _RECORDS:
            _RECORDS.move_to_end(key)
            return _RECORDS[key]
    value = load()
    with _RECORDS_LOCK:
        _RECORDS[key] = value
        while len(_RECORDS) > 16:
            _RECORDS.popitem(last=False)
    return value


def section_records(transforms: str, section: int):
    """Return ``(stitch, alignment)`` of a section, cached per process until the files change."""
    store = TransformStore(transforms)
    d = store.section_dir(section)
    key = ("section", transforms, section, _mtime(d / "stitch.json"), _mtime(d / "align.json"))

    def load():
        st = store.load_stitch(section)
        if st is None:
            raise InputError("section has tiles but no stitch record; run the stitch stage",
                             file=d / "stitch.json", section=section)
        return st, store.load_alignment(section)
    return _cached(key, load)


def _contrast_doc(transforms: str):
    store = TransformStore(transforms)
    key = ("contrast", transforms, _mtime(store.root / f"{DOC_KIND}.json"))
    return _cached(key, lambda: store.load_doc(DOC_KIND))


def render_block(plan: RenderPlan, z: int, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
    """Return output pixels ``[z, y0:y1, x0:x1]`` of level 0 (shape ``(1, h, w)``, the tile dtype)."""
    dtype = np.dtype(plan.dtype)
    section = plan.first_section + z
    if section in plan.lost:
        return np.zeros((1, y1 - y0, x1 - x0), dtype)
    stitch, alignment = section_records(plan.transforms, section)
    contrast = section_contrast(_contrast_doc(plan.transforms), section) if plan.contrast else None
    img = render_region(stitch, alignment, int(plan.origin_x) + x0, int(plan.origin_y) + y0,
                        x1 - x0, y1 - y0, scale=1, order=plan.order, contrast=contrast,
                        tiles=SectionTiles(stitch))
    return to_pixels(img, dtype)[None]


_CV_DEPTH = {np.dtype(np.uint8): cv2.CV_8U, np.dtype(np.uint16): cv2.CV_16U}


def to_pixels(img: np.ndarray, dtype) -> np.ndarray:
    """Return float ``img`` rounded half to even and saturated to the integer ``dtype``.

    For 8- and 16-bit unsigned output OpenCV's saturating conversion does it in one pass
    (it rounds half to even, as :func:`numpy.rint` does); other types go through numpy.
    """
    dtype = np.dtype(dtype)
    if dtype in _CV_DEPTH:
        return cv2.multiply(img, 1.0, dtype=_CV_DEPTH[dtype])
    info = np.iinfo(dtype)
    np.rint(img, out=img)
    np.clip(img, info.min, info.max, out=img)
    return img.astype(dtype)


def block_edges(n: int, step: int) -> list[tuple[int, int]]:
    """Return the ``[a, b)`` index ranges that cut an axis of ``n`` pixels into blocks of ``step`` (the last may be short)."""
    return [(a, min(a + step, n)) for a in range(0, n, step)]


def level0(plan: RenderPlan, planes: list[int] | None = None) -> da.Array:
    """Return level 0 of the planes ``planes`` (all when None), in ``1 x chunk x chunk`` blocks."""
    planes = list(range(plan.depth)) if planes is None else [int(p) for p in planes]
    for p in planes:
        if not 0 <= p < plan.depth:
            raise ValueError(f"plane {p} is outside the volume (depth {plan.depth})")
    ys, xs = block_edges(plan.height, plan.chunk), block_edges(plan.width, plan.chunk)
    import dask.array as da
    from dask.base import tokenize
    from dask.highlevelgraph import HighLevelGraph

    name = "stackbuild-level0-" + tokenize(plan, planes, records_token(plan, planes))
    dsk = {}
    for k, z in enumerate(planes):
        for i, (a, b) in enumerate(ys):
            for j, (c, d) in enumerate(xs):
                dsk[(name, k, i, j)] = (render_block, plan, z, a, b, c, d)
    chunks = ((1,) * len(planes), tuple(b - a for a, b in ys), tuple(d - c for c, d in xs))
    graph = HighLevelGraph.from_collections(name, dsk, dependencies=[])
    return da.Array(graph, name, chunks, dtype=np.dtype(plan.dtype))


def records_token(plan: RenderPlan, planes: list[int]) -> tuple:
    """Modification times of the records behind ``planes``, so a changed record gets a new graph name."""
    store = TransformStore(plan.transforms)
    return tuple((_mtime(store.section_dir(plan.first_section + z) / "stitch.json"),
                  _mtime(store.section_dir(plan.first_section + z) / "align.json")) for z in planes)


def _reduce_quad(kids: list[list[np.ndarray]], reducer: str) -> np.ndarray:
    """Return the 2x2 reduction of the (up to) 2 x 2 blocks ``kids`` as if they were one array.

    When every block but the last in each row and column has an even height and width
    (always, for even block edges), each block is reduced on its own and the quarters are
    joined, as the writer does (:func:`stackbuild.render.pyramid.join_shard`): the four
    full-size blocks are never concatenated.
    """
    heights = [row[0].shape[-2] for row in kids]
    widths = [b.shape[-1] for b in kids[0]]
    if any(n % 2 for n in heights[:-1] + widths[:-1]):
        return reduce2x2(np.block(kids), reducer)
    return np.block([[reduce2x2(b, reducer) for b in row] for row in kids])


def reduce_level(arr: da.Array, reducer: str, block: int) -> da.Array:
    """Return ``arr`` reduced 2x2 in y and x, in ``1 x block x block`` blocks.

    Each output block is one task on the (up to) 2 x 2 input blocks it summarises, so the
    graph is a quadtree and the scheduler can finish each quad before rendering far ahead.
    """
    if any(set(c[:-1]) - {block} for c in arr.chunks[1:]) or set(arr.chunks[0]) != {1}:
        arr = arr.rechunk((1, block, block))
    from dask.base import tokenize
    from dask.highlevelgraph import HighLevelGraph

    name = "stackbuild-reduce-" + tokenize(arr.name, reducer, block)
    nz, ny, nx = arr.numblocks
    dsk = {}
    for k in range(nz):
        for i in range(0, ny, 2):
            for j in range(0, nx, 2):
                kids = [[(arr.name, k, a, b) for b in range(j, min(j + 2, nx))] for a in range(i, min(i + 2, ny))]
                dsk[(name, k, i // 2, j // 2)] = (_reduce_quad, kids, reducer)
    pairs = [tuple((sum(c[i:i + 2]) + 1) // 2 for i in range(0, len(c), 2)) for c in arr.chunks[1:]]
    graph = HighLevelGraph.from_collections(name, dsk, dependencies=[arr])
    import dask.array as da

    return da.Array(graph, name, (arr.chunks[0], *pairs), dtype=arr.dtype)


def pyramid(base: da.Array, n_levels: int, reducer: str, block: int) -> list[da.Array]:
    """Return ``n_levels`` arrays: ``base`` (rechunked to ``block``) and its successive 2x2 reductions."""
    levels = [base if base.chunksize[1:] == (block, block) else base.rechunk((1, block, block))]
    for _ in range(1, n_levels):
        levels.append(reduce_level(levels[-1], reducer, block))
    return levels


def _written_settings(folder: BuildFolder):
    """Return the render settings recorded in the written volume, else the build's settings."""
    settings = folder.config.render
    meta = folder.pyramid_path() / "zarr.json"
    if meta.exists():
        attrs = json.loads(meta.read_text(encoding="utf-8")).get("attributes", {})
        used = attrs.get("stackbuild", {}).get("render")
        if used:
            settings = type(settings)(**{k: (tuple(v) if isinstance(v, list) else v) for k, v in used.items()
                                         if k in asdict(settings)})
    return settings


def plan_for(build_dir, settings=None) -> tuple[RenderPlan, Canvas]:
    """Return the render plan and canvas of a build folder (the stored canvas, else a fresh one)."""
    folder = BuildFolder(Path(build_dir))
    settings = settings or _written_settings(folder)
    store = folder.store
    canvas = store.load_canvas()
    if canvas is None:
        manifest = folder.tile_manifest()
        vol = folder.config.volume
        canvas = compute_canvas(store, manifest.sections, manifest.lost_sections,
                                vol.pixel_size, vol.section_thickness)
    return RenderPlan.from_canvas(store.root, canvas, settings), canvas


def lazy_volume(build_dir, level: int = 0, planes: list[int] | None = None) -> da.Array:
    """Return level ``level`` of the volume (z, y, x) as a dask array rendered from raw tiles.

    Parameters
    ----------
    build_dir : str or Path
        The build folder (stitch records needed; alignments optional).
    level : int
        Pyramid level; level ``n`` has ``ceil(shape / 2**n)`` pixels in y and x.
    planes : list of int, optional
        Output planes (0-based z) to include, in this order; all by default.
    """
    plan, _ = plan_for(build_dir)
    n_levels = len(level_shapes(plan.height, plan.width, plan.chunk))
    if not 0 <= level < n_levels:
        raise ValueError(f"level must be in 0..{n_levels - 1}, got {level}")
    return pyramid(level0(plan, planes), level + 1, plan.reducer, plan.chunk)[level]


@dataclass
class Volume:
    """One level of the volume with its physical frame (OME-NGFF: coordinate = index * scale + translation)."""

    data: da.Array
    scale_nm: tuple[float, float, float]
    translation_nm: tuple[float, float, float]
    level: int
    axes: tuple[str, str, str] = AXES

    @property
    def shape(self) -> tuple[int, ...]:
        """Array shape (z, y, x)."""
        return tuple(self.data.shape)

    @property
    def dtype(self) -> np.dtype:
        """Pixel type."""
        return self.data.dtype

    def __getitem__(self, key) -> da.Array:
        return self.data[key]

    def compute(self, **kwargs) -> np.ndarray:
        """Return the whole level as a numpy array."""
        return self.data.compute(**kwargs)


def open_volume(build_dir, level: int = 0, lazy: bool = True, channel: str | None = None) -> Volume:
    """Return one level of a build's volume: rendered lazily from tiles, or the written OME-Zarr.

    Parameters
    ----------
    build_dir : str or Path
        The build folder.
    level : int
        Pyramid level.
    lazy : bool
        True renders from raw tiles; False opens ``DIR/volume.zarr/em/<level>``.
    channel : str, optional
        A marker channel, ``DIR/volume.zarr/channels/<name>/<level>`` (``lazy=False`` only).
    """
    folder = BuildFolder(Path(build_dir))
    if channel is not None and lazy:
        raise ValueError("channels are only available from the written volume (lazy=False)")
    if lazy:
        data = lazy_volume(build_dir, level)
        canvas = plan_for(build_dir)[1]
        scale, trans = level_transform(level, canvas.pixel_size_nm, canvas.section_thickness_nm)
        return Volume(data, scale, trans, level)
    group = folder.pyramid_path(channel)
    meta = group / "zarr.json"
    if not meta.exists():
        raise InputError("no written volume here; run the render stage", file=group)
    attrs = json.loads(meta.read_text(encoding="utf-8"))["attributes"]["ome"]["multiscales"][0]
    paths = [d["path"] for d in attrs["datasets"]]
    if str(level) not in paths:
        raise ValueError(f"level must be one of {paths}, got {level}")
    ds = attrs["datasets"][paths.index(str(level))]["coordinateTransformations"]
    scale = tuple(next(t["scale"] for t in ds if t["type"] == "scale"))
    trans = tuple(next((t["translation"] for t in ds if t["type"] == "translation"), (0.0, 0.0, 0.0)))
    import dask.array as da

    return Volume(da.from_zarr(str(group / str(level))), scale, trans, level)
