"""Render stage on small hand-made build folders (render_builders.py): OME-Zarr 0.5 output, pyramid, lazy = written, bad input."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import zarr

from stackbuild.errors import BuildFolderError, InputError
from stackbuild.render.settings import RenderSettings
from stackbuild.transforms import Affine2D, SectionAlignment

from render_builders import SMALL, foam, make_build


# ----------------------------------------------------------------------------- helpers


def _render(folder, settings=SMALL, **kw):
    from stackbuild.render.write import render_volume
    return render_volume(folder.root, settings, **kw)


def _level(folder, n):
    return zarr.open_array(str(folder.volume_path / "em" / str(n)), mode="r")[...]


@pytest.fixture
def built(tmp_path):
    """Four sections (section 2 lost), one rotated by an affine; rendered with 32-px chunks."""
    folder = make_build(tmp_path, n_sections=4, lost=(2,), settings=SMALL,
                        affines={1: Affine2D.similarity(1.0, 0.05, 3.0, -2.0, center=(60, 60))})
    facts = _render(folder)
    return folder, facts


# ----------------------------------------------------------------------------- the standard
def test_volume_validates_against_ome_zarr_0_5(built):
    from ome_zarr_models.v05.image import Image
    folder, facts = built
    # Standard: OME-Zarr specification 0.5, validated by the ome-zarr-models package (v05.Image).
    image = Image.from_zarr(zarr.open_group(str(folder.volume_path / "em"), mode="r"))
    ms = image.attributes.ome.multiscales[0]
    assert [a.name for a in ms.axes] == ["z", "y", "x"]
    assert all(a.unit == "nanometer" and a.type == "space" for a in ms.axes)
    assert len(ms.datasets) == len(facts["levels"]) >= 3
    for n, ds in enumerate(ms.datasets):
        scale, trans = ds.coordinateTransformations
        # OME-NGFF: scale then translation; the translation puts a reduced pixel at the centre
        # of the level-0 pixels it summarises (pixel-centre convention, proposal 0.6, from memory).
        assert list(scale.scale) == [40.0, 4.0 * 2 ** n, 4.0 * 2 ** n]
        assert list(trans.translation) == [0.0, (2 ** n - 1) / 2 * 4.0, (2 ** n - 1) / 2 * 4.0]
    # Plain zarr v3 opens the root and every level; the smallest level fits one chunk.
    root = zarr.open_group(str(folder.volume_path), mode="r")
    assert root.attrs["ome"]["version"] == "0.5"
    last = root["em"][str(len(ms.datasets) - 1)]
    assert max(last.shape[1:]) <= SMALL.chunk
    assert root["em"]["0"].metadata.zarr_format == 3
    assert root["em"]["0"].shards == (1, 64, 64)


def test_each_level_is_the_2x2_mean_of_the_level_above(built):
    from skimage.transform import downscale_local_mean
    folder, facts = built
    # The canvas pads every level but the top to even sides (render/canvas.py), so growing it later
    # never changes how a pixel was reduced; the odd-edge rule is pinned in test_render_sampler.py.
    assert not any(h % 2 or w % 2 for _, h, w in facts["levels"][:-1])
    for n in range(1, len(facts["levels"])):
        above, here = _level(folder, n - 1), _level(folder, n)
        h, w = above.shape[1:]
        padded = np.pad(above, [(0, 0), (0, h % 2), (0, w % 2)], mode="edge").astype(np.float64)
        # Reference: skimage.transform.downscale_local_mean; our rule for odd edges (repeat the
        # last row/column) and rounding half up, floor(mean + 0.5), as documented in render/reduce.py.
        expect = np.floor(downscale_local_mean(padded, (1, 2, 2)) + 0.5).astype(above.dtype)
        np.testing.assert_array_equal(here, expect)


def test_lazy_volume_equals_written_bytes_at_every_level(built):
    from stackbuild.render.lazy import lazy_volume, open_volume
    folder, facts = built
    for n in (0, 1, len(facts["levels"]) - 1):
        lazy = lazy_volume(folder.root, level=n).compute()
        written = open_volume(folder.root, level=n, lazy=False)
        assert lazy.dtype == written.dtype
        assert lazy.tobytes() == written.compute().tobytes()


def test_lost_section_is_a_zero_plane_and_others_are_not(built):
    folder, _ = built
    vol = _level(folder, 0)
    assert vol.shape[0] == 4
    assert not vol[2].any()
    assert all(vol[z].mean() > 20 for z in (0, 1, 3))


def test_open_volume_reports_ngff_scale_and_translation(built):
    from stackbuild import open_volume
    folder, _ = built
    lazy, written = open_volume(folder.root, level=1), open_volume(folder.root, level=1, lazy=False)
    assert lazy.scale_nm == written.scale_nm == (40.0, 8.0, 8.0)
    assert lazy.translation_nm == written.translation_nm == (0.0, 2.0, 2.0)
    assert lazy.shape == written.shape and lazy.axes == ("z", "y", "x")
    assert np.array_equal(lazy[1, 5:9].compute(), written[1, 5:9].compute())


# ----------------------------------------------------------------------------- bad input
def test_existing_volume_is_refused_unless_overwrite(built):
    folder, _ = built
    with pytest.raises(BuildFolderError, match="already exists"):
        _render(folder)
    facts = _render(folder, overwrite=True)
    assert facts["planes"] == [0, 1, 2, 3]


def _stitch_json(folder, section):
    return folder.store.section_dir(section) / "stitch.json"


@pytest.mark.parametrize("damage", ["missing", "truncated", "newer"])
def test_bad_transform_file_is_a_clear_error_and_nothing_is_written(tmp_path, damage):
    folder = make_build(tmp_path, n_sections=3, settings=SMALL)
    path = _stitch_json(folder, 1)
    text = path.read_text()
    if damage == "missing":
        path.unlink()
    elif damage == "truncated":
        path.write_text(text[: len(text) // 2])
    else:
        env = json.loads(text)
        env["version"] = 99
        path.write_text(json.dumps(env))
    words = {"missing": "no stitch record", "truncated": "truncated", "newer": "newer"}[damage]
    with pytest.raises(InputError, match=words) as err:
        _render(folder)
    assert "00001" in str(err.value) or "section 1" in str(err.value)
    assert not folder.volume_path.exists()
    assert folder.store.load_canvas() is None


# ----------------------------------------------------------------------------- determinism, resume
def _files(root: Path) -> dict:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_rendering_twice_gives_identical_chunk_files(built):
    folder, _ = built
    first = _files(folder.volume_path / "em" / "0")
    first.update({"1/" + k: v for k, v in _files(folder.volume_path / "em" / "1").items()})
    _render(folder, overwrite=True)
    second = _files(folder.volume_path / "em" / "0")
    second.update({"1/" + k: v for k, v in _files(folder.volume_path / "em" / "1").items()})
    assert first.keys() == second.keys() and len(first) > 4
    assert all(first[k] == second[k] for k in first)


def test_planes_rerender_only_those_planes(built):
    from stackbuild.render.lazy import lazy_volume
    folder, _ = built
    before = _level(folder, 0)
    folder.store.save_alignment(SectionAlignment(3, Affine2D.translation(5.0, 0.0)))
    facts = _render(folder, planes=[3])
    after = _level(folder, 0)
    assert facts["planes"] == [3]
    np.testing.assert_array_equal(after[:3], before[:3])
    assert not np.array_equal(after[3], before[3])
    np.testing.assert_array_equal(after[3], lazy_volume(folder.root, planes=[3]).compute()[0])


def test_killed_render_resumes_with_the_planes_not_done(tmp_path):
    folder = make_build(tmp_path, n_sections=6, settings=SMALL)
    seen = []

    def stop_after_first_batch(done, total):
        seen.append((done, total))
        if 0 < done < total:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        _render(folder, progress=stop_after_first_batch)
    first = seen[-1][0]
    # Planes are checkpointed as each one finishes, in whatever order the scheduler ran them.
    ckpt = json.loads((folder.volume_path / "em" / ".stackbuild_done.json").read_text())
    assert len(ckpt["done"]) == first
    facts = _render(folder)
    assert facts["planes"] == sorted(set(range(6)) - set(ckpt["done"]))
    from stackbuild.render.lazy import lazy_volume
    assert _level(folder, 0).tobytes() == lazy_volume(folder.root).compute().tobytes()
    with pytest.raises(BuildFolderError):
        _render(folder)


def test_contrast_brings_sections_to_the_median_range(tmp_path):
    dim = {1: (0.5, 10.0)}

    def content(s, h, w):
        img = foam(h, w, seed=7 + s).astype(np.float32)
        g, o = dim.get(s, (1.0, 0.0))
        return np.round(g * img + o).astype(np.uint8)

    settings = RenderSettings(chunk=32, shard=2, contrast=True, contrast_percentiles=(2.0, 98.0))
    folder = make_build(tmp_path, n_sections=3, settings=settings, content=content)
    _render(folder, settings)
    vol = _level(folder, 0).astype(np.float64)
    # Reference: numpy.percentile of each rendered plane (covered pixels). The ranges are measured
    # on a reduced render, so sections are compared with each other, not with the stored target;
    # a few grey levels of tolerance is common practice, no source.
    ranges = [np.percentile(vol[z][vol[z] > 0], (2.0, 98.0)) for z in range(3)]
    raw = [np.percentile(content(z, 120, 120), (2.0, 98.0)) for z in range(3)]
    assert abs(raw[1][1] - raw[0][1]) > 40  # the dimmed section really differs before
    for z in (1, 2):
        assert np.all(np.abs(ranges[z] - ranges[0]) < 6), (ranges, raw)


def test_contrast_range_by_strips_matches_numpy_percentile_of_the_whole_render(tmp_path):
    from stackbuild.render.contrast import measure_range
    from stackbuild.sampler import render_region
    from stackbuild.tiles import SectionTiles
    folder = make_build(tmp_path, n_sections=1, grid=(3, 3), tile=(48, 48), overlap=12)
    stitch = folder.store.load_stitch(0)
    whole, weight = render_region(stitch, None, 0, 0, 60, 60, scale=2, return_weight=True,
                                  tiles=SectionTiles(stitch))
    # Reference: numpy.percentile over every covered pixel of the whole coarse render.
    expect = np.percentile(whole[weight > 0], (1.0, 99.0))
    got = measure_range(stitch, (1.0, 99.0), scale=2, strip=7)
    np.testing.assert_allclose(got, expect, rtol=1e-6)


def test_rendering_and_updating_do_not_import_dask_array():
    """The writer, the patcher and the update need dask's graphs, not ``dask.array`` (0.4-1 s to import in
    every worker process and in every in-process update); the lazy volume imports it where it makes one."""
    import subprocess
    import sys

    code = ("import sys, stackbuild.render.pyramid, stackbuild.render.patch, stackbuild.run.update, "
            "stackbuild.run.cluster; print('dask.array' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split()[-1] == "False"
