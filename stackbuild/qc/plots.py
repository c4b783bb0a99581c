"""Figures of the quality report (matplotlib, Agg backend, PNG).

Every function takes data already measured (rows of the metrics document,
block measurements, arrays) and returns a :class:`matplotlib.figure.Figure`;
:func:`save` writes it. Residuals are in full-resolution pixels throughout.
"""
from __future__ import annotations

import textwrap
from pathlib import Path

import matplotlib
import matplotlib.cm
import matplotlib.colors
import matplotlib.ticker
import numpy as np
from matplotlib.collections import LineCollection, PatchCollection
from matplotlib.figure import Figure
from matplotlib.patches import Circle, Rectangle

from .thumbnails import NO_DATA, nice_length, scale_text, thumbnail_png  # noqa: F401 (re-exported)

# Our palette: a sequential map for magnitudes and a few accents.
SEQ = "cividis"
INK, GOOD, BAD, WARN, LOST = "#22313f", "#2a9d8f", "#c8553d", "#e9a23b", "#b8b8b8"


def scale_bar(ax, nm_per_unit: float, extent_units: float, *, colour: str = "white") -> float:
    """Draw a scale bar (length in nm) in the lower-left corner of an image axis; return its length in nm.

    ``nm_per_unit`` is the size of one axis unit (a displayed pixel, or a level-0 pixel when the
    axis is in level-0 pixels); ``extent_units`` the axis width in those units.
    """
    from matplotlib.patches import Rectangle as _R
    from matplotlib import patheffects

    length = nice_length(extent_units * nm_per_unit)
    units = length / nm_per_unit
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    w, h = x1 - x0, y1 - y0
    bx, by = x0 + 0.05 * w, y0 + 0.07 * h
    ax.add_patch(_R((bx, by), units, 0.018 * abs(h) * np.sign(h), color=colour, ec=INK, lw=0.6, zorder=5))
    ax.text(bx + units / 2, by + 0.045 * h, scale_text(length), color=colour, ha="center", va="center",
            fontsize=8, zorder=6, path_effects=[patheffects.withStroke(linewidth=2, foreground=INK)])
    return length


class _Plots:
    """The two pyplot calls the figures need, without pyplot (its import and figure manager cost a few tenths of a second)."""

    @staticmethod
    def subplots(*args, figsize=None, layout=None, **kw):
        """Return ``(figure, axes)`` of a new Agg figure (as ``pyplot.subplots``)."""
        fig = Figure(figsize=figsize, layout=layout)
        return fig, fig.subplots(*args, **kw)

    @staticmethod
    def get_cmap(name):
        return matplotlib.colormaps[name]

    Circle = Circle


plt = _Plots()


def save(fig, path: str | Path, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG (Agg); return the path."""
    # constrained layouts already fit; "tight" would draw the figure twice
    tight = None if fig.get_layout_engine() is not None else "tight"
    # zlib level 1: about a fifth less encoding time than PIL's default 6 for 1-2 % larger files (bench_qc.py)
    fig.savefig(path, dpi=dpi, bbox_inches=tight, facecolor="white", pil_kwargs={"compress_level": 1})
    return Path(path)


def _note(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, color=INK)
    ax.set_xticks([])
    ax.set_yticks([])


def tile_maps(stitches: dict, tile_rows: list[dict], pair_rows: list[dict], sections: list[int],
              px_nm: float = 1.0):
    """Return maps of tile positions coloured by seam residual, one panel per section.

    Accepted pairs are solid lines between tile centres, rejected pairs dashed.
    """
    n = max(1, len(sections))
    cols = min(3, n)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(4.8 * cols + 1, 4.4 * rows + 0.6), squeeze=False,
                             layout="constrained")
    vals = [r["seam_median"] for r in tile_rows if r["section"] in sections and r["seam_median"] is not None]
    vmax = max(max(vals, default=0.0), 0.5)
    norm = matplotlib.colors.Normalize(0, vmax)
    cmap = plt.get_cmap(SEQ)
    for ax in axes.ravel()[n:]:
        ax.axis("off")
    for ax, s in zip(axes.ravel(), sections):
        st = stitches[s]
        res = {r["tile"]: r["seam_median"] for r in tile_rows if r["section"] == s}
        rects = [Rectangle((t.x - 0.5, t.y - 0.5), t.width, t.height) for t in st.tiles]
        colours = [cmap(norm(res[t.tile])) if res.get(t.tile) is not None else NO_DATA for t in st.tiles]
        # faces opaque (overlaps show the later tile), outlines drawn on top so every tile stays visible
        ax.add_collection(PatchCollection(rects, facecolors=colours, edgecolors="none"))
        ax.add_collection(PatchCollection([Rectangle(r.get_xy(), r.get_width(), r.get_height()) for r in rects],
                                          facecolors="none", edgecolors=INK, linewidths=0.7))
        centre = {t.tile: (t.x + t.width / 2, t.y + t.height / 2) for t in st.tiles}
        for acc, style, col in ((True, "-", GOOD), (False, "--", BAD)):
            segs = [(centre[r["a"]], centre[r["b"]]) for r in pair_rows
                    if r["section"] == s and bool(r["accepted"]) == acc and r["a"] in centre and r["b"] in centre]
            if segs:
                ax.add_collection(LineCollection(segs, colors=col, linestyles=style, linewidths=1.6))
        x0, y0, x1, y1 = st.bbox()
        ax.set_xlim(x0 - 10, x1 + 10)
        ax.set_ylim(y1 + 10, y0 - 10)
        ax.set_aspect("equal")
        if len(st.tiles) <= 400:  # labels stay readable up to about 20 x 20 tiles
            for t in st.tiles:
                ax.text(t.x + t.width / 2, t.y + t.height / 2, t.tile, ha="center", va="center",
                        fontsize=max(4, 9 - len(st.tiles) // 50), color="white",
                        bbox=dict(boxstyle="round,pad=0.15", fc=INK, ec="none", alpha=0.7),
                        in_layout=False)  # inside the axes: the layout need not measure every label (half the cost)
        scale_bar(ax, px_nm, x1 - x0, colour="white")
        ax.set_title(f"section {s}", color=INK)
        # no tick labels: the scale bar gives the size and the labels name the tiles (tick labels
        # were half the cost of the report's figures)
        ax.set_xticks([])
        ax.set_yticks([])
    sm = matplotlib.cm.ScalarMappable(norm=norm, cmap=cmap)
    fig.colorbar(sm, ax=axes.ravel().tolist(), shrink=0.8, label="tile seam residual, median (px)")
    fig.suptitle("Tile placement: colour = seam misfit (pink = not measured); solid = accepted pair, "
                 "dashed = rejected",
                 color=INK, fontsize=11)
    return fig


def displacement_field(section: int, field, origin_out=(0.0, 0.0), px_nm: float | None = None):
    """Return the magnitude map and arrows of a section's elastic displacement field."""
    fig, ax = plt.subplots(figsize=(6.5, 5.2), layout="constrained")  # fitted once, not drawn twice by "tight"
    if field is None:
        _note(ax, f"section {section}: no displacement field stored")
        return fig
    v = field.vectors
    ny, nx = v.shape[:2]
    xs = field.origin[0] - origin_out[0] + field.spacing * np.arange(nx)
    ys = field.origin[1] - origin_out[1] + field.spacing * np.arange(ny)
    mag = np.hypot(v[..., 0], v[..., 1])
    half = field.spacing / 2
    im = ax.imshow(mag, cmap=SEQ, origin="upper", interpolation="nearest",
                   extent=(xs[0] - half, xs[-1] + half, ys[-1] + half, ys[0] - half))
    # at most about 24 arrows a side (every k-th node, arrows k times longer): a denser quiver is unreadable
    # and most of the figure's cost
    k = max(1, int(np.ceil(max(nx, ny) / 24)))
    gx, gy = np.meshgrid(xs[::k], ys[::k])
    ax.quiver(gx, gy, v[::k, ::k, 0], v[::k, ::k, 1], color="white", angles="xy",
              scale_units="xy", scale=max(float(mag.max()), 1e-6) / (0.8 * k * field.spacing), width=0.004)
    fig.colorbar(im, ax=ax, label="displacement (px)")
    if px_nm:
        scale_bar(ax, px_nm, xs[-1] - xs[0] + field.spacing)
    ax.set_xlabel("x (output px)")
    ax.set_ylabel("y (output px)")
    ax.set_title(f"Elastic displacement, section {section} (arrows to scale of the largest)", color=INK)
    return fig


def reslice(xz: np.ndarray, yz: np.ndarray, z_aspect: float, at: tuple[float, float], factor: float,
            px_nm: float = 1.0):
    """Return the x-z and y-z re-slices, stretched in z by ``z_aspect`` (section thickness over pixel)."""
    panel = [float(np.clip(9.0 * img.shape[0] * z_aspect / max(img.shape[1] * factor, 1), 0.6, 4.5))
             for img in (xz, yz)]
    fig, axes = plt.subplots(2, 1, figsize=(9, sum(panel) + 2.0), layout="constrained",
                             gridspec_kw={"height_ratios": panel})
    for ax, img, name, pos in ((axes[0], xz, "x", f"y = {at[1]:.0f}"), (axes[1], yz, "y", f"x = {at[0]:.0f}")):
        lo, hi = np.percentile(img, [1, 99]) if img.size else (0, 1)
        n = img.shape[1] * factor
        ax.imshow(img, cmap="gray", vmin=lo, vmax=hi, interpolation="nearest",
                  extent=(0, n, img.shape[0] - 0.5, -0.5), aspect=z_aspect / factor)
        ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(nbins=4, integer=True))
        ax.set_xlabel(f"{name} (output px)")
        ax.set_ylabel("z (plane)")
        scale_bar(ax, px_nm, n)
        ax.set_title(f"{name}-z re-slice at {pos} (z stretched by {z_aspect:.1f}: physical proportions)",
                     color=INK, fontsize=10)
    return fig


def overlay(a: np.ndarray, b: np.ndarray, za: int, zb: int, at: tuple[float, float], tiles: int = 8):
    """Return a two-colour overlay and a checkerboard of two planes around a spot.

    In the overlay plane ``za`` is orange and ``zb`` blue; where they agree the
    picture is grey.
    """
    def norm(x):
        lo, hi = np.percentile(x, [1, 99])
        return np.clip((x - lo) / max(hi - lo, 1e-6), 0, 1)

    na, nb = norm(a), norm(b)
    rgb = np.dstack([na, 0.55 * na + 0.45 * nb, nb])
    h, w = a.shape
    yy, xx = np.mgrid[0:h, 0:w]
    cell = max(1, min(h, w) // tiles)
    board = np.where(((yy // cell + xx // cell) % 2) == 0, na, nb)
    fig, axes = plt.subplots(1, 2, figsize=(10, 5))
    axes[0].imshow(rgb, interpolation="nearest")
    axes[0].set_title(f"z {za} (orange) over z {zb} (blue)", color=INK)
    axes[1].imshow(board, cmap="gray", interpolation="nearest")
    axes[1].set_title(f"checkerboard z {za} / z {zb}", color=INK)
    for ax in axes:
        ax.set_xticks([])
        ax.set_yticks([])
    fig.suptitle(f"Worst section-to-section residual, around x = {at[0]:.0f}, y = {at[1]:.0f} output px",
                 color=INK, fontsize=11)
    return fig


def histograms(pair_rows: list[dict], seam_mags: np.ndarray, plane_mags: np.ndarray):
    """Return histograms of pair confidence (NCC), per-pair seam residuals and section residuals per block."""
    fig, axes = plt.subplots(1, 3, figsize=(12, 3.6))
    acc = [r["ncc"] for r in pair_rows if r["ncc"] is not None and r["accepted"]]
    rej = [r["ncc"] for r in pair_rows if r["ncc"] is not None and not r["accepted"]]
    bins = np.linspace(min(acc + rej + [0.0]), 1.0, 21)
    axes[0].hist([acc, rej], bins=bins, stacked=True, color=[GOOD, BAD], label=["accepted", "rejected"])
    axes[0].set_xlabel("pair NCC (stitcher)")
    axes[0].legend(fontsize=8)
    for ax, mags, name in ((axes[1], seam_mags, "seam residual per tile pair (px)"),
                           (axes[2], plane_mags, "section-to-section residual (px)")):
        if len(mags):
            ax.hist(mags, bins=30, color=WARN, edgecolor=INK, linewidth=0.3)
        else:
            _note(ax, "nothing measured")
        ax.set_xlabel(name)
    for ax in axes:
        ax.set_ylabel("count")
        ax.grid(alpha=0.3)
    fig.suptitle("Distributions", color=INK, fontsize=11)
    return fig


def landmark_residuals(rows: list[dict], marker_px: dict[str, float]):
    """Return each landmark's residual vector ``(dx, dy)`` (EM px), one panel per marker channel.

    A dashed circle marks one marker pixel (``marker_px[channel]``, in EM px): inside it, the
    registration places the marker spot within the marker image's own resolution.
    """
    names = sorted({r["channel"] for r in rows})
    fig, axes = plt.subplots(1, max(len(names), 1), figsize=(3.6 * max(len(names), 1), 3.6), squeeze=False,
                             layout="constrained")
    if not names:
        _note(axes[0, 0], "no landmarks")
        return fig
    for ax, name in zip(axes[0], names):
        mine = [r for r in rows if r["channel"] == name and r["residual"] is not None]
        if not mine:
            _note(ax, f"{name}: not registered")
            continue
        d = np.array([[r["dx"], r["dy"]] for r in mine])
        one = marker_px.get(name)
        reach = max(float(np.abs(d).max()), one or 0.0) * 1.15 + 1e-6
        if one:
            ax.add_patch(plt.Circle((0, 0), one, fill=False, ls="--", color=INK, lw=1))
        inside = np.hypot(d[:, 0], d[:, 1]) <= (one or np.inf)
        ax.scatter(d[inside, 0], d[inside, 1], s=18, color=GOOD, label="within one marker px")
        ax.scatter(d[~inside, 0], d[~inside, 1], s=18, color=BAD, marker="^", label="beyond")
        ax.axhline(0, color=LOST, lw=0.8)
        ax.axvline(0, color=LOST, lw=0.8)
        ax.set_xlim(-reach, reach)
        ax.set_ylim(reach, -reach)  # y down, as in the image
        ax.set_aspect("equal")
        rms = float(np.sqrt(np.mean(np.sum(d ** 2, axis=1))))
        ax.set_title(f"{name}: {len(mine)} landmarks, RMS {rms:.2f} px", color=INK, fontsize=10)
        ax.set_xlabel("dx (EM px)")
        ax.set_ylabel("dy (EM px)")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="lower left")
    return fig


def channel_overlays(panels: list[tuple[str, int, np.ndarray, np.ndarray]], nm_per_px: dict | None = None):
    """Return the EM plane in grey with each registered marker over it in green, one panel per channel.

    ``panels`` holds ``(channel, section, em, marker)``, both images on the same grid (the
    marker pyramid's level 0 and the EM level of the same pixel size). Marker structures
    should sit on their EM counterparts; a misregistration shows as a consistent offset.
    """
    def norm(x):
        lo, hi = np.percentile(x, [1, 99.5])
        return np.clip((x.astype(np.float32) - lo) / max(hi - lo, 1e-6), 0, 1)

    n = max(len(panels), 1)
    fig, axes = plt.subplots(1, n, figsize=(4.4 * n, 4.6), squeeze=False, layout="constrained")
    if not panels:
        _note(axes[0, 0], "no registered marker channels")
        return fig
    for ax, (name, section, em, marker) in zip(axes[0], panels):
        g, m = norm(em), norm(marker)
        rgb = np.dstack([0.85 * g, 0.85 * g + 0.6 * m, 0.85 * g]).clip(0, 1)
        ax.imshow(rgb, interpolation="nearest")
        ax.set_title(f"{name} (green) on section {section}", color=INK, fontsize=10)
        if nm_per_px and nm_per_px.get(name):
            scale_bar(ax, nm_per_px[name], g.shape[1])
        ax.set_xticks([])
        ax.set_yticks([])
    return fig


def error_vs_z(section_rows: list[dict], bar: float):
    """Return the estimated alignment error of every plane (with its uncertainty) against z, and the bar."""
    fig, ax = plt.subplots(figsize=(9, 3.6))
    rows = [r for r in section_rows if r["z"] is not None]
    have = [r for r in rows if r["align_error_px"] is not None]
    if have:
        z = np.array([r["z"] for r in have])
        e = np.array([r["align_error_px"] for r in have])
        u = np.array([r["align_error_unc_px"] or 0.0 for r in have])
        over = e > bar
        ax.errorbar(z[~over], e[~over], yerr=u[~over], fmt="o", color=GOOD, ms=4, capsize=2, label="under the bar")
        ax.errorbar(z[over], e[over], yerr=u[over], fmt="^", color=BAD, ms=6, capsize=2, label="over the bar")
        ax.axhline(bar, color=BAD, ls="--", lw=1, label=f"bar {bar:g} px")
        ax.set_ylim(0, max(1.15 * float((e + u).max()), 1.1 * bar))
    else:
        _note(ax, "alignment error not estimated")
    for r in rows:
        if r["lost"]:
            ax.axvspan(r["z"] - 0.5, r["z"] + 0.5, color=NO_DATA, alpha=0.8, lw=0)
    if any(r["lost"] for r in rows):
        ax.plot([], [], "s", color=NO_DATA, ms=9, label="lost section")
    ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
    ax.set_xlabel("z (plane)")
    ax.set_ylabel("estimated error (level-0 px)")
    ax.grid(alpha=0.3)
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), fontsize=8, ncols=4, frameon=False)
    ax.set_title("Estimated alignment error per plane (deviation from where its neighbours put it)",
                 color=INK, fontsize=10)
    return fig


def region_map(grid: np.ndarray, zs: list[int], bar: float):
    """Return a planes x regions map of the estimated error; cells without data in :data:`NO_DATA`."""
    fig, ax = plt.subplots(figsize=(9, max(2.5, min(0.18 * len(zs) + 1.5, 12))))
    cmap = plt.get_cmap(SEQ).with_extremes(bad=NO_DATA)
    vmax = max(float(np.nanmax(grid)) if np.isfinite(grid).any() else 0.0, bar)
    im = ax.imshow(np.ma.masked_invalid(grid), cmap=cmap, vmin=0, vmax=vmax, aspect="auto",
                   interpolation="nearest", extent=(-0.5, grid.shape[1] - 0.5, len(zs) - 0.5, -0.5))
    ax.set_yticks(np.arange(len(zs)), [str(z) for z in zs] if len(zs) <= 40 else None)
    if len(zs) > 40:
        ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
    fig.colorbar(im, ax=ax, label="estimated error (px)")
    ax.set_xlabel("region (row by row over the plane)")
    ax.set_ylabel("z (plane)")
    ax.set_title("Estimated error by region and plane (pink = not measured)", color=INK, fontsize=10)
    return fig


def neighbour_panels(windows: list[tuple[int, np.ndarray]], centre: tuple[float, float], px_nm: float,
                     factor: float, title: str):
    """Return side-by-side crops of planes around a spot (same place), each with a scale bar."""
    fig, axes = plt.subplots(1, max(len(windows), 1), figsize=(3.6 * max(len(windows), 1), 4), squeeze=False,
                             layout="constrained")
    for ax, (z, img) in zip(axes[0], windows):
        lo, hi = np.percentile(img, [1, 99]) if img.size else (0, 1)
        ax.imshow(img, cmap="gray", vmin=lo, vmax=hi, interpolation="nearest")
        ax.plot([img.shape[1] / 2], [img.shape[0] / 2], "+", color=WARN, ms=14, mew=1.5)
        ax.set_title(f"z {z}", color=INK, fontsize=10)
        ax.set_xticks([])
        ax.set_yticks([])
        scale_bar(ax, px_nm * factor, img.shape[1])
    # Wrapped to the figure's width: a long title on a two- or three-panel figure ran off both edges.
    text = f"{title} (around x = {centre[0]:.0f}, y = {centre[1]:.0f} level-0 px; + marks the spot)"
    width = max(40, int(fig.get_figwidth() * 12))  # about 12 characters per inch at 10 pt
    fig.suptitle(textwrap.fill(text, width), color=INK, fontsize=10)
    return fig
