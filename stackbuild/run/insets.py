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
reads, whatever the inset's size. The registration still works on the whole inset reduced to the
base pixel size and the base region around it (at 2x finer tiles, a quarter of the inset's pixels).
"""
from __future__ import annotations

import csv
import io
import math
import re
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

#: Candidate relative scales tried around the nominal pixel-size ratio (+-3 %, common practice, no source).
SCALES = np.linspace(0.97, 1.03, 25)


def inset_pixel_sizes(path: Path) -> dict[int, float]:
    """Return manifest row number -> ``pixel_size`` for rows that give one (empty when the column is absent)."""
    with Path(path).open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        if "pixel_size" not in (reader.fieldnames or []):
            return {}
        out = {}
        for row, rec in enumerate(reader, start=2):
            text = (rec.get("pixel_size") or "").strip()
            if text:
                try:
                    v = float(text)
                except ValueError:
                    raise InputError(f"column 'pixel_size' must be a number, got {text!r}", file=path,
                                     row=row) from None
                if not (math.isfinite(v) and v > 0):
                    raise InputError(f"column 'pixel_size' must be > 0, got {text!r}", file=path, row=row)
                out[row] = v
        return out


def is_inset(path: Path, build_pixel_nm: float) -> bool:
    """Return True if the manifest's tiles are at another pixel size than the build's (all of them).

    Raises
    ------
    InputError
        If some rows are at the build's pixel size and others are not, or the finer rows disagree.
    """
    sizes = inset_pixel_sizes(path)
    other = {r: v for r, v in sizes.items() if abs(v - build_pixel_nm) > 1e-6 * build_pixel_nm}
    if not other:
        return False
    n_rows = sum(1 for _ in Path(path).open(encoding="utf-8")) - 1
    if len(other) != n_rows:
        row = min(set(range(2, n_rows + 2)) - set(other))
        raise InputError(f"tiles at the build's pixel size ({build_pixel_nm:g} nm) and at another in one manifest; "
                         "put the finer inset in a manifest of its own (nothing was changed)", file=path, row=row)
    if len(set(other.values())) > 1:
        raise InputError("an inset's tiles must share one pixel_size (nothing was changed)", file=path,
                         row=max(other))
    return True


def register_inset(base: np.ndarray, inset: np.ndarray) -> tuple[float, float, float, float]:
    """Return ``(scale, dx, dy, ncc)``: ``inset`` resized by ``scale`` best matches ``base`` at top-left ``(dx, dy)``.

    Both images are float32; ``inset`` is already reduced to about the base pixel size, so
    ``scale`` is close to 1. Each candidate scale (:data:`SCALES`) is scored by the peak of the
    normalised cross-correlation (OpenCV ``matchTemplate``, ``TM_CCOEFF_NORMED``); the best peak
    is refined to sub-pixel by a parabola through its neighbours in x and in y, and the scale by a
    parabola through the neighbouring scales' peaks.
    """
    best = []
    for s in SCALES:
        t = cv2.resize(inset, None, fx=s, fy=s, interpolation=cv2.INTER_AREA if s < 1 else cv2.INTER_LINEAR)
        if t.shape[0] >= base.shape[0] or t.shape[1] >= base.shape[1]:
            best.append((-1.0, (0, 0), None))
            continue
        m = cv2.matchTemplate(base, t, cv2.TM_CCOEFF_NORMED)
        _, peak, _, (x, y) = cv2.minMaxLoc(m)
        best.append((peak, (x, y), m))
    k = int(np.argmax([b[0] for b in best]))
    peak, (x, y), m = best[k]
    if m is None:
        raise ValueError("the inset is larger than the region it is searched in")

    def vertex(a, b, c):
        d = a - 2 * b + c
        return 0.0 if d >= 0 else 0.5 * (a - c) / d

    dx = x + (vertex(m[y, x - 1], m[y, x], m[y, x + 1]) if 0 < x < m.shape[1] - 1 else 0.0)
    dy = y + (vertex(m[y - 1, x], m[y, x], m[y + 1, x]) if 0 < y < m.shape[0] - 1 else 0.0)
    scale = float(SCALES[k])
    if 0 < k < len(SCALES) - 1 and best[k - 1][2] is not None and best[k + 1][2] is not None:
        scale += vertex(best[k - 1][0], peak, best[k + 1][0]) * float(SCALES[1] - SCALES[0])
    return scale, float(dx), float(dy), float(peak)


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
    istore = TransformStore(Path(root) / "insets" / name)
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
    from ..sampler import render_region
    from ..stitch.section import stitch_section
    from ..tiles import SectionTiles

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
    # Nominal place: the stage (inset positions in inset pixels) through the section's own stage offset.
    g = np.median([[t.x - t.stage_x, t.y - t.stage_y] for t in base.tiles], axis=0)
    gf = np.median([[t.x - t.stage_x, t.y - t.stage_y] for t in fine.tiles], axis=0)
    fx0, fy0, fx1, fy1 = fine.bbox()
    red = max(1, int(round(k)))
    fw, fh = int((fx1 - fx0) // red), int((fy1 - fy0) // red)
    small = render_region(fine, None, int(math.ceil(fx0 + 0.5)), int(math.ceil(fy0 + 0.5)), fw, fh, scale=red,
                          tiles=SectionTiles(fine))
    nominal = (np.array([fx0, fy0]) - gf) / k + g
    margin = int(max(32, 0.05 * max(fw, fh) * red / k + cfg.stitch.max_stage_error))
    bx0, by0 = int(nominal[0]) - margin, int(nominal[1]) - margin
    bw, bh = int((fx1 - fx0) / k) + 2 * margin, int((fy1 - fy0) / k) + 2 * margin
    region = render_region(base, None, bx0, by0, bw, bh, tiles=SectionTiles(base))
    pre = red / k  # 'small' pixels -> base pixels, before the estimated relative scale
    if abs(pre - 1) > 1e-9:
        small = cv2.resize(small, None, fx=pre, fy=pre, interpolation=cv2.INTER_AREA if pre < 1 else cv2.INTER_LINEAR)
    try:
        c, dx, dy, ncc = register_inset(region.astype(np.float32), small.astype(np.float32))
    except ValueError as exc:
        raise InputError(f"inset not registered: {exc}", file=path, section=s) from None
    # 'small' pixel i (x) is inset mosaic x_f = sx0 + red * i + (red - 1) / 2; after both resizes it is
    # pixel j = (i + 0.5) * cr - 0.5 with cr = c * red / k, and base (section) pixel bx0 + dx + j.
    cr = c * pre
    sx0, sy0 = math.ceil(fx0 + 0.5), math.ceil(fy0 + 0.5)
    scale = cr / red
    tx = bx0 + dx + 0.5 * cr - 0.5 - scale * (sx0 + (red - 1) / 2)
    ty = by0 + dy + 0.5 * cr - 0.5 - scale * (sy0 + (red - 1) / 2)
    to_section = Affine2D(np.array([[scale, 0.0, tx], [0.0, scale, ty]]))
    record = {"section": s, "name": name, "pixel_size_nm": px, "scale": scale, "nominal_scale": 1.0 / k,
              "offset": [tx, ty], "ncc": ncc, "inset_to_section": to_section.to_json()}
    istore = TransformStore(store.root / "insets" / name)
    istore.save_stitch(fine)
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
    out = build.volume_path / "insets" / name
    zarr.open_group(str(build.volume_path / "insets"), mode="a", zarr_format=3)
    shapes = inset_shapes(height, width, cfg.render.chunk)
    attrs = _inset_attrs(name, len(shapes), z_nm, canvas.section_thickness_nm, px, x0_nm, y0_nm,
                         {"inset": record})
    _write_pyramid(out, store.root, name, shapes, np.dtype(fine.dtype), cfg.render.chunk, cfg.render.reducer,
                   attrs, mapper or (lambda fn, items: [fn(i) for i in items]))
    shapes = [(1, h, w) for h, w in shapes]
    stitch_rms = fine.stats.get("seam_residual_rms")
    _table(build, record, stitch_rms, shapes)
    return [f"inset {name}: {len(fine.tiles)} tile(s) at {px:g} nm on section {s}, written to {out}",
            f"  registered to the section: scale {scale:.5f} (nominal {1 / k:.5f}), offset ({tx:.2f}, {ty:.2f}) px, "
            f"NCC {ncc:.3f}; stitch seam residual RMS {_num(stitch_rms)} px; levels {shapes}"]


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
                 "ncc": f"{record['ncc']:.4f}", "stitch_seam_rms_px": "" if stitch_rms is None else f"{stitch_rms:.4f}",
                 "levels": len(shapes)})
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=list(rows[0]), lineterminator="\n")
    w.writeheader()
    w.writerows(rows)
    atomic_write_text(path, buf.getvalue())
