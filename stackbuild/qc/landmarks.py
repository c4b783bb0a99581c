"""Landmark residuals: how far the stored marker registration puts a spot from where the user saw it on the EM.

A landmark (see :func:`stackbuild.manifest.read_landmarks`) is the same spot on a
raw EM tile and on a marker image. The EM spot is carried into the section frame
by the tile's solved placement (``section = tile + (x, y)``), the marker spot by
the channel stage's stored ``channel -> section`` affine; the residual is the
difference, ``marker mapped - EM``, in EM section pixels (and nanometres). It
checks the marker registration alone: stitching and alignment move both ends
of a landmark together.

Landmarks are the only check of a marker registration that does not depend on
the registration's own similarity measure, so the report lists them next to it.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..manifest import read_landmarks
from ..transforms.records import ChannelRegistration
from .measure import section_to_output


def landmark_rows(folder, stitches: dict, aligns: dict, scale) -> tuple[list[dict], list[str]]:
    """Return one row per landmark of the build (none without a landmark file), and notes.

    Each row: ``section``, ``channel``, ``name``, ``tile``, ``em`` (section px ``[x, y]``),
    ``marker`` (marker px ``[x, y]``), ``dx``, ``dy``, ``residual`` (EM px; ``None`` when
    the channel was not registered), ``residual_nm``, ``row`` (line in the file), ``at``.
    """
    path = folder.load_state().get("landmarks")
    if not path:
        return [], []
    entries = read_landmarks(path, folder.tile_manifest(), folder.channel_manifest())
    sections = {e.section for e in entries}
    placements = {s: {t.tile: t for t in stitches[s].tiles} for s in sections if s in stitches}
    registered = {s: (folder.store.load_doc("channels", section=s) or {}).get("channels") or {} for s in sections}
    rows, notes, missing = [], [], set()
    for e in entries:
        t = placements.get(e.section, {}).get(e.tile)
        if t is None:
            missing.add(f"section {e.section} (not stitched)")
            continue
        em = np.array([[t.x + e.tile_x, t.y + e.tile_y]])
        ch = registered[e.section].get(e.channel) or {}
        row = {"section": e.section, "channel": e.channel, "name": e.name, "tile": e.tile,
               "em": [float(em[0, 0]), float(em[0, 1])], "marker": [e.marker_x, e.marker_y],
               "dx": None, "dy": None, "residual": None, "residual_nm": None, "row": e.row,
               "at": scale.at(e.section, section_to_output(em, aligns.get(e.section), scale.canvas)[0])}
        if ch.get("transform") and ch.get("registered") is not False:
            to_section = ChannelRegistration.from_json(ch, section=e.section, channel=e.channel).to_section
            d = to_section.apply([[e.marker_x, e.marker_y]])[0] - em[0]
            res = float(np.hypot(*d))
            row.update(dx=float(d[0]), dy=float(d[1]), residual=res, residual_nm=res * scale.px_nm)
        else:
            missing.add(f"{e.channel} on section {e.section} (not registered)")
        rows.append(row)
    if missing:
        notes.append(f"landmarks of {Path(path).name} not measured for: " + ", ".join(sorted(missing)))
    return rows, notes


def per_channel_rms(rows: list[dict]) -> dict[tuple[int, str], float]:
    """Return the RMS landmark residual (EM px) of each ``(section, channel)`` with measured landmarks."""
    groups: dict[tuple[int, str], list[float]] = {}
    for r in rows:
        if r["residual"] is not None:
            groups.setdefault((r["section"], r["channel"]), []).append(r["residual"])
    return {k: float(np.sqrt(np.mean(np.square(v)))) for k, v in groups.items()}


def landmark_totals(rows: list[dict]) -> dict:
    """Return ``channels.landmark_rms`` and ``channels.landmark_max`` (EM px; ``None`` without landmarks)."""
    res = np.array([r["residual"] for r in rows if r["residual"] is not None])
    if not res.size:
        return {"channels.landmark_rms": None, "channels.landmark_max": None, "landmarks": len(rows)}
    return {"channels.landmark_rms": float(np.sqrt(np.mean(res ** 2))),
            "channels.landmark_max": float(res.max()), "landmarks": len(rows)}
