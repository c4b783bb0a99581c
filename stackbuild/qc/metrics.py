"""Quality metrics of one build: ``DIR/qc/metrics.json`` and its CSV tables.

Schema of ``metrics.json`` (``schema_version`` 2)
------------------------------------------------
All errors and residuals are in full-resolution (level-0) pixels. Every place
is given as a *location*: ``{"section", "z", "x_px", "y_px", "x_nm", "y_nm",
"z_nm"}`` where ``x_px, y_px`` are level-0 output pixels (column, row of a
plane of the volume), ``x_nm = x_px * pixel_size_nm``, ``y_nm`` likewise, and
``z_nm = z * section_thickness_nm``. The worst places (``align_error_at``, ``stitch.at``) of
the ``worst`` worst-aligned sections also carry ``tile``, ``tile_x``, ``tile_y`` (raw tile
pixels) and ``stage_x``, ``stage_y`` (stage, full-resolution pixels), see
:func:`stackbuild.transforms.locate.from_volume`. A residual summary is ``{"n", "rms",
"median", "p95", "max", "at"}`` (all ``None`` when nothing was measured).

``schema_version``  int, 2.
``build``           the build folder.
``volume``          ``pixel_size_nm``, ``section_thickness_nm``, ``width``,
                    ``height``, ``depth``, ``first_section``, ``lost_sections``,
                    ``measured_on`` (``{"origin", "level", "factor"}`` of the planes
                    the alignment error was estimated on, or ``None``).
``sections``        one per section: ``section``, ``z``, ``lost``, ``flags``,
                    ``align_error_px`` (estimated alignment error: RMS over the probe
                    blocks of how far the plane deviates from where its neighbours put
                    it, see :mod:`stackbuild.qc.zchain`), ``align_error_unc_px`` (its
                    1-sigma uncertainty), ``align_error_blocks``, ``align_error_max_px``
                    and ``align_error_at`` (largest block), ``motion_prev`` (apparent
                    motion to the plane before: ``n``, ``median``, ``p95``, ``tried``,
                    ``beyond``; tissue change included, for information), ``tiles``,
                    ``pairs_accepted``, ``pairs_rejected``, ``stitch`` (summary over the
                    section's pair ``residual`` values), ``stitcher_stats``, ``inliers``
                    (``{neighbour's offset: RANSAC inliers}``, offsets ``"+1"``, ``"-2"``), ``elastic`` (``{"rms",
                    "max", "at"}`` of the stored field), ``aligner_stats``.
``flagged_tiles``   tiles that carry a flag (at most :data:`FLAGGED_TILES_IN_JSON`),
                    as rows of ``tiles.csv``.
``tables``          row counts of ``tiles.csv`` and ``pairs.csv``.
``channels``        one per (section, marker channel) registration: ``section``,
                    ``channel``, ``path``, ``registered``, ``measure`` (its name),
                    ``measure_before``, ``measure_after``, ``shift_from_given``
                    (section px), ``rotation_deg``, ``scale_ratio``, ``flags``,
                    ``landmark_residual`` (RMS over its landmarks, EM px; ``None``
                    without landmarks), ``at`` (the image centre), ``failure`` (the channel
                    stage's line when the registration was rejected, else ``None``).
``landmarks``       one per row of the build's landmark file (see
                    :mod:`stackbuild.qc.landmarks`).
``totals``          the measures that ``--fail-on`` can test, see
                    :data:`stackbuild.qc.thresholds.MEASURES` and their meanings in
                    :data:`stackbuild.qc.glossary.TOTALS`.
``worst``           ``tile``, ``pair``, ``section_stitch``, ``section_align``,
                    ``channel``, ``landmark``: the worst row of each (or ``None``).
``notes``           what could not be measured or was left out, and why.
``verdict``         ``passed``, ``failures``, ``thresholds``.
``provenance``      ``version``, ``written``, ``settings``, ``inputs`` (path, sha256,
                    bytes of each manifest), ``stages`` (status and seconds).

CSV tables beside it
--------------------
``sections.csv`` (the ``sections`` rows flattened; ``align_error_px`` is a kept
column name), ``tiles.csv`` (one per tile: ``section``, ``tile``, ``path``, ``x``,
``y``, ``flags``, ``stitch_residual``, ``seam_median``, ``seam_max``, ``seams``,
``at``), ``pairs.csv`` (one per tile pair: stitcher's ``dx``, ``dy``, ``ncc``,
``accepted``, ``reason``; ``misfit`` and ``residual`` at the final placement, and ``measured_from``:
``tiles`` when re-measured over the raw overlap, ``stitcher`` when taken from the stitcher's offset
and checked, see :func:`stackbuild.qc.measure.seams_of`), ``regions.csv``
(one per probe region), ``blocks.csv`` (a sample of probe blocks: ``z``, ``x_px``,
``y_px``, ``error_dx``, ``error_dy``, ``error``),
``channels.csv`` and ``landmarks.csv`` when there are any.

The alignment error is an independent measurement of the output; seam misfits are the final
placements against the stitcher's measured pair offsets, checked against the raw tiles. The
stitcher's and aligner's own statistics are kept apart (``stitcher_stats``, ``aligner_stats``).
"""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..manifest import image_header
from ..folder import BuildFolder
from ..transforms.records import Canvas, ChannelRegistration
from .blockmatch import summarize
from .landmarks import landmark_rows, landmark_totals, per_channel_rms
from .measure import Measurements, section_to_output
from .probe import measure_error
from .straighten import straightening
from .zchain import pooled_errors
from .planes import open_planes
from .settings import ReportSettings

from .bars import SCHEMA_VERSION  # noqa: E402,F401 (one number for writer and reader)


def location(section: int, z: int | None, xy, canvas: Canvas | None, px_nm: float, dz_nm: float) -> dict:
    """Return a location record for a level-0 output pixel ``xy = (x, y)``."""
    x, y = float(xy[0]), float(xy[1])
    return {"section": int(section), "z": None if z is None else int(z), "x_px": round(x, 2),
            "y_px": round(y, 2), "x_nm": round(x * px_nm, 1), "y_nm": round(y * px_nm, 1),
            "z_nm": None if z is None else round(z * dz_nm, 1)}


class _Scale:
    """Physical scale and section <-> plane bookkeeping of one build."""

    def __init__(self, folder: BuildFolder, canvas: Canvas | None):
        from .sections import physical_scale

        self.canvas = canvas
        self.px_nm, self.dz_nm = physical_scale(folder, canvas)

    def z(self, section: int) -> int | None:
        return None if self.canvas is None else section - self.canvas.first_section

    def section(self, z: int) -> int:
        return z + (self.canvas.first_section if self.canvas else 0)

    def at(self, section: int, xy_out) -> dict:
        return location(section, self.z(section), xy_out, self.canvas, self.px_nm, self.dz_nm)


def plane_errors(probe, depth: int) -> dict[int, dict]:
    """Return ``{z: {"align_error_px", "align_error_unc_px", "blocks", "max", "at_xy"}}`` from the probe's plane sums.

    Each plane's error is pooled with its neighbours' along z (:func:`stackbuild.qc.zchain.pool_along_z`).
    """
    out = {}
    pooled = pooled_errors(probe.planes) if probe is not None else {}
    for z in range(depth):
        p = probe.planes.get(z) if probe is not None else None
        if not p or z not in pooled:
            out[z] = {"align_error_px": None, "align_error_unc_px": None, "blocks": 0, "max": None, "at_xy": None}
            continue
        est, unc = pooled[z]
        out[z] = {"align_error_px": est, "align_error_unc_px": unc, "blocks": int(p["n"]),
                  "max": float(p["max"]) if p["max"] >= 0 else None, "at_xy": p["at_xy"] if p["max"] >= 0 else None}
    return out


def _motion(probe) -> dict[tuple[int, int], dict]:
    """Return per pair ``(z_from, z_to)``: blocks matched, tried and beyond the search, apparent motion median, p95 (px)."""
    return {} if probe is None else {k: v for k, v in probe.links.items() if v.get("tried")}


def _beyond_reach(motion: dict, z) -> float:
    """Return the share of tried blocks whose match lay beyond the search, over the span-1 links touching ``z``.

    Only when both such links (or the only one) are beyond reach is the plane itself blamed.
    """
    shares = [v["beyond"] / v["tried"] for (a, b), v in motion.items()
              if z in (a, b) and v["tried"] and b - a == 1]
    return min(shares) if shares else 0.0


def _section_rows(sections, sums: dict[int, dict], meas, sc: _Scale, settings) -> list[dict]:
    depth = sc.canvas.depth if sc.canvas else 0
    errors = plane_errors(meas.probe, depth) if meas.probe is not None else {}
    motion = _motion(meas.probe)
    prev = {zb: v for (za, zb), v in sorted(motion.items(), key=lambda kv: kv[0][1] - kv[0][0], reverse=True)
            if v["n"]}
    lost = set(sc.canvas.lost_sections) if sc.canvas else set()
    rows = []
    for s in sections:
        sm, z = sums.get(s) or {}, sc.z(s)
        flags = list(sm.get("flags") or [])
        if sc.canvas and s in sc.canvas.flagged_sections:
            extra = sc.canvas.flagged_sections[s]
            flags += [str(f) for f in extra] if isinstance(extra, (list, tuple, dict)) else [str(extra)]
        err = errors.get(z) or {"align_error_px": None, "align_error_unc_px": None, "blocks": 0, "max": None,
                                "at_xy": None}
        reach = _beyond_reach(motion, z)
        if reach > 0.25:
            # a quarter of the blocks found their match only at the edge of the search: the plane is off
            # by more than the probe can see, so its error is at least the search range
            flags.append("beyond_probe_reach")
            err = {**err, "align_error_px": max(err["align_error_px"] or 0.0, float(settings.probe_reach)),
                   "align_error_unc_px": None}
        jitter = err["align_error_px"]
        bent = meas.straightened.get(z)
        if jitter is not None:
            # the two parts are independent by construction (one non-linear in z, one linear)
            total = float(np.hypot(jitter, bent or 0.0))
            unc = err["align_error_unc_px"]
            if unc is not None:
                # add the model error seen against ground truth on the phantoms (bench_qc.py --agreement):
                # about 0.1 px plus 15 % of the estimate (an empirical term, not a derived one)
                unc = float(np.hypot(unc, 0.1 + 0.15 * total))
            err = {**err, "align_error_px": total, "align_error_unc_px": unc}
        if err["align_error_px"] is not None and err["align_error_px"] > settings.align_max:
            flags.append("error_over_bar")
        if s not in lost and sm.get("stitched") and not err["blocks"] and meas.probe is not None:
            flags.append("not_measured")
        rows.append({
            "section": s, "z": z, "lost": s in lost, "flags": sorted(set(flags)),
            "align_error_px": err["align_error_px"], "align_error_unc_px": err["align_error_unc_px"],
            "align_error_blocks": err["blocks"], "jitter_px": jitter, "straightened_px": bent,
            "align_error_max_px": err["max"],
            "align_error_at": sc.at(s, err["at_xy"]) if err["at_xy"] is not None else None,
            "motion_prev": prev.get(z),
            "tiles": sm.get("tiles", 0),
            "pairs_accepted": sm.get("pairs_accepted", 0), "pairs_rejected": sm.get("pairs_rejected", 0),
            "stitch": sm.get("stitch") or summarize([]) | {"at": None},
            "stitcher_stats": sm.get("stitcher_stats") or {},
            "inliers": by_offset(sm.get("inliers") or {}, s),
            "elastic": sm.get("elastic") or {"rms": None, "max": None, "at": None},
            "aligner_stats": _aligner_stats(sm.get("aligner_stats") or {}, s),
        })
    return rows


def by_offset(per_neighbour: dict, section: int) -> dict:
    """Return ``{neighbour section: value}`` keyed by the neighbour's offset instead (``"+1"``, ``"-2"``).

    A section's links are to its near neighbours, so keyed by offset every row of ``sections.csv``
    has the same few columns (``inliers.+1``, ``inliers.+2``, ...). Keyed by section number, the
    table had a set of columns per section of the stack, nearly all empty: 36 sections made 333
    columns; 400 would make about 3,000.
    """
    return {f"{int(k) - section:+d}": v for k, v in sorted(per_neighbour.items(), key=lambda kv: int(kv[0]))}


def _aligner_stats(stats: dict, section: int) -> dict:
    """Return the aligner's statistics of one section with its coarse pairs keyed by offset (:func:`by_offset`)."""
    coarse = stats.get("coarse")
    if not isinstance(coarse, dict) or not isinstance(coarse.get("pairs"), dict):
        return stats
    return {**stats, "coarse": {**coarse, "pairs": by_offset(coarse["pairs"], section)}}


def _image_size(path: str) -> tuple[int, int] | None:
    """Return ``(width, height)`` from an image header, or None if it cannot be read."""
    try:
        height, width, _ = image_header(Path(path))
    except InputError:
        return None
    return width, height


def _channel_rows(store, sections, aligns, sc: _Scale) -> list[dict]:
    """Return one row per registered marker channel, from the channel stage's records."""
    rows = []
    for s in sections:
        rec = store.load_doc("channels", section=s)
        for name, ch in sorted(((rec or {}).get("channels") or {}).items()):
            size = _image_size(ch.get("path", ""))
            at = None
            if size is not None and ch.get("transform"):
                to_section = ChannelRegistration.from_json(ch, section=s, channel=name).to_section
                c = to_section.apply([[(size[0] - 1) / 2, (size[1] - 1) / 2]])
                at = sc.at(s, section_to_output(c, aligns.get(s), sc.canvas)[0])
            rows.append({"section": s, "channel": name, "path": ch.get("path"),
                         "registered": ch.get("registered"), "measure": ch.get("measure"),
                         "measure_before": ch.get("measure_before"), "measure_after": ch.get("measure_after"),
                         "shift_from_given": ch.get("shift_from_given"), "rotation_deg": ch.get("rotation_deg"),
                         "scale_ratio": ch.get("scale_ratio"), "flags": list(ch.get("flags") or []),
                         "landmark_residual": ch.get("landmark_residual"), "at": at,
                         "failure": ch.get("failure")})
    return rows


def _worst(rows: list[dict], key) -> dict | None:
    ok = [r for r in rows if key(r) is not None]
    return max(ok, key=key) if ok else None


def _totals(sums: dict[int, dict], sections, channels, meas: Measurements) -> dict:
    def top(rows, key):
        vals = [key(r) for r in rows if key(r) is not None]
        return max(vals) if vals else None

    err = np.array([r["align_error_px"] for r in sections if r["align_error_px"] is not None])
    # apparent motion between adjacent planes only (across a lost section the tissue itself changed twice)
    motion = [r["motion_prev"]["p95"] for r in sections
              if r["motion_prev"] and r["z"] is not None and not r["lost"]]
    n_pairs = sum(v["pairs"] for v in sums.values())
    rejected = sum(v["rejected"] for v in sums.values())
    fs = sum(bool(r["flags"]) for r in sections)
    ft = sum(v["flagged_count"] for v in sums.values())
    fc = sum(bool(r["flags"]) or r["registered"] is False for r in channels)
    blank = sum(1 for r in sections if "blank_section" in r["flags"])
    missing = sum(v["missing"] for v in sums.values())
    return {
        "align.rms": float(np.sqrt(np.mean(err ** 2))) if err.size else None,
        "align.p95": float(np.percentile(err, 95)) if err.size else None,
        "align.max": float(err.max()) if err.size else None,
        "stitch.rms": top(sections, lambda r: r["stitch"]["rms"]),
        "stitch.p95": top(sections, lambda r: r["stitch"]["p95"]),
        "stitch.max": top(sections, lambda r: r["stitch"]["max"]),
        "motion.p95": max(motion) if motion else None,
        "elastic.max": top(sections, lambda r: r["elastic"]["max"]),
        "sections.blank": blank, "tiles.missing": missing,
        "sections.unmeasured": sum(1 for r in sections if "not_measured" in r["flags"]),
        "channels.failed": sum(r["registered"] is False for r in channels),
        "flagged": fs + ft, "flagged.sections": fs, "flagged.tiles": ft,
        "lost": sum(r["lost"] for r in sections), "rejected": rejected,
        "rejected.fraction": rejected / n_pairs if n_pairs else None,
        "channels.flagged": fc,
        "tiles": sum(v["tiles"] for v in sums.values()), "pairs": sum(v["pair_rows"] for v in sums.values()),
        "sections": len(sections), "channels": len(channels),
    }


def straighten_grid(canvas, settings: ReportSettings) -> tuple:
    """Return the output grid ``((x, y), ...)`` (level-0 px) on which straightening is read, about ``probe_blocks`` points."""
    if canvas is None:
        return ()
    step = max(float(settings.probe_spacing), float(np.sqrt(canvas.width * canvas.height / max(settings.probe_blocks, 1))))
    gx, gy = np.meshgrid(np.arange(step / 2, canvas.width, step), np.arange(step / 2, canvas.height, step))
    return tuple((round(float(x), 3), round(float(y), 3)) for x, y in zip(gx.ravel(), gy.ravel()))


def _straightened(sums: dict[int, dict], canvas, present: list[int], grid: tuple) -> dict[int, float]:
    """Return ``{z: px}``: oblique structure straightened by the aligner, read from its stored transforms.

    Each section task maps the grid through its section's transforms (``positions`` of its
    summary); see :mod:`stackbuild.qc.straighten`.
    """
    if canvas is None or len(present) < 3 or not grid:
        return {}
    pts = np.asarray(grid, float)
    secs = [canvas.first_section + z for z in present]
    mapped = np.stack([np.asarray((sums.get(s) or {}).get("positions") or pts + [canvas.origin_x, canvas.origin_y],
                                  float) for s in secs])
    vals = straightening(pts, mapped, np.asarray(present, float))
    return {z: float(v) for z, v in zip(present, vals) if np.isfinite(v)}


def measure_factor(settings: ReportSettings) -> float:
    """Return the coarsest pixel (level-0 px) the probe may read: ``measure_scale``, at most a quarter of the bar."""
    return float(max(1.0, min(settings.measure_scale, settings.align_p95 / 4.0)))


def _mark_blank(sections: list[dict], sums: dict) -> None:
    """Flag ``blank_section`` where every tile of a section was found blank (imaged resin or nothing)."""
    for r in sections:
        if (sums.get(r["section"]) or {}).get("blank"):
            r["flags"] = sorted(set(r["flags"]) | {"blank_section"})


def _add_tiles(sections: list[dict], store, canvas, n: int) -> None:
    """Give the worst places of the ``n`` worst-aligned sections their raw tile and stage position.

    Adds ``tile``, ``tile_x``, ``tile_y`` (raw tile pixels) and ``stage_x``, ``stage_y``
    (full-resolution stage pixels) to ``align_error_at`` and ``stitch.at``, through
    :func:`stackbuild.transforms.locate.from_volume` (the tile that sees the point farthest
    from its edges). Only these few sections' records are read.
    """
    from ..transforms.locate import from_volume

    if canvas is None:
        return
    worst = sorted((r for r in sections if r["align_error_px"] is not None), key=lambda r: -r["align_error_px"])[:n]
    for r in worst:
        stitch, align = store.load_stitch(r["section"]), store.load_alignment(r["section"])
        for at in (r["align_error_at"], r["stitch"].get("at")):
            if not at or at.get("z") is None:
                continue
            loc = from_volume(at["z"], at["y_px"], at["x_px"], canvas, stitch, align)
            at.update({k: (round(v, 2) if isinstance(v, float) else v)
                       for k, v in (("tile", loc.tile), ("tile_x", loc.tile_x), ("tile_y", loc.tile_y),
                                    ("stage_x", loc.stage_x), ("stage_y", loc.stage_y))})


class _Records:
    """Section records read on demand (the driver never holds every section's tiles at once)."""

    def __init__(self, load, have):
        self._load, self._have = load, set(have)

    def get(self, section, default=None):
        return self._load(section) if section in self._have else default

    def __getitem__(self, section):
        return self._load(section)

    def __contains__(self, section):
        return section in self._have


def collect(build_dir: str | Path, settings: ReportSettings, progress=None, mapper=None,
            reuse: bool = True, changed: dict | None = None) -> tuple[dict, Measurements]:
    """Return the metrics document of a build and the measurements behind it.

    Each section is measured by one task (:func:`stackbuild.qc.sections.seam_job`) that
    returns a small summary; the probe runs as pair and run tasks (:mod:`stackbuild.qc.probe`). With ``reuse``, measurements
    stored in ``DIR/qc/measured`` whose inputs are unchanged are re-used (see
    :mod:`stackbuild.qc.reuse`). The document's ``tiles`` and ``pairs`` are not kept in
    memory: :func:`stored_rows` streams them from the per-section files.

    Parameters
    ----------
    build_dir : str or Path
        The build folder.
    settings : ReportSettings
        Block sizes and the measuring level.
    progress : callable, optional
        Called as ``progress(done, total)`` while the sections are measured.
    mapper : callable, optional
        ``mapper(fn, items)`` running the tasks (the build's Dask mapper); ``map`` when omitted.
    reuse : bool
        False measures everything again.
    changed : dict, optional
        Where planes changed since the stored measurements (see :func:`stackbuild.qc.probe.measure_error`).
    """
    from .sections import SectionJob, seam_job

    folder = BuildFolder(build_dir)
    store = folder.store
    canvas = store.load_canvas()
    sc = _Scale(folder, canvas)
    stitched = store.sections_with("stitch")
    aligned = store.sections_with("align")
    secs = sorted(set(stitched) | set(aligned) | (set(canvas.lost_sections) if canvas else set()))
    meas = Measurements()
    run = mapper or map
    grid = straighten_grid(canvas, settings)
    todo = sorted(set(stitched) | set(aligned))
    sums = {}
    for k, sm in enumerate(run(seam_job, [SectionJob(str(build_dir), s, settings, grid, reuse) for s in todo])):
        sums[sm["section"]] = sm
        meas.seams[sm["section"]] = sm["pair_rows"]
        meas.section_fps[sm["section"]] = sm.get("fingerprint")
        meas.reused["sections"] += bool(sm.get("reused"))
        if progress:
            progress(k + 1, len(todo))
    meas.build = str(build_dir)
    meas.sections = sorted(s for s in sums if sums[s]["stitched"])
    factor = measure_factor(settings)
    meas.source = open_planes(build_dir, max_factor=factor)
    written = meas.source is not None and meas.source.origin == "volume.zarr"
    if meas.source is None:
        meas.notes.append("no rendered volume yet: the alignment error was not estimated")
    else:
        lost = {sc.z(s) for s in canvas.lost_sections} if canvas else set()
        present = [z for z in range(meas.source.depth) if z not in lost]
        meas.probe = measure_error(build_dir, meas.source, present, settings, written=written,
                                   max_factor=factor, mapper=mapper or map, reuse=reuse, changed=changed)
        meas.straightened = _straightened(sums, canvas, present, grid)
    sections = _section_rows(secs, sums, meas, sc, settings)
    _mark_blank(sections, sums)
    _add_tiles(sections, store, canvas, settings.worst)
    aligns = _Records(store.load_alignment, aligned)
    channels = _channel_rows(store, secs, aligns, sc)
    landmarks, notes = landmark_rows(folder, _Records(store.load_stitch, stitched), aligns, sc)
    meas.notes += notes
    rms = per_channel_rms(landmarks)
    for r in channels:
        r["landmark_residual"] = rms.get((r["section"], r["channel"]))
    meas.notes += [e for s in sorted(sums) for e in sums[s]["errors"]]
    src = meas.source
    top_tiles = [r for s in sorted(sums) for r in sums[s]["top_tiles"]]
    top_pairs = [r for s in sorted(sums) for r in sums[s]["top_pairs"]]
    doc = {
        "schema_version": SCHEMA_VERSION, "build": str(getattr(folder, "home", folder.root)),
        "volume": {"pixel_size_nm": sc.px_nm, "section_thickness_nm": sc.dz_nm,
                   "width": canvas.width if canvas else None, "height": canvas.height if canvas else None,
                   "depth": canvas.depth if canvas else None,
                   "first_section": canvas.first_section if canvas else None,
                   "lost_sections": list(canvas.lost_sections) if canvas else [],
                   "measured_on": None if src is None else
                   {"origin": src.origin, "level": src.level, "factor": src.factor}},
        "sections": sections, "channels": channels, "landmarks": landmarks,
        "flagged_tiles": [r for s in sorted(sums) for r in sums[s]["flagged_tiles"]][:FLAGGED_TILES_IN_JSON],
        "worst_tiles": sorted(top_tiles, key=lambda r: -r["seam_median"])[:settings.worst],
        "worst_pairs": sorted(top_pairs, key=lambda r: -r["residual"])[:settings.worst],
        "tables": {"tiles.csv": sum(v["tiles"] for v in sums.values()),
                   "pairs.csv": sum(v["pair_rows"] for v in sums.values())},
        "totals": {**_totals(sums, sections, channels, meas), **landmark_totals(landmarks)},
        "worst": {"tile": top_tiles and max(top_tiles, key=lambda r: r["seam_median"]) or None,
                  "pair": top_pairs and max(top_pairs, key=lambda r: r["residual"]) or None,
                  "section_stitch": _worst(sections, lambda r: r["stitch"]["rms"]),
                  "section_align": _worst(sections, lambda r: r["align_error_px"]),
                  "channel": _worst(channels, lambda r: None if r["measure_after"] is None
                                    else -r["measure_after"]),
                  "landmark": _worst(landmarks, lambda r: r["residual"])},
        "reused": {**meas.reused, **({} if meas.probe is None else {
            "pairs": meas.probe.pairs_reused, "pairs_measured": meas.probe.pairs_measured,
            "runs_solved": meas.probe.runs_solved})},
        "notes": meas.notes,
    }
    return doc, meas


def stored_rows(meas: Measurements, kind: str):
    """Yield the ``"tiles"`` or ``"pairs"`` rows of every measured section, one section's file at a time."""
    from .sections import stored_rows as _rows

    for s in meas.sections:
        yield from _rows(meas.build, s, kind)


def _flat(row: dict, prefix: str = "") -> dict:
    """Flatten nested dicts into ``a.b`` columns; lists become ``;``-joined text."""
    out = {}
    for k, v in row.items():
        name = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(_flat(v, name + "."))
        elif isinstance(v, list):
            out[name] = ";".join(str(x) for x in v)
        else:
            out[name] = v
    return out


def _write_csv(path: Path, rows) -> Path:
    """Write rows (any iterable of dicts, read once) as CSV; the columns are every key seen, in first-seen order.

    Rows are spooled through a temporary file while the columns are collected, so a stream of
    per-section rows is never held whole.
    """
    import tempfile

    from ..transforms.store import replace_atomically

    cols: list[str] = []
    with tempfile.TemporaryFile("w+", newline="", encoding="utf-8") as tmp:
        for r in rows:
            flat = _flat(r)
            for k in flat:
                if k not in cols:
                    cols.append(k)
            tmp.write(json.dumps(flat) + "\n")
        tmp.seek(0)

        def write(fh) -> bool:
            w = csv.DictWriter(fh, fieldnames=cols)
            w.writeheader()
            for line in tmp:
                w.writerow(json.loads(line))
            return True

        replace_atomically(path, write, durable=False, newline="")   # a reader never sees half a table
    return path


def _stored_runs(meas: Measurements):
    """Yield the stored run documents of the probe, one at a time."""
    from .reuse import stored_run

    for first in (meas.probe.runs if meas.probe is not None else []):
        doc = stored_run(meas.build, first)
        if doc is not None:
            yield doc


def block_rows(meas: Measurements):
    """Yield the sampled probe blocks: plane, level-0 place and estimated error (px), one run at a time."""
    for doc in _stored_runs(meas):
        yield from doc.get("sample", [])


def region_rows(meas: Measurements) -> list[dict]:
    """Return one row per probe region: its box (level-0 px), blocks, matching noise, error over the stack, worst plane."""
    from .runs import region_rows as rows

    if meas.probe is None:
        return []
    return rows(_stored_runs(meas), meas.probe.boxes, meas.probe.sigma)


#: at most this many flagged tiles are listed in metrics.json (all of them are in tiles.csv)
FLAGGED_TILES_IN_JSON = 1000


def write_metrics(doc: dict, qc_dir: str | Path, meas: Measurements | None = None) -> list[Path]:
    """Write ``metrics.json`` and the CSV tables (``channels.csv``, ``landmarks.csv`` only if there are any).

    ``metrics.json`` holds the per-section rows, totals, worst rows and verdict; per-tile and
    per-pair rows go to ``tiles.csv`` and ``pairs.csv`` only (plus up to
    :data:`FLAGGED_TILES_IN_JSON` flagged tiles), so its size grows with sections, not tiles:
    about 3 kB per section, under 2 MB for 400 sections whatever their tile count (measured
    by ``tests/benchmarks/bench_qc.py --json-size``). With ``meas``, also ``regions.csv``
    (one row per probe region) and ``blocks.csv`` (a sample of probe blocks, see
    ``blocks_per_region``).
    """
    from ..transforms.store import atomic_write_text
    from .sections import jsonable
    from .tables import write_table

    qc_dir = Path(qc_dir)
    qc_dir.mkdir(parents=True, exist_ok=True)
    path = qc_dir / "metrics.json"
    slim = {k: v for k, v in doc.items() if k not in ("tiles", "pairs")}
    atomic_write_text(path, json.dumps(jsonable(slim), indent=1, allow_nan=False) + "\n")
    paths = [path]
    for name in ("tiles", "pairs"):
        out = qc_dir / f"{name}.csv"
        if name in doc or meas is None:
            paths.append(_write_csv(out, doc.get(name) or []))
        else:  # from per-section parts: a re-report writes again only the sections measured again
            paths.append(write_table(meas.build, meas.sections, name, out, _flat,
                                     lambda out=out, name=name: _write_csv(out, stored_rows(meas, name))))
    for name in ("sections", "channels", "landmarks"):
        if doc.get(name) or name not in ("channels", "landmarks"):
            paths.append(_write_csv(qc_dir / f"{name}.csv", doc[name]))
    if meas is not None:
        paths.append(_write_csv(qc_dir / "regions.csv", region_rows(meas)))
        paths.append(_write_csv(qc_dir / "blocks.csv", block_rows(meas)))
    return paths
