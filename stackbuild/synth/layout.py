"""Where the tiles of a section lie, and how big the section and true frames are.

The section frame is the mosaic of one section: its origin is the top-left of
the tiled area, so true tile positions are small positive numbers. The true
frame is the common frame of the phantom; it is made large enough that every
section, however it is rotated, shifted, stretched or warped, and every marker
image, falls inside it (no empty borders in any tile).
"""
from __future__ import annotations

import math

import numpy as np

from .params import SynthParams, tile_name

# Tags that keep the random streams of different model parts independent.
TAG_LAYOUT, TAG_AFFINE, TAG_FIELD, TAG_TILE, TAG_NOISE = 1, 2, 3, 4, 5
TAG_FOLD, TAG_CHANNEL, TAG_CHANNEL_NOISE = 6, 7, 8
_MARGIN = 24  # px of tissue kept beyond the farthest possible sample


def rng(params: SynthParams, *key: int) -> np.random.Generator:
    """Return the random generator of one model part (``key``: non-negative ints)."""
    return np.random.default_rng([params.seed & 0xFFFFFFFF, *key])


def grid_step(params: SynthParams) -> int:
    """Return the nominal distance between neighbouring tile origins, pixels."""
    return int(round(params.tile_size * (1.0 - params.overlap)))


def section_shape(params: SynthParams) -> tuple[int, int]:
    """Return ``(height, width)`` of the section canvas that holds every tile."""
    rows, cols = params.grid
    step, pad = grid_step(params), 2 * math.ceil(params.irregularity)
    return (pad + (rows - 1) * step + params.tile_size, pad + (cols - 1) * step + params.tile_size)


def section_centre(params: SynthParams) -> np.ndarray:
    """Return the ``(x, y)`` centre of the section canvas."""
    h, w = section_shape(params)
    return np.array([(w - 1) / 2.0, (h - 1) / 2.0])


def true_shape(params: SynthParams) -> tuple[int, int]:
    """Return ``(height, width)`` of the true frame that contains every section's content."""
    h, w = section_shape(params)
    a = math.radians(params.rotation)
    grow = 1.0 + params.scale
    reach = params.offset + params.warp + _MARGIN
    if params.channels:
        b = math.radians(params.channel_rotation)
        reach += params.channel_shift + math.sin(b) * 0.5 * max(h, w) + 2 * params.channel_binning
    hx = 0.5 * (w * math.cos(a) + h * math.sin(a)) * grow + reach
    hy = 0.5 * (h * math.cos(a) + w * math.sin(a)) * grow + reach
    return 2 * math.ceil(hy), 2 * math.ceil(hx)


def true_centre(params: SynthParams) -> np.ndarray:
    """Return the ``(x, y)`` centre of the true frame."""
    h, w = true_shape(params)
    return np.array([(w - 1) / 2.0, (h - 1) / 2.0])


def tile_layout(params: SynthParams, section: int) -> dict[str, dict]:
    """Return each tile's true position and stage position in the section frame.

    Returns
    -------
    dict
        ``tile id -> {"row", "col", "true": (x, y), "stage": (x, y)}``: the
        section-frame position of the tile's pixel (0, 0) centre, truly and as
        the stage reports it (true + uniform error of ``jitter``).
    """
    rows, cols = params.grid
    step, pad = grid_step(params), math.ceil(params.irregularity)
    g = rng(params, TAG_LAYOUT, section)
    irregular = g.uniform(-params.irregularity, params.irregularity, (rows, cols, 2))
    error = g.uniform(-params.jitter, params.jitter, (rows, cols, 2))
    out = {}
    for r in range(rows):
        for c in range(cols):
            true = np.array([pad + c * step, pad + r * step]) + irregular[r, c]
            stage = true + error[r, c]
            out[tile_name(r, c)] = {"row": r, "col": c, "true": (float(true[0]), float(true[1])),
                                    "stage": (float(stage[0]), float(stage[1]))}
    return out
