"""A small hand-made build folder with planted errors, shared by the qc tests (a helper module, not a test module).

Ground truth (invented for these tests): every section shows the same scene,
scikit-image's bundled ``gravel`` image (512 x 512) plus independent noise,
cut into a 3 x 3 grid of 200 px tiles at a 156 px step, each tile with its
own noise (sigma 4 grey levels). Two errors are planted
in the stored records:

* section ``PLANT_TILE_SECTION``: tile ``PLANT_TILE`` is recorded 3 px to the
  right of where it was cut from (``PLANT_SHIFT``);
* section ``PLANT_ROT_SECTION``: its aligned -> section affine is a 1 degree
  rotation about the image centre instead of the identity.

The volume ``volume.zarr/em`` is rendered from those records by a test-side
renderer made of OpenCV calls (tiles pasted at their recorded positions, then
``cv2.warpAffine`` with ``WARP_INVERSE_MAP``), written as OME-Zarr 0.5 with two
levels, so the qc code measures what the records really produce.
"""
from __future__ import annotations

import json

import cv2
import numpy as np
import tifffile
import zarr
from skimage import data

from stackbuild.transforms import (Affine2D, Canvas, DisplacementField, PairMatch, SectionAlignment,
                                   SectionStitch, TilePlacement, TransformStore)

SIZE, TILE, STEP = 512, 200, 156
SECTIONS = [0, 1, 2, 3, 4]
PLANT_TILE, PLANT_TILE_SECTION, PLANT_SHIFT = "r1c1", 0, (3.0, 0.0)
PLANT_ROT_SECTION, PLANT_ANGLE = 2, np.deg2rad(1.0)
CENTRE = ((SIZE - 1) / 2, (SIZE - 1) / 2)
PX_NM, DZ_NM = 5.0, 45.0
#: A tile name with HTML metacharacters, to check the report escapes names from input files.
ODD_NAME = 'r2c2<i>&"x'


def scene(section: int) -> np.ndarray:
    """Return the true section image (uint8, no zeros so that 0 means 'no data')."""
    rng = np.random.default_rng(100 + section)
    img = data.gravel().astype(np.float32) * 0.9 + 12 + rng.normal(0, 3, (SIZE, SIZE))
    return np.clip(img, 1, 255).astype(np.uint8)


def true_positions() -> dict[str, tuple[float, float]]:
    """Return the true top-left ``(x, y)`` of each tile, section pixels."""
    return {f"r{r}c{c}": (c * STEP, r * STEP) for r in range(3) for c in range(3)}


def _stitch(section: int, tile_dir, odd_name: bool = False) -> SectionStitch:
    img = scene(section)
    places, pairs = [], []
    rename = (lambda n: ODD_NAME if n == "r2c2" else n) if odd_name else (lambda n: n)
    for name, (x, y) in true_positions().items():
        name = rename(name)
        path = tile_dir / f"s{section}_{name}.tif"
        # each exposure carries its own noise, so two tiles never agree exactly in their overlap
        noise = np.random.default_rng(1000 * section + len(places)).normal(0, 4, (TILE, TILE))
        tifffile.imwrite(path, np.clip(img[y:y + TILE, x:x + TILE] + noise, 1, 255).astype(np.uint8))
        rx, ry = float(x), float(y)
        if section == PLANT_TILE_SECTION and name == PLANT_TILE:
            rx, ry = rx + PLANT_SHIFT[0], ry + PLANT_SHIFT[1]
        places.append(TilePlacement(name, str(path), TILE, TILE, float(x), float(y), rx, ry,
                                    residual=0.1, flags=["dim"] if name == rename("r2c2") and section == 3 else []))
    for r in range(3):
        for c in range(3):
            for dr, dc in ((0, 1), (1, 0)):
                if r + dr < 3 and c + dc < 3:
                    a, b = rename(f"r{r}c{c}"), rename(f"r{r + dr}c{c + dc}")
                    rejected = (section == 1 and a == "r0c0" and b == "r0c1")
                    pairs.append(PairMatch(a, b, dc * STEP, dr * STEP, dc * STEP, dr * STEP,
                                           ncc=0.2 if rejected else 0.9, peak_ratio=1.1 if rejected else 4.0,
                                           accepted=not rejected, reason="low ncc" if rejected else "",
                                           residual=0.05))
    return SectionStitch(section, "uint8", places, pairs, stats={"rms": 0.05})


def _alignment(section: int) -> SectionAlignment:
    if section == PLANT_ROT_SECTION:
        aff = Affine2D.similarity(angle=PLANT_ANGLE, center=CENTRE)
    else:
        aff = Affine2D.identity()
    field = None
    if section == 3:  # a small stored field, to check the elastic numbers are copied faithfully
        v = np.zeros((5, 5, 2), np.float32)
        v[1, 3] = (0.3, -0.4)
        field = DisplacementField(v, (0.0, 0.0), 128.0)
    return SectionAlignment(section, aff, field, stats={"coarse": {"pairs": {str(section + 1): {"inliers": 40 + section}}}})


def render_plane(stitch: SectionStitch, align: SectionAlignment) -> np.ndarray:
    """Return the aligned plane the records describe (test-side renderer, OpenCV)."""
    mosaic = np.zeros((SIZE, SIZE), np.float32)
    for t in stitch.tiles:
        img = tifffile.imread(t.path).astype(np.float32)
        m = np.float32([[1, 0, t.x], [0, 1, t.y]])
        mask = cv2.warpAffine(np.ones_like(img), m, (SIZE, SIZE), flags=cv2.INTER_NEAREST)
        placed = cv2.warpAffine(img, m, (SIZE, SIZE), flags=cv2.INTER_LINEAR)
        mosaic = np.where(mask > 0, placed, mosaic)
    if align.displacement is None:
        plane = cv2.warpAffine(mosaic, align.affine.matrix.astype(np.float32), (SIZE, SIZE),
                               flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP, borderValue=0)
    else:  # aligned -> coarse (field) -> section (affine), sampled with cv2.remap
        xs = np.arange(SIZE, dtype=np.float64)
        gx, gy = np.meshgrid(xs, xs)
        d = align.displacement.displacement_grid(xs, xs)
        pts = np.column_stack([(gx + d[..., 0]).ravel(), (gy + d[..., 1]).ravel()])
        sec = align.affine.apply(pts).reshape(SIZE, SIZE, 2).astype(np.float32)
        plane = cv2.remap(mosaic, sec[..., 0], sec[..., 1], cv2.INTER_LINEAR, borderValue=0)
    return np.clip(np.rint(plane), 0, 255).astype(np.uint8)


def _write_volume(path, planes: np.ndarray) -> None:
    """Write a two-level OME-Zarr 0.5 image (metadata per the OME-Zarr 0.5 specification)."""
    grp = zarr.open_group(str(path), mode="w", zarr_format=3)
    levels = [planes, planes.reshape(len(planes), SIZE // 2, 2, SIZE // 2, 2).mean(axis=(2, 4))]
    datasets = []
    for i, lv in enumerate(levels):
        f = 2 ** i
        arr = grp.create_array(str(i), shape=lv.shape, dtype="uint8", chunks=(1, 128, 128),
                               dimension_names=("z", "y", "x"))
        arr[...] = np.rint(lv).astype(np.uint8)
        datasets.append({"path": str(i), "coordinateTransformations": [
            {"type": "scale", "scale": [DZ_NM, PX_NM * f, PX_NM * f]},
            {"type": "translation", "translation": [0.0, PX_NM * (f - 1) / 2, PX_NM * (f - 1) / 2]}]})
    grp.attrs["ome"] = {"version": "0.5", "multiscales": [{
        "name": "em", "axes": [{"name": "z", "type": "space", "unit": "nanometer"},
                               {"name": "y", "type": "space", "unit": "nanometer"},
                               {"name": "x", "type": "space", "unit": "nanometer"}],
        "datasets": datasets}]}


def _channel_record(section: int, folder) -> dict:
    """Return a channel-stage record of two invented markers (form of stackbuild.channels.stage)."""
    rng = np.random.default_rng(7)
    chans = {}
    for name, after, flags, tx in (("glowA", 1.42, [], 100.0), ("glowB", 1.04, ["low_mi"], 40.0)):
        path = folder / f"s{section}_{name}.tif"
        tifffile.imwrite(path, rng.integers(0, 255, (64, 48), dtype=np.uint8))
        aff = Affine2D(np.array([[4.0, 0.0, tx], [0.0, 4.0, 60.0]]))
        chans[name] = {"path": str(path), "row": 2, "pixel_size_nm": 20.0, "em_scale": 4, "registered": True,
                       "transform": {**aff.to_json(), "input": "channel", "output": "section"},
                       "measure": "normalized_mutual_information", "measure_before": 1.01,
                       "measure_after": after, "shift_from_given": [1.5, -0.5], "rotation_deg": 0.2,
                       "scale_ratio": 1.0, "flags": flags}
    return {"section": section, "em_pixel_size_nm": PX_NM, "channels": chans}


def make_build(root, *, volume: bool = True, odd_name: bool = False):
    """Create the planted build folder under ``root``; return its path."""
    root.mkdir(parents=True, exist_ok=True)
    tiles = root / "raw"
    tiles.mkdir(exist_ok=True)
    store = TransformStore(root / "transforms")
    planes = []
    for s in SECTIONS:
        st, al = _stitch(s, tiles, odd_name), _alignment(s)
        store.save_stitch(st)
        store.save_alignment(al)
        planes.append(render_plane(st, al))
    store.save_doc("channels", _channel_record(1, tiles), section=1)
    store.save_canvas(Canvas(SIZE, SIZE, 0.0, 0.0, SECTIONS[0], SECTIONS[-1], "uint8", PX_NM, DZ_NM))
    (root / "build.json").write_text(json.dumps({"format": "stackbuild.build", "version": 1,
                                                 "config": {"volume": {"pixel_size": PX_NM}}}))
    if volume:
        _write_volume(root / "volume.zarr" / "em", np.stack(planes))
    return root
