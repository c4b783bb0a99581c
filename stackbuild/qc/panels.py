"""Image panels of the quality report: pixels as PNG (OpenCV), in SVG with a scale bar in nm and labels.

Each function returns one SVG document (:mod:`stackbuild.qc.svg`) whose panels are the
images' own pixels (grey stretched between the 1st and 99th percentiles, repeated by whole
factors, never smoothed); every panel carries a scale bar in nm.
"""
from __future__ import annotations

import numpy as np

from .colours import INK, WARN, grey, stretch
from .svg import Axes, Svg, nice_ticks, note, scale_bar, upsample, wrap


def reslice(xz: np.ndarray, yz: np.ndarray, z_aspect: float, at: tuple[float, float], factor: float,
            px_nm: float = 1.0) -> str:
    """Return the x-z and y-z re-slices, stretched in z by ``z_aspect`` (section thickness over pixel).

    ``xz`` and ``yz`` are ``(planes, columns)`` at ``factor`` level-0 px per column. A plane is drawn
    ``z_aspect`` level-0 px tall (physical proportions) unless the panel would be under 60 or over
    420 figure px tall; the title then says the stretch drawn.
    """
    left, AW = 70.0, 800.0
    parts, y = [], 8.0
    for img, name, pos in ((xz, "x", f"y = {at[1]:.0f}"), (yz, "y", f"x = {at[0]:.0f}")):
        nz, nc = img.shape if img.ndim == 2 and img.size else (1, 1)
        span = nc * factor  # level-0 px across
        k = AW / max(span, 1)  # figure px per level-0 px
        want = nz * z_aspect * k
        h = float(np.clip(want, 60, 420))
        if abs(h - want) < 0.5:
            how = f"z stretched by {z_aspect:.1f}: physical proportions"
        else:
            how = f"z stretched by {h / (nz * k):.1f} to fit; physical proportions: {z_aspect:.1f}"
        parts.append((img, name, pos, nz, span, k, h, how, y))
        y += 24 + h + 46
    svg = Svg(left + AW + 20, y)
    for img, name, pos, nz, span, k, h, how, top in parts:
        svg.text(left + AW / 2, top + 8, f"{name}-z re-slice at {pos} ({how})", 11, "middle")
        box = (left, top + 22, AW, h)
        if not img.size:
            note(svg, box, "no pixels")
            continue
        svg.image(*box, upsample(grey(stretch(img)), AW, h), alt=f"{name}-z re-slice")
        ax = Axes(svg, box, (0, span), (nz - 0.5, -0.5))
        ax.yticks(nice_ticks(0, nz - 1, 4, integer=True))
        ax.xticks(nice_ticks(0, span, 8))
        ax.frame()
        ax.labels(f"{name} (output px)", "z (plane)")
        scale_bar(svg, left + 0.05 * AW, top + 22 + h - 6, px_nm / k, AW)
    return svg.render()


def neighbour_panels(windows: list[tuple[int, np.ndarray]], centre: tuple[float, float], px_nm: float,
                     factor: float, title: str) -> str:
    """Return side-by-side crops of planes around a spot (same place), each with a scale bar.

    ``px_nm`` is the level-0 pixel size, ``factor`` the level-0 px per pixel of the windows.
    """
    n = max(len(windows), 1)
    P, gap = 260.0, 16.0
    W = n * (P + gap) + gap
    text = f"{title} (around x = {centre[0]:.0f}, y = {centre[1]:.0f} level-0 px; + marks the spot)"
    rows = wrap(text, W - 2 * gap, 11)
    head = 14 + 1.3 * 11 * len(rows) + 20
    tall = max([P * img.shape[0] / max(img.shape[1], 1) for _, img in windows if img.size] + [P])
    svg = Svg(W, head + tall + 12)
    svg.lines(W / 2, 14, rows, 11, "middle")
    if not windows:
        note(svg, (gap, head, P, P), "no planes")
    for i, (z, img) in enumerate(windows):
        bx = gap + i * (P + gap)
        svg.text(bx + P / 2, head - 10, f"z {z}", 11, "middle")
        if not img.size:
            note(svg, (bx, head, P, P), "no pixels")
            continue
        h = P * img.shape[0] / img.shape[1]
        svg.image(bx, head, P, h, upsample(grey(stretch(img)), P, h), alt=f"plane {z}")
        cx, cy = bx + P / 2, head + h / 2
        for colour, width in ((INK, 3.2), (WARN, 1.6)):
            svg.line(cx - 9, cy, cx + 9, cy, stroke=colour, width=width)
            svg.line(cx, cy - 9, cx, cy + 9, stroke=colour, width=width)
        svg.rect(bx, head, P, h, stroke=INK, width=0.6)
        scale_bar(svg, bx + 0.05 * P, head + h - 6, px_nm * factor * img.shape[1] / P, P)
    return svg.render()


def channel_overlays(panels: list[tuple[str, int, np.ndarray, np.ndarray]], nm_per_px: dict | None = None) -> str:
    """Return the EM plane in grey with each registered marker over it in green, one panel per channel.

    ``panels`` holds ``(channel, section, em, marker)``, both images on the same grid (the
    marker pyramid's level 0 and the EM level of the same pixel size); ``nm_per_px[channel]``
    is that grid's pixel size. Marker structures should sit on their EM counterparts; a
    misregistration shows as a consistent offset.
    """
    n = max(len(panels), 1)
    P, gap = 300.0, 16.0
    W = n * (P + gap) + gap
    tall = max([P * em.shape[0] / max(em.shape[1], 1) for _, _, em, _ in panels if em.size] + [P])
    svg = Svg(W, tall + 44)
    if not panels:
        note(svg, (gap, 30, W - 2 * gap, P), "no registered marker channels")
    for i, (name, section, em, marker) in enumerate(panels):
        bx = gap + i * (P + gap)
        svg.text(bx + P / 2, 16, f"{name} (green) on section {section}", 11, "middle")
        if not em.size:
            note(svg, (bx, 30, P, P), "no pixels")
            continue
        g, m = stretch(em, 1, 99.5), stretch(marker, 1, 99.5)
        rgb = np.rint(np.dstack([0.85 * g, 0.85 * g + 0.6 * m, 0.85 * g]).clip(0, 1) * 255).astype(np.uint8)
        h = P * em.shape[0] / em.shape[1]
        svg.image(bx, 30, P, h, upsample(rgb, P, h), alt=f"{name} over section {section}")
        svg.rect(bx, 30, P, h, stroke=INK, width=0.6)
        if nm_per_px and nm_per_px.get(name):
            scale_bar(svg, bx + 0.05 * P, 30 + h - 6, nm_per_px[name] * em.shape[1] / P, P)
    return svg.render()
