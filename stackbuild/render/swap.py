"""Replacing a pyramid whole: render into a new location, then swap it into ``volume.zarr``.

``render --overwrite`` writes the new EM pyramid (and a marker pyramid whose
layout changed) under ``DIR/.render-incoming/new/<rel>`` (:attr:`BuildFolder.incoming_dir`) and only when it is
complete moves the old one to ``DIR/.render-incoming/old/<rel>`` and the new one
into ``DIR/volume.zarr/<rel>``; then the old one is deleted. Both moves are
renames within the build folder. A render that fails or is killed before the
swap leaves the old pyramid untouched; one killed between the two renames is
put back by :func:`recover_swap`, which every render calls first.
"""
from __future__ import annotations

import os
import shutil
from pathlib import Path

def incoming_path(folder, rel: str) -> Path:
    """Return where the replacement of ``volume.zarr/<rel>`` is rendered (``rel``: ``"em"``, ``"channels/<name>"``)."""
    return folder.incoming_dir / "new" / rel


def swap_in(folder, rel: str) -> None:
    """Move the finished replacement of ``volume.zarr/<rel>`` into place, then delete the old pyramid."""
    new = incoming_path(folder, rel)
    dest = Path(folder.volume_path) / rel
    old = folder.incoming_dir / "old" / rel
    old.parent.mkdir(parents=True, exist_ok=True)
    dest.parent.mkdir(parents=True, exist_ok=True)
    shutil.rmtree(old, ignore_errors=True)
    if dest.exists():
        os.replace(dest, old)
    os.replace(new, dest)
    shutil.rmtree(old, ignore_errors=True)
    _prune(folder.incoming_dir)


def _prune(base: Path) -> None:
    """Remove the empty folders under ``base``, and ``base`` itself if it ends up empty."""
    if not base.exists():
        return
    for d in sorted((p for p in base.rglob("*") if p.is_dir()), key=lambda p: len(p.parts), reverse=True):
        if not any(d.iterdir()):
            d.rmdir()
    if not any(base.iterdir()):
        base.rmdir()


def recover_swap(folder) -> list[str]:
    """Put back pyramids a killed swap left aside, drop unfinished replacements; return what was put back."""
    base = folder.incoming_dir
    if not base.exists():
        return []
    restored = []
    old = base / "old"
    for marker in sorted(old.rglob("zarr.json")) if old.exists() else []:
        group = marker.parent
        if (group.parent / "zarr.json").exists() and group.parent != old:
            continue  # an array inside a group already handled
        rel = group.relative_to(old)
        dest = Path(folder.volume_path) / rel
        if not dest.exists():
            dest.parent.mkdir(parents=True, exist_ok=True)
            os.replace(group, dest)
            restored.append(str(rel))
    shutil.rmtree(base, ignore_errors=True)
    return restored
