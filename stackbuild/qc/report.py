"""The report stage: metrics, tables, plots and one self-contained ``DIR/qc/report.html``.

The HTML file embeds its PNG figures as base64 ``data:`` URIs and its style
inline; it needs no server, no script and no network. Every name that comes
from input files (tile ids, paths, channel names) is escaped with
:func:`html.escape`.
"""
from __future__ import annotations

import base64
import datetime as _dt
import html
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..folder import BuildFolder
from ..transforms.store import atomic_write_text
from . import plots
from .metrics import collect, write_metrics
from .planes import open_planes, reslice_planes, window
from .settings import ReportSettings
from .thresholds import Threshold, default_thresholds, parse_fail_on_list


@dataclass
class Verdict:
    """Outcome of the report.

    Attributes
    ----------
    passed : bool
        True when no threshold failed.
    failures : list of str
        One line per failed threshold: the condition and the measured value.
    paths : list of Path
        Every file written under ``DIR/qc``.
    missed_bars : list of str
        The failures among the ``fail_on`` expressions alone (what a batch
        script asked to be checked; the CLI's exit status follows these).
    """

    passed: bool
    failures: list[str] = field(default_factory=list)
    paths: list[Path] = field(default_factory=list)
    missed_bars: list[str] = field(default_factory=list)


def _thresholds(settings: ReportSettings, fail_on) -> list[Threshold]:
    """Return the settings' bars, replaced or extended by ``fail_on`` (text or Threshold)."""
    extra = [t for t in (fail_on or []) if isinstance(t, Threshold)]
    extra += parse_fail_on_list([t for t in (fail_on or []) if not isinstance(t, Threshold)])
    named = {t.measure for t in extra}
    return [t for t in default_thresholds(settings) if t.measure not in named] + extra


def judge(doc: dict, thresholds: list[Threshold]) -> tuple[bool, list[str], list[dict]]:
    """Return ``(passed, failures, rows)`` of the thresholds against ``doc["totals"]``."""
    px = doc["volume"]["pixel_size_nm"]
    failures, rows = [], []
    for t in thresholds:
        failed, got = t.fails(doc["totals"], px)
        rows.append({"condition": t.describe(), "measured": got, "failed": failed, "text": t.text})
        if failed:
            failures.append(f"{t.describe()}: measured {got:.3g}")
    return not failures, failures, rows


def _figures(folder: BuildFolder, doc: dict, meas, settings: ReportSettings) -> list[tuple[str, Path]]:
    """Draw every figure into ``DIR/qc``; return ``(caption, path)`` pairs."""
    qc, store, out = folder.qc_dir, folder.store, []
    stitches = {s: store.load_stitch(s) for s in meas.seams}
    ranked = sorted((r for r in doc["sections"] if r["section"] in stitches and r["stitch"]["rms"] is not None),
                    key=lambda r: -r["stitch"]["rms"])[:min(settings.worst, 6)]
    if ranked:
        secs = [r["section"] for r in ranked]
        fig = plots.tile_maps(stitches, doc["tiles"], doc["pairs"], secs)
        out.append(("Tile positions of the sections with the worst seams", plots.save(fig, qc / "tiles.png")))
    out.append(("Section-to-section residual against z",
                plots.save(plots.residual_vs_z(doc["sections"]), qc / "residual_z.png")))
    out.append(("Residual over the stack, by x band",
                plots.save(plots.residual_heatmap(meas.plane_pairs, doc["volume"]["width"]),
                           qc / "residual_map.png")))
    el = [r for r in doc["sections"] if r["elastic"]["max"] is not None]
    pick = max(el, key=lambda r: r["elastic"]["max"]) if el else doc["worst"]["section_align"]
    if settings.field_section >= 0:
        pick = next((r for r in doc["sections"] if r["section"] == settings.field_section), pick)
    if pick is not None:
        al = store.load_alignment(pick["section"])
        canvas = store.load_canvas()
        org = (canvas.origin_x, canvas.origin_y) if canvas else (0.0, 0.0)
        fig = plots.displacement_field(pick["section"], al.displacement if al else None, org)
        out.append((f"Elastic displacement of section {pick['section']}", plots.save(fig, qc / "displacement.png")))
    out += _volume_figures(folder, doc, meas, settings)
    panels = _channel_panels(folder, doc)
    if panels:
        out.append(("Marker channels over the EM, as registered",
                    plots.save(plots.channel_overlays(panels), qc / "channels.png")))
    if doc.get("landmarks"):
        px = doc["volume"]["pixel_size_nm"]
        marker_px = {c.channel: c.pixel_size / px for c in folder.channel_manifest()}
        out.append(("Landmark residuals of the marker registrations (marker spot as registered minus the EM spot)",
                    plots.save(plots.landmark_residuals(doc["landmarks"], marker_px), qc / "landmarks.png")))
    seam = np.array([r["residual"] for r in doc["pairs"] if r["residual"] is not None])
    plane = np.concatenate([p.blocks.magnitudes for p in meas.plane_pairs] or [np.zeros(0)])
    out.append(("Distributions of pair confidence and residuals",
                plots.save(plots.histograms(doc["pairs"], seam, plane), qc / "histograms.png")))
    return out


def _channel_panels(folder: BuildFolder, doc: dict, size: int = 384) -> list:
    """Return ``(channel, section, em, marker)`` crops for each channel's best-registered section.

    Both come from the written volume: the marker's level 0, and the EM on the same grid
    (the EM level of the marker's pixel size, reduced further from the smallest written
    level when the EM pyramid stops above it).
    """
    import zarr

    from ..render.lazy import open_volume
    from ..render.reduce import reduce2x2

    root = folder.channels_path
    if not root.is_dir() or not doc["channels"]:
        return []
    levels = [k for k in range(32) if (folder.pyramid_path() / str(k) / "zarr.json").exists()]
    em0 = open_volume(folder.root, 0, lazy=False).scale_nm[-1]
    panels = []
    for name in sorted({c["channel"] for c in doc["channels"]}):
        rows = [c for c in doc["channels"] if c["channel"] == name and c["registered"] and c["at"]]
        if not (root / name / "zarr.json").exists() or not rows or not levels:
            continue
        best = max(rows, key=lambda c: c["measure_after"] or 0)
        marker = open_volume(folder.root, 0, lazy=False, channel=name)
        level = int(round(np.log2(marker.scale_nm[-1] / em0)))
        have = min(level, levels[-1])
        z, f, g = best["at"]["z"], 2 ** level, 2 ** (level - have)
        h, w = marker.shape[1:]
        cx, cy = int(best["at"]["x_px"] / f), int(best["at"]["y_px"] / f)
        y0, x0 = max(0, min(cy - size // 2, h - size)), max(0, min(cx - size // 2, w - size))
        em = np.asarray(zarr.open_array(str(folder.pyramid_path() / str(have)), mode="r")[
            z, y0 * g:(y0 + size) * g, x0 * g:(x0 + size) * g])
        for _ in range(level - have):
            em = reduce2x2(em, "mean")
        mk = np.asarray(marker.data[z, y0:y0 + size, x0:x0 + size])
        hh, ww = min(em.shape[0], mk.shape[0]), min(em.shape[1], mk.shape[1])
        panels.append((name, best["section"], em[:hh, :ww], mk[:hh, :ww]))
    return panels


def _volume_figures(folder: BuildFolder, doc: dict, meas, settings: ReportSettings) -> list[tuple[str, Path]]:
    out = []
    worst = doc["worst"]["section_align"]
    at = None
    if worst is not None:
        cand = [s for s in (worst["align_prev"], worst["align_next"]) if s and s["at"]]
        at = max(cand, key=lambda s: s["max"])["at"] if cand else None
    src = open_planes(folder.root, max_px=settings.reslice_px)
    if src is not None:
        vol = doc["volume"]
        h, w = src.data.shape[-2] // src.bin * src.factor, src.data.shape[-1] // src.bin * src.factor
        x, y = (at["x_px"], at["y_px"]) if at else (w / 2, h / 2)
        xz, yz = reslice_planes(src, x, y)
        aspect = vol["section_thickness_nm"] / vol["pixel_size_nm"]
        out.append(("Orthogonal re-slices through the worst spot",
                    plots.save(plots.reslice(xz, yz, aspect, (x, y), src.factor), folder.qc_dir / "reslice.png")))
    if at is not None and meas.source is not None:
        zb = at["z"]
        pair = next((p for p in meas.plane_pairs if p.zb == zb), None)
        if pair is not None:
            half = 128
            a = window(meas.source, pair.za, at["x_px"], at["y_px"], half)
            b = window(meas.source, pair.zb, at["x_px"], at["y_px"], half)
            fig = plots.overlay(a, b, pair.za, pair.zb, (at["x_px"], at["y_px"]))
            out.append(("Adjacent planes at the worst residual", plots.save(fig, folder.qc_dir / "overlay.png")))
    return out


_CSS = """
body{font-family:Helvetica,Arial,sans-serif;margin:24px 32px;color:#22313f;background:#fbfaf7}
h1{font-size:22px;margin:0 0 4px} h2{font-size:17px;margin:28px 0 8px;border-bottom:1px solid #d8d2c4}
.verdict{display:inline-block;padding:6px 14px;border-radius:4px;font-weight:bold;color:#fff;margin:8px 0}
.pass{background:#2a9d8f}.fail{background:#c8553d}
table{border-collapse:collapse;font-size:13px;margin:6px 0}
td,th{border:1px solid #d8d2c4;padding:3px 8px;text-align:right} th{background:#efe9dc}
td.t{text-align:left} tr.bad td{background:#f6d9d0}
figure{margin:14px 0} figure img{max-width:100%;border:1px solid #d8d2c4;background:#fff}
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


def _tables(doc: dict, settings: ReportSettings) -> str:
    n, amax = settings.worst, settings.align_max
    secs = sorted((r for r in doc["sections"] if r["align_score"] is not None), key=lambda r: -r["align_score"])[:n]
    worst_at = lambda r: max((s for s in (r["align_prev"], r["align_next"]) if s and s["n"]),  # noqa: E731
                             key=lambda s: s["max"])
    a_rows = [[r["section"], r["align_score"], (r["align_prev"] or {}).get("p95"), (r["align_next"] or {}).get("p95"),
               worst_at(r)["max"], min(r["inliers"].values(), default=None), r["elastic"]["max"],
               *_loc(worst_at(r)["at"]), "; ".join(r["flags"])] for r in secs]
    a_bad = [worst_at(r)["max"] > amax for r in secs]
    st = sorted((r for r in doc["sections"] if r["stitch"]["rms"] is not None), key=lambda r: -r["stitch"]["rms"])[:n]
    s_rows = [[r["section"], r["stitch"]["rms"], r["stitch"]["p95"], r["stitch"]["max"], r["pairs_rejected"],
               *_loc(r["stitch"]["at"])] for r in st]
    pr = sorted((r for r in doc["pairs"] if r["residual"] is not None), key=lambda r: -r["residual"])[:n]
    vec = lambda v: f"{v[0]:.2f}, {v[1]:.2f}"  # noqa: E731
    p_rows = [[r["section"], r["a"], r["b"], r["residual"], vec(r["misfit"]), r["blocks"]["n"], r["ncc"],
               r["accepted"], r["reason"], *_loc(r["at"])] for r in pr]
    tl = sorted((r for r in doc["tiles"] if r["seam_median"] is not None), key=lambda r: -r["seam_median"])[:n]
    t_rows = [[r["section"], r["tile"], r["seam_median"], r["seam_max"], r["stitch_residual"], "; ".join(r["flags"]),
               *_loc(r["at"]), r["path"]] for r in tl]
    ch = sorted(doc["channels"], key=lambda c: (c["measure_after"] is not None, c["measure_after"] or 0))[:n]
    shift = lambda v: None if not v else f"{v[0]:.1f}, {v[1]:.1f}"  # noqa: E731
    c_rows = [[c["channel"], c["section"], c["registered"], c["measure_before"], c["measure_after"],
               shift(c["shift_from_given"]), c["rotation_deg"], c["landmark_residual"], "; ".join(c["flags"]),
               *_loc(c["at"])] for c in ch]
    c_bad = [bool(c["flags"]) or c["registered"] is False for c in ch]
    return "".join([
        "<h2>Worst sections: alignment</h2>",
        '<p class="small">score = median over both neighbours of the 95th-percentile residual; '
        f"rows over {amax:g} px (largest residual) are shaded.</p>",
        _table(["section", "score (px)", "p95 to z-1", "p95 to z+1", "max (px)", "fewest inliers",
                "elastic max (px)", *_LOC, "flags"], a_rows, a_bad, (10,)),
        "<h2>Worst sections: stitching</h2>",
        _table(["section", "seam RMS (px)", "p95", "max", "rejected pairs", *_LOC], s_rows),
        "<h2>Worst seams</h2>",
        '<p class="small">residual = length of the misplacement of tile b relative to tile a, re-measured '
        "over their overlap (median over blocks); NCC and accepted are the stitcher's.</p>",
        _table(["section", "tile a", "tile b", "residual (px)", "dx, dy (px)", "blocks", "NCC", "accepted",
                "reason", *_LOC], p_rows, text_cols=(1, 2, 8)),
        "<h2>Worst tiles</h2>",
        _table(["section", "tile", "seam median (px)", "seam max", "stitcher residual", "flags", *_LOC, "path"],
               t_rows, text_cols=(1, 5, 9)),
        "<h2>Channels</h2>",
        '<p class="small">registration measure: normalised mutual information (1 unrelated .. 2 identical); '
        "lowest after registration first.</p>" +
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


def _img(path: Path) -> str:
    return "data:image/png;base64," + base64.b64encode(Path(path).read_bytes()).decode("ascii")


def render_html(doc: dict, verdict_rows: list[dict], passed: bool, figures, settings: ReportSettings) -> str:
    """Return the report as one HTML document."""
    tot = doc["totals"]
    vol = doc["volume"]
    badge = '<span class="verdict pass">PASSED</span>' if passed else '<span class="verdict fail">FAILED</span>'
    th = _table(["condition", "measured", "result"],
                [[r["condition"], r["measured"], "FAIL" if r["failed"] else "ok"] for r in verdict_rows],
                [r["failed"] for r in verdict_rows], (0,))
    keys = [k for k in tot if tot[k] is not None]
    totals = _table(["measure", "value"], [[k, tot[k]] for k in keys], text_cols=(0,))
    src = vol["measured_on"]
    measured = ("section residuals measured on " + html.escape(f"{src['origin']} level {src['level']} "
                                                             f"({src['factor']:g} px per pixel)") if src else
                "section residuals not measured")
    notes = "".join(f"<li>{html.escape(n)}</li>" for n in doc["notes"]) or "<li>none</li>"
    figs = "".join(f'<figure><img src="{_img(p)}" alt="{html.escape(c)}"><figcaption>{html.escape(c)}'
                   "</figcaption></figure>" for c, p in figures)
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return (f"<!DOCTYPE html><html lang=en><head><meta charset=utf-8><title>stackbuild quality report</title>"
            f"<style>{_CSS}</style></head><body>"
            f"<h1>Volume quality report</h1><div class=small>{html.escape(doc['build'])} &middot; {when} &middot; "
            f"{vol['depth'] or '-'} planes of {vol['width'] or '-'} x {vol['height'] or '-'} px, "
            f"{_fmt(vol['pixel_size_nm'])} nm/px, {_fmt(vol['section_thickness_nm'])} nm sections &middot; "
            f"{measured}</div>{badge}<h2>Thresholds</h2>{th}<h2>Totals</h2>{totals}"
            f"<h2>Notes</h2><ul class=small>{notes}</ul>{_tables(doc, settings)}<h2>Figures</h2>{figs}"
            "<p class=small>Residuals are full-resolution pixels; coordinates are output pixels of level 0 "
            "and nanometres (pixel x pixel size).</p></body></html>")


def run_report(build_dir, settings: ReportSettings, *, fail_on: list[str] | None = None,
               progress=None) -> Verdict:
    """Measure a build, write ``DIR/qc`` (metrics.json, CSV tables, PNG figures, report.html).

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
    doc, meas = collect(build_dir, settings, progress)
    passed, failures, rows = judge(doc, thresholds)
    doc["verdict"] = {"passed": passed, "failures": failures, "thresholds": rows}
    figures = _figures(folder, doc, meas, settings)
    paths = write_metrics(doc, folder.qc_dir, meas) + [p for _, p in figures]
    page = folder.report_path
    atomic_write_text(page, render_html(doc, rows, passed, figures, settings))
    asked = set(parse_fail_on_list([t for t in (fail_on or []) if not isinstance(t, Threshold)])
                + [t for t in (fail_on or []) if isinstance(t, Threshold)])
    _, missed, _ = judge(doc, [t for t in thresholds if t in asked])
    return Verdict(passed, failures, paths + [page], missed)
