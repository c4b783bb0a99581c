"""Tiny ground-truth sections for the stitching tests.

A scene (an invented specimen: band-limited noise 'cytoplasm' with dark round
'granules', or any image given) is cut into a grid of tiles at known sub-pixel
positions, each tile with vignetting, its own gain and offset, and noise;
the TIFFs go to a temporary folder with a tile manifest, and the checked
``TileEntry`` list comes back with the true positions.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage as ndi
import tifffile

from stackbuild.manifest import TileEntry, read_tile_manifest


def granule_scene(height: int, width: int, seed: int = 0) -> np.ndarray:
    """Return an invented specimen in [0, 1]: multi-scale smooth noise with dark granules."""
    rng = np.random.default_rng(seed)
    img = np.zeros((height, width), np.float64)
    for sigma, amp in ((1.5, 0.5), (4.0, 1.0), (12.0, 1.0)):
        layer = ndi.gaussian_filter(rng.standard_normal((height, width)), sigma)
        img += amp * layer / layer.std()
    dots = np.zeros((height, width))
    n = height * width // 2500
    dots[rng.integers(0, height, n), rng.integers(0, width, n)] = 1.0
    img -= 2.0 * 2 * np.pi * 25 * ndi.gaussian_filter(dots, 5.0)
    img = (img - img.min()) / (img.max() - img.min())
    return 0.15 + 0.7 * img


def vignetting(height: int, width: int, depth: float) -> np.ndarray:
    """Return a radial fall-off ``1 - depth * (r / r_corner)^2``."""
    yy, xx = np.mgrid[:height, :width]
    r2 = ((yy - (height - 1) / 2) ** 2 + (xx - (width - 1) / 2) ** 2)
    return 1.0 - depth * r2 / r2.max()


@dataclass
class Section:
    """A synthetic section: the manifest entries and the truth."""

    tiles: list[TileEntry]
    truth: np.ndarray   # (N, 2) true (x, y) of each tile's pixel (0, 0)
    gains: np.ndarray
    offsets: np.ndarray
    names: list[str]


def make_section(folder, rows=5, cols=5, tile=256, overlap=52, jitter=20.0, vignette=0.2,
                 snr=5.0, gain_spread=0.15, offset_spread=0.05, seed=1, blank=None,
                 scene=None, periodic_seam=None, integer=False) -> Section:
    """Write a ``rows x cols`` grid of uint16 tiles and their manifest into ``folder``.

    Stage positions are the nominal grid; true positions add a uniform jitter
    of up to ``jitter`` px per axis (``integer`` rounds it). ``blank`` is the
    index of a tile that shows no specimen. ``periodic_seam = (i, j)`` paints
    a 2-D periodic pattern over the nominal overlap of grid neighbours ``i`` and
    ``j`` (same row), making their correlation ambiguous.
    """
    rng = np.random.default_rng(seed)
    step = tile - overlap
    margin = int(np.ceil(jitter)) + 8
    grid = np.array([(c * step, r * step) for r in range(rows) for c in range(cols)], np.float64)
    jit = rng.uniform(-jitter, jitter, grid.shape)
    truth = grid + (np.round(jit) if integer else jit)
    h_all, w_all = (rows - 1) * step + tile + 2 * margin, (cols - 1) * step + tile + 2 * margin
    if scene is None:
        scene = granule_scene(h_all, w_all, seed)
    scene = np.array(scene, dtype=np.float64)
    if periodic_seam is not None:
        i, j = periodic_seam
        x0 = int(grid[j, 0])  # scene coordinates: grid + margin, grown by margin
        x1 = int(grid[i, 0]) + tile + 2 * margin
        y0 = int(grid[i, 1])
        y1 = int(grid[i, 1]) + tile + 2 * margin
        yy, xx = np.mgrid[y0:y1, x0:x1]
        scene[y0:y1, x0:x1] = 0.5 + 0.3 * np.cos(2 * np.pi * xx / 9) * np.cos(2 * np.pi * yy / 11)
    vig = vignetting(tile, tile, vignette)
    gains = rng.uniform(1 - gain_spread, 1 + gain_spread, len(grid))
    offsets = rng.uniform(-offset_spread, offset_spread, len(grid))
    folder.mkdir(parents=True, exist_ok=True)
    lines, names = ["section,tile,path,x,y"], []
    for k, (tx, ty) in enumerate(truth + margin):
        ix, iy = int(np.floor(tx)), int(np.floor(ty))
        crop = scene[iy - 4:iy + tile + 4, ix - 4:ix + tile + 4]
        # Tile pixel (u, v) shows scene point (tx + u, ty + v): cubic-spline shift of the crop.
        sub = ndi.shift(crop, (-(ty - iy), -(tx - ix)), order=3, mode="nearest")[4:-4, 4:-4]
        if blank == k:
            sub = np.full_like(sub, 0.5)
        signal = sub * vig * gains[k] + offsets[k]
        noise_std = (sub * vig * gains[k]).std() / snr if blank != k else 0.03
        img = signal + rng.normal(0, noise_std, signal.shape)
        name = f"r{k // cols}c{k % cols}"
        names.append(name)
        tifffile.imwrite(folder / f"{name}.tif", np.clip(img * 40000, 0, 65535).astype(np.uint16))
        lines.append(f"0,{name},{name}.tif,{grid[k, 0]:.3f},{grid[k, 1]:.3f}")
    (folder / "tiles.csv").write_text("\n".join(lines) + "\n")
    entries = read_tile_manifest(folder / "tiles.csv").section_tiles(0)
    return Section(entries, truth, gains, offsets, names)


def placement_errors(result, truth: np.ndarray, skip=()) -> np.ndarray:
    """Return per-tile distances (px) between solved and true positions after removing their mean offset."""
    pos = np.array([(t.x, t.y) for t in result.tiles])
    keep = np.array([i not in skip for i in range(len(pos))])
    d = pos[keep] - truth[keep]
    d -= d.mean(axis=0)
    return np.hypot(d[:, 0], d[:, 1])
