"""Landmarks of a synthetic sample: the same spot on a raw tile and on a marker image, from the ground truth.

A practitioner makes such a file by clicking a structure on a raw EM tile and
the same structure on the marker image; here the truth gives them exactly. A
spot is drawn inside the marker image, mapped to the section by the true
``channel -> section`` affine, and written against a tile that holds it well
inside its edges (tile pixel = section pixel - the tile's true position).
"""
from __future__ import annotations

import numpy as np
import tifffile

from .truth import Truth

COLUMNS = ["section", "channel", "tile", "tile_x", "tile_y", "marker_x", "marker_y", "name"]


def landmark_rows(truth: Truth, per_channel: int, seed: int, margin: float = 16.0) -> list[list]:
    """Return landmark rows (see :data:`COLUMNS`): ``per_channel`` spots per imaged marker and section."""
    rng = np.random.default_rng([seed, 7])
    th, tw = truth.tile_shape
    rows = []
    for s in truth.sections:
        positions = truth.tile_positions(s)
        for ch in truth.channels(s):
            info = truth.record["sections"][str(s)]["channels"][ch]
            with tifffile.TiffFile(truth.folder.parent / info["path"]) as tif:
                mh, mw = tif.pages[0].shape[:2]
            found = 0
            for _ in range(50 * per_channel):
                if found == per_channel:
                    break
                m = rng.uniform([0.15 * mw, 0.15 * mh], [0.85 * mw, 0.85 * mh])
                p = truth.channel_to_section(s, ch, m)[0]
                holders = [(t, p - np.array(xy)) for t, xy in sorted(positions.items())
                           if margin <= p[0] - xy[0] <= tw - 1 - margin and margin <= p[1] - xy[1] <= th - 1 - margin]
                if not holders:
                    continue
                tile, uv = holders[int(rng.integers(len(holders)))]
                found += 1
                rows.append([s, ch, tile, f"{uv[0]:.3f}", f"{uv[1]:.3f}", f"{m[0]:.3f}", f"{m[1]:.3f}",
                             f"{ch}-s{s}-{found}"])
    return rows
