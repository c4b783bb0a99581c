"""The versioned transform store: ``DIR/transforms/``.

Layout::

    transforms/
      canvas.json                      output extent and physical scale (stack)
      <name>.json                      other stack-level records (e.g. contrast)
      sections/<NNNNN>/stitch.json     tile placements, intensity corrections
      sections/<NNNNN>/illumination.zarr   illumination profile (float32)
      sections/<NNNNN>/align.json      section affine + displacement reference
      sections/<NNNNN>/displacement.zarr   elastic field vectors (ny, nx, 2)
      sections/<NNNNN>/history/        earlier versions, ``stitch.0001.json`` ...

Every JSON file has an envelope ``{"format", "version", "kind", "frames",
"units", "written", "record"}``. Writes are atomic (write a temporary file,
then rename); when a record is replaced, the old one moves to ``history/``
with the next version number, so a re-run can be compared or rolled back.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import Callable, TextIO

import numpy as np

from ..errors import InputError
from .arrayfile import read_one_chunk, write_one_chunk
from .records import FORMAT_VERSION, Canvas, SectionAlignment, SectionStitch

FORMAT_NAME = "stackbuild.transforms"
_FRAMES = {
    "stitch": ("tile", "section"),
    "align": ("aligned", "section"),
    "canvas": ("aligned", "physical"),
}


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def file_mode() -> int:
    """Return the mode a new file gets from ``open()`` under the process umask (0644 under 022).

    Read from ``/proc/self/status`` where it is available, since setting the umask to
    read it back (the only portable way) briefly changes it for every thread.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("Umask:"):
                return 0o666 & ~int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    umask = os.umask(0o022)
    os.umask(umask)
    return 0o666 & ~umask


def replace_atomically(path: Path, write: Callable[[TextIO], bool], *, durable: bool = True,
                       newline: str | None = None) -> bool:
    """Return whether ``path`` was replaced by what ``write`` wrote to a new file beside it.

    ``write`` gets the new file open for text (UTF-8; ``newline`` as :func:`open` takes it) and
    returns True to keep it: it then takes ``path``'s place in one rename (``os.replace``), so a
    reader sees the old file or the new one, never half of one. False, or an error, drops it and
    leaves ``path`` as it was. ``durable`` flushes the new file to disk before the rename (records
    a crash must not lose); without it a power cut can lose the new file, not corrupt the old one.
    The file gets the mode the umask gives any new file (``mkstemp`` alone would make it 0600).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        os.fchmod(fd, file_mode())
        with os.fdopen(fd, "w", newline=newline, encoding="utf-8") as fh:
            keep = write(fh)
            if keep and durable:
                fh.flush()
                os.fsync(fh.fileno())
        if keep:
            os.replace(tmp, path)
            return True
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    Path(tmp).unlink(missing_ok=True)
    return False


def atomic_write_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically and durably (:func:`replace_atomically`)."""
    def write(fh) -> bool:
        fh.write(text)
        return True

    replace_atomically(path, write)


class TransformStore:
    """Read and write the transform records of one build folder.

    Parameters
    ----------
    root : str or Path
        The ``DIR/transforms`` folder (created on first write).
    """

    def __init__(self, root: str | Path):
        self.root = Path(root)

    # ----------------------------------------------------------------- paths
    def inset(self, name: str) -> "TransformStore":
        """Return the store of inset ``name`` (``<root>/insets/<name>``: its stitch record and registration)."""
        return TransformStore(self.root / "insets" / name)

    def section_dir(self, section: int) -> Path:
        """Return the folder of one section's records."""
        return self.root / "sections" / f"{int(section):05d}"

    def _json_path(self, kind: str, section: int | None) -> Path:
        base = self.root if section is None else self.section_dir(section)
        return base / f"{kind}.json"

    # -------------------------------------------------------------- envelope
    def _write(self, kind: str, section: int | None, record: dict,
               arrays: dict[str, np.ndarray | None] | None = None) -> Path:
        path = self._json_path(kind, section)
        src, dst = _FRAMES.get(kind, (None, None))
        env = {"format": FORMAT_NAME, "version": FORMAT_VERSION, "kind": kind,
               "section": section, "frames": {"input": src, "output": dst},
               "units": "pixel", "written": _now(), "record": record}
        # Serialise before touching the current version, so a bad record loses nothing.
        text = json.dumps(env, indent=1, allow_nan=False) + "\n"
        try:
            self._retire(path, arrays or {})
            for name, arr in (arrays or {}).items():
                if arr is not None:
                    self._write_array(path.parent / f"{name}.zarr", arr)
            atomic_write_text(path, text)
        except OSError as exc:  # a read-only or full disk, a file where a folder should be
            raise InputError(f"cannot write the {kind} record ({exc.strerror or exc})", file=path,
                             section=section) from None
        return path

    def _retire(self, path: Path, arrays: dict) -> None:
        """Move the current version of a record (and its arrays) into ``history/``."""
        if not path.exists():
            return
        hist = path.parent / "history"
        hist.mkdir(parents=True, exist_ok=True)
        stem = path.stem
        n = 1 + max((int(p.name.split(".")[1]) for p in hist.glob(f"{stem}.*.json")), default=0)
        for name in arrays:
            old = path.parent / f"{name}.zarr"
            if old.exists():
                os.replace(old, hist / f"{name}.{n:04d}.zarr")
        os.replace(path, hist / f"{stem}.{n:04d}.json")

    @staticmethod
    def _write_array(path: Path, arr: np.ndarray) -> None:
        tmp = path.with_name(f".{path.name}.tmp")
        shutil.rmtree(tmp, ignore_errors=True)
        if not write_one_chunk(tmp, arr):  # the files zarr writes, without importing it; else zarr itself
            import zarr

            shutil.rmtree(tmp, ignore_errors=True)
            z = zarr.create_array(store=str(tmp), shape=arr.shape, dtype=arr.dtype,
                                  chunks=arr.shape, zarr_format=3)
            z[...] = arr
        shutil.rmtree(path, ignore_errors=True)
        os.replace(tmp, path)

    def _read(self, kind: str, section: int | None) -> dict | None:
        path = self._json_path(kind, section)
        if not path.exists():
            return None
        return read_envelope(path, kind)

    def _read_array(self, section: int, name: str) -> np.ndarray:
        path = self.section_dir(section) / f"{name}.zarr"
        direct = read_one_chunk(path)  # the layout _write_array makes, without zarr's per-array overhead
        if direct is not None:
            return direct
        try:
            import zarr

            return np.asarray(zarr.open_array(str(path), mode="r")[...])
        except Exception as exc:
            raise InputError(f"transform array is missing or unreadable ({exc})", file=path,
                             section=section) from None

    # --------------------------------------------------------------- records
    def save_stitch(self, rec: SectionStitch) -> Path:
        """Store one section's stitching result, retiring the previous version."""
        return self._write("stitch", rec.section, rec.to_json(), {"illumination": rec.illumination})

    def load_stitch(self, section: int) -> SectionStitch | None:
        """Return a section's stitching result, or ``None`` if it has none."""
        env = self._read("stitch", section)
        if env is None:
            return None
        rec = env["record"]
        illum = self._read_array(section, "illumination") if rec.get("has_illumination") else None
        return _checked(SectionStitch.from_json, rec, illum, path=self._json_path("stitch", section),
                        section=section)

    def save_alignment(self, rec: SectionAlignment) -> Path:
        """Store one section's alignment, retiring the previous version."""
        vec = None if rec.displacement is None else rec.displacement.vectors
        return self._write("align", rec.section, rec.to_json(), {"displacement": vec})

    def load_alignment(self, section: int) -> SectionAlignment | None:
        """Return a section's alignment, or ``None`` if it has none."""
        env = self._read("align", section)
        if env is None:
            return None
        rec = env["record"]
        kinds = [t["type"] for t in rec.get("transforms", {}).get("transformations", [])]
        vec = self._read_array(section, "displacement") if "displacements" in kinds else None
        return _checked(SectionAlignment.from_json, rec, vec, path=self._json_path("align", section),
                        section=section)

    def save_canvas(self, canvas: Canvas) -> Path:
        """Store the output extent."""
        return self._write("canvas", None, canvas.to_json())

    def load_canvas(self) -> Canvas | None:
        """Return the output extent, or ``None``."""
        env = self._read("canvas", None)
        return None if env is None else _checked(Canvas.from_json, env["record"],
                                                 path=self._json_path("canvas", None))

    def save_doc(self, kind: str, record: dict, section: int | None = None) -> Path:
        """Store any other JSON record (stack-level when ``section`` is None)."""
        return self._write(kind, section, record)

    def load_doc(self, kind: str, section: int | None = None) -> dict | None:
        """Return a record stored with :meth:`save_doc`, or ``None``."""
        env = self._read(kind, section)
        return None if env is None else env["record"]

    def retire(self, kind: str, section: int | None = None) -> bool:
        """Move the current record of ``kind`` (and its arrays) into ``history/``; return False if there is none.

        For taking back a record an update added (its section did not exist before).
        """
        path = self._json_path(kind, section)
        if not path.exists():
            return False
        arrays = {"stitch": {"illumination": None}, "align": {"displacement": None}}.get(kind, {})
        self._retire(path, arrays)
        return True

    def sections_with(self, kind: str) -> list[int]:
        """Return the sections that have a current record of ``kind``."""
        base = self.root / "sections"
        if not base.exists():
            return []
        return sorted(int(p.name) for p in base.iterdir() if (p / f"{kind}.json").exists())

    def history(self, kind: str, section: int | None = None) -> list[Path]:
        """Return the retired versions of a record, oldest first."""
        base = self.root if section is None else self.section_dir(section)
        return sorted((base / "history").glob(f"{kind}.*.json"))


def read_envelope(path: Path, kind: str | None = None) -> dict:
    """Read and validate a transform JSON file; raise :class:`InputError` if it is bad."""
    try:
        env = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"transform file is unreadable or truncated ({exc})", file=path) from None
    if not isinstance(env, dict) or env.get("format") != FORMAT_NAME:
        raise InputError(f"not a {FORMAT_NAME} file", file=path)
    version = env.get("version")
    if not isinstance(version, int) or version > FORMAT_VERSION:
        raise InputError(f"written by a newer stackbuild (format version {version}; this one reads "
                         f"<= {FORMAT_VERSION}); upgrade stackbuild", file=path)
    if kind is not None and env.get("kind") != kind:
        raise InputError(f"expected a {kind!r} record, found {env.get('kind')!r}", file=path)
    if "record" not in env:
        raise InputError("transform file has no record", file=path)
    return env


def _checked(fn, *args, path: Path, section: int | None = None):
    try:
        return fn(*args)
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"transform record is malformed ({type(exc).__name__}: {exc})", file=path,
                         section=section) from None
