"""The report as a reader sees it: headless Chromium renders it, images decode, image panels carry scale bars."""
from __future__ import annotations

import base64
import io
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from PIL import Image
from skimage import data

from stackbuild.qc import colours, panels, plots, thumbnails
from stackbuild.qc.report import run_report
from stackbuild.qc.settings import ReportSettings
from qc_builders import make_build

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
_BAR = re.compile(r"^[\d.]+ (nm|\u00b5m)$")
_NS = {"s": "http://www.w3.org/2000/svg"}


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    root = make_build(tmp_path_factory.mktemp("browser") / "build")
    run_report(root, ReportSettings(probe_half_size=32, probe_spacing=64, probe_neighbourhood=1))
    return root / "qc" / "report.html"


def _bars(svg: str, nm_per_figure_px: float) -> int:
    """Return how many image panels ``svg`` has, checking each has a scale bar of the length its text says."""
    root = ET.fromstring(svg)  # well-formed SVG (Python's XML parser)
    images = root.findall(".//s:image[@class='panel']", _NS)
    bars = root.findall(".//s:g[@class='scalebar']", _NS)
    assert images and len(bars) == len(images)
    for g in bars:
        text = g.find("s:text", _NS).text
        assert _BAR.match(text), text
        nm = float(g.get("data-nm"))
        assert text == thumbnails.scale_text(nm)
        # the bar's drawn width is its length in figure px: nm / (nm per figure px), to the written precision
        assert float(g.find("s:rect", _NS).get("width")) * nm_per_figure_px == pytest.approx(nm, rel=1e-3)
    return len(images)


@pytest.mark.skipif(CHROMIUM is None, reason="needs Debian's chromium (apt-get install chromium)")
def test_chromium_renders_the_verdict_first(page, tmp_path):
    shot = tmp_path / "shot.png"
    subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                    "--window-size=1200,900", f"--screenshot={shot}", page.as_uri()],
                   check=True, capture_output=True, timeout=120)
    img = np.asarray(Image.open(shot).convert("RGB"))  # decodes: PNG, ISO/IEC 15948
    assert img.shape[:2] == (900, 1200)
    # the verdict badge (FAILED: #c8553d, the report's own colour) sits in the first screenful
    top = img[:200].reshape(-1, 3).astype(int)
    assert (np.abs(top - (0xC8, 0x55, 0x3D)).sum(1) < 30).sum() > 200
    dom = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--dump-dom", page.as_uri()],
                         check=True, capture_output=True, timeout=120, text=True).stdout
    assert "FAILED" in dom and dom.count('class="thumb"') == 5


def test_every_embedded_image_decodes(page):
    html = page.read_text()
    srcs = re.findall(r'(?:src|href)="(data:image/png;base64,[^"]+)"', html)  # thumbnails and SVG image panels
    assert len(srcs) >= 8
    for s in srcs:
        Image.open(io.BytesIO(base64.b64decode(s.split(",", 1)[1]))).load()  # decodes: PNG, ISO/IEC 15948


def test_image_panels_carry_scale_bars():
    cam = data.camera().astype(np.float32)  # scikit-image's 512 x 512 test picture
    # two 128 px crops at 4 nm per px, each panel 260 figure px wide: 4 * 128 / 260 nm per figure px
    svg = panels.neighbour_panels([(0, cam[:128, :128]), (1, cam[:128, 128:256])], (64, 64), 4.0, 1.0, "t")
    assert _bars(svg, 4.0 * 128 / 260) == 2
    # re-slices of 512 columns at 1 level-0 px each, 4 nm per px, drawn 800 figure px wide
    assert _bars(panels.reslice(cam[:10], cam[10:20], 10.0, (5, 5), 1.0, 4.0), 4.0 * 512 / 800) == 2
    svg = panels.channel_overlays([("glowA", 0, cam[:64, :64], cam[:64, :64])], {"glowA": 32.0})
    assert _bars(svg, 32.0 * 64 / 300) == 1
    # a panel without a scale bar is caught
    broken = re.sub(r'<g class="scalebar".*?</g>', "", svg, count=1, flags=re.S)
    with pytest.raises(AssertionError):
        _bars(broken, 32.0 * 64 / 300)


def test_no_data_colour_lies_outside_the_colour_ramp():
    # the ramp's colours at 1000 steps never come near the no-data colour (RGB distance > 80 of 441;
    # a rule of thumb for telling two patches apart, no source), and NaN is drawn in it
    ramp = colours.ramp(np.linspace(0, 1, 1000), 0.0, 1.0).astype(float)
    assert np.linalg.norm(ramp - colours.NO_DATA_RGB, axis=1).min() > 80
    assert tuple(colours.ramp([np.nan], 0, 1)[0]) == colours.NO_DATA_RGB
    # lightness rises along the ramp: ITU-R BT.709 luma (0.2126 R + 0.7152 G + 0.0722 B) strictly increasing
    luma = ramp @ np.array([0.2126, 0.7152, 0.0722])
    assert np.all(np.diff(luma[::50]) > 0)


def test_charts_are_svg_with_axes_units_and_legends():
    rows = [{"z": z, "section": z, "lost": z == 2, "align_error_px": None if z == 2 else 0.5 + z,
             "align_error_unc_px": 0.1} for z in range(5)]
    root = ET.fromstring(plots.error_vs_z(rows, 2.0))
    texts = {t.text for t in root.iter("{http://www.w3.org/2000/svg}text")}
    assert {"z (plane)", "estimated error (level-0 px)", "over the bar", "under the bar", "lost section",
            "bar 2 px"} <= texts
    # two planes over the 2 px bar (z 3 and 4: 3.5 and 4.5 px) are triangles, two under are circles
    assert len(root.findall(".//s:polygon", _NS)) == 2 + 1  # + the legend's triangle
    assert len(root.findall(".//s:circle", _NS)) == 2 + 1
    grid = np.array([[0.5, np.nan], [3.0, 1.0]])
    root = ET.fromstring(plots.region_map(grid, [0, 1], 2.0))
    heat = root.find(".//s:image[@class='heat']", _NS)
    img = np.asarray(Image.open(io.BytesIO(base64.b64decode(heat.get("href").split(",", 1)[1]))).convert("RGB"))
    assert tuple(img[0, -1]) == colours.NO_DATA_RGB  # the unmeasured cell, top right


def test_scale_bar_lengths_are_round_and_in_proportion():
    # 1, 2 or 5 times a power of ten, about a fifth of the panel (common practice, no source)
    assert thumbnails.nice_length(1000.0) == 200.0
    assert thumbnails.nice_length(52000.0) == 10000.0
    assert thumbnails.scale_text(10000.0) == "10 \u00b5m"


def test_thumbnail_has_a_burned_in_bar():
    png = thumbnails.thumbnail_png(data.camera(), 40.0, 2000.0, height=56)
    img = np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))
    # the bar: 2000 nm at 40 nm per source px, 512 px shrunk to 56 -> about 5.5 white px wide
    white = (img[-6:-4] == 255).all(axis=2).any(axis=0).sum()
    assert 4 <= white <= 7
