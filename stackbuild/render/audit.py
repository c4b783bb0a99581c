"""The volume check: does every plane match its transforms, and can every chunk be decoded?

For each pyramid of ``volume.zarr`` (``em`` and every marker channel) the check
compares each plane's recorded fingerprint with the one the current
transform records and settings give (:mod:`stackbuild.render.fingerprint`),
and decodes every chunk of every level, one task per pyramid, level and plane.
Planes with a chunk that cannot be decoded are noted as damaged in the
pyramid's plane record, so that ``render --resume`` renders them again.

What one task holds: one plane of one level, read chunk by chunk (one
``chunk x chunk`` block at a time).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import zarr

from ..errors import InputError
from ..folder import BuildFolder
from .fingerprint import current_fingerprints, forget_planes, read_plane_record


@dataclass(frozen=True)
class _PlaneJob:
    array: str          # path of the level array
    label: str          # how the array is named in messages, e.g. "volume.zarr/em/0"
    z: int


@dataclass
class Finding:
    """One stale or damaged plane."""

    pyramid: str        # "em" or "channels/<name>"
    plane: int
    kind: str           # "stale" or "damaged"
    detail: str

    def line(self) -> str:
        """Return the finding as one line."""
        return f"{self.kind}: volume.zarr/{self.pyramid} plane {self.plane}: {self.detail}"


@dataclass
class AuditReport:
    """What the volume check found."""

    planes: int = 0
    chunks: int = 0
    findings: list[Finding] = field(default_factory=list)
    unrecorded: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """True when nothing is stale or damaged."""
        return not self.findings


def check_plane(job: _PlaneJob) -> tuple[int, list[str]]:
    """Decode every chunk of one plane of one level array; return ``(chunks read, problems)`` (runs on a worker)."""
    try:
        arr = zarr.open_array(job.array, mode="r")
    except Exception as exc:  # unreadable metadata: zarr and the JSON parser raise many types
        return 0, [f"{job.label}: array metadata unreadable ({type(exc).__name__}: {exc})"]
    _, h, w = arr.shape
    _, ch, cw = arr.chunks
    _, sh, sw = arr.shards or arr.chunks
    problems, n = [], 0
    # One read per shard (one index read, its chunks decoded together); chunk by chunk only
    # inside a shard that fails, to name the damaged chunks.
    for y1 in range(0, h, sh):
        for x1 in range(0, w, sw):
            try:
                arr[job.z, y1:y1 + sh, x1:x1 + sw]
                n += len(range(y1, min(h, y1 + sh), ch)) * len(range(x1, min(w, x1 + sw), cw))
                continue
            except Exception:  # codecs raise many types for corrupt bytes: look chunk by chunk
                pass
            for y0 in range(y1, min(h, y1 + sh), ch):
                for x0 in range(x1, min(w, x1 + sw), cw):
                    n += 1
                    try:
                        arr[job.z, y0:y0 + ch, x0:x0 + cw]
                    except Exception as exc:  # codecs raise many types for corrupt bytes
                        problems.append(f"{job.label} chunk (plane {job.z}, row {y0 // ch}, col {x0 // cw}) "
                                        f"cannot be decoded ({type(exc).__name__}: {exc})")
    return n, problems


def _pyramids(folder: BuildFolder) -> list[str]:
    out = ["em"] if (folder.pyramid_path() / "zarr.json").exists() else []
    chans = folder.channels_path
    if chans.exists():
        out += [f"channels/{p.name}" for p in sorted(chans.iterdir()) if (p / "zarr.json").exists()]
    return out


def _levels(group: Path) -> list[Path]:
    return sorted((p for p in group.iterdir() if p.name.isdigit() and (p / "zarr.json").exists()),
                  key=lambda p: int(p.name))


def audit_volume(folder, *, pixels: bool = True, mapper=None, record: bool = True) -> AuditReport:
    """Check every plane of a build's volume against its transforms and (with ``pixels``) decode every chunk.

    Parameters
    ----------
    folder : BuildFolder
        The build folder.
    pixels : bool
        Decode every chunk of every level (reads the whole volume); without it only
        the fingerprints are compared.
    mapper : callable(fn, items), optional
        Runs the per-plane chunk checks (default: in this process).
    record : bool
        Note damaged planes in their pyramid's plane record, so ``render --resume``
        renders them again.

    Returns
    -------
    AuditReport

    Raises
    ------
    InputError
        If the build has no volume.
    """
    volume = folder.volume_path
    pyramids = _pyramids(folder)
    if not pyramids:
        raise InputError("no volume to check (run the render stage first)", file=volume)
    report = AuditReport()
    jobs: list[tuple[str, _PlaneJob]] = []
    for pyr in pyramids:
        group = volume / pyr
        name = "em" if pyr == "em" else pyr.split("/", 1)[1]
        doc = read_plane_record(group)
        if doc is None:
            report.unrecorded.append(pyr)
        recorded = (doc or {}).get("fingerprints", {})
        now = current_fingerprints(folder, array=name)
        report.planes += len(now)
        for z, fp in sorted(now.items()):
            have = recorded.get(str(z))
            if have != fp:
                why = "never written, or its rendering was interrupted" if have is None else \
                    "rendered from other transform records, tile files or settings than the current ones"
                report.findings.append(Finding(pyr, z, "stale", why))
        if pixels:
            for level in _levels(group):
                depth = zarr.open_array(str(level), mode="r").shape[0]
                jobs += [(pyr, _PlaneJob(str(level), f"volume.zarr/{pyr}/{level.name}", z)) for z in range(depth)]
    if jobs:
        run = mapper or (lambda fn, items: [fn(i) for i in items])
        damaged: dict[str, dict[int, str]] = {}
        for (pyr, job), (n, problems) in zip(jobs, run(check_plane, [j for _, j in jobs])):
            report.chunks += n
            if problems:
                damaged.setdefault(pyr, {}).setdefault(job.z, problems[0])
                for p in problems:
                    report.findings.append(Finding(pyr, job.z, "damaged", p))
        if record:
            for pyr, planes in damaged.items():
                name = "em" if pyr == "em" else pyr.split("/", 1)[1]
                for z, why in planes.items():
                    forget_planes(folder, [z], array=name, reason=why)
    report.findings.sort(key=lambda f: (f.pyramid != "em", f.pyramid, f.plane, f.kind))
    return report


def chunk_error(label: str, path, z: int, row: int, col: int, exc: BaseException) -> InputError:
    """Return the error for a volume chunk that cannot be decoded, naming array, plane and chunk."""
    return InputError(f"{label}: chunk (plane {z}, row {row}, col {col}) cannot be decoded "
                      f"({type(exc).__name__}: {exc}); 'stackbuild audit' lists every damaged chunk and "
                      "'stackbuild render --resume' renders damaged planes again", file=path)


class CheckedArray:
    """A read-only view of a zarr array whose failed reads name the array, plane and chunk.

    Wraps reads of ``volume.zarr`` levels: when a selection cannot be decoded, its
    chunks are read one by one to find the first damaged one, and an
    :class:`~stackbuild.errors.InputError` names it (see :func:`chunk_error`).
    Anything else is passed through to the array.

    Parameters
    ----------
    array : zarr.Array
        A 3-D ``(z, y, x)`` level array.
    label : str
        How messages name it, e.g. ``"volume.zarr/em/2"``.
    """

    def __init__(self, array, label: str):
        self._array = array
        self._label = label

    def __getattr__(self, name):
        return getattr(self._array, name)

    def __getitem__(self, key):
        try:
            return self._array[key]
        except (IndexError, TypeError, KeyError):
            raise
        except Exception as exc:  # codecs raise many types for damaged bytes
            raise self._locate(key, exc) from None

    def _locate(self, key, exc: BaseException) -> InputError:
        key = key if isinstance(key, tuple) else (key,)
        key = key + (slice(None),) * (3 - len(key))
        ranges = []
        for k, n in zip(key[:3], self._array.shape):
            if isinstance(k, slice):
                a, b, _ = k.indices(n)
                ranges.append((a, b))
            else:
                i = int(k) % n
                ranges.append((i, i + 1))
        (z0, z1), (y0, y1), (x0, x1) = ranges
        _, ch, cw = self._array.chunks
        store = getattr(self._array, "store_path", None)
        for z in range(z0, z1):
            for i in range(y0 // ch, max(y0 // ch + 1, math.ceil(y1 / ch))):
                for j in range(x0 // cw, max(x0 // cw + 1, math.ceil(x1 / cw))):
                    try:
                        self._array[z, i * ch:(i + 1) * ch, j * cw:(j + 1) * cw]
                    except Exception as inner:  # the damaged chunk
                        return chunk_error(self._label, store, z, i, j, inner)
        return InputError(f"{self._label}: planes {z0}-{z1 - 1} cannot be read ({type(exc).__name__}: {exc})",
                          file=store)
