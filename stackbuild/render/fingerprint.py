"""Plane fingerprints: which transform records and settings each written plane was rendered from.

Every written plane of ``volume.zarr/em`` and of each marker pyramid
``volume.zarr/channels/<name>`` carries a fingerprint: the SHA-256 of the
pixel-relevant parts of the records it was rendered from (the section's tile
placements and intensity corrections with its illumination array, its
alignment with its displacement field, its marker registration), the canvas
geometry and the render settings. Statistics, flags that do not change
pixels, pair lists and timestamps are left out, so a record rewritten with
the same transforms keeps its planes fresh.

The fingerprints live beside the pixels, in the array group's plane record
``<group>/.stackbuild_done.json``::

    {"format": "stackbuild.planes", "version": 2,
     "stamp": {...layout: render settings and canvas...},
     "done": [z, ...],                    planes written under this stamp
     "fingerprints": {"z": "<sha256>"},   what each written plane was rendered from
     "damaged": {"z": "reason"}}          planes the volume check found unreadable

The record is rewritten atomically after each finished plane, and a plane's
fingerprint is dropped *before* it is written again, so a killed render can
only leave a plane recorded as stale, never one recorded as fresh that is not.
Because the record sits inside the group, a group rendered elsewhere and
swapped into place carries its own fingerprints with it.

Raw tile files are not hashed (they are only ever read; ``update`` brings new
tiles in under new paths, which changes the stitch record).
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import asdict
from pathlib import Path

from ..errors import InputError
from ..transforms.store import TransformStore, atomic_write_text, read_envelope

#: File name of a group's plane record.
PLANE_RECORD = ".stackbuild_done.json"
PLANE_FORMAT = "stackbuild.planes"
PLANE_VERSION = 2
#: Canvas fields that change pixels (flags and the physical scale do not).
_CANVAS_KEYS = ("width", "height", "origin_x", "origin_y", "first_section", "dtype")
#: Tile placement fields that change pixels.
_TILE_KEYS = ("tile", "path", "width", "height", "x", "y", "gain", "offset")
#: Channel record fields that change pixels.
_CHANNEL_KEYS = ("path", "transform", "pixel_size_nm")
#: Channel flags that stop a plane from being rendered.
_SKIP_FLAGS = ("blank", "too_small")


# ----------------------------------------------------------------- hashing
def _digest(obj) -> str:
    text = json.dumps(obj, sort_keys=True, separators=(",", ":"), allow_nan=True, default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _tree_digest(path: Path) -> str | None:
    """Return the SHA-256 of every file under ``path`` (names and bytes), or None if it is absent."""
    if not path.exists():
        return None
    h = hashlib.sha256()
    for p in sorted(q for q in path.rglob("*") if q.is_file()):
        h.update(str(p.relative_to(path)).encode() + b"\0")
        h.update(p.read_bytes())
    return h.hexdigest()


def _record(store: TransformStore, kind: str, section: int) -> dict | None:
    path = store.section_dir(section) / f"{kind}.json"
    if not path.exists():
        return None
    return read_envelope(path, kind)["record"]


def section_parts(store: TransformStore, section: int) -> dict:
    """Return the pixel-relevant parts of a section's stitch and alignment records (JSON-ready).

    Raises
    ------
    InputError
        If a record is unreadable (see :func:`stackbuild.transforms.store.read_envelope`).
    """
    d = store.section_dir(section)
    st = _record(store, "stitch", section)
    al = _record(store, "align", section)
    stitch = None
    if st is not None:
        stitch = {"dtype": st.get("dtype"), "illumination_step": st.get("illumination_step"),
                  "tiles": [{k: t.get(k) for k in _TILE_KEYS} for t in st.get("tiles", [])],
                  "illumination": _tree_digest(d / "illumination.zarr") if st.get("has_illumination") else None}
    align = None
    if al is not None:
        align = {"transforms": al.get("transforms"), "displacement": _tree_digest(d / "displacement.zarr")}
    return {"stitch": stitch, "align": align}


def _canvas_parts(canvas) -> dict:
    c = canvas.to_json()
    return {k: c[k] for k in _CANVAS_KEYS}


def _contrast_range(store: TransformStore, section: int, settings):
    if not settings.contrast:
        return None
    from .contrast import DOC_KIND

    doc = store.load_doc(DOC_KIND) or {}
    return doc.get("sections", {}).get(str(section))


def em_fingerprints(store: TransformStore, canvas, settings, planes=None) -> dict[int, str]:
    """Return ``{z: fingerprint}`` of EM planes as the current records would render them.

    Parameters
    ----------
    store : TransformStore
        The build's transform store.
    canvas : Canvas
        The canvas the planes are (or would be) rendered on.
    settings : RenderSettings
        The render settings.
    planes : iterable of int, optional
        Planes (0-based z) to fingerprint; all by default.
    """
    planes = range(canvas.depth) if planes is None else planes
    base = {"kind": "em", "canvas": _canvas_parts(canvas), "render": asdict(settings)}
    lost = set(canvas.lost_sections)
    out = {}
    for z in planes:
        s = canvas.first_section + int(z)
        if s in lost:
            out[int(z)] = _digest({**base, "section": s, "lost": True})
            continue
        out[int(z)] = _digest({**base, "section": s, **section_parts(store, s),
                               "contrast": _contrast_range(store, s, settings)})
    return out


def channel_fingerprints(store: TransformStore, canvas, settings, name: str, level: int,
                         records: dict[int, dict], planes=None) -> dict[int, str]:
    """Return ``{z: fingerprint}`` of one marker channel's planes as the current records would render them.

    Parameters
    ----------
    records : dict
        ``section -> channel record`` of this channel (sections without one render as zeros).
    level : int
        The EM pyramid level the channel's level 0 lies on.
    """
    planes = range(canvas.depth) if planes is None else planes
    base = {"kind": "channel", "name": name, "level": int(level), "canvas": _canvas_parts(canvas),
            "render": asdict(settings)}
    out = {}
    for z in planes:
        s = canvas.first_section + int(z)
        rec = records.get(s)
        if rec is None or set(_SKIP_FLAGS) & set(rec.get("flags", [])):
            out[int(z)] = _digest({**base, "section": s, "empty": True})
            continue
        align = section_parts(store, s)["align"]
        out[int(z)] = _digest({**base, "section": s, "align": align,
                               "channel": {k: rec.get(k) for k in _CHANNEL_KEYS}})
    return out


# ------------------------------------------------------------ plane records
def read_plane_record(group: Path) -> dict | None:
    """Return the plane record of an array group (``em`` or a channel), or None if absent or unreadable.

    A record from before fingerprints (version 1: ``stamp`` and ``done`` only)
    is returned with no fingerprints, so every plane counts as stale.
    """
    path = Path(group) / PLANE_RECORD
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict) or not isinstance(doc.get("done"), list):
        return None
    doc.setdefault("fingerprints", {})
    doc.setdefault("damaged", {})
    return doc


def write_plane_record(group: Path, stamp: dict, fingerprints: dict, damaged: dict | None = None) -> None:
    """Write an array group's plane record atomically (``fingerprints``: ``{z: fingerprint}`` of written planes)."""
    fps = {str(int(z)): fp for z, fp in sorted(fingerprints.items(), key=lambda kv: int(kv[0]))}
    doc = {"format": PLANE_FORMAT, "version": PLANE_VERSION, "stamp": stamp,
           "done": sorted(int(z) for z in fps), "fingerprints": fps,
           "damaged": {str(k): v for k, v in (damaged or {}).items()}}
    atomic_write_text(Path(group) / PLANE_RECORD, json.dumps(doc) + "\n")


def _group(folder, array: str) -> Path:
    return folder.pyramid_path(None if array == "em" else array)


def plane_fingerprint(folder, z: int, array: str = "em") -> str | None:
    """Return the recorded fingerprint of written plane ``z`` of ``array`` (``"em"`` or a channel name), or None.

    None means the plane was never written under the current layout, or its
    fingerprint was dropped because it is being rewritten or was found damaged.
    """
    doc = read_plane_record(_group(folder, array))
    if doc is None or str(int(z)) in doc["damaged"]:
        return None
    return doc["fingerprints"].get(str(int(z)))


def current_fingerprints(folder, planes=None, array: str = "em") -> dict[int, str]:
    """Return ``{z: fingerprint}`` the current records give, on the stored canvas with the build's settings.

    Raises
    ------
    InputError
        If no canvas is stored (nothing rendered yet) or a record is unreadable.
    """
    store = folder.store
    canvas = store.load_canvas()
    if canvas is None:
        raise InputError("no canvas stored; the volume has not been rendered yet", file=store.root)
    settings = folder.config.render
    if array == "em":
        return em_fingerprints(store, canvas, settings, planes)
    from ..channels.stage import channel_records

    level, records = channel_records(folder, array, canvas)
    return channel_fingerprints(store, canvas, settings, array, level, records, planes)


def stale_planes(folder, array: str = "em") -> list[int]:
    """Return the planes of ``array`` (``"em"`` or a channel name) that do not match the current records.

    A plane is stale when it was never written, its recorded fingerprint
    differs from what the current transform records and settings give, or the
    volume check (``stackbuild check``) found one of its chunks damaged.
    Every plane is stale when the group has no plane record.
    """
    canvas = folder.store.load_canvas()
    if canvas is None:
        return []
    doc = read_plane_record(_group(folder, array)) or {"fingerprints": {}, "damaged": {}}
    now = current_fingerprints(folder, array=array)
    return sorted(z for z, fp in now.items()
                  if str(z) in doc["damaged"] or doc["fingerprints"].get(str(z)) != fp)


def record_planes(folder, fingerprints: dict[int, str], array: str = "em") -> None:
    """Record ``fingerprints`` (``{z: fingerprint}``) for planes just written into ``array``, clearing their damage notes.

    For code that rewrites part of a plane itself (dirty chunks): call it after
    the plane's chunks and the pyramid above them are written, with
    fingerprints from :func:`current_fingerprints`.
    """
    group = _group(folder, array)
    doc = read_plane_record(group)
    if doc is None:
        raise InputError("the array has no plane record; render it first", file=group)
    fps = dict(doc["fingerprints"])
    damaged = dict(doc["damaged"])
    for z, fp in fingerprints.items():
        fps[str(int(z))] = fp
        damaged.pop(str(int(z)), None)
    write_plane_record(group, doc["stamp"], fps, damaged)


def forget_planes(folder, planes, array: str = "em", reason: str | None = None) -> None:
    """Drop the fingerprints of ``planes`` (before they are rewritten), or mark them damaged with ``reason``."""
    group = _group(folder, array)
    doc = read_plane_record(group)
    if doc is None:
        return
    fps = {k: v for k, v in doc["fingerprints"].items() if int(k) not in {int(p) for p in planes}}
    damaged = dict(doc["damaged"])
    if reason is not None:
        damaged.update({str(int(p)): reason for p in planes})
    write_plane_record(group, doc["stamp"], fps if reason is None else doc["fingerprints"], damaged)


def discard_plane(group: Path, z: int) -> None:
    """Delete the stored chunks of plane ``z`` at every level of an array group (zarr v3 keys ``c/<z>/...``).

    Only for a plane found damaged and about to be rendered again: writing part of a
    shard reads the shard first, which a damaged one would fail.
    """
    import shutil

    for level in Path(group).iterdir():
        if level.name.isdigit():
            shutil.rmtree(level / "c" / str(int(z)), ignore_errors=True)
