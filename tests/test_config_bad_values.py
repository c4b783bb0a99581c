"""Pipeline files whose values pass the type check but cannot work.

Every bad value must be refused when the file is read, naming the file and the
key, before a build folder exists (not when its stage starts, as a traceback).
"""
from __future__ import annotations

from pathlib import Path

import pytest
from zarr.codecs import BloscCname

from stackbuild.cli import main
from stackbuild.config import load_config
from stackbuild.errors import InputError

ROOT = Path(__file__).resolve().parents[1]

# Each case: (TOML text, text the one-line error must contain). Before the fix the
# ones marked "was:" got through the config check and failed later.
BAD = [
    ("[render]\nchunk = -64\n", "[render] chunk"),            # was: refused after stitch+align, no file named
    ("[render]\nchunk = 513\n", "[render] chunk must be an even number"),  # odd shards cannot halve exactly
    ("[render]\nshard = 0\n", "[render] shard"),              # was: same
    ("[render]\ncodec = \"lzma9\"\n", "[render] codec"),      # was: ValueError traceback from the codec
    ("[render]\nclevel = 12\n", "[render] clevel"),
    ("[align]\nmodel = \"wobbly\"\n", "[align] model"),       # was: ValueError traceback in a worker
    ("[align]\ndetector = \"surf\"\n", "[align] detector"),   # was: ValueError traceback in a worker
    ("[align]\nwork_scale = 0\n", "[align] work_scale"),
    ("[align]\nmin_inliers = 2\n", "[align]"),
    ("[stitch]\nupsample = 0\n", "[stitch] upsample"),
    ("[stitch]\nspectral_exponent = 2.0\n", "[stitch] spectral_exponent"),
    ("[volume]\npixel_size = 0.0\n", "[volume] pixel_size"),  # was: ZeroDivisionError in the channel stage
    ("[volume]\nsection_thickness = -40.0\n", "[volume] section_thickness"),
    ("[channels]\nbins = 1\n", "[channels] bins"),
    ("[report]\nseam_spacing = 0\n", "[report] seam_spacing"),  # was: accepted silently
    ("[report]\nmeasure_scale = 0\n", "[report] measure_scale"),  # was: accepted silently
    ("[stitch]\nmax_stage_eror = 3\n", "max_stage_eror"),     # unknown key (already refused)
    ("[render]\nchunk = \"big\"\n", "[render] chunk must be int"),  # wrong type (already refused)
]


@pytest.mark.parametrize("text,needle", BAD)
def test_bad_value_names_file_and_key(tmp_path, text, needle):
    path = tmp_path / "pipeline.toml"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        load_config(path)
    assert info.value.file == str(path)
    assert needle in info.value.reason


def test_build_refuses_bad_value_before_making_the_folder(tiny_data, tmp_path, capsys):
    path = tmp_path / "pipeline.toml"
    path.write_text("[render]\nchunk = -64\n")
    out = tmp_path / "never"
    status = main(["build", str(tiny_data / "tiles.csv"), "--out", str(out), "--config", str(path), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2
    assert len(err) == 1 and err[0].startswith("stackbuild: error: ")
    assert str(path) in err[0] and "[render] chunk" in err[0]
    assert not out.exists()  # nothing written


@pytest.mark.parametrize("name", sorted(p.name for p in (ROOT / "pipelines").glob("*.toml")))
def test_shipped_pipeline_files_pass(name):
    load_config(ROOT / "pipelines" / name)


def test_every_blosc_codec_name_is_accepted(tmp_path):
    # The codec names are zarr's own list (zarr.codecs.BloscCname, a reference library).
    for cname in [c.value for c in BloscCname] + ["none"]:
        path = tmp_path / f"{cname}.toml"
        path.write_text(f"[render]\ncodec = \"{cname}\"\n")
        assert load_config(path).render.codec == cname
