"""The build folder: where every stage reads its inputs and writes its results.

Layout::

    DIR/build.json        inputs of the build (manifests, settings) and stage status
    DIR/transforms/       every transform, apart from the pixels (see stackbuild.transforms.store)
    DIR/volume.zarr/      OME-Zarr 0.5: em/ (EM pyramid), channels/<name>/ (marker pyramids)
    DIR/qc/               metrics.json, CSV tables, SVG figures, report.html
    DIR/manifests/        merged tile manifests written by ``update``, and
                          tiles.checked.json, the checked tile manifest (a cache)
    DIR/scratch/<stage>/  a stage's temporary files, removed when it ends
    DIR/.stackbuild.lock  held while a command works in the folder
    DIR/.build-incoming/  a whole build made by ``build --overwrite`` beside the one it replaces
                          (a build folder of its own), swapped in when it is complete

Raw tiles are only ever read, never written. Every path inside the folder is
named here and nowhere else: stages ask the :class:`BuildFolder` for it.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import logging
import os
from dataclasses import dataclass
from pathlib import Path

from .config import PipelineConfig
from .errors import BuildFolderError, InputError
from .manifest import TileManifest, read_channel_manifest, read_tile_manifest
from .transforms.store import TransformStore, atomic_write_text

STATE_FORMAT = "stackbuild.build"
STATE_VERSION = 1
SNAPSHOT_FORMAT = "stackbuild.checked-manifest"
SNAPSHOT_VERSION = 1
#: The file whose lock marks a folder in use (see :mod:`stackbuild.run.lock`).
LOCK_NAME = ".stackbuild.lock"
#: What a build writes at the top of its folder (``--overwrite`` removes these).
OUTPUTS = ("build.json", "transforms", "volume.zarr", "qc")
#: Where ``build --overwrite`` makes the replacing build, inside the folder it replaces.
REPLACEMENT_NAME = ".build-incoming"
#: What a finished replacement swaps in for the old build's (``build.json`` last), relative to the folder.
REPLACED = ("transforms", "volume.zarr", "qc", "updates", "manifests/tiles.checked.json", "build.json")

log = logging.getLogger(__name__)


@dataclass
class BuildFolder:
    """Paths and state of one build folder.

    Parameters
    ----------
    root : Path
        The folder (``--out DIR``).
    """

    root: Path

    def __post_init__(self):
        self.root = Path(self.root)

    @property
    def state_path(self) -> Path:
        """``DIR/build.json``."""
        return self.root / "build.json"

    @property
    def store(self) -> TransformStore:
        """The transform store at ``DIR/transforms``."""
        return TransformStore(self.root / "transforms")

    @property
    def volume_path(self) -> Path:
        """``DIR/volume.zarr``."""
        return self.root / "volume.zarr"

    def pyramid_path(self, channel: str | None = None) -> Path:
        """``DIR/volume.zarr/em``, or ``DIR/volume.zarr/channels/<channel>`` for a marker channel."""
        return self.volume_path / "em" if channel is None else self.channels_path / channel

    @property
    def channels_path(self) -> Path:
        """``DIR/volume.zarr/channels``, the group holding the marker-channel pyramids."""
        return self.volume_path / "channels"

    def inset_path(self, name: str) -> Path:
        """``DIR/volume.zarr/insets/<name>``: a finer-pixel inset image."""
        return self.volume_path / "insets" / name

    @property
    def qc_dir(self) -> Path:
        """``DIR/qc``."""
        return self.root / "qc"

    def measurement_path(self, kind: str, key: str) -> Path:
        """``DIR/qc/measured/<kind>/<key>.json``: one stored report measurement (a section, a plane pair, a run)."""
        return self.qc_dir / "measured" / kind / f"{key}.json"

    @property
    def report_path(self) -> Path:
        """``DIR/qc/report.html``."""
        return self.qc_dir / "report.html"

    @property
    def lock_path(self) -> Path:
        """``DIR/.stackbuild.lock``."""
        return self.root / LOCK_NAME

    @property
    def manifests_dir(self) -> Path:
        """``DIR/manifests``: merged tile manifests and the checked-manifest snapshot."""
        return self.root / "manifests"

    def merged_manifest_path(self, n: int) -> Path:
        """``DIR/manifests/tiles.NNNN.csv``, the ``n``-th tile manifest merged by ``update``."""
        return self.manifests_dir / f"tiles.{int(n):04d}.csv"

    @property
    def incoming_dir(self) -> Path:
        """``DIR/.render-incoming``: pyramids rendered to replace others, swapped in when complete."""
        return self.root / ".render-incoming"

    @property
    def home(self) -> Path:
        """The folder this build is for: :attr:`root`, or ``DIR`` for a replacement made in ``DIR/.build-incoming``.

        What reports and messages name: a replacement is swapped into ``DIR`` when it is complete.
        """
        return self.root.parent if self.root.name == REPLACEMENT_NAME else self.root

    @property
    def replacement(self) -> "BuildFolder":
        """The build ``build --overwrite`` makes beside this one (``DIR/.build-incoming``), swapped in when complete."""
        return BuildFolder(self.root / REPLACEMENT_NAME)

    @property
    def replaced_dir(self) -> Path:
        """``DIR/.build-replaced``: the old build's outputs, set aside for the moment of a swap."""
        return self.root / ".build-replaced"

    def scratch_dir(self, stage: str) -> Path:
        """``DIR/scratch/<stage>``: a stage's temporary files (the stage removes them)."""
        return self.root / "scratch" / stage

    def output_paths(self) -> list[Path]:
        """The top-level outputs of a build in this folder (see :data:`OUTPUTS`)."""
        return [self.root / name for name in OUTPUTS]

    def exists(self) -> bool:
        """Return True if the folder holds a build (its ``build.json``)."""
        return self.state_path.exists()

    # ----------------------------------------------------------------- state
    def load_state(self) -> dict:
        """Return the build record; raise :class:`BuildFolderError` if there is none."""
        if not self.state_path.exists():
            raise BuildFolderError(f"{self.root} is not a build folder (no build.json); "
                                   "run 'stackbuild build' first", file=self.root)
        try:
            state = json.loads(self.state_path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            raise InputError(f"build record is unreadable ({exc})", file=self.state_path) from None
        if state.get("format") != STATE_FORMAT:
            raise InputError(f"not a {STATE_FORMAT} record", file=self.state_path)
        if not isinstance(state.get("version"), int) or state["version"] > STATE_VERSION:
            raise InputError(f"written by a newer stackbuild (version {state.get('version')})",
                             file=self.state_path)
        return state

    def save_state(self, state: dict) -> None:
        """Write the build record atomically."""
        state = {"format": STATE_FORMAT, "version": STATE_VERSION, **state}
        atomic_write_text(self.state_path, json.dumps(state, indent=1) + "\n")

    def update_state(self, **changes) -> dict:
        """Merge ``changes`` into the build record and write it; return the new record."""
        state = self.load_state()
        state.update(changes)
        self.save_state(state)
        return state

    def mark_stage(self, stage: str, status: str, **info) -> None:
        """Record a stage's status (``"running"``, ``"done"``) and facts about its run."""
        state = self.load_state()
        state.setdefault("stages", {})[stage] = {"status": status, **info}
        self.save_state(state)

    def stage_done(self, stage: str) -> bool:
        """Return True if ``stage`` finished in this folder."""
        return self.load_state().get("stages", {}).get(stage, {}).get("status") == "done"

    # --------------------------------------------------------------- inputs
    @property
    def config(self) -> PipelineConfig:
        """The settings this build runs with."""
        state = self.load_state()
        return PipelineConfig.from_json(state.get("config", {}), str(self.state_path))

    @property
    def snapshot_path(self) -> Path:
        """``DIR/manifests/tiles.checked.json``, the checked tile manifest."""
        return self.manifests_dir / "tiles.checked.json"

    def tile_manifest(self) -> TileManifest:
        """Return the checked tile manifest this build is made from, opening tile headers only when needed.

        The first call checks the CSV fully (every tile's header included, see
        :func:`stackbuild.manifest.read_tile_manifest`) and keeps the result in
        :attr:`snapshot_path`, with the CSV's path, size, mtime_ns and sha256.
        Later calls hash the CSV and return the snapshot when path and digest
        still match; otherwise the CSV is checked again and the snapshot
        rewritten. ``update`` points the build at a new CSV, whose digest
        differs, so the snapshot follows it.

        Notes
        -----
        The snapshot is a cache, never the source of truth: a missing,
        truncated or unreadable one is rebuilt, and one that cannot be written
        (a read-only build folder) is skipped. One written by a newer
        stackbuild is refused, as the build record and transform store refuse
        theirs, since it means a newer version is at work in this folder.
        Tiles whose files change after the check are not seen here; they are
        caught where pixels are read (:func:`stackbuild.tiles.read_tile`
        checks every decoded tile against its recorded size and type).

        Raises
        ------
        InputError
            For a bad manifest or tile (as ``read_tile_manifest``), or a
            snapshot written by a newer stackbuild.
        """
        csv_path = Path(self.load_state()["tiles"])
        if not csv_path.is_file():
            return read_tile_manifest(csv_path)  # names the missing file
        facts = csv_facts(csv_path)
        kept = self._kept_manifest(facts)
        if kept is not None:
            return kept
        manifest = read_tile_manifest(csv_path, known=self.checked_headers())  # opens new or changed files only
        self._keep_manifest(manifest, facts)
        return manifest

    def checked_headers(self) -> dict:
        """Return the tile files the kept snapshot checked, whatever CSV it was made from (``{}`` if none).

        For :func:`stackbuild.manifest.read_tile_manifest` ``known=``: files whose size and
        modification time are unchanged are not opened again, so a changed or merged
        manifest (``update``) costs one header read per new or changed file only.
        """
        try:
            doc = json.loads(self.snapshot_path.read_text(encoding="utf-8"))
            if doc.get("format") == SNAPSHOT_FORMAT and doc.get("version", 0) <= SNAPSHOT_VERSION:
                return TileManifest.from_json(doc.get("record")).known_headers()
        except (OSError, ValueError, AttributeError, TypeError):
            pass
        return {}

    def _kept_manifest(self, facts: dict) -> TileManifest | None:
        """Return the snapshot's manifest if it was checked from the CSV described by ``facts``."""
        path = self.snapshot_path
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            return None
        except (OSError, ValueError) as exc:  # truncated, not UTF-8, not JSON
            log.info("rebuilding %s: unreadable (%s)", path, exc)
            return None
        if not isinstance(doc, dict) or doc.get("format") != SNAPSHOT_FORMAT \
                or not isinstance(doc.get("version"), int):
            log.info("rebuilding %s: not a %s file", path, SNAPSHOT_FORMAT)
            return None
        if doc["version"] > SNAPSHOT_VERSION:
            raise InputError(f"written by a newer stackbuild (version {doc['version']}, this one reads "
                             f"up to {SNAPSHOT_VERSION}); use that version, or delete the file (it is "
                             "rebuilt from the tile manifest)", file=path)
        csv = doc.get("csv")
        if not isinstance(csv, dict) or {k: csv.get(k) for k in ("path", "sha256")} != \
                {k: facts[k] for k in ("path", "sha256")}:
            log.info("rebuilding %s: the tile manifest %s changed", path, facts["path"])
            return None
        try:
            return TileManifest.from_json(doc.get("record"))
        except ValueError as exc:
            log.info("rebuilding %s: %s", path, exc)
            return None

    def keep_checked_manifest(self, manifest: TileManifest, facts: dict) -> None:
        """Keep ``manifest``, just checked from the CSV that ``facts`` describes (see :func:`csv_facts`), as the snapshot.

        For a caller that has checked the manifest itself (``build`` checks it before it
        creates the folder), so the first stage does not check every tile again.
        """
        self._keep_manifest(manifest, facts)

    def _keep_manifest(self, manifest: TileManifest, facts: dict) -> None:
        """Write the snapshot of a freshly checked manifest; skip it if the folder is not writable."""
        doc = {"format": SNAPSHOT_FORMAT, "version": SNAPSHOT_VERSION, "kind": "tiles",
               "written": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
               "csv": facts, "record": manifest.to_json()}
        try:
            atomic_write_text(self.snapshot_path, json.dumps(doc, allow_nan=False, separators=(",", ":")))
        except OSError as exc:
            log.warning("cannot keep the checked tile manifest in %s (%s); every stage start will "
                        "check the tiles again", self.snapshot_path, exc)

    def channel_manifest(self):
        """Re-read the channel manifest, or return ``[]`` if the build has none."""
        path = self.load_state().get("channels")
        return read_channel_manifest(path) if path else []


def csv_facts(path: Path) -> dict:
    """Return the resolved path, size, mtime_ns and sha256 of a manifest file.

    The digest is taken before the file is checked, so an edit made during
    the check can only leave a stale digest (a rebuild next time), never a
    snapshot that claims content it was not made from.
    """
    path = path.resolve()
    with path.open("rb") as fh:
        st = os.fstat(fh.fileno())
        digest = hashlib.file_digest(fh, "sha256").hexdigest()
    return {"path": str(path), "size": st.st_size, "mtime_ns": st.st_mtime_ns, "sha256": digest}
