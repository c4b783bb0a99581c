"""Shared fixtures: small synthetic data sets made by stackbuild.synth (generated, never committed)."""
from __future__ import annotations

from pathlib import Path

import pytest

from stackbuild.synth import SynthParams, generate

SAMPLE = Path(__file__).resolve().parents[1] / "sample_tiles"

#: A tiny stack for end-to-end runs: 5 sections (section 2 lost) of 2 x 2 tiles, one marker channel.
TINY = SynthParams(seed=11, sections=5, grid=(2, 2), tile_size=256, offset=12.0, warp=3.0,
                   channels=1, channel_every=2, lost_sections="2", compress=False)


@pytest.fixture(scope="session")
def tiny_data(tmp_path_factory) -> Path:
    """Return the folder of the tiny synthetic stack (tiles.csv, channels.csv, truth/)."""
    out = tmp_path_factory.mktemp("tiny")
    generate(out, TINY)
    return out
