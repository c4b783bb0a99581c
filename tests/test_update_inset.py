"""A region re-imaged at half the pixel size lands as an inset in the volume's physical space.

Ground truth: the finer tiles are made from a raw tile of the build, enlarged 2x with OpenCV's
bicubic resize (so every fine pixel's place on that raw tile, and so in the section, is known);
the inset's pyramid is checked against the OME-Zarr 0.5 specification (ome-zarr-models).
"""
from __future__ import annotations

import shutil

import cv2
import numpy as np
import tifffile
import zarr

import stackbuild
from stackbuild.cli import main
from stackbuild.transforms import Affine2D, TransformStore

X0, Y0, SIDE = 48, 40, 150  # the raw-tile region imaged again (base pixels)


def _finer(grid_data, grid_build, out):
    store = TransformStore(grid_build / "transforms")
    t = store.load_stitch(3).tile("r1c1")
    raw = tifffile.imread(t.path)[Y0:Y0 + SIDE, X0:X0 + SIDE]
    big = cv2.resize(raw, None, fx=2, fy=2, interpolation=cv2.INTER_CUBIC)  # fine pixel f <-> raw (f+0.5)/2-0.5
    out.mkdir()
    # Fine pixel (0, 0) of the top tile is raw pixel (X0 - 0.25, Y0 - 0.25): stage position in fine pixels.
    sx, sy = 2 * (t.stage_x + X0 - 0.25), 2 * (t.stage_y + Y0 - 0.25)
    rows = ["section,tile,path,x,y,pixel_size"]
    for name, r0 in (("top", 0), ("bottom", 120)):
        tifffile.imwrite(out / f"{name}.tif", big[r0:r0 + 180])
        rows.append(f"3,{name},{out / (name + '.tif')},{sx},{sy + r0},2")
    (out / "tiles.csv").write_text("\n".join(rows) + "\n")
    return out / "tiles.csv", t


def test_half_pixel_inset_lands_within_half_a_base_pixel(grid_build, grid_data, tmp_path, capsys):
    from ome_zarr_models.v05.image import Image

    work = tmp_path / "b"
    shutil.copytree(grid_build, work)
    em_before = {p: p.stat().st_mtime_ns for p in (work / "volume.zarr" / "em").rglob("*") if p.is_file()}
    manifest, t = _finer(grid_data, grid_build, tmp_path / "fine")
    assert main(["update", str(work), "--tiles", str(manifest), "--quiet"]) == 0
    assert "inset section3_2nm" in capsys.readouterr().out
    istore = TransformStore(work / "transforms" / "insets" / "section3_2nm")
    rec = istore.load_doc("inset")
    fine = istore.load_stitch(3)
    to_section = Affine2D.from_json(rec["inset_to_section"])
    top = fine.tile("top")
    u = np.array([[a, b] for a in (10.0, 150.0, 290.0) for b in (10.0, 90.0, 170.0)])  # top tile pixels
    truth = np.column_stack([t.x + (u[:, 0] + 0.5) / 2 - 0.5 + X0, t.y + (u[:, 1] + 0.5) / 2 - 0.5 + Y0])
    got = to_section.apply(u + [top.x, top.y])
    assert np.abs(got - truth).max() <= 0.5  # issue bar: 0.5 base-grid px
    assert abs(rec["scale"] - 0.5) < 0.005  # estimated, not assumed
    # Registered by regions (one task each), their fit residuals recorded beside the inset's row of qc/insets.csv.
    assert rec["regions_used"] >= 3 and rec["residual_rms_px"] < 0.1, rec
    row = (work / "qc" / "insets.csv").read_text().splitlines()
    assert "residual_rms_px" in row[0] and "section3_2nm" in row[1]
    group = zarr.open_group(str(work / "volume.zarr" / "insets" / "section3_2nm"), mode="r")
    # Standard: OME-Zarr specification 0.5, validated by the ome-zarr-models package (v05.Image).
    image = Image.from_zarr(group)
    ds = image.attributes.ome.multiscales[0].datasets
    assert ds[0].coordinateTransformations[0].scale[1:] == [2.0, 2.0]
    # Same physical space as em: inset level 1 (4 nm) pixel (r, c) sits on an em level-0 pixel.
    inset1 = np.asarray(group["1"][0], np.float64)
    ty, tx = ds[1].coordinateTransformations[1].translation[1:]
    r0, c0 = ty / 4.0, tx / 4.0
    assert r0 == int(r0) and c0 == int(c0)
    em = stackbuild.open_volume(work, level=0, lazy=False)[3].compute().astype(np.float64)
    h, w = inset1.shape
    patch = em[int(r0):int(r0) + h, int(c0):int(c0) + w]
    covered = inset1 > 0
    a, b = inset1[covered] - inset1[covered].mean(), patch[covered] - patch[covered].mean()
    assert (a * b).sum() / np.sqrt((a * a).sum() * (b * b).sum()) > 0.9
    assert {p: p.stat().st_mtime_ns for p in (work / "volume.zarr" / "em").rglob("*") if p.is_file()} == em_before


def test_tiles_of_another_size_need_a_pixel_size(grid_build, grid_data, tmp_path, capsys):
    work = tmp_path / "b"
    shutil.copytree(grid_build, work)
    manifest, _ = _finer(grid_data, grid_build, tmp_path / "fine")
    lines = manifest.read_text().splitlines()
    manifest.write_text("\n".join(ln.rsplit(",", 1)[0] for ln in lines) + "\n")  # no pixel_size column
    assert main(["update", str(work), "--tiles", str(manifest), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "pixel_size" in err[0]
