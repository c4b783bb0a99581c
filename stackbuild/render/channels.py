"""Write each marker channel as an OME-Zarr 0.5 multiscale image in the EM's physical space.

Channel ``name`` goes to ``DIR/volume.zarr/channels/<name>/``. Its level 0 lies
on the grid of EM pyramid level ``L``, where ``2**L * EM pixel size`` is the
closest power-of-two multiple to the channel's pixel size (``L = round(log2(
channel / EM pixel size))``, at least 0). Output pixel ``(z, r, c)`` of
channel level ``n`` is EM level ``L + n`` pixel ``(z, r, c)``: its aligned-frame
centre ``origin + f * (c, r) + (f - 1) / 2`` (``f = 2**L``) is mapped
``aligned -> section`` by the section's alignment and ``section -> channel``
by the inverse of the stored channel affine (see :mod:`stackbuild.channels.stage`),
and the channel image is sampled there bilinearly. Points beyond the image's
pixel edges, sections without that channel and blank images give 0.

Levels above 0 are 2x2 reductions with :func:`stackbuild.render.reduce.reduce2x2`
(the EM's reducer), and the ``multiscales`` metadata are the EM's level ``L``,
``L + 1``, ... transforms from :mod:`stackbuild.render.ngff`, so a physical
point means the same place in both images.
"""
from __future__ import annotations

import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
import tifffile
import zarr

from ..errors import InputError
from ..manifest import image_header
from ..folder import BuildFolder
from .ngff import multiscales_attrs, root_attrs
from .reduce import level_shapes, reduce2x2, reduced_size
from .fingerprint import channel_fingerprints, discard_plane, read_plane_record, write_plane_record
from .swap import incoming_path, swap_in
from .pyramid import compute_each
from .settings import check_settings
from .write import _create_arrays
from ..transforms.records import Canvas, SectionAlignment
from ..transforms.store import TransformStore
from ..channels.stage import channel_affine, channel_level, channel_records, channel_table  # noqa: F401 (channel_level re-exported)

_ROWS = 1024  # output rows resampled at a time


def resample_channel(image: np.ndarray, to_section_inv, alignment: SectionAlignment | None,
                     canvas: Canvas, level: int, shape: tuple[int, int]) -> np.ndarray:
    """Return the channel image resampled onto EM level ``level`` of the canvas (float32, ``shape``).

    Parameters
    ----------
    image : ndarray
        The marker image.
    to_section_inv : Affine2D
        ``section pixel -> channel pixel``.
    alignment : SectionAlignment or None
        ``aligned -> section`` (None: the aligned frame is the section frame).
    canvas : Canvas
        The EM output extent.
    level : int
        EM pyramid level of the output grid.
    shape : (int, int)
        Output ``(height, width)`` (EM level ``level``'s shape).
    """
    f = 2 ** level
    h, w = shape
    src = image.astype(np.float32)
    ih, iw = src.shape
    out = np.zeros((h, w), np.float32)
    xs = canvas.origin_x + f * np.arange(w, dtype=np.float64) + (f - 1) / 2
    for r0 in range(0, h, _ROWS):
        ys = canvas.origin_y + f * np.arange(r0, min(h, r0 + _ROWS), dtype=np.float64) + (f - 1) / 2
        pts = np.stack(np.meshgrid(xs, ys), -1).reshape(-1, 2)
        if alignment is not None:
            pts = alignment.aligned_to_section(pts)
        uv = to_section_inv.apply(pts).reshape(len(ys), w, 2)
        mx, my = uv[..., 0].astype(np.float32), uv[..., 1].astype(np.float32)
        val = np.empty(mx.shape, np.float32)
        step = 16384  # cv2.remap limit per side
        for c0 in range(0, w, step):
            val[:, c0:c0 + step] = cv2.remap(src, mx[:, c0:c0 + step], my[:, c0:c0 + step], cv2.INTER_LINEAR,
                                             borderMode=cv2.BORDER_REPLICATE)
        inside = (mx >= -0.5) & (mx < iw - 0.5) & (my >= -0.5) & (my < ih - 0.5)
        out[r0:r0 + len(ys)] = np.where(inside, val, 0.0)
    return out


def _level0_shape(canvas: Canvas, level: int) -> tuple[int, int]:
    h, w = canvas.height, canvas.width
    for _ in range(level):
        h, w = reduced_size(h), reduced_size(w)
    return h, w


@dataclass(frozen=True)
class _PlaneJob:
    """One marker plane to write at every level (small: paths, a record, the canvas)."""

    target: str
    z: int
    rec: dict | None
    store: str
    canvas: Canvas
    level: int
    shapes: tuple
    dtype: str
    reducer: str
    fresh: bool


def _renders(rec: dict) -> bool:
    """Return whether a channel record's image is drawn: registered (blank, too small and rejected ones are not)."""
    return rec.get("registered") is not False and not {"blank", "too_small"} & set(rec.get("flags") or [])


def write_marker_plane(job: _PlaneJob) -> int:
    """Resample one section's marker image and write its plane at every level of the pyramid; return ``z``.

    A task holds one plane of the channel at its level 0 (EM level ``job.level``).
    """
    arrays = [zarr.open_array(str(Path(job.target) / str(n)), mode="r+") for n in range(len(job.shapes))]
    dtype = np.dtype(job.dtype)
    s = job.canvas.first_section + job.z
    rec = job.rec
    if rec is None or not _renders(rec):
        if not job.fresh:  # a new array already reads as zeros
            for n, arr in enumerate(arrays):
                arr[job.z] = np.zeros(job.shapes[n], dtype)
        return job.z
    alignment = TransformStore(job.store).load_alignment(s)
    img = resample_channel(read_marker(rec["path"], s), channel_affine(rec).inverse(), alignment,
                           job.canvas, job.level, job.shapes[0])
    info = np.iinfo(dtype)
    plane = np.clip(np.rint(img), info.min, info.max).astype(dtype)
    for n, arr in enumerate(arrays):
        if n:
            plane = reduce2x2(plane, job.reducer)
        arr[job.z] = plane
    return job.z


def _write_channel(folder, name, recs, canvas, settings, progress, done_before, total,
                   overwrite: bool = False, mapper=None) -> dict:
    """Write the stale planes of one channel's pyramid (all of them into a new pyramid if its layout changed)."""
    level, _ = channel_records(folder, name, canvas)
    shapes = level_shapes(*_level0_shape(canvas, level), settings.chunk)
    dtypes = [np.dtype(image_header(Path(r["path"]))[2]) for r in recs.values()]
    dtype = np.result_type(*dtypes)
    em_levels = multiscales_attrs(name, level + len(shapes), canvas.pixel_size_nm,
                                  canvas.section_thickness_nm, settings.reducer)
    ms = em_levels["ome"]["multiscales"][0]
    ms["datasets"] = [{**d, "path": str(n)} for n, d in enumerate(ms["datasets"][level:])]
    flagged = {str(s): r["flags"] for s, r in sorted(recs.items()) if r["flags"]}
    extra = {"channel": name, "em_level": level, "sections": sorted(recs), "flagged_sections": flagged,
             "source": "resampled from marker images through stored channel -> section -> aligned maps"}
    attrs = {"ome": em_levels["ome"], "stackbuild": extra}
    path = folder.pyramid_path(name)
    stamp = {"shapes": [[canvas.depth, h, w] for h, w in shapes], "dtype": dtype.name, "level": level,
             "chunk": settings.chunk, "shard": settings.shard, "codec": settings.codec, "clevel": settings.clevel}
    fps = channel_fingerprints(folder.store, canvas, settings, name, level, recs)
    doc = read_plane_record(path)
    fresh = overwrite or doc is None or doc.get("stamp") != stamp or not (path / "zarr.json").exists()
    target = incoming_path(folder, f"channels/{name}") if fresh and (path / "zarr.json").exists() else path
    if fresh:
        shutil.rmtree(target, ignore_errors=True)
        _create_arrays(target, shapes, canvas.depth, settings, dtype.name, attrs)
        done, damaged = {}, {}
        todo = list(range(canvas.depth))
    else:
        zarr.open_group(str(target), mode="r+").update_attributes(attrs)
        todo = [z for z in range(canvas.depth) if str(z) in doc["damaged"]
                or doc["fingerprints"].get(str(z)) != fps[z]]
        done = {int(z): fp for z, fp in doc["fingerprints"].items() if int(z) not in set(todo)}
        damaged = {k: v for k, v in doc["damaged"].items() if int(k) not in set(todo)}
        for z in todo:
            if str(z) in doc["damaged"]:
                discard_plane(target, z)
    write_plane_record(target, stamp, done, damaged)
    jobs = [_PlaneJob(str(target), z, recs.get(canvas.first_section + z), str(folder.store.root), canvas, level,
                      tuple(shapes), dtype.name, settings.reducer, fresh) for z in todo]

    def finish(i: int) -> None:
        done[todo[i]] = fps[todo[i]]
        write_plane_record(target, stamp, done, damaged)

    from dask import delayed

    compute_each(mapper)([delayed(write_marker_plane, pure=False)(j) for j in jobs], finish)
    # Returned without error: every plane is written, whether or not the scheduler called back
    # for each (a local callback is not called when the graph runs on a distributed client).
    for i, z in enumerate(todo):
        if z not in done:
            finish(i)
    if progress is not None:
        progress(done_before + 1, total)
    if target != path:
        swap_in(folder, f"channels/{name}")
    return {"path": str(path), "em_level": level, "levels": [(canvas.depth, h, w) for h, w in shapes],
            "sections": sorted(recs), "dtype": dtype.name, "planes": todo}


def read_marker(path: str, section: int) -> np.ndarray:
    """Return a marker image's pixels, or raise :class:`InputError` naming it."""
    try:
        return tifffile.imread(path, key=0)
    except Exception as exc:  # tifffile and the codecs raise many exception types
        raise InputError(f"cannot read the marker image: {type(exc).__name__}: {exc}", file=path,
                         section=section) from None


def check_marker_images(folder, table: dict | None = None) -> None:
    """Raise :class:`InputError` naming the first marker image a render would read that is gone or unreadable.

    Only headers are read. ``render`` calls it before it writes the EM, so a marker image that is
    gone refuses the whole command before any output is touched.
    """
    for recs in (channel_table(folder) if table is None else table).values():
        for rec in recs.values():
            if _renders(rec):
                image_header(Path(rec["path"]))


def render_channels(build_dir, render_settings, *, overwrite: bool = False, progress=None, mapper=None) -> dict:
    """Write every registered marker channel of a build as OME-Zarr 0.5 beside the EM; return facts.

    Parameters
    ----------
    build_dir : str or Path
        The build folder: channel records (the channel stage) and the canvas
        (the render stage) are needed.
    render_settings : RenderSettings
        Chunk, shard, codec and reducer, the same as the EM's.
    overwrite : bool
        Render every plane into new pyramids and swap them in when complete. Without
        it only stale planes are rendered (see :mod:`stackbuild.render.fingerprint`),
        and a pyramid whose layout changed is rendered anew and swapped in.
    progress : callable(done, total), optional
        Called after each channel.
    mapper : optional
        The caller's mapper: each plane is one Dask task on its ``compute_each`` (see
        :func:`stackbuild.render.pyramid.compute_each`); without one, on this process.

    Returns
    -------
    dict
        ``channels``: ``name -> {"path", "em_level", "levels", "sections", "dtype", "planes"}``
        (``planes``: those written); ``seconds``.

    Raises
    ------
    InputError
        If the render stage has not stored a canvas yet, or a marker image is gone or
        unreadable (checked for every channel before anything is written).
    """
    t0 = time.perf_counter()
    check_settings(render_settings)
    folder = BuildFolder(Path(build_dir))
    canvas = folder.store.load_canvas()
    if canvas is None:
        raise InputError("no canvas stored; run the render stage before rendering channels",
                         file=folder.store.root)
    table = channel_table(folder)
    check_marker_images(folder, table)  # every input checked before any output is touched
    zarr.open_group(str(folder.volume_path), mode="a", zarr_format=3).update_attributes(root_attrs())
    if table:
        zarr.open_group(str(folder.channels_path), mode="a", zarr_format=3)
    total = len(table)
    if progress is not None:
        progress(0, total)
    facts = {}
    for k, (name, recs) in enumerate(sorted(table.items())):
        facts[name] = _write_channel(folder, name, recs, canvas, render_settings, progress, k, total,
                                     overwrite=overwrite, mapper=mapper)
    return {"channels": facts, "seconds": time.perf_counter() - t0}
