"""Write a synthetic sample: tiles, marker images, both manifests and the ground truth."""
from __future__ import annotations

import csv
import io
import shutil
from pathlib import Path

import numpy as np
import tifffile

from ..errors import InputError
from .acquire import (expose, fold_record, intensity_scale, quantise, repeat_record, tile_gain_offset,
                      tile_signal, vignetting_profile)
from .channels import CHANNEL_LAYERS, CHANNEL_NAMES, channel_affine, channel_shape, render_channel
from .distort import section_affine, section_field, section_to_true, section_to_true_grid
from .layout import TAG_NOISE, rng, section_shape, tile_layout, true_shape
from .params import SynthParams, tile_index
from .phantom import phantom_layers, slant_model
from .tissue import motion_record
from .landmarks import COLUMNS as LANDMARK_COLUMNS, landmark_rows
from .truth import load_truth, write_truth


def _write_tiff(path: Path, image: np.ndarray, compress: bool) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    # no description, no date: the bytes depend on the pixels only
    tifffile.imwrite(path, image, compression="zlib" if compress else None, predictor=compress,
                     metadata=None, photometric="minisblack")


def _tiles(params, out, section, affine, field, em, extras):
    """Render, write and describe the tiles of one section; return (tile rows, tile truth, noise sigma)."""
    t = params.tile_size
    vignette = vignetting_profile((t, t), params.vignetting)
    layout = tile_layout(params, section)
    clean, info = {}, {}
    for name, lay in layout.items():
        xs, ys = lay["true"][0] + np.arange(t, dtype=np.float64), lay["true"][1] + np.arange(t, dtype=np.float64)
        px, py = section_to_true_grid(affine, field, xs, ys)
        blank = (section, name) in extras["blank"]
        rep = extras["repeat"] if extras["repeat"] and name in extras["repeat"]["tiles"] else None
        signal = tile_signal(em, px, py, xs, ys, blank, extras["fold"], rep)
        gain, offset = tile_gain_offset(params, section, lay["row"], lay["col"])
        clean[name] = expose(signal, vignette, gain, offset)
        info[name] = {"x": lay["true"][0], "y": lay["true"][1], "stage_x": round(lay["stage"][0], 3),
                      "stage_y": round(lay["stage"][1], 3), "gain": gain, "offset": offset, "blank": blank}
    tissue = [clean[n] for n in clean if not info[n]["blank"]] or list(clean.values())
    sigma = float(max(np.std(np.stack(tissue)), 1.0) / params.snr)
    rows = []
    for name, image in clean.items():
        r, c = tile_index(name)
        noisy = image + sigma * rng(params, TAG_NOISE, section, r, c).standard_normal(image.shape, dtype=np.float32)
        rel = Path("tiles") / str(section) / f"{name}.tif"
        _write_tiff(out / rel, quantise(noisy, params.dtype, params.bit_depth), params.compress)
        rows.append([section, name, rel.as_posix(), f"{info[name]['stage_x']:.3f}", f"{info[name]['stage_y']:.3f}"])
    return rows, info, sigma


def _channels(params, out, section, affine, field, layers):
    """Render and write the marker images of one section; return (manifest rows, channel truth)."""
    h, w = channel_shape(params)
    gx, gy = np.meshgrid(np.arange(w, dtype=np.float64), np.arange(h, dtype=np.float64))
    rows, info = [], {}
    for index, name in enumerate(CHANNEL_NAMES[:params.channels]):
        to_section = channel_affine(params, section, index)
        q = to_section.apply(np.column_stack([gx.ravel(), gy.ravel()]))
        p = section_to_true(affine, field, q)
        image, sigma = render_channel(params, section, index, layers[CHANNEL_LAYERS[name]],
                                      p[:, 0].reshape(h, w), p[:, 1].reshape(h, w))
        rel = Path("channels") / str(section) / f"{name}.tif"
        _write_tiff(out / rel, image, params.compress)
        size = params.pixel_size * params.channel_binning
        rows.append([section, name, rel.as_posix(), f"{size:g}", "0.000", "0.000"])
        info[name] = {"path": rel.as_posix(), "pixel_size": size, "affine": to_section.matrix.tolist(),
                      "noise_std": sigma}
    return rows, info


def _section(params, out, z):
    """Render and write one section; return its manifest rows, truth record, warp and defects."""
    affine, field = section_affine(params, z), section_field(params, z)
    with_markers = params.channels > 0 and z % params.channel_every == 0
    layers = phantom_layers(params, z, markers=with_markers)
    rep = params.repetitive()
    extras = {"blank": set(params.blank()), "fold": fold_record(params, z) if z in params.damaged() else None,
              "repeat": None}
    if rep is not None and rep[0] == z:
        extras["repeat"] = repeat_record(tile_layout(params, z), rep[1], rep[2], params.tile_size)
    rows, tiles, sigma = _tiles(params, out, z, affine, field, layers["em"], extras)
    crow, chans = _channels(params, out, z, affine, field, layers) if with_markers else ([], {})
    record = {"affine": affine.matrix.tolist(), "noise_std": sigma, "tiles": tiles, "channels": chans,
              "field": {"file": f"fields/{z}.npy", "origin": list(field.origin), "spacing": field.spacing}}
    return rows, crow, record, field, extras


def _write_csv(path: Path, header: list[str], rows: list[list]) -> None:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    path.write_text(buf.getvalue(), encoding="utf-8")


_OUTPUTS = ("tiles.csv", "channels.csv", "landmarks.csv", "tiles", "channels", "truth")


def _clear_previous(out: Path) -> None:
    """Remove an earlier sample's files from ``out`` (other files stay); refuse a foreign folder."""
    if not out.exists() or not any(out.iterdir()):
        return
    if not (out / "truth" / "truth.json").is_file():
        raise InputError("exists, is not empty and holds no synthetic sample; choose an empty or new folder",
                         file=out)
    for name in _OUTPUTS:
        target = out / name
        if target.is_dir():
            shutil.rmtree(target)
        elif target.exists():
            target.unlink()


def generate(outdir, params: SynthParams = SynthParams()) -> Path:
    """Return the tile manifest path of a freshly written synthetic sample.

    Parameters
    ----------
    outdir : str or Path
        Folder to write into: new, empty, or holding an earlier sample (whose
        generated files are replaced; others, e.g. a README, are kept):
        ``tiles.csv``, ``tiles/``,
        ``channels.csv``, ``channels/``, ``landmarks.csv`` (when ``params.channels > 0``) and
        ``truth/`` (see :mod:`stackbuild.synth.truth`).
    params : SynthParams
        The sample description; the same parameters give byte-identical files.

    Returns
    -------
    Path
        ``outdir/tiles.csv``.

    Raises
    ------
    InputError
        If a parameter is out of range or names a section or tile that does not exist.
    """
    params.check()
    out = Path(outdir)
    _clear_previous(out)
    out.mkdir(parents=True, exist_ok=True)
    lost = set(params.lost())
    tile_rows, chan_rows, sections, fields, folds = [], [], {}, {}, {}
    repeat_truth = None
    for z in range(params.sections):
        if z in lost:
            continue
        rows, crow, sections[str(z)], fields[z], extras = _section(params, out, z)
        tile_rows += rows
        chan_rows += crow
        if extras["fold"] is not None:
            folds[str(z)] = extras["fold"]
        if extras["repeat"] is not None:
            repeat_truth = {"section": z, **extras["repeat"]}
    manifest = out / "tiles.csv"
    _write_csv(manifest, ["section", "tile", "path", "x", "y"], tile_rows)
    if chan_rows:
        _write_csv(out / "channels.csv", ["section", "channel", "path", "pixel_size", "x", "y"], chan_rows)
    defects = {"blank_tiles": [list(b) for b in params.blank()], "lost_sections": sorted(lost),
               "damaged_sections": folds, "repetitive_pair": repeat_truth}
    record = {"params": params.to_json(), "pixel_size": params.pixel_size,
              "section_thickness": params.section_thickness, "true_shape": list(true_shape(params)),
              "section_shape": list(section_shape(params)), "tile_shape": [params.tile_size] * 2,
              "vignetting": params.vignetting, "intensity_scale": intensity_scale(params.dtype, params.bit_depth),
              "slant": motion_record(params) if params.content == "realistic" else slant_model(params),
              "lost_sections": sorted(lost), "defects": defects,
              "sections": sections}
    write_truth(out, record, fields)
    if chan_rows and params.landmarks > 0:
        _write_csv(out / "landmarks.csv", LANDMARK_COLUMNS,
                   landmark_rows(load_truth(out), params.landmarks, params.seed))
    return manifest
