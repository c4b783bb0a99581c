"""Per-section measurements as tasks: seams, tile and pair rows, the section's own figures, kept for re-use.

One task measures one section on a worker (:func:`seam_job`): it takes the section's seams
from the stitcher's pair offsets against the final placements, checked against the raw tiles
(:func:`stackbuild.qc.measure.seams_of`; a pair re-measured from the tiles holds at most a row of
overlap strips, :func:`stackbuild.qc.measure.measure_seams`), turns them into tile and pair rows, and
reads from the section's records what the report copies (flags, the stitcher's and the
aligner's statistics, the elastic field's size, the straightening grid's positions).
The rows go to ``DIR/qc/measured/sections/<section>.json``, stamped with the section's
fingerprint (:func:`stackbuild.qc.reuse.section_fingerprint`); the task returns a small
summary only (counts, the seam summary, the worst rows, the flagged tiles). When the stored
file carries the same fingerprint the task returns its summary without measuring.

What one task holds at production size (1000 tiles of 4096 px): four tiles as float32
(268 MB), the section's 2000 pair rows and 1000 tile rows (a few MB); the driver holds
one summary per section (a few kB).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..folder import BuildFolder
from .blockmatch import BlockMatches, summarize
from .measure import seams_of, section_to_output
from .reuse import section_fingerprint, stored_measurement, write_measurement
from .settings import ReportSettings
from .straighten import section_positions

#: tiles or pairs per section kept in the summary as the section's worst rows
TOP_ROWS = 10


@dataclass(frozen=True)
class SectionJob:
    """What one section task needs (small and picklable)."""

    build: str
    section: int
    settings: ReportSettings
    grid: tuple = ()          # straightening grid ((x, y), ...) level-0 output px, the same for every plane
    reuse: bool = True


def section_file(build, section: int) -> Path:
    """Return the path of a section's stored measurements."""
    return BuildFolder(build).measurement_path("sections", f"{int(section):05d}")


def physical_scale(folder: BuildFolder, canvas) -> tuple[float, float]:
    """Return ``(pixel size, section thickness)`` in nm: the canvas's, else the build's settings, else 4 and 40."""
    if canvas is not None:
        return canvas.pixel_size_nm, canvas.section_thickness_nm
    vol = {}
    try:
        vol = folder.load_state().get("config", {}).get("volume", {})
    except Exception:  # a hand-made folder without build.json still gets a report
        pass
    return float(vol.get("pixel_size", 4.0)), float(vol.get("section_thickness", 40.0))


class Locator:
    """Output locations (level-0 px and nm) of section points, for one build's canvas and scale."""

    def __init__(self, canvas, px_nm: float, dz_nm: float):
        self.canvas, self.px_nm, self.dz_nm = canvas, px_nm, dz_nm

    def z(self, section: int) -> int | None:
        return None if self.canvas is None else section - self.canvas.first_section

    def at(self, section: int, xy_out) -> dict:
        x, y = float(xy_out[0]), float(xy_out[1])
        z = self.z(section)
        return {"section": int(section), "z": z, "x_px": round(x, 2), "y_px": round(y, 2),
                "x_nm": round(x * self.px_nm, 1), "y_nm": round(y * self.px_nm, 1),
                "z_nm": None if z is None else round(z * self.dz_nm, 1)}


def _blocks_summary(blocks: BlockMatches) -> tuple[dict, np.ndarray | None]:
    """Return a pair's block summary and the section point of its largest block (placed later, in one batch)."""
    mags = blocks.magnitudes
    return summarize(mags), (blocks.points[int(np.argmax(mags))] if mags.size else None)


def stitch_rows(section, stitch, seams, align, loc: Locator):
    """Return tile rows, pair rows and the section's seam summary (over the pairs' rigid misfits).

    Every place is mapped to the output in one call (the alignment's inverse is the costly part).
    """
    recorded = {(p.a, p.b): p for p in stitch.pairs}
    pairs, misfits, places = [], [], []
    todo: list[tuple[dict, str, np.ndarray]] = []   # (row, key, section point): places to map at the end
    for sb in seams:
        p = recorded.get((sb.a, sb.b))
        row = {"section": section, "a": sb.a, "b": sb.b}
        for k in ("dx", "dy", "stage_dx", "stage_dy", "ncc", "peak_ratio", "accepted", "reason"):
            row[k] = getattr(p, k) if p else None
        row["stitch_residual"] = p.residual if p else None
        if len(sb.blocks.ncc):
            one = len(sb.blocks.ncc) == 1  # a pair measured from the stitcher's offset: its one point
            vec = sb.blocks.shifts[0] if one else np.median(sb.blocks.shifts, axis=0)
            centre = sb.blocks.points[0] if one else sb.blocks.points.mean(axis=0)
            row["misfit"] = [float(vec[0]), float(vec[1])]
            row["residual"] = float(np.hypot(*vec))
            todo.append((row, "at", centre))
            misfits.append(row["residual"])
            places.append(centre)
        else:
            row["misfit"] = row["residual"] = row["at"] = None
        row["blocks"], worst = _blocks_summary(sb.blocks)
        row["blocks"]["at"] = None
        if worst is not None:
            todo.append((row["blocks"], "at", worst))
        row["error"] = sb.error
        row["measured_from"] = sb.source
        pairs.append(row)
    mine: dict[str, list[float]] = {}
    for r in pairs:
        if r["residual"] is not None:
            mine.setdefault(r["a"], []).append(r["residual"])
            mine.setdefault(r["b"], []).append(r["residual"])
    tiles = []
    for t in stitch.tiles:
        m = mine.get(t.tile, [])
        centre = (t.x + (t.width - 1) / 2, t.y + (t.height - 1) / 2)
        flags = list(t.flags) + ([] if Path(t.path).is_file() else ["missing_file"])
        row = {"section": section, "tile": t.tile, "path": t.path, "x": t.x, "y": t.y,
               "flags": flags, "stitch_residual": t.residual,
               "seam_median": float(np.median(m)) if m else None,
               "seam_max": max(m, default=None), "seams": len(m), "at": None}
        todo.append((row, "at", np.asarray(centre, float)))
        tiles.append(row)
    summary = summarize(misfits)
    summary["at"] = None
    if misfits:
        todo.append((summary, "at", places[int(np.argmax(misfits))]))
    if todo:
        out = section_to_output(np.array([pt for _, _, pt in todo], float), align, loc.canvas)
        for (target, key, _), xy in zip(todo, out):
            target[key] = loc.at(section, xy)
    return tiles, pairs, summary


def _elastic(section, align, loc: Locator) -> dict:
    if align is None or align.displacement is None:
        return {"rms": None, "max": None, "at": None}
    d = align.displacement
    mag = np.hypot(d.vectors[..., 0], d.vectors[..., 1])
    j, i = np.unravel_index(int(np.argmax(mag)), mag.shape)
    node = np.array([d.origin[0] + i * d.spacing, d.origin[1] + j * d.spacing])
    off = np.array([loc.canvas.origin_x, loc.canvas.origin_y]) if loc.canvas else 0.0
    st = d.magnitude_stats()
    return {"rms": st["rms"], "max": st["max"], "at": loc.at(section, node - off)}


def _inliers(align) -> dict:
    """Return ``{neighbour section: RANSAC inliers}`` from the aligner's statistics (empty if absent)."""
    pairs = ((align.stats if align else {}).get("coarse") or {}).get("pairs") or {}
    return {str(k): int(v["inliers"]) for k, v in pairs.items()
            if isinstance(v, dict) and isinstance(v.get("inliers"), (int, float))}


def _top(rows, key, n):
    ok = [r for r in rows if key(r) is not None]
    return sorted(ok, key=lambda r: -key(r))[:n]


#: types :func:`jsonable` returns as they are (exact types: a subclass, numpy's float64 among them, takes the long way)
_AS_IS = frozenset({str, int, bool, type(None)})


def jsonable(x):
    """Return ``x`` with numpy scalars as Python numbers, non-finite floats as None and keys as strings."""
    # the exact built-in types first: a section's stored rows are tens of thousands of plain values, and
    # numpy's isfinite on a Python float and isinstance against numpy's abstract types cost more than the walk
    t = type(x)
    if t in _AS_IS:
        return x
    if t is float:
        return x if math.isfinite(x) else None
    if t is list or t is tuple:
        return [v if type(v) in _AS_IS else jsonable(v) for v in x]
    if t is dict:
        return {k if type(k) is str else str(k): v if type(v) in _AS_IS else jsonable(v) for k, v in x.items()}
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [jsonable(v) for v in x]
    if isinstance(x, (np.floating, float)):
        return float(x) if np.isfinite(x) else None
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    return x


def _summary(section, stitch, align, tiles, pairs, seam, loc, grid) -> dict:
    """Return what the driver keeps of one section (a few kB whatever its tile count)."""
    pos = None
    if grid and loc.canvas is not None:
        pos = section_positions(align, loc.canvas, np.asarray(grid, float)).round(3).tolist()
    return {
        "section": section, "stitched": stitch is not None, "aligned": align is not None,
        "flags": list(stitch.flags if stitch else []) + list(align.flags if align else []),
        "tiles": len(tiles), "pairs": sum(r["accepted"] is not None for r in pairs),
        "pairs_accepted": sum(bool(p.accepted) for p in stitch.pairs) if stitch else 0,
        "pairs_rejected": sum(not p.accepted for p in stitch.pairs) if stitch else 0,
        "rejected": sum(r["accepted"] is False for r in pairs), "pair_rows": len(pairs),
        "blank": bool(stitch is not None and stitch.tiles and all("blank" in t.flags for t in stitch.tiles)),
        "missing": sum("missing_file" in r["flags"] for r in tiles),
        "flagged_tiles": [r for r in tiles if r["flags"]][:1000], "flagged_count": sum(bool(r["flags"]) for r in tiles),
        "stitch": seam, "stitcher_stats": dict(stitch.stats) if stitch else {},
        "inliers": _inliers(align), "elastic": _elastic(section, align, loc),
        "aligner_stats": dict(align.stats) if align else {},
        "top_tiles": _top(tiles, lambda r: r["seam_median"], TOP_ROWS),
        "top_pairs": _top(pairs, lambda r: r["residual"], TOP_ROWS),
        "errors": [f"section {section} tile pair {r['a']}-{r['b']}: {r['error']}" for r in pairs if r["error"]],
        "positions": pos,
    }


def seam_job(job: SectionJob) -> dict:
    """Measure one section's seams and copied figures (or re-use them); return its summary (runs on a worker).

    Named ``seam_job`` for the plan's task kinds (``report.seams``, :mod:`stackbuild.run.plan_measure`).
    """
    folder = BuildFolder(job.build)
    store = folder.store
    canvas = store.load_canvas()
    fp = section_fingerprint(folder, job.section, job.settings, job.grid)
    path = section_file(job.build, job.section)
    old = stored_measurement(path) if job.reuse else None
    if old is not None and old.get("fingerprint") == fp:
        return {**old["summary"], "reused": True, "fingerprint": fp}
    stitch = store.load_stitch(job.section)
    align = store.load_alignment(job.section)
    loc = Locator(canvas, *physical_scale(folder, canvas))
    if stitch is not None:
        tiles, pairs, seam = stitch_rows(job.section, stitch, seams_of(stitch, job.settings), align, loc)
    else:
        tiles, pairs, seam = [], [], summarize([]) | {"at": None}
    summary = jsonable(_summary(job.section, stitch, align, tiles, pairs, seam, loc, job.grid))
    write_measurement(path, {"fingerprint": fp, "summary": summary, "tiles": jsonable(tiles), "pairs": jsonable(pairs)})
    return {**summary, "reused": False, "fingerprint": fp}


def stored_tables(build, section: int, kinds: tuple[str, ...]) -> dict[str, list[dict]]:
    """Return ``{kind: rows}`` of one section's stored ``"tiles"`` / ``"pairs"`` rows, from one read of its file."""
    path = section_file(build, section)
    doc = json.loads(path.read_text(encoding="utf-8")) if path.is_file() else {}
    return {k: doc.get(k) or [] for k in kinds}


def stored_rows(build, section: int, kind: str) -> list[dict]:
    """Return the stored ``"tiles"`` or ``"pairs"`` rows of one section (empty when not measured)."""
    return stored_tables(build, section, (kind,))[kind]
