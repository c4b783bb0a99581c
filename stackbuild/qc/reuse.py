"""Fingerprints of what each report measurement was made from, so a re-report measures only what changed.

Two kinds of stored measurement live under ``DIR/qc/measured/``:

* ``sections/<section>.json``: a section's seams, tile and pair rows and copied figures
  (:mod:`stackbuild.qc.sections`). Its fingerprint is the SHA-256 of the section's own
  stitch and alignment records (their bytes), the identity of its tile files
  (:func:`stackbuild.render.fingerprint.file_identities`), its displacement field, the
  canvas and the settings that change what is measured. Seams do not depend on the
  neighbours.
* ``pairs/<a>-<b>.json``: the probe's block shifts between planes ``a`` and ``b``
  (:mod:`stackbuild.qc.probe`). Its fingerprint is made of the two planes' render
  fingerprints (what each was rendered from: tile placements and tile files, intensity,
  alignment and field, canvas, render settings; :mod:`stackbuild.render.fingerprint`), the
  measured level and the settings that change the shifts. A plane changed by an update
  changes the ``2 x probe_spans`` pairs it takes part in, and only those are measured again.
* ``runs/<first>.json``: one run of planes solved along z (:mod:`stackbuild.qc.runs`),
  stamped with the fingerprints of every pair it read, the stack, its settings and the
  estimator's code (:data:`ESTIMATE_CODE`).

A measurement whose fingerprint is unchanged is re-used as stored; nothing else is.
"""
from __future__ import annotations

import hashlib
from dataclasses import asdict
from pathlib import Path

import numpy as np

from ..render.fingerprint import digest
from .zchain import ESTIMATE_VERSION



def _source_digest(*names: str) -> str:
    """Return a digest of the source files ``names`` beside this module (a file not shipped as source counts by its name)."""
    h = hashlib.blake2b(digest_size=16)
    for name in names:
        try:
            h.update((Path(__file__).with_name(name)).read_bytes())
        except OSError:
            h.update(name.encode())
    return h.hexdigest()


#: the code that solves a run from stored shifts. A stored run is the estimator's output, so it is
#: re-used only by the same code: a change to the estimator that kept :data:`ESTIMATE_VERSION`
#: once handed a benchmark the runs of a dropped estimator (read as 67-83 % agreement where the
#: code in hand gave 78-86 %).
ESTIMATE_CODE = _source_digest("zchain.py", "runs.py")

#: bump when what a stored measurement holds or how it is measured changes (old files are then ignored)
MEASURE_VERSION = 7  # 6: seams from the stitcher's offsets, checked against the raw tiles (measure.seams_of);
# 7: probe blocks whose first answer is within half the fine search matched around 0 (matching.NEAR)
#: settings that change a section's seam measurement or its copied figures
SECTION_KEYS = ("seam_spacing", "seam_half_size", "seam_max_shift", "seam_smooth", "min_block_ncc")
#: settings that change a pair's block shifts
PAIR_KEYS = ("measure_scale", "align_p95", "probe_spacing", "probe_blocks", "probe_half_size", "probe_max_shift",
             "probe_reach", "probe_fine_sigma", "probe_coarse_sigma", "region_size")
#: ... and the settings that change a run's solution from them
RUN_KEYS = PAIR_KEYS + ("probe_neighbourhood", "probe_min_confidence", "probe_spans", "slow_window",
                        "blocks_per_region")


def _file_digest(path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def _canvas_geometry(canvas) -> dict | None:
    """Return the canvas's record without its last section: appended sections move no measured pixel."""
    if canvas is None:
        return None
    return {k: v for k, v in canvas.to_json().items() if k != "last_section"}


def section_fingerprint(folder, section: int, settings, grid=()) -> str:
    """Return the fingerprint of what a section's stored measurement is made from."""
    from ..render.fingerprint import section_parts

    store = folder.store
    d = store.section_dir(section)
    s = asdict(settings)
    canvas = store.load_canvas()
    return digest({"v": MEASURE_VERSION, "stitch": _file_digest(d / "stitch.json"),
                    "align": _file_digest(d / "align.json"), "parts": section_parts(store, section),
                    "canvas": _canvas_geometry(canvas),
                    "settings": {k: s[k] for k in SECTION_KEYS}, "grid": list(map(list, grid))})


def probe_reach(settings) -> int:
    """Return how many present planes on each side of a plane its estimate depends on."""
    return int(settings.slow_window) // 2 + int(settings.probe_spans)


def render_fingerprints(folder, source) -> dict[int, str | None]:
    """Return ``{z: render fingerprint}`` of the planes the probe reads (None: unrecorded, damaged or lazy)."""
    from ..render.fingerprint import read_plane_record

    record = read_plane_record(folder.pyramid_path()) if source.origin == "volume.zarr" else None
    written = (record or {}).get("fingerprints") or {}
    damaged = (record or {}).get("damaged") or {}
    return {z: (None if str(z) in damaged else written.get(str(z))) for z in range(source.depth)}


def pair_fingerprints(folder, source, pairs, settings, planes: dict | None = None) -> dict[tuple[int, int], str | None]:
    """Return ``{(a, b): fingerprint}`` of each pair's shifts; None where a plane has no recorded fingerprint.

    A pair with None is always measured again (a plane never written, being rewritten,
    damaged, or read from the lazy volume). ``planes``: the planes' render fingerprints when the
    caller has them (:func:`render_fingerprints`, read otherwise).
    """
    planes = render_fingerprints(folder, source) if planes is None else planes
    base = pair_base(source, settings)
    out = {}
    for a, b in pairs:
        fa, fb = planes.get(a), planes.get(b)
        out[(a, b)] = None if fa is None or fb is None else digest({**base, "a": [a, fa], "b": [b, fb]})
    return out


def pair_base(source, settings) -> dict:
    """Return what every pair's fingerprint shares: measure version, level, settings that change shifts, plane shape."""
    s = asdict(settings)
    return {"v": MEASURE_VERSION, "level": [source.origin, source.level, source.factor, source.bin],
            "settings": {k: s[k] for k in PAIR_KEYS}, "shape": list(source.data.shape[1:])}


def run_fingerprint(pair_fps: dict, window, stack, settings) -> str | None:
    """Return the fingerprint of one run: its pairs' fingerprints, its planes, the stack and the settings."""
    fps = [[a, b, pair_fps.get((a, b))] for a, b in sorted(pair_fps)]
    if any(f is None for _, _, f in fps):
        return None
    s = asdict(settings)
    return digest({"v": MEASURE_VERSION, "estimate": [ESTIMATE_VERSION, ESTIMATE_CODE], "pairs": fps, "window": list(window),
                   "stack": list(stack), "settings": {k: s[k] for k in RUN_KEYS}})


def _pair_path(build, a: int, b: int):
    from ..folder import BuildFolder

    return BuildFolder(build).measurement_path("pairs", f"{int(a):05d}-{int(b):05d}")


def _run_path(build, first: int):
    from ..folder import BuildFolder

    return BuildFolder(build).measurement_path("runs", f"{int(first):05d}")


def _num(v, nd: int = 4):
    return None if not np.isfinite(v) else round(float(v), nd)


def write_measurement(path, doc: dict) -> None:
    """Store one measurement document atomically (its folder made when needed)."""
    import json

    from ..transforms.store import atomic_write_text

    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_text(path, json.dumps(doc) + "\n")


def stored_measurement(path) -> dict | None:
    """Return a stored measurement document (None when absent or unreadable)."""
    import json

    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def write_pair(build, a: int, b: int, fingerprint, shifts, ncc, beyond, made_from=None) -> None:
    """Store one pair's block shifts (level-0 px), NCC and beyond-reach marks with its fingerprint.

    ``made_from`` (``[base digest, render fingerprint of a, of b]``, see :func:`pair_base`) lets a
    later report that is told where a plane changed re-measure only the blocks there
    (:func:`stackbuild.qc.probe.measure_error`'s ``changed``).
    """
    write_measurement(_pair_path(build, a, b), {
        "fingerprint": fingerprint, "a": int(a), "b": int(b), "made_from": made_from,
        "dx": [_num(v) for v in shifts[:, 0]], "dy": [_num(v) for v in shifts[:, 1]],
        "ncc": [_num(v, 3) for v in ncc], "beyond": np.flatnonzero(beyond).tolist()})


def stored_pair(build, a: int, b: int) -> dict | None:
    """Return the stored document of pair ``(a, b)`` (None when absent or unreadable)."""
    return stored_measurement(_pair_path(build, a, b))


def pair_arrays(doc: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return ``(shifts (B, 2), ncc (B,), beyond (B,) bool)`` of a stored pair document (NaN where unmatched)."""
    f = lambda xs: np.array([np.nan if v is None else v for v in xs], float)  # noqa: E731
    shifts = np.column_stack([f(doc["dx"]), f(doc["dy"])]).reshape(-1, 2)
    beyond = np.zeros(len(shifts), bool)
    beyond[doc.get("beyond") or []] = True
    return shifts, f(doc["ncc"]), beyond


def read_pair(build, a: int, b: int):
    """Return ``(shifts (B, 2), ncc (B,))`` of a stored pair (NaN where unmatched), or None."""
    doc = stored_pair(build, a, b)
    if doc is None:
        return None
    shifts, ncc, _ = pair_arrays(doc)
    return shifts, ncc


def write_run(build, first: int, fingerprint, result: dict, regions: list, sample: list) -> None:
    """Store one run's per-plane sums, per-region sums and sampled blocks with its fingerprint."""
    write_measurement(_run_path(build, first), {
        "fingerprint": fingerprint, "planes": {str(z): v for z, v in result["planes"].items()},
        "sigma": result["sigma"], "regions": regions, "sample": sample})


def stored_run(build, first: int) -> dict | None:
    """Return the stored document of the run starting at plane ``first`` (None when absent or unreadable)."""
    return stored_measurement(_run_path(build, first))
