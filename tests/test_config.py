"""Pipeline TOML settings: defaults, shipped pipelines, and clear errors."""
from __future__ import annotations

from pathlib import Path

import pytest

from stackbuild.config import PipelineConfig, default_toml, load_config
from stackbuild.errors import InputError

PIPELINES = Path(__file__).resolve().parents[1] / "pipelines"


def test_default_pipeline_file_lists_exactly_the_defaults():
    # pipelines/default.toml documents every key; it must not drift from the code.
    # Regenerate with: python -c "from stackbuild.config import default_toml; print(default_toml(), end='')"
    assert (PIPELINES / "default.toml").read_text() == default_toml()
    assert load_config(PIPELINES / "default.toml") == PipelineConfig()


@pytest.mark.parametrize("path", sorted(PIPELINES.glob("*.toml")), ids=lambda p: p.name)
def test_every_shipped_pipeline_loads(path):
    load_config(path)


def test_round_trip_through_json():
    cfg = load_config(PIPELINES / "cluster_large.toml")
    assert PipelineConfig.from_json(cfg.to_json()) == cfg


@pytest.mark.parametrize("text, expect", [
    ("[stitch]\nnot_a_key = 1\n", "unknown key(s) in [stitch]: not_a_key"),
    ("[colour]\n", "unknown table(s) colour"),
    ("[render]\nchunk = 'big'\n", "[render] chunk must be int"),
    ("[stitch]\nillumination = 1\n", "[stitch] illumination must be bool"),
    ("[stitch\n", "not valid TOML"),
])
def test_bad_pipeline_names_file_and_key(tmp_path, text, expect):
    p = tmp_path / "p.toml"
    p.write_text(text)
    with pytest.raises(InputError) as err:
        load_config(p)
    assert expect in str(err.value) and str(p) in str(err.value)
