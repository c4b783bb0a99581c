"""Peak memory of rendering does not grow with the size of a section (fresh subprocesses, ru_maxrss)."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import cv2
import numpy as np
import tifffile

from stackbuild.config import PipelineConfig
from stackbuild.folder import BuildFolder
from stackbuild.tiles import cache_bytes_for
from stackbuild.transforms import SectionStitch, TilePlacement

TILE, OVERLAP = 1024, 64
CACHE_MB = cache_bytes_for(TILE, TILE) / 2 ** 20  # the tile cache's bound, sized from these tiles

_CHILD = """
import json, resource, sys, time
import dask
dask.config.set(scheduler="threads", num_workers=2)
from stackbuild.render.settings import RenderSettings
from stackbuild.render.write import render_volume
t0 = time.perf_counter()
facts = render_volume(sys.argv[1], RenderSettings(chunk=512, shard=2, codec="none"))
peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB
print(json.dumps({"peak_mb": peak_mb, "seconds": time.perf_counter() - t0, "levels": facts["levels"]}))
"""


def _section(root: Path, n: int) -> Path:
    """Write one section of ``n x n`` tiles of 1024 x 1024 (uncompressed TIFF) and its build folder."""
    rng = np.random.default_rng(5)
    base = cv2.GaussianBlur(rng.integers(0, 255, (TILE, TILE), dtype=np.uint8), (0, 0), 2.0)
    raw = root / "raw"
    raw.mkdir(parents=True)
    rows, placements = ["section,tile,path,x,y"], []
    for i in range(n):
        for j in range(n):
            path = raw / f"t{i:02d}{j:02d}.tif"
            tifffile.imwrite(path, np.roll(base, 37 * (i * n + j), axis=1))
            x, y = j * (TILE - OVERLAP), i * (TILE - OVERLAP)
            rows.append(f"0,t{i:02d}{j:02d},{path},{x},{y}")
            placements.append(TilePlacement(path.stem, str(path), TILE, TILE, x, y, x, y))
    folder = BuildFolder(root / "build")
    folder.store.save_stitch(SectionStitch(0, "uint8", placements))
    (root / "tiles.csv").write_text("\n".join(rows) + "\n")
    folder.save_state({"tiles": str(root / "tiles.csv"), "config": PipelineConfig().to_json()})
    return folder.root


def _peak(build: Path) -> dict:
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    out = subprocess.run([sys.executable, "-c", _CHILD, str(build)], env=env, capture_output=True,
                         text=True, timeout=120, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_peak_memory_does_not_grow_with_section_size(tmp_path):
    t0 = time.perf_counter()
    small = _peak(_section(tmp_path / "small", 4))
    large = _peak(_section(tmp_path / "large", 12))
    print(f"peak memory: 4x4 tiles {small['peak_mb']:.0f} MB ({small['seconds']:.1f} s), "
          f"12x12 tiles {large['peak_mb']:.0f} MB ({large['seconds']:.1f} s); "
          f"total {time.perf_counter() - t0:.1f} s")
    assert large["levels"][0][1] > 11000  # the large section really is ~9x the small one in area
    # Bound: the small section's peak plus the tile cache bound and 32 MB (rule of thumb, no source);
    # holding the 11.5k x 11.5k section at once would need > 130 MB as uint8 and > 500 MB as float32.
    assert large["peak_mb"] <= small["peak_mb"] + CACHE_MB + 32
