"""The report stage end to end: files, verdict, self-contained HTML, and a real browser."""
from __future__ import annotations

import base64
import csv
import html
import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from stackbuild.errors import InputError
from stackbuild.qc.report import judge, run_report
from stackbuild.qc.settings import ReportSettings
from stackbuild.qc.thresholds import parse_fail_on_list
from qc_builders import ODD_NAME, PLANT_ROT_SECTION, PLANT_TILE, PLANT_TILE_SECTION, make_build

CHROMIUM = "/usr/bin/chromium"
_IMG_SRC = re.compile(r'<img[^>]*\ssrc="([^"]*)"', re.S)
# image panels inside the inline SVG figures: <image class="panel" ... href="data:image/png;base64,...">
_PANEL_SRC = re.compile(r'<image class="panel"[^>]*\shref="([^"]*)"', re.S)
_SVG = re.compile(r"<svg\b.*?</svg>", re.S)


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    # No volume.zarr: the report must measure the renderer's lazy volume.
    root = make_build(tmp_path_factory.mktemp("qcr") / "build", volume=False, odd_name=True)
    verdict = run_report(root, ReportSettings(probe_half_size=32, probe_spacing=64, probe_neighbourhood=1), fail_on=["flagged>0"])
    return root, verdict


def _png_stats(raw: bytes) -> tuple[tuple[int, int], float]:
    img = np.asarray(Image.open(io.BytesIO(raw)).convert("L"), np.float32)
    return img.shape, float(img.std())


def test_files_and_verdict(report):
    root, v = report
    qc = root / "qc"
    names = {p.name for p in v.paths}
    assert {"metrics.json", "tiles.csv", "pairs.csv", "sections.csv", "channels.csv", "blocks.csv",
            "report.html"} <= names
    assert all(p.exists() and p.stat().st_size > 0 for p in v.paths)
    assert not v.passed
    assert any(f.startswith("fail if align.p95 > 2 px") for f in v.failures)
    assert any(f.startswith("fail if flagged > 0") for f in v.failures)
    doc = json.loads((qc / "metrics.json").read_text())
    assert doc["schema_version"] == 2 and doc["volume"]["measured_on"]["origin"] == "lazy"
    assert doc["verdict"]["passed"] is False
    with open(qc / "sections.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 5 and {"section", "align_error_px", "align_error_unc_px", "stitch.rms"} <= set(rows[0])
    # neighbours are columns by offset (inliers.+1, inliers.+2), not one set per section of the stack
    neighbour = [c for c in rows[0] if c.startswith(("inliers.", "aligner_stats.coarse.pairs."))]
    assert neighbour and all(c.split(".")[1 if c.startswith("inliers.") else 3][0] in "+-" for c in neighbour)


def test_lazy_volume_finds_the_same_planted_errors(report):
    root, _ = report
    doc = json.loads((root / "qc" / "metrics.json").read_text())
    assert (doc["worst"]["tile"]["section"], doc["worst"]["tile"]["tile"]) == (PLANT_TILE_SECTION, PLANT_TILE)
    assert doc["worst"]["section_align"]["section"] == PLANT_ROT_SECTION


def test_report_numbers_equal_the_stored_metrics(report):
    root, _ = report
    doc = json.loads((root / "qc" / "metrics.json").read_text())
    row = next(r for r in doc["sections"] if r["section"] == PLANT_ROT_SECTION)
    page = (root / "qc" / "report.html").read_text()
    assert f"<td>{row['align_error_px']:.3g}</td>" in page  # the table shows the measured number
    assert "PASSED" in page or "FAILED" in page
    import stackbuild

    assert "Provenance" in page and f"stackbuild {stackbuild.__version__}" in page


def test_fail_on_rechecks_stored_metrics_fast_without_writing(report):
    import time

    from stackbuild.qc.report import recheck
    from stackbuild.qc.settings import ReportSettings

    root, _ = report
    page = root / "qc" / "report.html"
    before = page.stat().st_mtime_ns
    t0 = time.perf_counter()
    v = recheck(root, ReportSettings(), ["align.max>0.01px"])
    took = time.perf_counter() - t0
    assert v.missed_bars and v.missed_bars[0].startswith("fail if align.max > 0.01 px")
    assert took < 0.5  # "well under a second" (issue 14)
    assert page.stat().st_mtime_ns == before


def test_html_is_self_contained_and_escaped(report):
    import xml.etree.ElementTree as ET

    root, _ = report
    page = (root / "qc" / "report.html").read_text()
    assert "<script" not in page.lower()
    assert not re.search(r'(src|href)="(?!data:)', page)  # every resource is inline
    assert "<link" not in page.lower() and "url(" not in page.lower()
    thumbs, panels = _IMG_SRC.findall(page), _PANEL_SRC.findall(page)
    assert len(thumbs) == 5 and len(panels) >= 3  # a thumbnail per plane; worst section and re-slices
    for s in thumbs + panels:
        assert s.startswith("data:image/png;base64,")
        raw = base64.b64decode(s.split(",", 1)[1])
        assert raw[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature, ISO/IEC 15948
        shape, std = _png_stats(raw)
        assert min(shape) >= 40 and std > 5  # the stack strip's thumbnails are 56 px high
    figures = _SVG.findall(page)
    assert len(figures) >= 5
    for fig in figures:  # every inline figure is well-formed XML in the SVG namespace (Python's XML parser)
        assert ET.fromstring(fig).tag == "{http://www.w3.org/2000/svg}svg"
    assert ODD_NAME not in page
    assert html.escape(ODD_NAME) in page


def test_figures_are_svg_files_with_labels_units_and_no_matplotlib(report):
    import subprocess as sp
    import sys
    import xml.etree.ElementTree as ET

    from stackbuild.folder import BuildFolder

    root, _ = report
    qc, ns = root / "qc", {"s": "http://www.w3.org/2000/svg"}
    assert not [p.name for p in qc.glob("*.png") if p.name != "browser_shot.png"]  # every figure is SVG
    tiles = ET.parse(qc / "tiles.svg").getroot()
    texts = {t.text for t in tiles.iter("{http://www.w3.org/2000/svg}text")}
    drawn = [int(t.split()[1]) for t in texts if t and t.startswith("section ")]
    assert drawn
    for s in drawn:  # every tile of every drawn section is labelled with its name
        assert {t.tile for t in BuildFolder(root).store.load_stitch(s).tiles} <= texts
    assert "tile seam residual, median (px)" in texts and "not measured" in texts  # colour bar, units, no-data
    regions = ET.parse(qc / "error_regions.svg").getroot()
    assert "estimated error (px)" in {t.text for t in regions.iter("{http://www.w3.org/2000/svg}text")}
    bars = ET.parse(qc / "worst_section.svg").getroot().findall(".//s:g[@class='scalebar']", ns)
    assert len(bars) == len(ET.parse(qc / "worst_section.svg").getroot().findall(".//s:image[@class='panel']", ns))
    # drawing the figures needs no plotting library
    code = "import sys, stackbuild.qc.report, stackbuild.qc.plots; print('matplotlib' in sys.modules)"
    assert sp.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()[-1] == "False"


def test_bad_fail_on_is_refused_before_any_work(tmp_path):
    with pytest.raises(InputError, match="expected MEASURE OP NUMBER"):
        run_report(tmp_path, ReportSettings(), fail_on=["align.p95 2px"])
    assert not (tmp_path / "qc").exists()


def test_lenient_bars_pass(report):
    root, _ = report
    doc = json.loads((root / "qc" / "metrics.json").read_text())
    passed, failures, rows = judge(doc, parse_fail_on_list(["stitch.rms>10px, align.p95>20px"]))
    assert passed and not failures and len(rows) == 2


@pytest.mark.browser
@pytest.mark.skipif(not Path(CHROMIUM).exists(), reason="Debian's chromium is not installed (apt-get install chromium)")
def test_report_renders_in_headless_chromium(report, tmp_path):
    root, _ = report
    url = (root / "qc" / "report.html").resolve().as_uri()
    flags = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={tmp_path / 'profile'}"]
    shot = tmp_path / "shot.png"
    subprocess.run(flags + [f"--screenshot={shot}", "--window-size=1280,2000", url],
                   check=True, capture_output=True, timeout=120)
    shape, std = _png_stats(shot.read_bytes())
    assert shape == (2000, 1280) and std > 10  # not a blank page
    dom = subprocess.run(flags + ["--dump-dom", url], check=True, capture_output=True, timeout=120,
                         text=True).stdout
    srcs = _IMG_SRC.findall(dom) + _PANEL_SRC.findall(dom)
    assert len(srcs) >= 8
    for s in srcs:
        shape, std = _png_stats(base64.b64decode(s.split(",", 1)[1]))
        assert std > 5
    # the browser kept every image panel's scale bar (one per panel) in the page it laid out
    assert dom.count('class="scalebar"') >= dom.count('<image class="panel"') > 0
    assert "FAILED" in dom and "Worst sections" in dom
    shutil.copy(shot, root / "qc" / "browser_shot.png")  # kept for a human look


def test_lossy_tiles_and_unmeasured_sections_are_warned_about():
    from stackbuild.qc.report import warnings_of

    doc = {"volume": {}, "flagged_tiles": [{"section": 4, "tile": "r0c0", "flags": ["lossy_compression"]}],
           "sections": [{"section": 4, "flags": ["lossy_tiles"]}, {"section": 5, "flags": ["not_measured"]}]}
    got = warnings_of(doc)
    assert any("lossy-compressed tiles in section(s) 4" in w for w in got)
    assert any("not measured on section(s) 5" in w for w in got)
