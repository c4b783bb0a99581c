"""A tile re-imaged in place (same path, new pixels) makes its plane stale (issue #15).

Plane fingerprints carry a cheap content identity of every tile file (size, mtime_ns and a
BLAKE2b digest of sampled blocks, :func:`stackbuild.render.fingerprint.file_identity`), so the
volume check lists the plane and ``render --resume`` renders exactly it. Volumes are read back
with zarr-python (the zarr v3 reference reader); tiles are written with tifffile.
"""
from __future__ import annotations

import os
import shutil

import numpy as np
import tifffile
import zarr

from render_builders import SMALL, foam, make_build


def test_tile_reimaged_in_place_makes_exactly_its_plane_stale_and_render_resume_renders_it(tmp_path):
    from stackbuild.render.audit import audit_volume
    from stackbuild.render.fingerprint import stale_planes
    from stackbuild.run import stages

    folder = make_build(tmp_path, n_sections=3, settings=SMALL)
    stages.render_stage(folder)
    level0 = folder.pyramid_path() / "0"
    before = zarr.open_array(str(level0), mode="r")[...]
    assert stale_planes(folder) == []
    tile = tmp_path / "raw" / "s1_r0_c1.tif"
    old = tifffile.imread(tile)
    tifffile.imwrite(tile, foam(*old.shape, seed=7))  # re-imaged: same path, size and place, new pixels
    assert stale_planes(folder) == [1]
    found = audit_volume(folder, pixels=False)
    assert [(f.pyramid, f.plane, f.kind) for f in found.findings] == [("em", 1, "stale")]
    assert stages.render_stage(folder, resume=True)["planes"] == [1]
    after = zarr.open_array(str(level0), mode="r")[...]
    np.testing.assert_array_equal(after[[0, 2]], before[[0, 2]])
    assert not np.array_equal(after[1], before[1])
    assert audit_volume(folder).ok


def test_file_identity_sees_new_content_with_size_and_time_kept_and_not_a_faithful_copy(tmp_path):
    from stackbuild.render.fingerprint import file_identity

    rng = np.random.default_rng(3)
    path = tmp_path / "big.tif"
    tifffile.imwrite(path, rng.integers(0, 65535, (512, 512), dtype=np.uint16))  # 512 kB: sampled, not read whole
    first = file_identity(path)
    st = path.stat()
    tifffile.imwrite(path, rng.integers(0, 65535, (512, 512), dtype=np.uint16))  # same size
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))  # and the old time put back (as cp -p would)
    assert path.stat().st_size == st.st_size and file_identity(path)[:2] == first[:2]
    assert file_identity(path) != first
    copy = tmp_path / "copy.tif"
    shutil.copy2(path, copy)  # bytes and times kept: the same identity
    assert file_identity(copy) == file_identity(path)
    assert file_identity(tmp_path / "gone.tif") is None


def test_file_identities_are_the_same_read_one_at_a_time_or_by_threads(tmp_path, monkeypatch):
    """Fast storage reads identities one at a time, slow storage 16 at a time: the same list either way."""
    from stackbuild.render import fingerprint as fpr

    rng = np.random.default_rng(5)
    paths = []
    for k in range(9):
        paths.append(tmp_path / f"t{k}.tif")
        tifffile.imwrite(paths[-1], rng.integers(0, 255, (64 + 8 * k, 96), dtype=np.uint8))
    paths.insert(4, tmp_path / "gone.tif")
    expected = [fpr.file_identity(p) for p in paths]
    monkeypatch.setattr(fpr, "SLOW_IDENTITY_S", 1e9)  # every file fast: one at a time
    assert fpr.file_identities(iter(paths)) == expected
    monkeypatch.setattr(fpr, "SLOW_IDENTITY_S", -1.0)  # every file slow: the rest by the thread pool
    assert fpr.file_identities(iter(paths)) == expected
    assert expected[4] is None and fpr.file_identities([]) == []
