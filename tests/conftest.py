"""Shared fixtures: small synthetic data sets made by stackbuild.synth (generated, never committed)."""
from __future__ import annotations

import os
from pathlib import Path

import pytest
from threadpoolctl import threadpool_limits

import stackbuild.manifest as manifest_mod

# One BLAS thread per process: the tests' small matrix products run several times slower when
# OpenBLAS spreads them over threads on a 2-core machine (measured on the stitch tests: 122 s
# against 70 s). numpy is already imported by pytest plugins here, so the environment variables
# only reach the subprocesses (CLI builds, workers); threadpoolctl limits this process at run time.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")
_BLAS_LIMIT = threadpool_limits(limits=1)

from stackbuild.synth import SynthParams, generate

SAMPLE = Path(__file__).resolve().parents[1] / "sample_tiles"

#: A tiny stack for end-to-end runs: 5 sections (section 2 lost) of 2 x 2 tiles, one marker channel.
TINY = SynthParams(seed=11, sections=5, grid=(2, 2), tile_size=256, offset=12.0, warp=3.0,
                   channels=1, channel_every=2, lost_sections="2", compress=False)


@pytest.fixture(scope="session", autouse=True)
def shared_workers():
    """Run every in-process command that names no ``--workers``/``--scheduler`` on one session cluster.

    Starting and stopping a local cluster of real worker processes costs about 3 s, more than most
    of these commands' work; commands reach this one through Dask's ``scheduler-address`` setting
    (what ``DASK_SCHEDULER_ADDRESS`` sets), as a user's shell would. Tests that pass ``--workers``
    (killing workers, counting them) and every CLI subprocess still start their own cluster.
    """
    import dask
    from distributed import LocalCluster

    from stackbuild.run.cluster import SINGLE_THREAD_ENV

    with dask.config.set({"distributed.nanny.pre-spawn-environ": SINGLE_THREAD_ENV}):
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                               silence_logs=50)
    try:
        with dask.config.set({"scheduler-address": cluster.scheduler_address}):
            yield cluster.scheduler_address
    finally:
        cluster.close()


@pytest.fixture(scope="session")
def tiny_data(tmp_path_factory) -> Path:
    """Return the folder of the tiny synthetic stack (tiles.csv, channels.csv, truth/)."""
    out = tmp_path_factory.mktemp("tiny")
    generate(out, TINY)
    return out


#: A stack for update and locate tests: 7 sections (section 2 lost) of 3 x 3 tiles and one marker; the
#: build holds sections 0-4 (``first.csv``, no markers), ``later.csv`` has sections 5 and 6 to append,
#: ``markers.csv`` the marker images of sections 0-4 (to add to the build).
GRID = SynthParams(seed=5, sections=7, grid=(3, 3), tile_size=256, offset=12.0, warp=3.0, channels=1,
                   lost_sections="2", compress=False)


@pytest.fixture(scope="session")
def grid_data(tmp_path_factory) -> Path:
    """Return the folder of the GRID stack with ``first.csv``, ``later.csv``, ``markers.csv``, ``small.toml``.

    ``small.toml``: 64 px chunks in shards of 2 x 2 (128 px), so an update rewrites a few of a plane's
    shards; shards of one chunk made the build's render mostly per-file overhead (8 s of a 13 s build).
    """
    out = tmp_path_factory.mktemp("grid")
    generate(out, GRID)
    lines = (out / "tiles.csv").read_text().splitlines()
    marks = (out / "channels.csv").read_text().splitlines()
    for src, name, keep in ((lines, "first.csv", lambda s: s <= 4), (lines, "later.csv", lambda s: s >= 5),
                            (marks, "markers.csv", lambda s: s <= 4)):
        rows = [src[0]] + [ln for ln in src[1:] if keep(int(ln.split(",")[0]))]
        (out / name).write_text("\n".join(rows) + "\n")
    (out / "small.toml").write_text("[render]\nchunk = 64\nshard = 2\n")
    return out


@pytest.fixture(scope="session")
def grid_build(grid_data, tmp_path_factory) -> Path:
    """Return a finished build of ``grid_data/first.csv`` (treat as read-only: copy it to change it)."""
    from stackbuild.cli import main

    out = tmp_path_factory.mktemp("grid_build") / "b"
    assert main(["build", str(grid_data / "first.csv"), "--out", str(out), "--config", str(grid_data / "small.toml"),
                 "--pixel-size", "4", "--section-thickness", "40", "--quiet"]) == 0
    return out


@pytest.fixture(scope="session")
def tiny_build(tiny_data, tmp_path_factory) -> Path:
    """Return a finished build of the tiny stack: its marker channel and landmarks, 128 px chunks in shards of 2.

    Shared by every test that only reads a finished build (treat as read-only: copy it to change it).
    """
    from stackbuild.cli import main

    out = tmp_path_factory.mktemp("tiny_build") / "b"
    config = out.parent / "small.toml"
    config.write_text("[render]\nchunk = 128\nshard = 2\n")
    assert main(["build", str(tiny_data / "tiles.csv"), "--out", str(out), "--channels", str(tiny_data / "channels.csv"),
                 "--landmarks", str(tiny_data / "landmarks.csv"), "--config", str(config), "--quiet"]) == 0
    return out


@pytest.fixture
def header_calls(monkeypatch) -> list:
    """Count the tile headers opened through ``stackbuild.manifest._header``."""
    calls = []
    real = manifest_mod._header

    def counting(path, *args, **kw):
        calls.append(Path(path).stem)
        return real(path, *args, **kw)

    monkeypatch.setattr(manifest_mod, "_header", counting)
    return calls
