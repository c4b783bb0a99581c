"""The build folder: where every stage reads its inputs and writes its results.

Layout::

    DIR/build.json        inputs of the build (manifests, settings) and stage status
    DIR/transforms/       every transform, apart from the pixels (see stackbuild.transforms.store)
    DIR/volume.zarr/      OME-Zarr 0.5: em/ (EM pyramid), channels/<name>/ (marker pyramids)
    DIR/qc/               metrics.json, CSV tables, PNG plots, report.html

Raw tiles are only ever read, never written.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from ..config import PipelineConfig
from ..errors import BuildFolderError, InputError
from ..manifest import TileManifest, read_channel_manifest, read_tile_manifest
from ..transforms.store import TransformStore, atomic_write_text

STATE_FORMAT = "stackbuild.build"
STATE_VERSION = 1


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

    @property
    def qc_dir(self) -> Path:
        """``DIR/qc``."""
        return self.root / "qc"

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

    def tile_manifest(self) -> TileManifest:
        """Re-read and check the tile manifest this build was made from."""
        return read_tile_manifest(self.load_state()["tiles"])

    def channel_manifest(self):
        """Re-read the channel manifest, or return ``[]`` if the build has none."""
        path = self.load_state().get("channels")
        return read_channel_manifest(path) if path else []
