"""``locate``: where a point of the volume is on the raw tiles and the stage, and back, in any version.

A build's transform *version* counts its updates: version 0 is the build as
first made, version ``k`` the build after update ``k``. Earlier versions are
read from the records each update kept before it changed anything
(``DIR/updates/NNNN/before``), so annotation points placed in an older volume
can be carried into the current one through the raw tiles, which never move.
"""
from __future__ import annotations

import csv
import io
import math
from dataclasses import asdict
from pathlib import Path

from ..errors import InputError
from ..folder import BuildFolder
from ..transforms.locate import FLAGS, Located, from_stage, from_tile, from_volume
from ..transforms.store import TransformStore, atomic_write_text
from .update_plan import load_plans, plan_dir

SOURCES = ("volume", "tile", "stage")
_COLUMNS = {"volume": ("z", "y", "x"), "tile": ("section", "tile", "tile_x", "tile_y"),
            "stage": ("section", "stage_x", "stage_y")}
_NM_COLUMNS = ("z_nm", "y_nm", "x_nm")


def current_version(root: Path) -> int:
    """Return the version of the records the build holds now (the last update that stands, else 0)."""
    done = [p.number for p in load_plans(root) if p.status == "done"]
    return max(done, default=0)


def version_store(build: BuildFolder, version: int | None) -> TransformStore:
    """Return the transform store of ``version`` (None: the current one).

    Raises
    ------
    InputError
        If the version does not exist or was rolled back.
    """
    now = current_version(build.root)
    if version is None or version == now:
        return build.store
    plans = {p.number: p for p in load_plans(build.root)}
    if version < 0 or version > max(plans, default=0):
        raise InputError(f"no transform version {version}; this build has versions 0 to {now}", file=build.root)
    if version in plans and plans[version].status != "done":
        raise InputError(f"version {version} was not kept (update {version:04d} is {plans[version].status})",
                         file=build.root)
    later = [n for n in plans if n > version]
    return TransformStore(plan_dir(build.root, min(later)) / "before")


class _Records:
    """Per-section records of one version, loaded once."""

    def __init__(self, store: TransformStore):
        self.store = store
        self.canvas = store.load_canvas()
        if self.canvas is None:
            raise InputError("no canvas stored; render the volume first", file=store.root)
        self._cache: dict[int, tuple] = {}

    def section(self, s: int):
        if s not in self._cache:
            self._cache[s] = (self.store.load_stitch(s), self.store.load_alignment(s))
        return self._cache[s]


def _number(rec: dict, key: str, path, row: int) -> float:
    try:
        v = float(rec[key])
    except (KeyError, TypeError, ValueError):
        raise InputError(f"column {key!r} must be a number, got {rec.get(key)!r}", file=path, row=row) from None
    if not math.isfinite(v):
        raise InputError(f"column {key!r} must be finite, got {v}", file=path, row=row)
    return v


def _one(rec: dict, source: str, nm: bool, recs: _Records, path, row: int) -> Located:
    c = recs.canvas
    if source == "volume":
        if nm:
            z = _number(rec, "z_nm", path, row) / c.section_thickness_nm
            y = _number(rec, "y_nm", path, row) / c.pixel_size_nm
            x = _number(rec, "x_nm", path, row) / c.pixel_size_nm
        else:
            z, y, x = (_number(rec, k, path, row) for k in ("z", "y", "x"))
        st, al = recs.section(c.first_section + int(round(z)))
        return from_volume(z, y, x, c, st, al)
    try:
        s = int(rec["section"])
    except (KeyError, TypeError, ValueError):
        raise InputError(f"column 'section' must be an integer, got {rec.get('section')!r}", file=path,
                         row=row) from None
    st, al = recs.section(s)
    if source == "tile":
        try:
            return from_tile(s, str(rec["tile"]), _number(rec, "tile_x", path, row), _number(rec, "tile_y", path, row),
                             c, st, al)
        except KeyError:
            raise InputError(f"section {s} has no tile {rec.get('tile')!r}", file=path, row=row, section=s) from None
    return from_stage(s, _number(rec, "stage_x", path, row), _number(rec, "stage_y", path, row), c, st, al)


def locate_points(build_dir, points: list[dict], source: str = "volume", *, nm: bool = False,
                  from_version: int | None = None, to_version: int | None = None,
                  where: str = "points") -> list[dict]:
    """Return every point in volume, tile and stage coordinates, with flags.

    Parameters
    ----------
    build_dir : str or Path
        A rendered build.
    points : list of dict
        One dict per point with the columns of ``source``: ``volume``: ``z, y, x`` (level-0 pixels;
        ``z_nm, y_nm, x_nm`` with ``nm``); ``tile``: ``section, tile, tile_x, tile_y``; ``stage``:
        ``section, stage_x, stage_y``. Other keys (a ``name``) are carried through.
    source : str
        One of :data:`SOURCES`.
    nm : bool
        Volume coordinates in nanometres (in and out).
    from_version, to_version : int, optional
        Transform versions (see the module docstring): points are read in ``from_version``
        and given in ``to_version`` (both the current one by default); ``moved_px`` says how far
        each moved in the volume (level-0 pixels).
    where : str
        Name of the points' file, for messages.

    Returns
    -------
    list of dict
        Per point: the carried keys, ``section``, ``z, y, x`` (and ``*_nm``), ``tile``, ``tile_x``,
        ``tile_y``, ``stage_x``, ``stage_y``, ``flags`` (``;``-separated: see
        :data:`stackbuild.transforms.locate.FLAGS`), and with versions ``from_z``, ``from_y``,
        ``from_x``, ``moved_px``.
    """
    if source not in SOURCES:
        raise ValueError(f"source must be one of {SOURCES}, got {source!r}")
    build = BuildFolder(Path(build_dir))
    versions = from_version is not None or to_version is not None
    src = _Records(version_store(build, from_version))
    dst = _Records(version_store(build, to_version)) if versions else src
    out = []
    for i, rec in enumerate(points, start=2):
        first = _one(rec, source, nm, src, where, i)
        final = first
        if versions and first.tile is not None and "lost_section" not in first.flags:
            st, al = dst.section(first.section)
            try:
                final = from_tile(first.section, first.tile, first.tile_x, first.tile_y, dst.canvas, st, al)
            except KeyError:  # the tile was replaced under another name: carry the point through the stage
                final = from_stage(first.section, first.stage_x, first.stage_y, dst.canvas, st, al)
            final.flags = sorted(set(final.flags) | (set(first.flags) - {"outside_volume"}), key=_flag_rank)
        row = {k: v for k, v in rec.items() if k not in _COLUMNS[source] + _NM_COLUMNS}
        row.update(_row(final, dst.canvas))
        if versions:
            row.update({"from_z": first.z, "from_y": first.y, "from_x": first.x,
                        "moved_px": None if first.x is None or final.x is None else
                        math.hypot(final.x - first.x, final.y - first.y) + abs(final.z - first.z)})
        out.append(row)
    return out


def _flag_rank(flag: str) -> int:
    return FLAGS.index(flag) if flag in FLAGS else len(FLAGS)


def _row(p: Located, canvas) -> dict:
    d = asdict(p)
    flags = d.pop("flags")
    row = {"section": d["section"], "z": d["z"], "y": d["y"], "x": d["x"]}
    if p.z is not None:
        row.update({"z_nm": p.z * canvas.section_thickness_nm, "y_nm": p.y * canvas.pixel_size_nm,
                    "x_nm": p.x * canvas.pixel_size_nm})
    else:
        row.update({"z_nm": None, "y_nm": None, "x_nm": None})
    row.update({k: d[k] for k in ("tile", "tile_x", "tile_y", "stage_x", "stage_y")})
    row["flags"] = ";".join(flags)
    return row


def locate_file(build_dir, points_csv: Path, out_csv: Path, source: str = "volume", *, nm: bool = False,
                from_version: int | None = None, to_version: int | None = None) -> int:
    """Read points from a CSV, locate them (see :func:`locate_points`), write a CSV; return the row count."""
    path = Path(points_csv)
    try:
        with path.open(newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            need = ("z_nm", "y_nm", "x_nm") if nm and source == "volume" else _COLUMNS[source]
            missing = [c for c in need if c not in (reader.fieldnames or [])]
            if missing:
                raise InputError(f"missing column(s) {', '.join(missing)} for --from {source}"
                                 + (" --nm" if nm and source == "volume" else ""), file=path, row=1)
            rows = list(reader)
    except OSError as exc:
        raise InputError(f"cannot read the points ({exc.strerror or exc})", file=path) from None
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file", file=path) from None
    located = locate_points(build_dir, rows, source, nm=nm, from_version=from_version, to_version=to_version,
                            where=str(path))
    fields = list(dict.fromkeys(k for r in located for k in r)) if located else ["section"]
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=fields, lineterminator="\n")
    w.writeheader()
    for r in located:
        w.writerow({k: _fmt(v) for k, v in r.items()})
    atomic_write_text(Path(out_csv), buf.getvalue())
    return len(located)


def _fmt(v):
    if isinstance(v, float):
        return f"{v:.4f}"
    return "" if v is None else v
