"""The report's colours: a sequential ramp for magnitudes (numpy, no plotting library), accents and the no-data colour.

The ramp is a small table of RGB stops of our own, interpolated linearly: it runs from a deep
ink blue through teal to a pale sand, its lightness rising steadily, so a larger value always
reads lighter (also in grey print). It holds no pink or magenta, so :data:`NO_DATA_RGB`, a pale
magenta, can never be mistaken for a value.
"""
from __future__ import annotations

import numpy as np

#: stops of the sequential ramp (position 0..1, RGB); lightness rises monotonically along it
RAMP_STOPS = (
    (0.00, (28, 33, 64)),
    (0.25, (44, 82, 120)),
    (0.50, (52, 132, 128)),
    (0.75, (150, 172, 92)),
    (1.00, (244, 222, 130)),
)

INK, GOOD, BAD, WARN, LOST = "#22313f", "#2a9d8f", "#c8553d", "#e9a23b", "#b8b8b8"
#: cells and tiles without data: a pale magenta, a colour the ramp never takes
NO_DATA = "#f4c6e8"
NO_DATA_RGB = (244, 198, 232)


def ramp(values, vmin: float, vmax: float) -> np.ndarray:
    """Return the ramp's colours of ``values`` (``(..., 3)`` uint8); NaN gets :data:`NO_DATA_RGB`.

    Values are clipped to ``[vmin, vmax]`` (``vmin`` the darkest stop, ``vmax`` the lightest).
    """
    v = np.asarray(values, np.float64)
    t = np.clip((v - vmin) / max(vmax - vmin, 1e-12), 0.0, 1.0)
    pos = np.array([p for p, _ in RAMP_STOPS])
    rgb = np.array([c for _, c in RAMP_STOPS], np.float64)
    out = np.stack([np.interp(np.nan_to_num(t), pos, rgb[:, k]) for k in range(3)], axis=-1)
    out = np.rint(out).astype(np.uint8)
    out[~np.isfinite(v)] = NO_DATA_RGB
    return out


def hex_colour(rgb) -> str:
    """Return ``#rrggbb`` of one RGB triple."""
    r, g, b = (int(c) for c in rgb)
    return f"#{r:02x}{g:02x}{b:02x}"


def stretch(img: np.ndarray, low: float = 1.0, high: float = 99.0) -> np.ndarray:
    """Return ``img`` scaled to 0..1 between its ``low`` and ``high`` percentiles (float32)."""
    img = np.asarray(img, np.float32)
    if img.size == 0:
        return img
    lo, hi = np.percentile(img, [low, high])
    return np.clip((img - lo) / max(float(hi - lo), 1e-6), 0.0, 1.0)


def grey(unit: np.ndarray) -> np.ndarray:
    """Return a 0..1 image as grey RGB (uint8)."""
    g = np.rint(np.clip(unit, 0, 1) * 255).astype(np.uint8)
    return np.dstack([g, g, g])
