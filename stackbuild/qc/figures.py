"""The report's figures and thumbnails, each drawn again only when what it shows changed.

Every figure is an SVG document (:mod:`stackbuild.qc.plots`, :mod:`stackbuild.qc.panels`: charts
as vector shapes, image panels as embedded PNGs) written to ``DIR/qc/<name>.svg`` and shown
inline in the report. Every figure has a *key*: the numbers it draws (rows of the metrics
document) or, for image panels, a digest of the pixels it shows (read first: small windows and
two lines through the stack at a coarse level, a fraction of drawing them), where it reads and
the settings that change it. The SVG is kept with the key's digest in
``DIR/qc/measured/figures/<name>.json``; a report whose key is unchanged takes the SVG as it is,
without drawing. A figure without a key (the channel overlays when a pyramid has no plane
record) is always drawn; ``reuse=False`` draws every figure. A re-report after an update redraws
only the figures whose pixels or numbers changed.

The plane thumbnails of the stack strip are kept the same way, one per plane, in
``DIR/qc/measured/figures/thumbnails.json``.
"""
from __future__ import annotations

import base64
from pathlib import Path

import numpy as np

from ..folder import BuildFolder
from ..render.fingerprint import digest
from ..transforms.store import atomic_write_text
from . import panels, plots
from .planes import open_planes, reslice_lines, reslice_planes, window
from .reuse import render_fingerprints, stored_measurement, write_measurement
from .sections import jsonable
from .settings import ReportSettings
from .thumbnails import nice_length, thumbnail_png
from .zchain import section_error

#: bump when a figure's drawing changes (every kept figure is then drawn again once); 2: SVG, no matplotlib; 3: tile-map scale bar under the map
FIGURE_VERSION = 3
#: the region figure shows at most this many columns (regions beyond are pooled, in order)
REGION_COLUMNS = 64


class FigureStore:
    """Draws a figure or takes the kept one, by its key (see the module docstring)."""

    def __init__(self, folder: BuildFolder, reuse: bool = True):
        self.folder, self.reuse = folder, reuse
        self.drawn: list[str] = []
        self.kept: list[str] = []

    def get(self, name: str, caption: str, key, draw, numbers=None) -> tuple[str, Path]:
        """Return ``(caption, path)`` of figure ``name``; ``draw()`` gives its SVG text when it must be drawn.

        ``numbers`` (a flat list of px values, None where there is none): the values the figure
        plots, kept with its key; the figure is kept while each is within :data:`SEEN_PX` of the
        value it was drawn with (compared with the drawn values, so changes do not add up).
        """
        path = self.folder.qc_dir / f"{name}.svg"
        stamp = self.folder.measurement_path("figures", name)
        fp = None if key is None else digest({"v": FIGURE_VERSION, "name": name, "key": jsonable(key)})
        numbers = None if numbers is None else jsonable(list(numbers))
        if self.reuse and fp is not None and path.is_file():
            old = stored_measurement(stamp)
            if old is not None and old.get("fingerprint") == fp and _close(old.get("numbers"), numbers):
                self.kept.append(name)
                return caption, path
        stamp.unlink(missing_ok=True)  # the figure is about to change: its old key no longer holds
        atomic_write_text(path, draw())
        (self.folder.qc_dir / f"{name}.png").unlink(missing_ok=True)  # the raster an older report wrote
        if fp is not None:
            write_measurement(stamp, {"fingerprint": fp, "numbers": numbers})
        self.drawn.append(name)
        return caption, path


def _close(drawn, now) -> bool:
    """Return whether two lists of values are the same to within :data:`SEEN_PX` (None only where None)."""
    if drawn is None or now is None:
        return drawn is None and now is None
    return len(drawn) == len(now) and all(
        (a is None) == (b is None) and (a is None or abs(a - b) <= SEEN_PX) for a, b in zip(drawn, now))


def _where(source) -> list:
    return [source.origin, source.level, source.factor, source.bin]


#: an error figure is kept while its numbers stay within this (px) of those it was drawn with: less than
#: a pixel of the error curve (260 px high for 2 px or more of error) or a step of the region map's colours
#: (256 over the align_max bar), so the kept figure still shows the current numbers
SEEN_PX = 0.005


def draw_all(folder: BuildFolder, doc: dict, meas, settings: ReportSettings, store: FigureStore) -> list[tuple[str, Path]]:
    """Draw (or keep) every figure into ``DIR/qc``; return ``(caption, path)`` pairs (the failing ones first)."""
    out = failing_figures(folder, doc, meas, settings, store)
    px = doc["volume"]["pixel_size_nm"]
    rows = doc["sections"]

    def error_z():
        return plots.error_vs_z(rows, settings.align_max)

    out.append(store.get("error_z", "Estimated alignment error per plane, with its uncertainty (1 sigma)",
                         # which side of the bar each plane is on changes its marker: part of the key
                         [[[r["z"], r["lost"], (r["align_error_px"] or 0) > settings.align_max] for r in rows],
                          settings.align_max], error_z,
                         [v for r in rows for v in (r["align_error_px"], r["align_error_unc_px"])]))
    grid, zs = region_grid(meas, doc)
    if grid is not None:
        def regions():
            return plots.region_map(grid, zs, settings.align_max)

        out.append(store.get("error_regions", "Estimated alignment error by region and plane",
                             [list(grid.shape), zs, settings.align_max], regions,
                             [float(v) if np.isfinite(v) else None for v in grid.ravel()]))
    out += _field_figure(folder, doc, meas, settings, store, px)
    out += _reslice_figure(folder, doc, settings, store, px)
    if _has_channel_panels(folder, doc):
        nm = {c.channel: c.pixel_size for c in folder.channel_manifest()}

        def channels():
            return panels.channel_overlays(channel_panels(folder, doc), nm)

        key = _channel_key(folder, doc)
        out.append(store.get("channels", "Marker channels over the EM, as registered",
                             None if key is None else [key, nm], channels))
    if doc.get("landmarks"):
        marker_px = {c.channel: c.pixel_size / px for c in folder.channel_manifest()}

        def landmarks():
            return plots.landmark_residuals(doc["landmarks"], marker_px)

        out.append(store.get("landmarks", "Landmark residuals of the marker registrations (marker spot as "
                             "registered minus the EM spot)", [doc["landmarks"], marker_px], landmarks))
    return out


def _field_figure(folder, doc, meas, settings, store, px) -> list:
    """Return the elastic displacement figure of the section with the largest displacement (or the one asked for)."""
    el = [r for r in doc["sections"] if r["elastic"]["max"] is not None]
    pick = max(el, key=lambda r: r["elastic"]["max"]) if el else None
    if settings.field_section >= 0:
        pick = next((r for r in doc["sections"] if r["section"] == settings.field_section), pick)
    if pick is None:
        return []
    s = pick["section"]
    canvas = folder.store.load_canvas()
    org = (canvas.origin_x, canvas.origin_y) if canvas else (0.0, 0.0)

    def draw():
        al = folder.store.load_alignment(s)
        return plots.displacement_field(s, al.displacement if al else None, org, px)

    fp = meas.section_fps.get(s)  # the section's records, its displacement field included
    return [store.get("displacement", f"Elastic displacement of section {s}",
                      None if fp is None else [s, fp, org, px], draw)]


def _reslice_figure(folder, doc, settings, store, px) -> list:
    """Return the orthogonal re-slices through the worst spot of the worst section (they cross every plane)."""
    src = open_planes(folder.root, max_px=settings.reslice_px)
    if src is None:
        return []
    vol = doc["volume"]
    worst = doc["worst"]["section_align"]
    at = worst["align_error_at"] if worst else None
    h, w = src.data.shape[-2] // src.bin * src.factor, src.data.shape[-1] // src.bin * src.factor
    x, y = (at["x_px"], at["y_px"]) if at else (w / 2, h / 2)
    aspect = vol["section_thickness_nm"] / vol["pixel_size_nm"]

    # keyed by the pixels it shows (two lines through every plane, read at a coarse level): an update that
    # rewrote shards the lines do not cross keeps the figure
    xz, yz = _reslice(folder, src, x, y, store.reuse)

    def draw():
        return panels.reslice(xz, yz, aspect, (x, y), src.factor, px)

    return [store.get("reslice", "Orthogonal re-slices through the worst spot of the worst section",
                      [_pixels(xz, yz), _where(src), x, y, aspect, px], draw)]


def _reslice(folder: BuildFolder, src, x: float, y: float, reuse: bool) -> tuple[np.ndarray, np.ndarray]:
    """Return :func:`~stackbuild.qc.planes.reslice_planes` at ``(x, y)``, reading only planes whose lines changed.

    Each plane's two lines are kept with its render fingerprint (``DIR/qc/measured/figures/reslice-lines.json``,
    float32 bytes in base64) and read again only when that changed, as the thumbnails are: a re-report after an
    update reads the rewritten planes, not the stack.
    """
    base = digest({"v": FIGURE_VERSION, "where": _where(src), "x": x, "y": y, "shape": list(src.data.shape)})
    path = folder.measurement_path("figures", "reslice-lines")
    old = (stored_measurement(path) or {}) if reuse else {}
    kept = old.get("planes", {}) if old.get("base") == base else {}
    fps = render_fingerprints(folder, src)
    lines = {}
    for z in range(src.depth):
        fp, had = fps.get(z), kept.get(str(z))
        if fp is not None and had is not None and had[0] == fp:
            lines[z] = tuple(np.frombuffer(base64.b64decode(a), np.float32) for a in had[1:])
    lines.update(reslice_lines(src, x, y, [z for z in range(src.depth) if z not in lines]))
    keep = {str(z): [fps[z]] + [base64.b64encode(np.ascontiguousarray(a, np.float32).tobytes()).decode("ascii")
                                for a in lines[z]]
            for z in range(src.depth) if fps.get(z) is not None}
    if keep != kept or old.get("base") != base:
        write_measurement(path, {"base": base, "planes": keep})
    if not lines:
        return reslice_planes(src, x, y)
    return (np.stack([lines[z][0] for z in range(src.depth)]).astype(np.float32),
            np.stack([lines[z][1] for z in range(src.depth)]).astype(np.float32))


def _pixels(*arrays) -> str:
    """Return the SHA-256 of arrays' shapes and bytes: the key of a figure by the pixels it shows."""
    import hashlib

    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(repr((a.shape, a.dtype.str)).encode())
        h.update(a.tobytes())
    return h.hexdigest()


def region_grid(meas, doc) -> tuple[np.ndarray | None, list[int]]:
    """Return the planes x regions grid of estimated error (NaN where unmeasured) and the plane numbers.

    Read from the stored runs one at a time (:func:`stackbuild.qc.metrics._stored_runs`); more
    than :data:`REGION_COLUMNS` regions are pooled into that many columns (their sums added), so
    the grid stays planes x 64 whatever the section's size.
    """
    from .metrics import _stored_runs

    depth = doc["volume"]["depth"] or 0
    if meas.probe is None or not meas.probe.boxes or not depth:
        return None, []
    order = sorted(meas.probe.boxes)
    ncol = min(len(order), REGION_COLUMNS)
    cols = {r: j * ncol // len(order) for j, r in enumerate(order)}
    sums = np.zeros((3, depth, ncol))
    for run in _stored_runs(meas):
        for row in run.get("regions", []):
            if row["region"] in cols and 0 <= row["z"] < depth:
                sums[:, row["z"], cols[row["region"]]] += (row["n"], row["sum_sq"], row["sum_noise"])
    grid = np.full((depth, ncol), np.nan)
    for z, j in zip(*np.nonzero(sums[0])):
        grid[z, j] = section_error(*sums[:, z, j])[0]
    if not np.isfinite(grid).any():
        return None, []
    return grid, list(range(depth))


def failing_figures(folder: BuildFolder, doc: dict, meas, settings: ReportSettings,
                    store: FigureStore) -> list[tuple[str, Path]]:
    """Return the figures of the section and the tile pair that fail (or come closest to failing) each bar."""
    out = []
    px = doc["volume"]["pixel_size_nm"]
    worst = doc["worst"]["section_align"]
    src = meas.source
    if worst is not None and worst["align_error_at"] and src is not None:
        at, z = worst["align_error_at"], worst["z"]
        lost = set(doc["volume"]["lost_sections"])
        first = doc["volume"]["first_section"] or 0
        present = [k for k in range(src.depth) if k + first not in lost]
        i = present.index(z) if z in present else None
        picks = [present[k] for k in (i - 1, i, i + 1) if i is not None and 0 <= k < len(present)]
        half = int(max(64, 3 * settings.probe_half_size) / src.factor)
        title = (f"Section {worst['section']} (z {z}) between its neighbours, at its largest "
                 f"estimated error ({worst['align_error_max_px']:.2f} px)")

        wins = [(k, window(src, k, at["x_px"], at["y_px"], half)) for k in picks]  # three small windows

        def draw():
            return panels.neighbour_panels(wins, (at["x_px"], at["y_px"]), px, src.factor, title)

        out.append(store.get("worst_section",
                             f"The worst-aligned section, {worst['section']}: estimated error "
                             f"{worst['align_error_px']:.2f} px; its largest block {worst['align_error_max_px']:.2f} px",
                             [picks, _pixels(*(w for _, w in wins)), _where(src), at["x_px"], at["y_px"], half, title,
                              px], draw))
    ranked = sorted((r for r in doc["sections"] if r["section"] in meas.seams and r["stitch"]["rms"] is not None),
                    key=lambda r: -r["stitch"]["rms"])[:min(settings.worst, 3)]
    if ranked:
        secs = [r["section"] for r in ranked]

        def draw_tiles():
            from .sections import stored_tables

            stitches = {s: folder.store.load_stitch(s) for s in secs}  # the few sections drawn, not all
            got = [stored_tables(folder.root, s, ("tiles", "pairs")) for s in secs]  # each section's file read once
            rows = {k: [r for g in got for r in g[k]] for k in ("tiles", "pairs")}
            return plots.tile_maps(stitches, rows["tiles"], rows["pairs"], secs, px)

        fps = [meas.section_fps.get(s) for s in secs]  # each section's records and settings, its rows follow
        out.append(store.get("tiles", "Tile maps of the sections with the worst seams (labels = tile names)",
                             None if None in fps else [secs, fps, px], draw_tiles))
    return out


def _has_channel_panels(folder: BuildFolder, doc: dict) -> bool:
    """Return whether :func:`channel_panels` would give a panel (a marker pyramid and a registered row with a place)."""
    root = folder.channels_path
    if not root.is_dir() or not doc["channels"] or not (folder.pyramid_path() / "0" / "zarr.json").exists():
        return False
    return any((root / c["channel"] / "zarr.json").exists() and c["registered"] and c["at"] for c in doc["channels"])


def _channel_key(folder: BuildFolder, doc: dict):
    """Return what the channel figure shows: its rows and every EM and marker plane's render fingerprint (None when
    a pyramid has no plane record)."""
    from ..render.fingerprint import read_plane_record

    root = folder.channels_path
    groups = {"em": folder.pyramid_path(), **{p.name: p for p in sorted(root.iterdir()) if p.is_dir()}}
    recs = {}
    for name, path in groups.items():
        rec = read_plane_record(path)
        if rec is None or not rec.get("fingerprints"):
            return None
        recs[name] = rec["fingerprints"]
    return [doc["channels"], recs]


def channel_panels(folder: BuildFolder, doc: dict, size: int = 384) -> list:
    """Return ``(channel, section, em, marker)`` crops for each channel's best-registered section.

    Both come from the written volume: the marker's level 0, and the EM on the same grid
    (the EM level of the marker's pixel size, reduced further from the smallest written
    level when the EM pyramid stops above it).
    """
    root = folder.channels_path
    if not root.is_dir() or not doc["channels"]:
        return []
    import zarr

    from ..render.lazy import open_volume  # only with channels: it brings in dask
    from ..render.reduce import reduce2x2

    levels = [k for k in range(32) if (folder.pyramid_path() / str(k) / "zarr.json").exists()]
    em0 = open_volume(folder.root, 0, lazy=False).scale_nm[-1]
    out = []
    for name in sorted({c["channel"] for c in doc["channels"]}):
        rows = [c for c in doc["channels"] if c["channel"] == name and c["registered"] and c["at"]]
        if not (root / name / "zarr.json").exists() or not rows or not levels:
            continue
        best = max(rows, key=lambda c: c["measure_after"] or 0)
        marker = open_volume(folder.root, 0, lazy=False, channel=name)
        level = int(round(np.log2(marker.scale_nm[-1] / em0)))
        have = min(level, levels[-1])
        z, f, g = best["at"]["z"], 2 ** level, 2 ** (level - have)
        h, w = marker.shape[1:]
        cx, cy = int(best["at"]["x_px"] / f), int(best["at"]["y_px"] / f)
        y0, x0 = max(0, min(cy - size // 2, h - size)), max(0, min(cx - size // 2, w - size))
        em = np.asarray(zarr.open_array(str(folder.pyramid_path() / str(have)), mode="r")[
            z, y0 * g:(y0 + size) * g, x0 * g:(x0 + size) * g])
        for _ in range(level - have):
            em = reduce2x2(em, "mean")
        mk = np.asarray(marker.data[z, y0:y0 + size, x0:x0 + size])
        hh, ww = min(em.shape[0], mk.shape[0]), min(em.shape[1], mk.shape[1])
        out.append((name, best["section"], em[:hh, :ww], mk[:hh, :ww]))
    return out


def thumbnails(folder: BuildFolder, doc: dict, reuse: bool = True, height: int = 56) -> tuple[dict[int, str], float | None]:
    """Return ``{z: data URI}`` of a small PNG per plane (read from a coarse level) and the scale bar length (nm).

    A plane's thumbnail is kept with its render fingerprint and made again only when that changed.
    """
    src = open_planes(folder.root, max_px=4 * height)
    if src is None:
        return {}, None
    px = doc["volume"]["pixel_size_nm"] * src.factor
    w = src.data.shape[-1] // src.bin
    bar = nice_length(w * px)
    base = digest({"v": FIGURE_VERSION, "where": _where(src), "px": px, "bar": bar, "height": height})
    path = folder.measurement_path("figures", "thumbnails")
    old = (stored_measurement(path) or {}) if reuse else {}
    kept = old.get("planes", {}) if old.get("base") == base else {}
    fps = render_fingerprints(folder, src)
    out, keep = {}, {}
    for z in range(src.depth):
        fp, had = fps.get(z), kept.get(str(z))
        if fp is not None and had is not None and had[0] == fp:
            out[z] = had[1]
        else:
            png = thumbnail_png(src.plane(z), px, bar, height)
            out[z] = "data:image/png;base64," + base64.b64encode(png).decode("ascii")
        if fp is not None:
            keep[str(z)] = [fp, out[z]]
    if keep != kept or old.get("base") != base:
        write_measurement(path, {"base": base, "planes": keep})
    return out, bar
