"""Charts of the quality report, each returned as SVG text (no plotting library).

Every function takes data already measured (rows of the metrics document, stored records,
arrays) and returns one SVG document (:mod:`stackbuild.qc.svg`); the image panels (re-slices,
neighbouring planes, marker overlays) are in :mod:`stackbuild.qc.panels`. Residuals are in
full-resolution pixels throughout; colours are :mod:`stackbuild.qc.colours`' ramp, with the
no-data colour outside it.
"""
from __future__ import annotations

import numpy as np

from .colours import BAD, GOOD, INK, LOST, NO_DATA, hex_colour, ramp
from .svg import Axes, Svg, colour_bar, legend, nice_ticks, note, num, scale_bar, text_width, upsample, wrap


def error_vs_z(section_rows: list[dict], bar: float) -> str:
    """Return the estimated alignment error of every plane (with its uncertainty) against z, and the bar."""
    W, H = 900, 390
    svg = Svg(W, H)
    svg.text(W / 2, 16, "Estimated alignment error per plane (deviation from where its neighbours put it)",
             12, "middle", bold=True)
    box = (70, 36, 800, 260)
    rows = [r for r in section_rows if r["z"] is not None]
    have = [r for r in rows if r["align_error_px"] is not None]
    if not rows:
        note(svg, box, "no planes")
        return svg.render()
    zs = [r["z"] for r in rows]
    z0, z1 = min(zs) - 0.5, max(zs) + 0.5
    if have:
        z = np.array([r["z"] for r in have], float)
        e = np.array([r["align_error_px"] for r in have], float)
        u = np.array([r["align_error_unc_px"] or 0.0 for r in have], float)
        top = max(1.15 * float((e + u).max()), 1.1 * bar)
    else:
        top = 1.1 * bar if bar > 0 else 1.0
    ax = Axes(svg, box, (z0, z1), (0.0, top))
    for r in rows:  # lost sections first, under everything
        if r["lost"]:
            svg.rect(ax.X(r["z"] - 0.5), box[1], ax.X(r["z"] + 0.5) - ax.X(r["z"] - 0.5), box[3], fill=NO_DATA,
                     opacity=0.8)
    ax.yticks(nice_ticks(0.0, top, 5), grid=True)
    ax.xticks(nice_ticks(z0, z1, 10, integer=True), grid=True)
    entries = []
    if have:
        by = float(ax.Y(bar))
        svg.line(box[0], by, box[0] + box[2], by, stroke=BAD, width=1.2, dash="6 4")
        for zi, ei, ui in zip(z, e, u):
            px, py = float(ax.X(zi)), float(ax.Y(ei))
            if ui > 0:
                lo, hi = float(ax.Y(max(ei - ui, 0.0))), float(ax.Y(ei + ui))
                colour = BAD if ei > bar else GOOD
                svg.line(px, lo, px, hi, stroke=colour, width=1)
                svg.line(px - 3, lo, px + 3, lo, stroke=colour, width=1)
                svg.line(px - 3, hi, px + 3, hi, stroke=colour, width=1)
            if ei > bar:
                svg.polygon([(px, py - 6), (px + 5.5, py + 4), (px - 5.5, py + 4)], fill=BAD)
            else:
                svg.circle(px, py, 3.5, fill=GOOD)
        entries = [("circle", GOOD, "under the bar"), ("triangle", BAD, "over the bar"), ("dash", BAD, f"bar {bar:g} px")]
    else:
        svg.text(box[0] + box[2] / 2, box[1] + box[3] / 2, "alignment error not estimated", 12, "middle")
    if any(r["lost"] for r in rows):
        entries.append(("square", NO_DATA, "lost section"))
    ax.frame()
    ax.labels("z (plane)", "estimated error (level-0 px)")
    legend(svg, box[0] + 150, H - 16, entries)
    return svg.render()


def region_map(grid: np.ndarray, zs: list[int], bar: float) -> str:
    """Return a planes x regions map of the estimated error; cells without data in :data:`NO_DATA`."""
    n, ncol = grid.shape
    plot_h = float(np.clip(14 * n, 120, 960))
    W, H = 900, plot_h + 100
    svg = Svg(W, H)
    svg.text(W / 2, 16, "Estimated error by region and plane (pink = not measured)", 12, "middle", bold=True)
    box = (70, 36, 690, plot_h)
    vmax = max(float(np.nanmax(grid)) if np.isfinite(grid).any() else 0.0, bar)
    svg.image(*box, upsample(ramp(grid, 0.0, vmax), box[2], box[3]), cls="heat",
              alt="estimated error, one row per plane, one column per region")
    ax = Axes(svg, box, (-0.5, ncol - 0.5), (n - 0.5, -0.5))  # plane 0 at the top
    if n <= 40:
        ax.yticks(list(range(n)), [str(z) for z in zs], size=9 if n > 20 else 10)
    else:
        ax.yticks(nice_ticks(0, n - 1, 8, integer=True))
    ax.xticks(nice_ticks(0, ncol - 1, 8, integer=True))
    ax.frame()
    ax.labels("region (row by row over the plane)", "z (plane)")
    colour_bar(svg, box[0] + box[2] + 24, box[1], min(plot_h, 300.0), 0.0, vmax, "estimated error (px)",
               no_data="not measured", mark=(bar, "bar"))
    return svg.render()


def tile_maps(stitches: dict, tile_rows: list[dict], pair_rows: list[dict], sections: list[int],
              px_nm: float = 1.0) -> str:
    """Return maps of tile positions coloured by seam residual, one panel per section.

    Accepted pairs are solid lines between tile centres, rejected pairs dashed; every tile is
    labelled with its name (up to 400 tiles a section), every panel has a scale bar in nm.
    """
    n = max(1, len(sections))
    cols = min(3, n)
    rows = int(np.ceil(n / cols))
    P, gap, head = 300.0, 24.0, 44.0
    W = cols * (P + gap) + 110
    title = ("Tile placement: colour = seam misfit (pink = not measured); solid = accepted pair, "
             "dashed = rejected")
    H = head + rows * (P + 60) + 10
    svg = Svg(W, H)
    svg.lines(W / 2, 16, wrap(title, W - 40, 12), 12, "middle", bold=True)
    vals = [r["seam_median"] for r in tile_rows if r["section"] in sections and r["seam_median"] is not None]
    vmax = max(max(vals, default=0.0), 0.5)
    for i, s in enumerate(sections):
        bx, by = 16 + (i % cols) * (P + gap), head + (i // cols) * (P + 60) + 18
        svg.text(bx + P / 2, by - 10, f"section {s}", 11, "middle")
        _tile_panel(svg, (bx, by, P), stitches[s], s, tile_rows, pair_rows, vmax, px_nm)
    colour_bar(svg, W - 84, head + 18, min(P, H - head - 60), 0.0, vmax, "tile seam residual, median (px)",
               no_data="not measured")
    return svg.render()


def _tile_panel(svg: Svg, where, st, s: int, tile_rows, pair_rows, vmax: float, px_nm: float) -> None:
    """Draw one section's tiles (faces, then outlines, pairs and labels) into a ``P`` x ``P`` square at ``where``."""
    bx, by, P = where
    x0, y0, x1, y1 = st.bbox()
    x0, y0, x1, y1 = x0 - 10, y0 - 10, x1 + 10, y1 + 10
    k = min(P / (x1 - x0), P / (y1 - y0))  # figure px per section px, equal in x and y
    ax = Axes(svg, (bx, by, (x1 - x0) * k, (y1 - y0) * k), (x0, x1), (y1, y0))
    res = {r["tile"]: r["seam_median"] for r in tile_rows if r["section"] == s}
    faces = ramp([np.nan if res.get(t.tile) is None else res[t.tile] for t in st.tiles], 0.0, vmax)
    boxes = [(float(ax.X(t.x - 0.5)), float(ax.Y(t.y - 0.5)), t.width * k, t.height * k) for t in st.tiles]
    # faces opaque (overlaps show the later tile), outlines on top so every tile stays visible
    for b, c in zip(boxes, faces):
        svg.rect(*b, fill=hex_colour(c))
    for b in boxes:
        svg.rect(*b, stroke=INK, width=0.7)
    centre = {t.tile: (float(ax.X(t.x + t.width / 2)), float(ax.Y(t.y + t.height / 2))) for t in st.tiles}
    for r in pair_rows:
        if r["section"] == s and r["a"] in centre and r["b"] in centre:
            (xa, ya), (xb, yb) = centre[r["a"]], centre[r["b"]]
            ok = bool(r["accepted"])
            svg.line(xa, ya, xb, yb, stroke=GOOD if ok else BAD, width=1.6, dash=None if ok else "5 3")
    if len(st.tiles) <= 400:  # labels stay readable up to about 20 x 20 tiles
        size = max(5.0, 10.0 - len(st.tiles) // 50)
        for t in st.tiles:
            cx, cy = centre[t.tile]
            w = text_width(t.tile, size) + 4
            svg.rect(cx - w / 2, cy - 0.7 * size, w, 1.4 * size, fill=INK, opacity=0.7, rx=2)
            svg.text(cx, cy, t.tile, size, "middle", fill="#ffffff")
    # under the map, in ink: inside it the bar would cover the bottom row's labels
    scale_bar(svg, bx, by + ax.box[3] + 24, px_nm / k, ax.box[2], colour=INK)
    ax.frame()


def displacement_field(section: int, field, origin_out=(0.0, 0.0), px_nm: float | None = None) -> str:
    """Return the magnitude map and arrows of a section's elastic displacement field."""
    title = f"Elastic displacement, section {section} (arrows to scale of the largest)"
    if field is None:
        svg = Svg(700, 160)
        svg.text(350, 16, title, 12, "middle", bold=True)
        note(svg, (20, 36, 660, 110), f"section {section}: no displacement field stored")
        return svg.render()
    v = np.asarray(field.vectors, float)
    ny, nx = v.shape[:2]
    xs = field.origin[0] - origin_out[0] + field.spacing * np.arange(nx)
    ys = field.origin[1] - origin_out[1] + field.spacing * np.arange(ny)
    mag = np.hypot(v[..., 0], v[..., 1])
    half = field.spacing / 2
    ex0, ex1, ey0, ey1 = xs[0] - half, xs[-1] + half, ys[0] - half, ys[-1] + half
    k = min(560 / (ex1 - ex0), 440 / (ey1 - ey0))  # figure px per output px
    box = (80, 36, (ex1 - ex0) * k, (ey1 - ey0) * k)
    W, H = box[0] + box[2] + 110, box[1] + box[3] + 50
    svg = Svg(W, H)
    svg.text(W / 2, 16, title, 12, "middle", bold=True)
    top = max(float(mag.max()), 1e-6)
    svg.image(*box, upsample(ramp(mag, 0.0, top), box[2], box[3]), alt="displacement magnitude")
    ax = Axes(svg, box, (ex0, ex1), (ey1, ey0))  # y down, as in the image
    # at most about 24 arrows a side (every s-th node, arrows s times longer): a denser field is unreadable
    step = max(1, int(np.ceil(max(nx, ny) / 24)))
    reach = 0.8 * step * field.spacing / top * k  # figure px per px of displacement
    _arrows(svg, [(float(ax.X(xs[i])), float(ax.Y(ys[j])), v[j, i, 0] * reach, v[j, i, 1] * reach)
                  for j in range(0, ny, step) for i in range(0, nx, step)])
    ax.xticks(nice_ticks(ex0, ex1, 5))
    ax.yticks(nice_ticks(ey0, ey1, 5))
    ax.frame()
    ax.labels("x (output px)", "y (output px)", left=58)
    if px_nm:
        scale_bar(svg, box[0] + 0.05 * box[2], box[1] + box[3] - 8, px_nm / k, box[2])
    colour_bar(svg, box[0] + box[2] + 16, box[1], min(box[3], 300.0), 0.0, top, "displacement (px)")
    return svg.render()


def _arrows(svg: Svg, arrows) -> None:
    """Draw arrows ``(x, y, dx, dy)`` (figure px): white with a dark edge, readable on any colour; three paths in all."""
    shafts, heads = [], []
    for x, y, dx, dy in arrows:
        length = float(np.hypot(dx, dy))
        if length < 1.0:
            continue
        ux, uy = dx / length, dy / length
        head = min(6.0, 0.45 * length)
        tx, ty = x + dx, y + dy
        bx, by = tx - head * ux, ty - head * uy
        wx, wy = -uy * head * 0.5, ux * head * 0.5
        shafts.append(f"M{num(x)} {num(y)}L{num(bx)} {num(by)}")
        heads.append(f"M{num(tx)} {num(ty)}L{num(bx + wx)} {num(by + wy)}L{num(bx - wx)} {num(by - wy)}Z")
    if shafts:
        svg.path("".join(shafts), stroke=INK, width=2.4)
        svg.path("".join(shafts), stroke="#ffffff", width=1.1)
        svg.path("".join(heads), fill="#ffffff", stroke=INK, width=0.6)


def landmark_residuals(rows: list[dict], marker_px: dict[str, float]) -> str:
    """Return each landmark's residual vector ``(dx, dy)`` (EM px), one panel per marker channel.

    A dashed circle marks one marker pixel (``marker_px[channel]``, in EM px): inside it, the
    registration places the marker spot within the marker image's own resolution.
    """
    names = sorted({r["channel"] for r in rows})
    P = 260.0
    n = max(len(names), 1)
    W, H = n * (P + 96) + 20, P + 112
    svg = Svg(W, H)
    if not names:
        note(svg, (20, 20, W - 40, H - 40), "no landmarks")
        return svg.render()
    for i, name in enumerate(names):
        box = (84 + i * (P + 96), 40, P, P)
        mine = [r for r in rows if r["channel"] == name and r["residual"] is not None]
        if not mine:
            note(svg, box, f"{name}: not registered")
            continue
        d = np.array([[r["dx"], r["dy"]] for r in mine], float)
        one = marker_px.get(name)
        reach = max(float(np.abs(d).max()), one or 0.0) * 1.15 + 1e-6
        ax = Axes(svg, box, (-reach, reach), (reach, -reach))  # y down, as in the image
        ticks = nice_ticks(-reach, reach, 4)
        ax.xticks(ticks, grid=True)
        ax.yticks(ticks, grid=True)
        svg.line(ax.X(0), box[1], ax.X(0), box[1] + P, stroke=LOST, width=0.8)
        svg.line(box[0], ax.Y(0), box[0] + P, ax.Y(0), stroke=LOST, width=0.8)
        if one:
            svg.circle(ax.X(0), ax.Y(0), one * P / (2 * reach), stroke=INK, width=1, dash="5 3")
        inside = np.hypot(d[:, 0], d[:, 1]) <= (one or np.inf)
        for (dx, dy), ok in zip(d, inside):
            px, py = float(ax.X(dx)), float(ax.Y(dy))
            if ok:
                svg.circle(px, py, 3.5, fill=GOOD)
            else:
                svg.polygon([(px, py - 5), (px + 4.5, py + 3.5), (px - 4.5, py + 3.5)], fill=BAD)
        rms = float(np.sqrt(np.mean(np.sum(d ** 2, axis=1))))
        svg.text(box[0] + P / 2, 20, f"{name}: {len(mine)} landmarks, RMS {rms:.2f} px", 11, "middle")
        ax.frame()
        ax.labels("dx (EM px)", "dy (EM px)", left=50)
    legend(svg, 84, H - 16, [("circle", GOOD, "within one marker px"), ("triangle", BAD, "beyond"),
                             ("dash", INK, "one marker pixel")])
    return svg.render()
