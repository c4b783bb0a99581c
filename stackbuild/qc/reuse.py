"""Fingerprints of what each report measurement was made from, so a re-report measures only what changed.

Two kinds of stored measurement live under ``DIR/qc/measured/``:

* ``sections/<section>.json``: a section's seams, tile and pair rows and copied figures
  (:mod:`stackbuild.qc.sections`). Its fingerprint is the SHA-256 of the section's own
  stitch and alignment records (their bytes), the identity of its tile files
  (:func:`stackbuild.render.fingerprint.file_identities`), its displacement field, the
  canvas and the settings that change what is measured. Seams do not depend on the
  neighbours.
* ``probe.json``: the alignment-error probe's per-region, per-plane sums. The estimate of
  plane ``z`` depends on the planes around it (the chain of block shifts and the straight
  line fitted along z, :mod:`stackbuild.qc.zchain`), so its fingerprint covers the written
  planes within :func:`probe_reach` of it (their render fingerprints,
  :mod:`stackbuild.render.fingerprint`) and the probe's settings. A re-report runs the
  probe again only over the changed planes plus that reach on each side as context, and
  keeps the stored sums of every other plane.

A measurement whose fingerprint is unchanged is re-used as stored; nothing else is.
"""
from __future__ import annotations

import hashlib
from dataclasses import asdict

from ..render.fingerprint import digest

#: folder under ``DIR/qc`` holding the stored measurements
MEASURED = "measured"
#: bump when what a stored measurement holds or how it is measured changes (old files are then ignored)
MEASURE_VERSION = 4
#: settings that change a section's seam measurement or its copied figures
SECTION_KEYS = ("seam_spacing", "seam_half_size", "seam_max_shift", "seam_smooth", "min_block_ncc")
#: settings that change the probe's sums
PROBE_KEYS = ("measure_scale", "align_p95", "probe_spacing", "probe_blocks", "probe_half_size", "probe_max_shift",
              "probe_reach", "probe_neighbourhood", "probe_fine_sigma", "probe_coarse_sigma",
              "probe_min_confidence", "probe_spans", "slow_window", "region_size", "blocks_per_region")


def _file_digest(path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def section_fingerprint(folder, section: int, settings, grid=()) -> str:
    """Return the fingerprint of what a section's stored measurement is made from."""
    from ..render.fingerprint import section_parts

    store = folder.store
    d = store.section_dir(section)
    s = asdict(settings)
    canvas = store.load_canvas()
    return digest({"v": MEASURE_VERSION, "stitch": _file_digest(d / "stitch.json"),
                    "align": _file_digest(d / "align.json"), "parts": section_parts(store, section),
                    "canvas": canvas.to_json() if canvas else None,
                    "settings": {k: s[k] for k in SECTION_KEYS}, "grid": list(map(list, grid))})


def probe_reach(settings) -> int:
    """Return how many present planes on each side of a plane its estimate depends on."""
    return int(settings.slow_window) // 2 + int(settings.probe_spans)


def plane_fingerprints(folder, source, present: list[int], settings) -> dict[int, str]:
    """Return ``{z: fingerprint}`` of the probe's estimate of each present plane.

    Built from the written planes' render fingerprints within :func:`probe_reach` (by
    position among the present planes), the measured level and the probe's settings. A
    plane without a recorded fingerprint (never written, being rewritten, damaged, or read
    from the lazy volume) gets a fingerprint of its own that matches nothing stored, so
    every plane near it is measured again.
    """
    from ..render.fingerprint import read_plane_record

    record = read_plane_record(folder.pyramid_path()) if source.origin == "volume.zarr" else None
    written = (record or {}).get("fingerprints") or {}
    damaged = (record or {}).get("damaged") or {}
    s = asdict(settings)
    base = {"v": MEASURE_VERSION, "level": [source.origin, source.level, source.factor, source.bin],
            "settings": {k: s[k] for k in PROBE_KEYS}, "shape": list(source.data.shape)}
    reach = probe_reach(settings)
    fps = {}
    for i, z in enumerate(present):
        near = present[max(0, i - reach):i + reach + 1]
        own = [None if (str(k) in damaged) else written.get(str(k)) for k in near]
        if any(v is None for v in own):
            fps[z] = "unrecorded"
            continue
        fps[z] = digest({**base, "planes": dict(zip(map(str, near), own)), "present": near})
    return fps


def changed_planes(stored: dict[str, str], current: dict[int, str]) -> list[int]:
    """Return the present planes whose probe fingerprint differs from the stored one (or has none)."""
    return sorted(z for z, fp in current.items() if fp == "unrecorded" or stored.get(str(z)) != fp)


def context_runs(changed: list[int], present: list[int], reach: int) -> list[list[int]]:
    """Return runs of present planes to probe again: the changed ones plus ``reach`` planes each side.

    Overlapping runs are merged; each run is a list of present planes in order.
    """
    if not changed:
        return []
    index = {z: i for i, z in enumerate(present)}
    spans = sorted((max(0, index[z] - reach), min(len(present) - 1, index[z] + reach)) for z in changed if z in index)
    runs: list[list[int]] = []
    lo, hi = spans[0]
    for a, b in spans[1:]:
        if a <= hi + 1:
            hi = max(hi, b)
        else:
            runs.append(present[lo:hi + 1])
            lo, hi = a, b
    runs.append(present[lo:hi + 1])
    return runs
