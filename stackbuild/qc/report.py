"""The report stage: metrics, tables, plots and one self-contained ``DIR/qc/report.html``.

The HTML file holds its SVG figures inline (their image panels and the plane thumbnails as
base64 PNG ``data:`` URIs) and its style; it needs no server, no script and no network. Every
name that comes from input files (tile ids, paths, channel names) is escaped with
:func:`html.escape`.
"""
from __future__ import annotations

import base64
import datetime as _dt
import html
import json
from pathlib import Path

from ..errors import InputError
from ..folder import BuildFolder
from ..transforms.store import atomic_write_text
from .figures import FigureStore, draw_all, thumbnails
from .glossary import FLAGS, TOTALS, flag_meaning
from .metrics import collect, write_metrics
from .settings import ReportSettings
from .bars import Verdict, _thresholds, judge, recheck  # noqa: F401 (recheck re-exported)
from .thresholds import Threshold, parse_fail_on_list
from .thumbnails import scale_text


_CSS = """
body{font-family:Helvetica,Arial,sans-serif;margin:24px 32px;color:#22313f;background:#fbfaf7}
h1{font-size:22px;margin:0 0 4px} h2{font-size:17px;margin:28px 0 8px;border-bottom:1px solid #d8d2c4}
.verdict{display:inline-block;padding:6px 14px;border-radius:4px;font-weight:bold;color:#fff;margin:8px 0}
.pass{background:#2a9d8f}.fail{background:#c8553d}
table{border-collapse:collapse;font-size:13px;margin:6px 0}
td,th{border:1px solid #d8d2c4;padding:3px 8px;text-align:right} th{background:#efe9dc}
td.t{text-align:left} tr.bad td{background:#f6d9d0}
.thumb{display:block;height:56px} .ebar{display:inline-block;height:10px;background:#2a9d8f;vertical-align:middle}
.ebar.over{background:#c8553d} .flag{display:inline-block;background:#efe9dc;border-radius:3px;padding:0 4px;
margin:1px;font-size:11px} ul.why{color:#c8553d;font-weight:bold}
p.warn{color:#8a5a00;background:#fbecc8;padding:4px 8px;border-radius:3px;display:inline-block;margin:2px 0} table.strip td{padding:1px 6px}
figure{margin:14px 0} figure img,figure svg{max-width:100%;height:auto;border:1px solid #d8d2c4;background:#fff}
figcaption{font-size:13px;margin-top:4px} .small{font-size:12px;color:#5b6770}
"""


def _fmt(v, nd: int = 3) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.{nd}g}"
    return html.escape(str(v))


def _table(header: list[str], rows: list[list], bad: list[bool] | None = None, text_cols=()) -> str:
    if not rows:
        return '<p class="small">none</p>'
    h = "".join(f"<th>{html.escape(c)}</th>" for c in header)
    body = []
    for i, r in enumerate(rows):
        cls = ' class="bad"' if bad and bad[i] else ""
        cells = "".join(f'<td{" class=t" if j in text_cols else ""}>{_fmt(v)}</td>' for j, v in enumerate(r))
        body.append(f"<tr{cls}>{cells}</tr>")
    return f"<table><tr>{h}</tr>{''.join(body)}</table>"


def _loc(at: dict | None) -> list:
    if not at:
        return ["-"] * 3
    return [at["section"], f"{at['x_px']:.0f}, {at['y_px']:.0f}", f"{at['x_nm']:.0f}, {at['y_nm']:.0f}"]


_LOC = ["at section", "x, y (px)", "x, y (nm)"]


def _flag_cell(flags: list[str]) -> str:
    """Return flags as text; each explained in the glossary and in a hover title."""
    return "; ".join(flags)


def _tables(doc: dict, settings: ReportSettings) -> str:
    n, amax = settings.worst, settings.align_max
    secs = sorted((r for r in doc["sections"] if r["align_error_px"] is not None),
                  key=lambda r: -r["align_error_px"])[:n]
    motion = lambda r: (r["motion_prev"] or {}).get("p95")  # noqa: E731
    a_rows = [[r["section"], r["z"], r["align_error_px"], r["align_error_unc_px"], r["align_error_max_px"],
               r["align_error_blocks"], motion(r), min(r["inliers"].values(), default=None), r["elastic"]["max"],
               *_loc(r["align_error_at"]), _flag_cell(r["flags"])] for r in secs]
    a_bad = [r["align_error_px"] > amax for r in secs]
    st = sorted((r for r in doc["sections"] if r["stitch"]["rms"] is not None), key=lambda r: -r["stitch"]["rms"])[:n]
    s_rows = [[r["section"], r["stitch"]["rms"], r["stitch"]["p95"], r["stitch"]["max"], r["pairs_rejected"],
               *_loc(r["stitch"]["at"])] for r in st]
    s_bad = [r["stitch"]["rms"] > settings.stitch_rms for r in st]
    pr = sorted((r for r in doc["worst_pairs"] if r["residual"] is not None), key=lambda r: -r["residual"])[:n]
    vec = lambda v: f"{v[0]:.2f}, {v[1]:.2f}"  # noqa: E731
    p_rows = [[r["section"], r["a"], r["b"], r["residual"], vec(r["misfit"]), r.get("measured_from", "tiles"),
               r["blocks"]["n"], r["ncc"], r["accepted"], r["reason"], *_loc(r["at"])] for r in pr]
    seen = {(r["section"], r["tile"]): r for r in doc["flagged_tiles"] + doc["worst_tiles"]}
    tl = sorted((r for r in seen.values() if r["seam_median"] is not None or r["flags"]),
                key=lambda r: (-len(r["flags"]), -(r["seam_median"] or 0)))[:n]
    t_rows = [[r["section"], r["tile"], r["seam_median"], r["seam_max"], r["stitch_residual"], _flag_cell(r["flags"]),
               *_loc(r["at"]), r["path"]] for r in tl]
    t_bad = [bool(r["flags"]) for r in tl]
    ch = sorted(doc["channels"], key=lambda c: (c["measure_after"] is not None, c["measure_after"] or 0))[:n]
    shift = lambda v: None if not v else f"{v[0]:.1f}, {v[1]:.1f}"  # noqa: E731
    c_rows = [[c["channel"], c["section"], c["registered"], c["measure_before"], c["measure_after"],
               shift(c["shift_from_given"]), c["rotation_deg"], c["landmark_residual"], _flag_cell(c["flags"]),
               *_loc(c["at"])] for c in ch]
    c_bad = [bool(c["flags"]) or c["registered"] is False for c in ch]
    return "".join([
        "<h2>Worst sections: alignment</h2>",
        '<p class="small">Sorted and shaded by the same number: the estimated error (RMS over the section\'s probe '
        f"blocks of how far the plane deviates from where its neighbours put it, level-0 px); shaded over the "
        f"align_max bar, {amax:g} px. Apparent motion (block shift to the plane before, tissue change included) "
        "is shown for comparison only.</p>",
        _table(["section", "z", "estimated error (px)", "&plusmn; (px)", "largest block (px)", "blocks",
                "apparent motion p95 (px)", "fewest inliers", "elastic max (px)", *_LOC, "flags"],
               a_rows, a_bad, (12,)),
        "<h2>Worst sections: stitching</h2>",
        f'<p class="small">Sorted and shaded by seam RMS (shaded over the stitch_rms bar, {settings.stitch_rms:g} '
        "px).</p>",
        _table(["section", "seam RMS (px)", "p95 (px)", "max (px)", "rejected pairs", *_LOC], s_rows, s_bad),
        "<h2>Worst seams</h2>",
        '<p class="small">residual = length of the misplacement of tile b relative to tile a at the final '
        "placement: re-measured over their overlap from the raw tiles (median over blocks), or, measured from "
        "the stitcher, the placement against the offset the stitcher measured for the pair (checked against the "
        "raw tiles on a few pairs per section and on every pair over half the stitch_rms bar); NCC and accepted "
        "are the stitcher's.</p>",
        _table(["section", "tile a", "tile b", "residual (px)", "dx, dy (px)", "measured from", "blocks", "NCC",
                "accepted", "reason", *_LOC], p_rows, text_cols=(1, 2, 5, 9)),
        "<h2>Flagged and worst tiles</h2>",
        '<p class="small">Flagged tiles first (shaded), then by seam misfit.</p>',
        _table(["section", "tile", "seam median (px)", "seam max (px)", "stitcher residual (px)", "flags", *_LOC,
                "path"], t_rows, t_bad, (1, 5, 9)),
        "<h2>Channels</h2>",
        '<p class="small">registration measure: normalised mutual information (1 unrelated .. 2 identical); '
        "lowest after registration first; flagged or unregistered rows shaded.</p>" +
        _table(["channel", "section", "registered", "measure before", "measure after", "shift from given (px)",
                "rotation (deg)", "landmark residual (px)", "flags", *_LOC], c_rows, c_bad, (0, 8))
        if c_rows else '<p class="small">no marker channels in this build</p>',
        _landmark_table(doc.get("landmarks") or [], n, settings.align_max),
    ])


def _landmark_table(rows: list[dict], n: int, bar: float) -> str:
    """Return the worst landmarks: marker registration checked against spots the user placed on both images."""
    if not rows:
        return ""
    worst = sorted(rows, key=lambda r: (r["residual"] is not None, r["residual"] or 0), reverse=True)[:n]
    body = [[r["channel"], r["section"], r["name"], r["tile"], r["residual"], r["residual_nm"],
             None if r["dx"] is None else f"{r['dx']:.2f}, {r['dy']:.2f}", r["row"], *_loc(r["at"])] for r in worst]
    bad = [r["residual"] is None or r["residual"] > bar for r in worst]
    return "".join([
        "<h2>Worst landmarks</h2>",
        '<p class="small">residual = where the stored marker registration puts the marker spot, minus where the '
        f"same spot lies on the EM tile, in EM pixels; rows over {bar:g} px or not measured are shaded.</p>",
        _table(["channel", "section", "landmark", "tile", "residual (px)", "residual (nm)", "dx, dy (px)",
                "file line", *_LOC], body, bad, (0, 2, 3)),
    ])


def _figure(caption: str, path: Path) -> str:
    """Return one figure for the page: an SVG file inline, a PNG as a ``data:`` URI."""
    path = Path(path)
    if path.suffix == ".svg":
        pic = path.read_text(encoding="utf-8").replace("<svg ", f'<svg role="img" aria-label="{html.escape(caption)}" ', 1)
    else:
        pic = (f'<img src="data:image/png;base64,{base64.b64encode(path.read_bytes()).decode("ascii")}" '
               f'alt="{html.escape(caption)}">')
    return f"<figure>{pic}<figcaption>{html.escape(caption)}</figcaption></figure>"


def _strip(doc: dict, thumbs: dict[int, str], bar_nm: float | None, settings: ReportSettings) -> str:
    """Return the stack strip: one row per plane, in z order, shaded when the plane fails a bar or is lost."""
    rows = sorted((r for r in doc["sections"] if r["z"] is not None), key=lambda r: r["z"])
    top = max([r["align_error_px"] or 0 for r in rows] + [settings.align_max])
    out = []
    for r in rows:
        e = r["align_error_px"]
        bad = r["lost"] or (e is not None and e > settings.align_max) or "blank_section" in r["flags"] or \
            (r["stitch"]["rms"] is not None and r["stitch"]["rms"] > settings.stitch_rms)
        img = thumbs.get(r["z"])
        pic = f'<img class=thumb src="{img}" alt="plane {r["z"]}">' if img else '<span class=small>no image</span>'
        if r["lost"]:
            err = "lost section"
        elif e is None:
            err = "not measured"
        else:
            width = int(160 * e / top) if top > 0 else 0
            err = (f'<span class="ebar{" over" if e > settings.align_max else ""}" style="width:{width}px"></span> '
                   f"{e:.2f} &plusmn; {r['align_error_unc_px'] or 0:.2f} px")
        flags = " ".join(f'<span class=flag title="{html.escape(flag_meaning(f))}">{html.escape(f)}</span>'
                         for f in r["flags"])
        stitch = "-" if r["stitch"]["rms"] is None else f"{r['stitch']['rms']:.2f}"
        out.append(f'<tr{" class=bad" if bad else ""}><td>{r["z"]}</td><td>{r["section"]}</td><td>{pic}</td>'
                   f"<td class=t>{err}</td><td>{stitch}</td><td class=t>{flags}</td></tr>")
    scale = f" (white bar = {scale_text(bar_nm)})" if bar_nm else ""
    return ("<h2>The stack, plane by plane</h2>"
            f'<p class="small">One row per plane in z order; shaded rows fail a bar or are lost. Thumbnail{scale}; '
            "estimated alignment error with its uncertainty (bar length to scale, red over the align_max bar "
            f"of {settings.align_max:g} px); seam RMS; flags (hover or see the glossary).</p>"
            "<table class=strip><tr><th>z</th><th>section</th><th>plane</th><th>estimated error</th>"
            f"<th>seam RMS (px)</th><th>flags</th></tr>{''.join(out)}</table>")


def _glossary(doc: dict) -> str:
    """Return the meaning of every flag that appears in this report."""
    seen = set()
    for key in ("sections", "tiles", "channels"):
        for r in doc.get(key) or []:
            seen |= set(r.get("flags") or [])
    if not seen:
        return "<h2>Flags</h2><p class=small>no flags were raised</p>"
    rows = [[f, FLAGS.get(f, ("", ""))[0], flag_meaning(f)] for f in sorted(seen)]
    return "<h2>Flags</h2>" + _table(["flag", "set on", "meaning"], rows, text_cols=(0, 1, 2))


def _provenance(doc: dict) -> str:
    """Return version, settings, inputs with their hashes and stage times."""
    prov = doc.get("provenance") or {}
    inputs = [[k, v.get("path"), v.get("sha256"), v.get("bytes")] for k, v in (prov.get("inputs") or {}).items()]
    stages = [[k, v.get("status"), v.get("seconds")] for k, v in (prov.get("stages") or {}).items()]
    settings = html.escape(json.dumps(prov.get("settings") or {}, indent=1, sort_keys=True))
    return ("<h2>Provenance</h2>"
            f"<p class=small>stackbuild {html.escape(str(prov.get('version')))}; report written "
            f"{html.escape(str(prov.get('written')))}; measured on {html.escape(str(prov.get('measured_on')))}</p>"
            + _table(["input", "path", "sha256", "bytes"], inputs, text_cols=(0, 1, 2))
            + _table(["stage", "status", "seconds"], stages, text_cols=(0, 1))
            + f"<details><summary class=small>settings of this build</summary><pre class=small>{settings}</pre>"
              "</details>")


def render_html(doc: dict, verdict_rows: list[dict], passed: bool, figures, settings: ReportSettings,
                thumbs: dict[int, str] | None = None, bar_nm: float | None = None) -> str:
    """Return the report as one HTML document: verdict, stack strip, totals, figures, tables, provenance."""
    tot = doc["totals"]
    vol = doc["volume"]
    badge = '<span class="verdict pass">PASSED</span>' if passed else '<span class="verdict fail">FAILED</span>'
    failed = [r for r in verdict_rows if r["failed"]]
    why = "".join(f"<li>{html.escape(r['condition'])}: measured {_fmt(r['measured'])} "
                  f"{html.escape(TOTALS.get(r['measure'], ('', ''))[0])} &mdash; "
                  f"{html.escape(TOTALS.get(r['measure'], ('', r['measure']))[1])}</li>" for r in failed)
    th = _table(["condition", "measured", "result"],
                [[r["condition"], r["measured"], "FAIL" if r["failed"] else "ok"] for r in verdict_rows],
                [r["failed"] for r in verdict_rows], (0,))
    keys = [k for k in tot if tot[k] is not None]
    totals = _table(["measure", "value", "unit", "meaning"],
                    [[k, tot[k], *TOTALS.get(k, ("", ""))] for k in keys], text_cols=(0, 2, 3))
    src = vol["measured_on"]
    measured = ("alignment error measured on " + html.escape(f"{src['origin']} level {src['level']} "
                                                             f"({src['factor']:g} level-0 px per pixel)") if src else
                "alignment error not measured")
    notes = "".join(f"<li>{html.escape(n)}</li>" for n in doc["notes"]) or "<li>none</li>"
    figs = "".join(_figure(c, p) for c, p in figures)
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return (f"<!DOCTYPE html><html lang=en><head><meta charset=utf-8><title>stackbuild quality report</title>"
            f"<style>{_CSS}</style></head><body>"
            f"<h1>Volume quality report</h1>{badge}"
            + (f"<ul class=why>{why}</ul>" if why else "<p class=small>every bar is met</p>")
            + "".join(f"<p class=warn>warning: {html.escape(w)}</p>" for w in doc.get("warnings") or []) +
            f"<div class=small>{html.escape(doc['build'])} &middot; {when} &middot; "
            f"{vol['depth'] or '-'} planes of {vol['width'] or '-'} x {vol['height'] or '-'} px, "
            f"{_fmt(vol['pixel_size_nm'])} nm/px, {_fmt(vol['section_thickness_nm'])} nm sections &middot; "
            f"{measured}</div>"
            f"{_strip(doc, thumbs or {}, bar_nm, settings)}"
            f"<h2>Bars</h2>{th}<h2>Totals</h2>{totals}<h2>Figures</h2>{figs}"
            f"{_tables(doc, settings)}{_glossary(doc)}"
            f"<h2>Notes</h2><ul class=small>{notes}</ul>"
            "<p class=small>Errors and residuals are level-0 (full-resolution) pixels; coordinates are output "
            "pixels of level 0 and nanometres (pixel x pixel size). The estimated alignment error cannot see "
            "what no image can show: a steady slant or slow bend of the whole stack, or oblique structure "
            "straightened by the aligner.</p>"
            f"{_provenance(doc)}</body></html>")


def warnings_of(doc: dict) -> list[str]:
    """Return the warnings shown under the verdict and on the terminal (no bar needed to raise them)."""
    out = []
    assumed = doc["volume"].get("assumed") or {}
    if assumed:
        out.append("physical scale assumed, not given: " + " and ".join(
            f"{k.replace('_', ' ')} {v:g} nm" for k, v in sorted(assumed.items()))
            + "; nanometre values in this report are only as right as these (build with --pixel-size and "
              "--section-thickness)")
    lossy = [t for t in doc.get("flagged_tiles") or [] if "lossy_compression" in t["flags"]]
    lossy_secs = sorted({r["section"] for r in doc["sections"] if "lossy_tiles" in r["flags"]}
                        | {t["section"] for t in lossy})
    if lossy_secs:
        out.append(f"lossy-compressed tiles in section(s) {', '.join(map(str, lossy_secs[:20]))}"
                   f"{' ...' if len(lossy_secs) > 20 else ''}: fine detail may be altered by the compression")
    unmeasured = [r["section"] for r in doc["sections"] if "not_measured" in r["flags"]]
    if unmeasured:
        out.append(f"alignment error not measured on section(s) {', '.join(map(str, unmeasured[:20]))}")
    beyond = [r["section"] for r in doc["sections"] if "beyond_probe_reach" in r["flags"]]
    if beyond:
        out.append(f"section(s) {', '.join(map(str, beyond[:20]))} moved beyond the probe's reach: "
                   "their error is only known to be at least probe_reach")
    return out


def _sha256(path: Path) -> str | None:
    import hashlib

    try:
        h = hashlib.sha256()
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
        return h.hexdigest()
    except OSError:
        return None


def provenance(folder: BuildFolder, settings: ReportSettings, doc: dict) -> dict:
    """Return version, settings, input manifests (path, sha256, bytes) and stage times of the build."""
    from dataclasses import asdict

    from .._version import __version__

    state = {}
    try:
        state = folder.load_state()
    except Exception:  # a hand-made folder without build.json still gets a report
        pass
    inputs = {}
    for key in ("tiles", "channels", "landmarks"):
        path = state.get(key)
        if path:
            p = Path(path)
            inputs[key] = {"path": str(p), "sha256": _sha256(p), "bytes": p.stat().st_size if p.is_file() else None}
    src = doc["volume"]["measured_on"]
    return {"version": __version__, "written": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "settings": {**(state.get("config") or {}), "report": asdict(settings)}, "inputs": inputs,
            "stages": state.get("stages") or {},
            "measured_on": None if src is None else f"{src['origin']} level {src['level']}"}


def run_report(build_dir, settings: ReportSettings, *, fail_on: list[str] | None = None,
               progress=None, mapper=None, reuse: bool = True, changed: dict | None = None) -> Verdict:
    """Measure a build, write ``DIR/qc`` (metrics.json, CSV tables, SVG figures, report.html).

    Parameters
    ----------
    build_dir : str or Path
        The build folder.
    settings : ReportSettings
        Thresholds, block sizes and table lengths.
    fail_on : list of str, optional
        Extra ``--fail-on`` expressions (see :mod:`stackbuild.qc.thresholds`);
        one naming the same measure as a setting replaces it.
    progress : callable, optional
        ``progress(done, total)`` while measuring.
    mapper : callable, optional
        ``mapper(fn, items)`` that runs the section, pair and run tasks (the build's Dask mapper); in this process
        when omitted.
    reuse : bool
        Re-use stored measurements whose inputs are unchanged (``DIR/qc/measured``, see
        :mod:`stackbuild.qc.reuse`); False measures everything again.
    changed : dict, optional
        ``{z: {"before": render fingerprint, "boxes": [[x0, y0, x1, y1], ...]}}``: plane ``z`` changed
        only inside these level-0 boxes since it was rendered from ``before`` (an update's rewritten
        shards); the probe then re-measures only the blocks there (:func:`stackbuild.qc.probe.measure_error`).

    Returns
    -------
    Verdict
        Whether the volume meets every bar, what failed, and the files written.
    """
    folder = BuildFolder(build_dir)
    thresholds = _thresholds(settings, fail_on)  # bad syntax fails before any work
    if not folder.store.sections_with("stitch"):
        raise InputError("nothing to report yet: no section has been stitched; run the stitch stage "
                         "(or build) first", file=folder.root)
    try:
        folder.qc_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot write the report folder ({exc.strerror})", file=folder.qc_dir) from None
    doc, meas = collect(build_dir, settings, progress, mapper=mapper, reuse=reuse, changed=changed)
    passed, failures, rows = judge(doc, thresholds)
    doc["verdict"] = {"passed": passed, "failures": failures, "thresholds": rows}
    doc["provenance"] = provenance(folder, settings, doc)
    doc["volume"]["assumed"] = folder.load_state().get("assumed_scale") or {}  # scale nobody gave (run/start.py)
    doc["warnings"] = warnings_of(doc)
    figures = draw_all(folder, doc, meas, settings, FigureStore(folder, reuse))
    thumbs, bar_nm = thumbnails(folder, doc, reuse)
    paths = write_metrics(doc, folder.qc_dir, meas) + [p for _, p in figures]
    page = folder.qc_dir / "report.html"
    atomic_write_text(page, render_html(doc, rows, passed, figures, settings, thumbs, bar_nm))
    asked = set(parse_fail_on_list([t for t in (fail_on or []) if not isinstance(t, Threshold)])
                + [t for t in (fail_on or []) if isinstance(t, Threshold)])
    _, missed, _ = judge(doc, [t for t in thresholds if t in asked])
    return Verdict(passed, failures, paths + [page], missed, doc["warnings"])
