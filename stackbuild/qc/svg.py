"""SVG figures written directly as text: shapes, text, embedded PNG panels, axes with round ticks, colour bars, scale bars.

No plotting library: a figure is a list of SVG elements in pixel coordinates (origin top
left, y down), closed by :meth:`Svg.render`. Image pixels go in as PNGs encoded by OpenCV
and embedded as ``data:`` URIs, so the figure is one self-contained file that a browser shows
inline. Nothing uses ``id`` or ``url(...)``: several figures can sit in one HTML page.
"""
from __future__ import annotations

import base64
import html
import textwrap

import numpy as np

from .colours import BAD, INK, NO_DATA, hex_colour, ramp
from .thumbnails import nice_length, png_bytes, scale_text

FONT = "Helvetica,Arial,sans-serif"
#: average advance of a character in em (Helvetica / Arial text; a rule of thumb for layout, no source)
CHAR_EM = 0.56


def num(v: float) -> str:
    """Return a coordinate as short text (two decimals at most)."""
    s = f"{float(v):.2f}".rstrip("0").rstrip(".")
    return "0" if s in ("-0", "") else s


def text_width(s: str, size: float) -> float:
    """Return the rough width (px) of ``s`` at font size ``size``."""
    return len(s) * size * CHAR_EM


def wrap(s: str, width_px: float, size: float) -> list[str]:
    """Return ``s`` broken into lines of at most ``width_px`` at font size ``size``."""
    return textwrap.wrap(s, max(20, int(width_px / (size * CHAR_EM)))) or [""]


def upsample(rgb: np.ndarray, width: float, height: float) -> np.ndarray:
    """Return ``rgb`` sized for a ``width`` x ``height`` figure box.

    An axis over twice the box is reduced by area averaging to twice it (detail for a high-density
    screen, without encoding pixels nobody sees); a shorter one is repeated by a whole factor toward
    the box (nearest: cells stay sharp in any viewer).
    """
    ky, kx = min(1.0, 2 * height / max(rgb.shape[0], 1)), min(1.0, 2 * width / max(rgb.shape[1], 1))
    if ky < 1 or kx < 1:  # each axis on its own: a re-slice keeps every plane while its columns are reduced
        import cv2

        size = (max(1, int(round(rgb.shape[1] * kx))), max(1, int(round(rgb.shape[0] * ky))))
        rgb = cv2.resize(rgb, size, interpolation=cv2.INTER_AREA)
    fy = max(1, int(height // max(rgb.shape[0], 1)))
    fx = max(1, int(width // max(rgb.shape[1], 1)))
    if fy > 1:
        rgb = np.repeat(rgb, fy, axis=0)
    if fx > 1:
        rgb = np.repeat(rgb, fx, axis=1)
    return rgb


def nice_ticks(lo: float, hi: float, n: int = 5, integer: bool = False) -> list[float]:
    """Return round values (1, 2 or 5 times a power of ten apart) inside ``[lo, hi]``, about ``n`` of them."""
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        return [lo] if np.isfinite(lo) else []
    raw = (hi - lo) / max(n, 1)
    base = 10 ** np.floor(np.log10(raw))
    step = next(m * base for m in (1, 2, 5, 10) if m * base >= raw)
    if integer:
        step = max(1.0, np.ceil(step))
    first = np.ceil(lo / step - 1e-9) * step
    return [float(v) for v in np.arange(first, hi + step * 1e-9, step)]


def tick_text(v: float) -> str:
    """Return a tick value as short text."""
    return f"{v:.6g}" if abs(v) >= 1e-9 else "0"


class Svg:
    """An SVG document built element by element (pixel coordinates, y down)."""

    def __init__(self, width: float, height: float):
        self.width, self.height = float(width), float(height)
        self.parts: list[str] = []

    def add(self, element: str) -> None:
        self.parts.append(element)

    def open(self, cls: str, **data) -> None:
        """Start a group of class ``cls`` (``data`` become ``data-*`` attributes); close it with :meth:`close`."""
        attrs = "".join(f' data-{k}="{html.escape(str(v))}"' for k, v in data.items())
        self.parts.append(f'<g class="{cls}"{attrs}>')

    def close(self) -> None:
        self.parts.append("</g>")

    @staticmethod
    def _paint(fill, stroke, width, dash, opacity) -> str:
        out = f' fill="{fill}"'
        if stroke:
            out += f' stroke="{stroke}" stroke-width="{num(width)}"'
        if dash:
            out += f' stroke-dasharray="{dash}"'
        if opacity is not None:
            out += f' opacity="{num(opacity)}"'
        return out

    def rect(self, x, y, w, h, fill="none", stroke=None, width=1.0, dash=None, opacity=None, rx=None) -> None:
        r = f' rx="{num(rx)}"' if rx else ""
        self.add(f'<rect x="{num(x)}" y="{num(y)}" width="{num(max(w, 0))}" height="{num(max(h, 0))}"{r}'
                 f"{self._paint(fill, stroke, width, dash, opacity)}/>")

    def line(self, x1, y1, x2, y2, stroke=INK, width=1.0, dash=None) -> None:
        self.add(f'<line x1="{num(x1)}" y1="{num(y1)}" x2="{num(x2)}" y2="{num(y2)}"'
                 f"{self._paint('none', stroke, width, dash, None)}/>")

    def path(self, d: str, fill="none", stroke=INK, width=1.0, dash=None, opacity=None) -> None:
        self.add(f'<path d="{d}"{self._paint(fill, stroke, width, dash, opacity)}/>')

    def polygon(self, points, fill, stroke=None, width=1.0) -> None:
        pts = " ".join(f"{num(x)},{num(y)}" for x, y in points)
        self.add(f'<polygon points="{pts}"{self._paint(fill, stroke, width, None, None)}/>')

    def circle(self, cx, cy, r, fill="none", stroke=None, width=1.0, dash=None) -> None:
        self.add(f'<circle cx="{num(cx)}" cy="{num(cy)}" r="{num(r)}"{self._paint(fill, stroke, width, dash, None)}/>')

    def text(self, x, y, s: str, size: float = 11, anchor: str = "start", fill: str = INK, bold: bool = False,
             halo: str | None = None, rotate: bool = False) -> None:
        """Write ``s`` with its vertical middle at ``y`` (``rotate``: reading upwards, centred on ``(x, y)``)."""
        yb = y + 0.35 * size
        extra = ' font-weight="bold"' if bold else ""
        if halo:
            extra += f' stroke="{halo}" stroke-width="{num(size / 4)}" paint-order="stroke" stroke-linejoin="round"'
        if rotate:
            extra += f' transform="rotate(-90 {num(x)} {num(y)})"'
        self.add(f'<text x="{num(x)}" y="{num(yb)}" font-size="{num(size)}" text-anchor="{anchor}" fill="{fill}"'
                 f"{extra}>{html.escape(s)}</text>")

    def lines(self, x, y, rows: list[str], size: float = 11, anchor: str = "start", **kw) -> float:
        """Write several lines from ``y`` down; return the y below the last."""
        for k, row in enumerate(rows):
            self.text(x, y + k * 1.3 * size, row, size, anchor, **kw)
        return y + len(rows) * 1.3 * size

    def image(self, x, y, w, h, rgb: np.ndarray, cls: str = "panel", alt: str = "") -> None:
        """Embed an RGB uint8 image as PNG, stretched to ``w`` x ``h`` (nearest neighbour, no smoothing)."""
        data = base64.b64encode(png_bytes(rgb)).decode("ascii")
        self.add(f'<image class="{cls}" x="{num(x)}" y="{num(y)}" width="{num(w)}" height="{num(h)}" '
                 f'preserveAspectRatio="none" style="image-rendering:pixelated" '
                 f'href="data:image/png;base64,{data}"><title>{html.escape(alt)}</title></image>')

    def render(self) -> str:
        """Return the document (standalone: an SVG file, and inline in HTML as it is)."""
        return (f'<svg xmlns="http://www.w3.org/2000/svg" width="{num(self.width)}" height="{num(self.height)}" '
                f'viewBox="0 0 {num(self.width)} {num(self.height)}" font-family="{FONT}">'
                f'<rect width="100%" height="100%" fill="#ffffff"/>{"".join(self.parts)}</svg>')


class Axes:
    """A data rectangle inside an :class:`Svg`: maps values to pixels (``ylim`` = (value at bottom, value at top))."""

    def __init__(self, svg: Svg, box, xlim, ylim):
        self.svg, self.box = svg, tuple(float(v) for v in box)
        self.xlim, self.ylim = (float(xlim[0]), float(xlim[1])), (float(ylim[0]), float(ylim[1]))

    def X(self, v):
        x, _, w, _ = self.box
        return x + (np.asarray(v, float) - self.xlim[0]) / (self.xlim[1] - self.xlim[0] or 1) * w

    def Y(self, v):
        _, y, _, h = self.box
        return y + h - (np.asarray(v, float) - self.ylim[0]) / (self.ylim[1] - self.ylim[0] or 1) * h

    def inside(self, x, y) -> bool:
        bx, by, bw, bh = self.box
        return bx - 0.5 <= x <= bx + bw + 0.5 and by - 0.5 <= y <= by + bh + 0.5

    def frame(self) -> None:
        x, y, w, h = self.box
        self.svg.rect(x, y, w, h, stroke=INK, width=0.8)

    def xticks(self, values, labels=None, grid: bool = False, size: float = 10) -> None:
        x, y, w, h = self.box
        for k, v in enumerate(values):
            px = float(self.X(v))
            if not x - 0.5 <= px <= x + w + 0.5:
                continue
            if grid:
                self.svg.line(px, y, px, y + h, stroke="#d8d8d8", width=0.6)
            self.svg.line(px, y + h, px, y + h + 4, stroke=INK, width=0.8)
            self.svg.text(px, y + h + 6 + size / 2, labels[k] if labels else tick_text(v), size, "middle")

    def yticks(self, values, labels=None, grid: bool = False, size: float = 10) -> None:
        x, y, w, h = self.box
        for k, v in enumerate(values):
            py = float(self.Y(v))
            if not y - 0.5 <= py <= y + h + 0.5:
                continue
            if grid:
                self.svg.line(x, py, x + w, py, stroke="#d8d8d8", width=0.6)
            self.svg.line(x - 4, py, x, py, stroke=INK, width=0.8)
            self.svg.text(x - 6, py, labels[k] if labels else tick_text(v), size, "end")

    def labels(self, xlabel: str | None = None, ylabel: str | None = None, size: float = 11, left: float = 44) -> None:
        x, y, w, h = self.box
        if xlabel:
            self.svg.text(x + w / 2, y + h + 30, xlabel, size, "middle")
        if ylabel:
            self.svg.text(x - left, y + h / 2, ylabel, size, "middle", rotate=True)


def scale_bar(svg: Svg, x: float, y: float, nm_per_px: float, span_px: float, colour: str = "#ffffff") -> float:
    """Draw a scale bar (length in nm, about a fifth of ``span_px``) from ``(x, y)`` (its lower left); return its nm.

    ``nm_per_px`` is the physical size of one figure pixel; ``span_px`` the width of the panel in figure px.
    The bar and its text form a group ``class="scalebar"`` with ``data-nm`` (what the browser test looks for).
    """
    length = nice_length(span_px * nm_per_px)
    w = length / nm_per_px
    svg.open("scalebar", nm=f"{length:g}")
    svg.rect(x, y - 4, w, 4, fill=colour, stroke=INK, width=0.6)
    svg.text(x + w / 2, y - 13, scale_text(length), 11, "middle", fill=colour,
             halo=None if colour == INK else INK)
    svg.close()
    return length


def colour_bar(svg: Svg, x: float, y: float, h: float, vmin: float, vmax: float, label: str,
               no_data: str | None = None, mark: tuple[float, str] | None = None) -> None:
    """Draw a vertical colour bar of the ramp from ``vmin`` (bottom) to ``vmax``, its ticks and label (with units).

    ``no_data``: a swatch of the no-data colour under the bar with this text. ``mark``: ``(value, text)``
    drawn as a line across the bar (a threshold).
    """
    w, steps = 14.0, 48
    cols = ramp(np.linspace(vmin, vmax, steps), vmin, vmax)
    for k in range(steps):  # from the bottom up; rectangles, no gradient (no ids in inline SVG)
        svg.rect(x, y + h - (k + 1) * h / steps, w, h / steps + 0.4, fill=hex_colour(cols[k]))
    svg.rect(x, y, w, h, stroke=INK, width=0.6)
    ax = Axes(svg, (x, y, w, h), (0, 1), (vmin, vmax))
    for v in nice_ticks(vmin, vmax, 5):
        py = float(ax.Y(v))
        svg.line(x + w, py, x + w + 4, py, stroke=INK, width=0.8)
        svg.text(x + w + 6, py, tick_text(v), 10)
    if mark is not None and vmin <= mark[0] <= vmax:
        py = float(ax.Y(mark[0]))
        svg.line(x - 3, py, x + w + 3, py, stroke=BAD, width=2)
        svg.text(x - 5, py, mark[1], 10, "end", fill=BAD)
    svg.text(x + w + 46, y + h / 2, label, 11, "middle", rotate=True)
    if no_data:
        svg.rect(x, y + h + 10, w, 12, fill=NO_DATA, stroke=INK, width=0.6)
        svg.text(x + w + 6, y + h + 16, no_data, 10)


def legend(svg: Svg, x: float, y: float, entries: list[tuple[str, str, str]], size: float = 10) -> None:
    """Draw a one-line legend from ``(x, y)``: ``(kind, colour, label)`` with kind in circle/triangle/square/line/dash."""
    for kind, colour, label in entries:
        if kind == "circle":
            svg.circle(x + 6, y, 4, fill=colour)
        elif kind == "triangle":
            svg.polygon([(x + 6, y - 5), (x + 11, y + 4), (x + 1, y + 4)], fill=colour)
        elif kind == "square":
            svg.rect(x + 1, y - 5, 10, 10, fill=colour, stroke=INK, width=0.5)
        else:
            svg.line(x, y, x + 14, y, stroke=colour, width=1.6, dash="5 3" if kind == "dash" else None)
        svg.text(x + 18, y, label, size)
        x += 30 + text_width(label, size)


def note(svg: Svg, box, text: str) -> None:
    """Write ``text`` in the middle of ``box`` (a panel with nothing to draw)."""
    x, y, w, h = box
    svg.rect(x, y, w, h, stroke="#d8d2c4", width=0.8)
    svg.text(x + w / 2, y + h / 2, text, 12, "middle")
