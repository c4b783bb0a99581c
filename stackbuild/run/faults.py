"""Faults of the machine rather than of the input, said in one line: a full disk.

The command line turns an exception into one line naming the place and the
cause (see :func:`stackbuild.cli.main`); this module recognises the faults
that need more words than the exception carries.
"""
from __future__ import annotations

import errno
import re
import shutil
from pathlib import Path


#: numpy's ``tofile`` / ``save`` on a full disk says only how much it wrote.
_SHORT_WRITE = re.compile(r"(\d+) requested and (\d+) written")


def _is_disk_full(exc: BaseException) -> bool:
    if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return True
    text = str(exc)
    return bool(_SHORT_WRITE.search(text)) or "No space left on device" in text or "Disk quota exceeded" in text


def _size(n: float) -> str:
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB"):
        if abs(n) < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} TiB"


def _used(root: Path) -> int:
    total = 0
    for p in root.rglob("*"):
        try:
            if p.is_file() and not p.is_symlink():
                total += p.stat().st_size
        except OSError:
            pass
    return total


def volume_bytes_bound(folder) -> int | None:
    """Return an upper bound (bytes) of the finished volume's EM pyramid, uncompressed, or None if unknown.

    From the stored canvas when there is one, else from the tile manifest's summed
    tile area (a section mosaic is smaller than its tiles laid side by side).
    """
    try:
        canvas = folder.store.load_canvas()
        if canvas is not None:
            item = 2 if "2" in canvas.dtype else 1
            return int(canvas.depth * canvas.width * canvas.height * item * 4 / 3)
        manifest = folder.tile_manifest()
        item = 2 if "2" in manifest.dtype else 1
        return int(sum(t.width * t.height for t in manifest.tiles) * item * 4 / 3)
    except Exception:  # a bound is a courtesy: a folder too broken to estimate gets none
        return None


def disk_full_line(exc: BaseException, folder) -> str | None:
    """Return the one line for a full disk, or None if ``exc`` is not one.

    Names the build folder's file system, its free space, the write that failed
    (its file when the exception knows it), the space the build uses so far and
    an upper bound of what its volume needs, and says how to carry on.
    """
    if not _is_disk_full(exc):
        return None
    where = getattr(exc, "filename", None) or getattr(exc, "file", None)
    root = Path(folder.root) if folder is not None else (Path(where).parent if where else Path.cwd())
    probe = root if root.exists() else root.parent
    try:
        free = shutil.disk_usage(probe).free
    except OSError:
        free = None
    m = _SHORT_WRITE.search(str(exc))
    parts = [f"no space left on the file system holding {root}"]
    if free is not None:
        parts[0] += f" ({_size(free)} free now)"
    if where:
        parts.append(f"while writing {where}")
    elif m:
        parts.append(f"a write of {_size(int(m.group(1)))} stopped after {_size(int(m.group(2)))}")
    if folder is not None and root.exists():
        used = _used(root)
        bound = volume_bytes_bound(folder)
        need = f"; the build uses {_size(used)} so far"
        if bound:
            need += f" and its EM volume takes at most {_size(bound)} before compression"
        parts.append(need.lstrip("; "))
    return "; ".join(parts) + "; free space, then run the same command again with --resume"
