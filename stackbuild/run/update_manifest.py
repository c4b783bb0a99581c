"""An update manifest read against the build: refused rows, the merged manifest, the tiles that change.

Pure bookkeeping on the checked manifests (no transform is read, nothing is written):
:func:`check_new_tiles` refuses in one line what an update cannot take (a section not in the
build without ``--append``, tiles of another size or pixel type), :func:`merged_manifest`
gives the build's manifest with the update's rows in, :func:`changed_tiles` names the tiles
that really change and :func:`tiles_to_read` counts what registering their pairs again reads;
:func:`is_inset` tells a manifest of finer tiles (an inset) from one at the build's pixel size.
"""
from __future__ import annotations

import csv
import io
import math
from dataclasses import replace
from pathlib import Path

from ..errors import InputError
from ..manifest import TileEntry, TileManifest


def _merged_rows(old: TileManifest, new: TileManifest) -> list[TileEntry]:
    incoming = {(t.section, t.tile) for t in new.tiles}
    rows = [t for t in old.tiles if (t.section, t.tile) not in incoming] + list(new.tiles)
    rows.sort(key=lambda t: t.section)  # stable: manifest order within a section is kept
    return rows


def merged_checked(old: TileManifest, new: TileManifest, path: Path) -> TileManifest:
    """Return the checked manifest of :func:`merged_manifest`'s CSV kept at ``path``, without opening a file.

    Both manifests were checked (every file's header, size and modification time), so the
    merged one is their rows renumbered as the CSV lists them; it equals
    :func:`stackbuild.manifest.read_tile_manifest` of that CSV while no tile file changes,
    without a second ``stat`` of every tile of the build.

    Raises
    ------
    InputError
        A new row's image file is already another tile of the build (one line naming that row).
    """
    owner = {str(t.path): t for t in old.tiles}
    replaced = {(t.section, t.tile) for t in new.tiles}
    for t in new.tiles:
        o = owner.get(str(t.path))
        if o is not None and (o.section, o.tile) != (t.section, t.tile) and (o.section, o.tile) not in replaced:
            raise InputError(f"image file {t.path} is already tile {o.tile!r} of section {o.section} in this build; "
                             "each tile must be its own file (nothing was changed)", file=new.source, row=t.row,
                             section=t.section)
    tiles = [replace(t, row=i) for i, t in enumerate(_merged_rows(old, new), start=2)]
    files = {**old.files, **new.files}
    return TileManifest(Path(path).resolve(), tiles, {str(t.path): files[str(t.path)] for t in tiles})


def merged_manifest(old: TileManifest, new: TileManifest) -> str:
    """Return the CSV text of ``old`` with ``new``'s rows merged in by (section, tile).

    A row of ``new`` naming an existing tile of its section replaces it; other rows are added.
    """
    rows = _merged_rows(old, new)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["section", "tile", "path", "x", "y"])
    for t in rows:
        w.writerow([t.section, t.tile, str(t.path), repr(t.x), repr(t.y)])
    return buf.getvalue()


def _common_size(tiles: list[TileEntry]) -> tuple[int, int]:
    sizes = [(t.width, t.height) for t in tiles]
    return max(set(sizes), key=sizes.count)


def check_new_tiles(old: TileManifest, new: TileManifest, append: bool, first: int | None) -> None:
    """Refuse, in one line, sections not in the build (without ``append``) and tiles of another size."""
    if new.dtype != old.dtype:
        raise InputError(f"new tiles are {new.dtype}, the build's are {old.dtype}", file=new.source)
    have = set(old.sections)
    unknown = sorted(set(new.sections) - have)
    if unknown and not append:
        raise InputError(f"section(s) {unknown} are not in this build; pass --append to add new sections "
                         "(nothing was changed)", file=new.source, row=new.section_tiles(unknown[0])[0].row)
    if append and first is not None and unknown and min(unknown) < first:
        raise InputError(f"section {min(unknown)} comes before the build's first section {first}; "
                         "only later sections (or lost ones) can be appended", file=new.source,
                         row=new.section_tiles(min(unknown))[0].row)
    for s in new.sections:
        ref = old.section_tiles(s) if s in have else old.tiles
        w, h = _common_size(ref)
        for t in new.section_tiles(s):
            if (t.width, t.height) != (w, h):
                raise InputError(f"tile {t.tile!r} of section {s} is {t.width} x {t.height} px, the build's "
                                 f"tiles are {w} x {h}; a region imaged at another pixel size needs a "
                                 "pixel_size column (nothing was changed)", file=new.source, row=t.row,
                                 section=s)


def changed_tiles(old: TileManifest, new: TileManifest) -> dict[str, list[str]]:
    """Return section (text) -> names of tiles of existing sections that the update replaces or adds.

    A row naming an existing tile counts when its file, stage position or the file's size or
    modification time (a tile imaged again in place, under the same path) differs.
    """
    before = {(t.section, t.tile): t for t in old.tiles}
    have = set(old.sections)
    out: dict[str, list[str]] = {}
    for t in new.tiles:
        if t.section not in have:
            continue
        o = before.get((t.section, t.tile))
        # A tile imaged again in place keeps its path; its file's size or modification time tells.
        same_file = o is not None and Path(o.path).resolve() == Path(t.path).resolve() and \
            old.files.get(str(o.path), ())[:2] == new.files.get(str(t.path), ())[:2]
        if o is None or not same_file or (o.x, o.y) != (t.x, t.y):
            out.setdefault(str(t.section), []).append(t.tile)
    return out


def tiles_to_read(old: TileManifest, new: TileManifest, changed: dict, settings) -> int:
    """Return how many tiles re-stitching the re-imaged sections reads: the new tiles and those they overlap."""
    import numpy as np

    from ..stitch.overlaps import find_overlaps

    count = 0
    for key, names in changed.items():
        s = int(key)
        incoming = {t.tile: t for t in new.section_tiles(s)}
        tiles = [t for t in old.section_tiles(s) if t.tile not in incoming] + list(incoming.values())
        overlaps = find_overlaps(np.array([(t.x, t.y) for t in tiles], float),
                                 np.array([(t.width, t.height) for t in tiles], np.int64),
                                 settings.min_overlap, math.ceil(2 * settings.max_stage_error))
        fresh = {i for i, t in enumerate(tiles) if t.tile in names}
        count += len(fresh | {i for ov in overlaps if {ov.a, ov.b} & fresh for i in (ov.a, ov.b)})
    return count


def inset_pixel_sizes(path: Path) -> dict[int, float]:
    """Return manifest row number -> ``pixel_size`` for rows that give one (empty when the column is absent)."""
    with Path(path).open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        if "pixel_size" not in (reader.fieldnames or []):
            return {}
        out = {}
        for row, rec in enumerate(reader, start=2):
            text = (rec.get("pixel_size") or "").strip()
            if text:
                try:
                    v = float(text)
                except ValueError:
                    raise InputError(f"column 'pixel_size' must be a number, got {text!r}", file=path,
                                     row=row) from None
                if not (math.isfinite(v) and v > 0):
                    raise InputError(f"column 'pixel_size' must be > 0, got {text!r}", file=path, row=row)
                out[row] = v
        return out


def is_inset(path: Path, build_pixel_nm: float) -> bool:
    """Return True if the manifest's tiles are at another pixel size than the build's (all of them).

    Raises
    ------
    InputError
        If some rows are at the build's pixel size and others are not, or the finer rows disagree.
    """
    sizes = inset_pixel_sizes(path)
    other = {r: v for r, v in sizes.items() if abs(v - build_pixel_nm) > 1e-6 * build_pixel_nm}
    if not other:
        return False
    n_rows = sum(1 for _ in Path(path).open(encoding="utf-8")) - 1
    if len(other) != n_rows:
        row = min(set(range(2, n_rows + 2)) - set(other))
        raise InputError(f"tiles at the build's pixel size ({build_pixel_nm:g} nm) and at another in one manifest; "
                         "put the finer inset in a manifest of its own (nothing was changed)", file=path, row=row)
    if len(set(other.values())) > 1:
        raise InputError("an inset's tiles must share one pixel_size (nothing was changed)", file=path,
                         row=max(other))
    return True
