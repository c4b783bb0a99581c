"""Hand-made build folders for render tests: invented "foam" tiles, a tile manifest, exact stitch records.

``make_build`` writes a tiny build folder by hand: synthetic tiles of an
invented specimen (a smooth random "foam" texture), a tile manifest, stitch
records with exact placements, optional alignments, and ``build.json``.
Imported by the render, codec, contrast and fault tests (a helper module, not a test module).
"""
from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np
import tifffile

from stackbuild.config import PipelineConfig
from stackbuild.folder import BuildFolder
from stackbuild.render.settings import RenderSettings
from stackbuild.transforms import Affine2D, SectionAlignment, SectionStitch, TilePlacement

#: Small chunks, so the tiny volumes still have several levels.
SMALL = RenderSettings(chunk=32, shard=2)


def foam(height: int, width: int, seed: int, dtype=np.uint8) -> np.ndarray:
    """Return a smooth random texture (invented specimen) spanning most of the dtype's range."""
    rng = np.random.default_rng(seed)
    img = cv2.GaussianBlur(rng.random((height, width), dtype=np.float32), (0, 0), 3.0)
    img = (img - img.min()) / (img.max() - img.min() + 1e-9)
    top = np.iinfo(dtype).max
    return np.round(20 + img * (top * 0.8)).astype(dtype)


def make_build(root: Path, n_sections: int = 3, grid=(2, 2), tile=(64, 64), overlap: int = 8,
               lost=(), affines: dict | None = None, fields: dict | None = None, dtype=np.uint8,
               tiff_kwargs: dict | None = None, settings: RenderSettings | None = None,
               content=None) -> BuildFolder:
    """Write a build folder with ``n_sections`` sections of ``grid`` tiles; return it.

    ``content(section, height, width)`` gives each section's mosaic (default: :func:`foam`).
    """
    root = Path(root)
    tiles_dir = root / "raw"
    tiles_dir.mkdir(parents=True, exist_ok=True)
    folder = BuildFolder(root / "build")
    th, tw = tile
    step_y, step_x = th - overlap, tw - overlap
    H, W = step_y * (grid[0] - 1) + th, step_x * (grid[1] - 1) + tw
    rows = ["section,tile,path,x,y"]
    for s in range(n_sections):
        if s in lost:
            continue
        mosaic = content(s, H, W) if content else foam(H, W, seed=100 + s, dtype=dtype)
        placements = []
        for i in range(grid[0]):
            for j in range(grid[1]):
                y, x = i * step_y, j * step_x
                name = f"s{s}_r{i}_c{j}"
                path = tiles_dir / f"{name}.tif"
                tifffile.imwrite(path, mosaic[y:y + th, x:x + tw], **(tiff_kwargs or {}))
                rows.append(f"{s},{name},{path},{x},{y}")
                placements.append(TilePlacement(name, str(path), tw, th, x, y, x, y))
        folder.store.save_stitch(SectionStitch(s, np.dtype(dtype).name, placements))
        if affines and s in affines or fields and s in fields:
            folder.store.save_alignment(SectionAlignment(
                s, (affines or {}).get(s, Affine2D.identity()), (fields or {}).get(s)))
    (root / "tiles.csv").write_text("\n".join(rows) + "\n")
    cfg = PipelineConfig()
    if settings is not None:
        cfg.render = settings
    folder.save_state({"tiles": str(root / "tiles.csv"), "config": cfg.to_json()})
    return folder
