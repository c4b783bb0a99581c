"""A region of one section imaged again at a finer pixel size: an inset beside the EM volume.

An update manifest with a ``pixel_size`` column (nanometres per pixel of each tile) whose value is
not the build's describes an inset. Its tiles are stitched among themselves (in their own
pixels), the mosaic is registered to the section it lies on (scale and offset estimated, see
:func:`register_inset`), and it is written as ``volume.zarr/insets/<name>/``: an OME-Zarr 0.5
multiscale image at its own pixel size whose physical coordinates are those of ``em`` (the same
point of the tissue has the same nanometres in both). Records: ``transforms/insets/<name>/``
(the stitch record and ``inset.json``, the registration), and ``qc/insets.csv`` (residuals).

The pyramid is written one chunk per task (:func:`render_inset_block` for level 0, each task
mapping its own chunk of the output grid to the inset mosaic; :func:`reduce_inset_block` for the
levels above, each from the 2 x 2 chunks below it), so a task holds one chunk and the tiles it
reads, whatever the inset's size. The registration is coarse on an overview of at most
:data:`OVERVIEW` section pixels a side (whole pixels and a scale among :data:`SCALES`), then fine
by regions of at most :data:`REGION` section pixels, one task each (:func:`register_region`: one
region of the inset and of the section, matched by the project's one sub-pixel estimator), and a
least-squares scale and offset through the regions' matches, whose residuals are reported.
"""
from __future__ import annotations

import csv
import io
import math
import re
import shutil
from pathlib import Path

import cv2
import numpy as np
import zarr

from ..errors import InputError
from ..folder import BuildFolder
from ..manifest import TileManifest, read_tile_manifest
from ..transforms.records import SectionAlignment
from ..transforms.store import TransformStore, atomic_write_text
from ..transforms.types import Affine2D, DisplacementField
from .update_manifest import inset_pixel_sizes

#: Candidate relative scales tried around the nominal pixel-size ratio (+-3 %, common practice, no source).
SCALES = np.linspace(0.97, 1.03, 25)
#: Largest side (section pixels) of the overview the coarse search works on: bounds its memory.
OVERVIEW = 512
#: Side (section pixels) of the regions the inset is registered by, one task each.
REGION = 128


def coarse_place(base: np.ndarray, inset: np.ndarray) -> tuple[float, int, int, float]:
    """Return ``(scale, dx, dy, ncc)``: ``inset`` resized by ``scale`` best matches ``base`` at whole pixel ``(dx, dy)``.

    Both are float32 overviews at about one pixel size, so ``scale`` is close to 1. Each
    candidate scale (:data:`SCALES`) is scored by the peak of the normalised cross-correlation
    (OpenCV ``matchTemplate``, ``TM_CCOEFF_NORMED``). Whole pixels and the nearest candidate
    scale only: the sub-pixel answer comes from the regions (:func:`register_region`).
    """
    best = (-2.0, 1.0, 0, 0)
    for s in SCALES:
        t = cv2.resize(inset, None, fx=s, fy=s, interpolation=cv2.INTER_AREA if s < 1 else cv2.INTER_LINEAR)
        if t.shape[0] >= base.shape[0] or t.shape[1] >= base.shape[1]:
            continue
        _, peak, _, (x, y) = cv2.minMaxLoc(cv2.matchTemplate(base, t, cv2.TM_CCOEFF_NORMED))
        if peak > best[0]:
            best = (peak, float(s), x, y)
    if best[0] < -1:
        raise ValueError("the inset is larger than the region it is searched in")
    peak, scale, x, y = best
    return scale, int(x), int(y), float(peak)


def _mosaic_x(j, start: float, red: int, zoom: float):
    """Inset mosaic coordinate of pixel ``j`` of a block rendered at binning ``red`` from ``start``, resized by ``zoom``."""
    return start + red * ((np.asarray(j, float) + 0.5) / zoom - 0.5) + (red - 1) / 2


def register_region(job: tuple) -> dict | None:
    """Measure where one region of an inset lies on its section; return the correspondence or None.

    ``job`` is ``(transforms root, inset name, section, (u0, v0), side_fine, red, coarse
    inset->section affine (JSON), block, max_shift)``. The task renders the inset's region of
    ``side_fine`` mosaic pixels from ``(u0, v0)`` binned by ``red`` and resized to ``block``
    pixels square (about the section's pixel size and scale, by the coarse map), cuts the
    section's own pixels where the coarse map puts it, and measures the remaining shift with
    the project's one sub-pixel estimator (:func:`stackbuild.align.blockmatch.match_block_pairs`).
    It holds one region of each, whatever the inset's size.

    Returns
    -------
    dict or None
        ``u``: a mosaic point, ``p``: the section point it matches, ``ncc``, ``confidence``;
        None where the region has no texture or no match.
    """
    from ..align.blockmatch import match_block_pairs
    from ..sampler import render_region
    from ..tiles import SectionTiles

    root, name, section, (u0, v0), side, red, coarse_doc, block, max_shift = job
    store = TransformStore(Path(root))
    istore = store.inset(name)
    fine, base = istore.load_stitch(section), store.load_stitch(section)
    coarse = Affine2D.from_json(coarse_doc)
    n = max(1, side // red)
    img = render_region(fine, None, u0, v0, n, n, scale=red, tiles=SectionTiles(fine))
    zoom_x = zoom_y = block / n
    img = cv2.resize(img, (block, block), interpolation=cv2.INTER_AREA if zoom_x < 1 else cv2.INTER_LINEAR)
    c = block // 2
    centre = np.array([_mosaic_x(c, u0, red, zoom_x), _mosaic_x(c, v0, red, zoom_y)])
    px, py = coarse.apply(centre[None])[0]
    bx, by = int(round(px)) - c, int(round(py)) - c
    ref = render_region(base, None, bx, by, block, block, tiles=SectionTiles(base))
    if img.std() < 1.0 or ref.std() < 1.0:
        return None
    found = match_block_pairs(ref[None], img[None], int(max_shift))
    d = found.shifts[0]
    if not np.isfinite(d).all():
        return None
    # Content at the section block's centre (bx + c, by + c) is found in the inset block at c + d.
    u = [float(_mosaic_x(c + d[0], u0, red, zoom_x)), float(_mosaic_x(c + d[1], v0, red, zoom_y))]
    return {"u": u, "p": [float(bx + c), float(by + c)], "ncc": float(found.ncc[0]),
            "confidence": float(found.confidence[0])}


def fit_scale_offset(u: np.ndarray, p: np.ndarray, weight: np.ndarray) -> tuple[Affine2D, np.ndarray]:
    """Return the scale-and-offset map ``p = s u + t`` (weighted least squares) and each point's residual (px).

    One robust round (common practice, no source): points farther than three times the median
    residual (and over 0.5 px) are left out and the map fitted again.
    """
    u, p, w = np.asarray(u, float), np.asarray(p, float), np.asarray(weight, float)
    keep = np.ones(len(u), bool)
    for _ in range(2):
        a = np.zeros((2 * keep.sum(), 3))
        a[0::2, 0], a[0::2, 1] = u[keep, 0], 1.0
        a[1::2, 0], a[1::2, 2] = u[keep, 1], 1.0
        b = p[keep].reshape(-1)
        sw = np.repeat(np.sqrt(w[keep]), 2)
        s, tx, ty = np.linalg.lstsq(a * sw[:, None], b * sw, rcond=None)[0]
        res = np.hypot(s * u[:, 0] + tx - p[:, 0], s * u[:, 1] + ty - p[:, 1])
        cut = max(0.5, 3.0 * float(np.median(res[keep])))
        if (res[keep] <= cut).all() or (res <= cut).sum() < 3:
            break
        keep = res <= cut
    return Affine2D(np.array([[s, 0.0, tx], [0.0, s, ty]])), np.where(keep, res, np.nan)


def _fine_map(alignment: SectionAlignment | None, to_inset: Affine2D, ox: float, oy: float, k: float,
              width: int, height: int, spacing: int = 8) -> SectionAlignment:
    """Return an 'alignment' taking inset output pixels ``(c, r)`` to inset mosaic pixels.

    Output pixel ``(c, r)`` is aligned point ``(ox - 0.5 + (c + 0.5) / k, oy - 0.5 + (r + 0.5) / k)``;
    the section's alignment maps it to section pixels, ``to_inset`` to the inset mosaic. Stored as a
    displacement field on nodes ``spacing`` output pixels apart (exact for an affine chain, bilinear
    between nodes otherwise).
    """
    nx, ny = width // spacing + 2, height // spacing + 2
    gx, gy = np.meshgrid(np.arange(nx) * spacing, np.arange(ny) * spacing)
    u = np.column_stack([gx.ravel(), gy.ravel()]).astype(np.float64)
    a = np.column_stack([ox - 0.5 + (u[:, 0] + 0.5) / k, oy - 0.5 + (u[:, 1] + 0.5) / k])
    s = a if alignment is None else alignment.aligned_to_section(a)
    p = to_inset.apply(s)
    field = (p - u).reshape(ny, nx, 2).astype(np.float32)
    return SectionAlignment(-1, Affine2D.identity(), DisplacementField(field, (0.0, 0.0), float(spacing)))


def _inset_attrs(name: str, n_levels: int, z_nm: float, thickness: float, pixel_nm: float, x0_nm: float,
                 y0_nm: float, extra: dict) -> dict:
    """Return the OME-Zarr 0.5 group attributes of an inset pyramid of ``n_levels`` levels."""
    datasets = []
    for n in range(n_levels):
        f = 2 ** n
        datasets.append({"path": str(n), "coordinateTransformations": [
            {"type": "scale", "scale": [thickness, pixel_nm * f, pixel_nm * f]},
            {"type": "translation", "translation": [z_nm, y0_nm + (f - 1) / 2 * pixel_nm,
                                                    x0_nm + (f - 1) / 2 * pixel_nm]}]})
    return {"ome": {"version": "0.5", "multiscales": [{
        "name": name, "axes": [{"name": a, "type": "space", "unit": "nanometer"} for a in "zyx"],
        "datasets": datasets}]}, "stackbuild": extra}


def inset_shapes(height: int, width: int, chunk: int) -> list[tuple[int, int]]:
    """Return ``(height, width)`` of every level: halved (rounded up) until one chunk holds the level."""
    shapes = [(height, width)]
    while max(shapes[-1]) > chunk:
        h, w = shapes[-1]
        shapes.append(((h + 1) // 2, (w + 1) // 2))
    return shapes


def _blocks(shape: tuple[int, int], chunk: int) -> list[tuple[int, int, int, int]]:
    h, w = shape
    return [(y, min(h, y + chunk), x, min(w, x + chunk)) for y in range(0, h, chunk) for x in range(0, w, chunk)]


def render_inset_block(job: tuple) -> int:
    """Render one chunk of an inset's level 0 from its records and write it; return its pixel count.

    ``job`` is ``(transforms root, inset name, y0, y1, x0, x1, level-0 array path)``. The task
    holds one chunk and the fine tiles it reads (through the per-process tile cache): the output
    grid's map to the inset mosaic is made for this chunk only (see :func:`_fine_map`).
    """
    from ..render.lazy import to_pixels
    from ..sampler import render_region
    from ..tiles import SectionTiles

    root, name, y0, y1, x0, x1, array = job
    store = TransformStore(Path(root))
    istore = store.inset(name)
    rec = istore.load_doc("inset")
    fine = istore.load_stitch(rec["section"])
    alignment = store.load_alignment(rec["section"])
    to_inset = Affine2D.from_json(rec["inset_to_section"]).inverse()
    k = rec["base_over_inset"]
    ox, oy = rec["grid_origin"]
    # Output pixel (x0 + c) is aligned point ox - 0.5 + (x0 + c + 0.5) / k: a chunk's own origin.
    fmap = _fine_map(alignment, to_inset, ox + x0 / k, oy + y0 / k, k, x1 - x0, y1 - y0)
    img = render_region(fine, fmap, 0, 0, x1 - x0, y1 - y0, tiles=SectionTiles(fine))
    zarr.open_array(array, mode="r+")[0:1, y0:y1, x0:x1] = to_pixels(img, np.dtype(fine.dtype))[None]
    return (y1 - y0) * (x1 - x0)


def reduce_inset_block(job: tuple) -> int:
    """Write one chunk of an inset level from the 2 x 2 block below it (``reducer``); return its pixel count."""
    from ..render.reduce import reduce2x2

    below, above, y0, y1, x0, x1, reducer = job
    src = zarr.open_array(below, mode="r")
    part = np.asarray(src[0:1, 2 * y0:min(src.shape[1], 2 * y1), 2 * x0:min(src.shape[2], 2 * x1)])
    zarr.open_array(above, mode="r+")[0:1, y0:y1, x0:x1] = reduce2x2(part, reducer)
    return (y1 - y0) * (x1 - x0)


def _write_pyramid(group_path: Path, root: Path, name: str, shapes: list, dtype, chunk: int, reducer: str,
                   attrs: dict, mapper) -> None:
    """Write an inset's pyramid chunk by chunk through ``mapper``: level 0 rendered, each level above reduced."""
    group = zarr.open_group(str(group_path), mode="w", zarr_format=3, attributes=attrs)
    arrays = [group.create_array(str(n), shape=(1, h, w), dtype=dtype, chunks=(1, chunk, chunk), fill_value=0,
                                 dimension_names=["z", "y", "x"]) for n, (h, w) in enumerate(shapes)]
    paths = [str(group_path / str(n)) for n in range(len(arrays))]
    # list(): a mapper may return a lazy iterable (builtin map does); each level waits for the one below.
    list(mapper(render_inset_block, [(str(root), name, *b, paths[0]) for b in _blocks(shapes[0], chunk)]))
    for n in range(1, len(shapes)):
        list(mapper(reduce_inset_block, [(paths[n - 1], paths[n], *b, reducer) for b in _blocks(shapes[n], chunk)]))


def add_inset(build: BuildFolder, path: Path, mapper=None) -> list[str]:
    """Stitch, register and write an inset from a manifest of finer tiles; return summary lines.

    The pyramid is written one chunk per task through ``mapper`` (``mapper(fn, items)``; in this
    process when omitted), so no task holds more than a chunk of the inset.

    Raises
    ------
    InputError
        Tiles of more than one section, a section the build has no stitched and aligned record
        of, or a registration that finds no match (nothing is written then).
    """
    from ..stitch.section import stitch_section

    manifest: TileManifest = read_tile_manifest(path)
    px = next(iter(inset_pixel_sizes(path).values()))
    if len(manifest.sections) != 1:
        raise InputError(f"an inset lies on one section; this manifest has {manifest.sections}", file=path)
    s = manifest.sections[0]
    store = build.store
    base, alignment, canvas = store.load_stitch(s), store.load_alignment(s), store.load_canvas()
    if base is None or canvas is None:
        raise InputError(f"section {s} has no stitched and rendered record in this build", file=path, section=s)
    vol = build.config.volume
    k = vol.pixel_size / px  # inset pixels per base pixel
    cfg = build.config
    name = re.sub(r"[^A-Za-z0-9_.-]", "_", f"section{s}_{px:g}nm")
    fine = stitch_section(manifest.section_tiles(s), cfg.stitch, s)
    istore = store.inset(name)
    fresh = not istore.root.exists()
    istore.save_stitch(fine)  # the region tasks read it
    try:
        to_section, record = _register(build, base, fine, k, s, name, mapper or _serial)
    except ValueError as exc:
        if fresh:
            shutil.rmtree(istore.root, ignore_errors=True)
        raise InputError(f"inset not registered: {exc}", file=path, section=s) from None
    record.update({"section": s, "name": name, "pixel_size_nm": px})
    fx0, fy0, fx1, fy1 = fine.bbox()
    # Output grid: the inset's aligned footprint, in inset pixels.
    corners = np.array([[fx0, fy0], [fx1, fy0], [fx0, fy1], [fx1, fy1]])
    sec = to_section.apply(corners)
    al = sec if alignment is None else alignment.section_to_aligned(sec)
    ox, oy = math.floor(al[:, 0].min()), math.floor(al[:, 1].min())
    width = int(math.ceil((al[:, 0].max() - ox + 1) * k))
    height = int(math.ceil((al[:, 1].max() - oy + 1) * k))
    record.update({"base_over_inset": k, "grid_origin": [ox, oy], "shape": [height, width]})
    istore.save_doc("inset", record)
    x0_nm = (ox - canvas.origin_x - 0.5) * vol.pixel_size + 0.5 * px
    y0_nm = (oy - canvas.origin_y - 0.5) * vol.pixel_size + 0.5 * px
    z_nm = (s - canvas.first_section) * canvas.section_thickness_nm
    out = build.inset_path(name)
    zarr.open_group(str(out.parent), mode="a", zarr_format=3)
    shapes = inset_shapes(height, width, cfg.render.chunk)
    attrs = _inset_attrs(name, len(shapes), z_nm, canvas.section_thickness_nm, px, x0_nm, y0_nm,
                         {"inset": record})
    _write_pyramid(out, store.root, name, shapes, np.dtype(fine.dtype), cfg.render.chunk, cfg.render.reducer,
                   attrs, mapper or _serial)
    shapes = [(1, h, w) for h, w in shapes]
    stitch_rms = fine.stats.get("seam_residual_rms")
    _table(build, record, stitch_rms, shapes)
    return [f"inset {name}: {len(fine.tiles)} tile(s) at {px:g} nm on section {s}, written to {out}",
            f"  registered to the section: scale {record['scale']:.5f} (nominal {1 / k:.5f}), offset "
            f"({record['offset'][0]:.2f}, {record['offset'][1]:.2f}) px, from {record['regions_used']} of "
            f"{record['regions']} regions: residual RMS {_num(record['residual_rms_px'])} px, max "
            f"{_num(record['residual_max_px'])} px; stitch seam residual RMS {_num(stitch_rms)} px; levels {shapes}"]


def _serial(fn, items):
    return [fn(i) for i in items]


def _register(build: BuildFolder, base, fine, k: float, s: int, name: str, mapper) -> tuple[Affine2D, dict]:
    """Return the inset mosaic -> section map (scale and offset) and its record: coarse, then by regions.

    Coarse: the whole inset against the section around its stage position, both reduced to an
    overview of at most :data:`OVERVIEW` px (:func:`coarse_place`, whole pixels). Fine: regions of
    at most :data:`REGION` section pixels, one task each (:func:`register_region`), and a
    weighted least-squares scale and offset through their matches (:func:`fit_scale_offset`).
    """
    from ..sampler import render_region
    from ..tiles import SectionTiles

    cfg = build.config
    g = np.median([[t.x - t.stage_x, t.y - t.stage_y] for t in base.tiles], axis=0)
    gf = np.median([[t.x - t.stage_x, t.y - t.stage_y] for t in fine.tiles], axis=0)
    fx0, fy0, fx1, fy1 = fine.bbox()
    sx0, sy0 = math.ceil(fx0 + 0.5), math.ceil(fy0 + 0.5)
    extent = max(fx1 - fx0, fy1 - fy0) / k  # section pixels
    b_ov = max(1, math.ceil(extent / OVERVIEW))
    red_ov = max(1, int(round(k * b_ov)))
    small = render_region(fine, None, sx0, sy0, int((fx1 - fx0) // red_ov), int((fy1 - fy0) // red_ov),
                          scale=red_ov, tiles=SectionTiles(fine))
    nominal = (np.array([fx0, fy0]) - gf) / k + g
    margin = int(max(32, 0.05 * extent + cfg.stitch.max_stage_error))
    bx0, by0 = int(nominal[0]) - margin, int(nominal[1]) - margin
    bw, bh = int((fx1 - fx0) / k) + 2 * margin, int((fy1 - fy0) / k) + 2 * margin
    region = render_region(base, None, bx0, by0, bw // b_ov, bh // b_ov, scale=b_ov, tiles=SectionTiles(base))
    pre = red_ov / (k * b_ov)  # overview inset pixels -> overview section pixels, before the estimated scale
    if abs(pre - 1) > 1e-9:
        small = cv2.resize(small, None, fx=pre, fy=pre, interpolation=cv2.INTER_AREA if pre < 1 else cv2.INTER_LINEAR)
    c, dx, dy, ncc = coarse_place(region.astype(np.float32), small.astype(np.float32))
    # Overview inset pixel i is mosaic x = sx0 + red_ov i + (red_ov - 1) / 2; resized, pixel j = (i + 0.5) cr - 0.5,
    # overview section pixel dx + j, section pixel bx0 + b_ov (dx + j) + (b_ov - 1) / 2.
    cr = c * pre
    scale0 = b_ov * cr / red_ov
    t0 = [b0 + (b_ov - 1) / 2 + b_ov * (d + 0.5 * cr - 0.5) - scale0 * (s0 + (red_ov - 1) / 2)
          for b0, d, s0 in ((bx0, dx, sx0), (by0, dy, sy0))]
    coarse = Affine2D(np.array([[scale0, 0.0, t0[0]], [0.0, scale0, t0[1]]]))
    block = int(min(REGION, (fx1 - fx0) / k / 2 - 2, (fy1 - fy0) / k / 2 - 2))  # at least 2 x 2 regions
    max_shift = 2 * b_ov + 2
    if block < 2 * max_shift + 12:
        raise ValueError(f"the inset is too small to register ({block} section px per region)")
    side = int(block / scale0)  # mosaic pixels of one region
    red = max(1, int(round(k)))
    starts = [(u, v) for v in range(sy0, int(fy1) - side + 1, side) for u in range(sx0, int(fx1) - side + 1, side)]
    jobs = [(str(build.store.root), name, s, st, side, red, coarse.to_json(), block, max_shift) for st in starts]
    found = [f for f in mapper(register_region, jobs) if f is not None]
    if len(found) < 3:
        raise ValueError(f"only {len(found)} of {len(jobs)} regions matched the section (3 needed)")
    to_section, res = fit_scale_offset(np.array([f["u"] for f in found]), np.array([f["p"] for f in found]),
                                       np.array([max(f["confidence"], 1e-3) for f in found]))
    used = res[np.isfinite(res)]
    scale, tx, ty = float(to_section.matrix[0, 0]), float(to_section.matrix[0, 2]), float(to_section.matrix[1, 2])
    return to_section, {"scale": scale, "nominal_scale": 1.0 / k, "offset": [tx, ty],
                        "ncc": float(np.median([f["ncc"] for f in found])), "coarse_ncc": ncc,
                        "coarse_scale": scale0, "regions": len(jobs), "regions_used": int(used.size),
                        "region_px": block, "residual_rms_px": float(np.sqrt(np.mean(used ** 2))),
                        "residual_max_px": float(used.max()), "inset_to_section": to_section.to_json()}


def _num(v) -> str:
    return "-" if v is None else f"{v:.3g}"


def _table(build: BuildFolder, record: dict, stitch_rms, shapes) -> None:
    path = build.qc_dir / "insets.csv"
    rows = []
    if path.exists():
        rows = [r for r in csv.DictReader(path.open(encoding="utf-8")) if r["name"] != record["name"]]
    rows.append({"name": record["name"], "section": record["section"], "pixel_size_nm": record["pixel_size_nm"],
                 "scale": f"{record['scale']:.6f}", "nominal_scale": f"{record['nominal_scale']:.6f}",
                 "offset_x": f"{record['offset'][0]:.3f}", "offset_y": f"{record['offset'][1]:.3f}",
                 "ncc": f"{record['ncc']:.4f}", "regions": record["regions"], "regions_used": record["regions_used"],
                 "residual_rms_px": f"{record['residual_rms_px']:.4f}",
                 "residual_max_px": f"{record['residual_max_px']:.4f}", "stitch_seam_rms_px": "" if stitch_rms is None else f"{stitch_rms:.4f}",
                 "levels": len(shapes)})
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=list(rows[0]), lineterminator="\n")
    w.writeheader()
    w.writerows(rows)
    atomic_write_text(path, buf.getvalue())
