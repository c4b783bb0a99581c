"""Starting a build: check every input, then create or resume the build folder, or begin its replacement.

Raw tiles, channel images and manifests are only read. ``overwrite`` never
deletes the old build before its replacement exists: the new build is made in
``DIR/.build-incoming`` (a build folder of its own, :attr:`BuildFolder.replacement`)
while the old one stays whole, and :func:`finish_build` swaps it in when every
stage is done. A failed or killed ``build --overwrite`` leaves the old build
byte-identical; ``build --resume`` continues the replacement, ``build --overwrite``
starts it again. The swap is a handful of renames inside the folder, recorded
first (:func:`complete_replacement`), so one killed halfway is finished by the next
command that takes the folder's lock (:mod:`stackbuild.run.lock`).
"""
from __future__ import annotations

import json
import os
import shutil
import tomllib
from pathlib import Path

from .._version import __version__
from ..config import load_config
from ..errors import InputError
from ..manifest import read_channel_manifest, read_landmarks, read_tile_manifest
from ..folder import LOCK_NAME, OUTPUTS, REPLACED, BuildFolder, csv_facts
from ..transforms.store import atomic_write_text

#: What an earlier build wrote at the top of its folder.
OUR_OUTPUTS = OUTPUTS
#: Written into a finished replacement before the swap: the names it brings (the swap is then rolled forward).
SWAP_RECORD = "swap.json"


def start_build(out, tiles, *, channels=None, landmarks=None, config=None, pixel_size=None,
                section_thickness=None, resume: bool = False, overwrite: bool = False) -> BuildFolder:
    """Return the build folder ``out``, ready for the stages: new, resumed, or emptied of an earlier build.

    Every input is checked before anything is written: the tile manifest (its check is kept
    in the folder, see :meth:`BuildFolder.keep_checked_manifest`), the channel manifest, the
    landmark file and the settings.

    Parameters
    ----------
    out : str or Path
        The build folder.
    tiles, channels, landmarks : str or Path
        The tile manifest; optional channel manifest and landmark file (which needs channels).
    config : str or Path, optional
        A pipeline TOML; ``pixel_size`` and ``section_thickness`` (nm) override its volume table.
    resume : bool
        Continue the build in ``out`` with its own settings; settings given again must match.
    overwrite : bool
        Replace the build in ``out``: the returned folder is its replacement
        (``out/.build-incoming``), which :func:`finish_build` swaps in when complete.

    Raises
    ------
    InputError
        For bad input, a folder that already holds a build (without ``resume`` or
        ``overwrite``), a non-empty folder that holds none, or settings that differ on resume.
    """
    build = BuildFolder(Path(out))
    complete_replacement(build)
    if resume and build.replacement.exists():  # an interrupted --overwrite: its build is the one to continue
        build = build.replacement
    tiles = Path(tiles)
    # Hashed before the check, so the kept snapshot never claims content it was not made from.
    facts = csv_facts(tiles) if tiles.is_file() else None
    manifest = None
    if resume and build.exists() and Path(build.load_state().get("tiles", "")) == tiles.resolve():
        manifest = build.tile_manifest()  # the kept snapshot while the CSV is unchanged
    if manifest is None:
        manifest = read_tile_manifest(tiles)
    channels = Path(channels).resolve() if channels else None
    entries = read_channel_manifest(channels) if channels else []
    imaged = set(manifest.sections)
    stray = next((e for e in entries if e.section not in imaged), None)
    if stray is not None:  # refused now rather than after stitching and aligning everything else
        raise InputError(f"channel {stray.channel!r} is for section {stray.section}, which has no tiles "
                         "in the tile manifest", file=channels, row=stray.row, section=stray.section)
    if landmarks and not channels:
        raise InputError("--landmarks needs --channels: landmarks tie marker images to the EM",
                         file=Path(landmarks))
    landmarks = Path(landmarks).resolve() if landmarks else None
    if landmarks:
        read_landmarks(landmarks, manifest, entries)
    cfg = load_config(config)
    if pixel_size is not None:
        cfg.volume.pixel_size = _positive(pixel_size, "--pixel-size")
    if section_thickness is not None:
        cfg.volume.section_thickness = _positive(section_thickness, "--section-thickness")
    record = {"tiles": str(manifest.source), "channels": str(channels) if channels else None,
              "landmarks": str(landmarks) if landmarks else None,
              "config": cfg.to_json(), "stackbuild": __version__}
    assumed = assumed_scale(cfg, config, pixel_size, section_thickness)
    if assumed:
        record["assumed_scale"] = assumed
    if build.exists():
        if resume:
            old = build.load_state()
            if old.get("tiles") != record["tiles"] and not old.get("manifests"):
                raise InputError(f"--resume: this build was made from {old.get('tiles')}, "
                                 f"not {record['tiles']}", file=build.state_path)
            given = config or pixel_size is not None or section_thickness is not None
            changed = _changed_settings(old.get("config", {}), json.loads(json.dumps(record["config"]))) \
                if given else []  # no settings given: carry on with the build's own
            if changed or (channels and old.get("channels") != record["channels"]):
                what = ", ".join(changed) if changed else "the channel manifest"
                raise InputError(f"--resume: {what} differ from the interrupted build's; resume with the "
                                 "same settings, or start again with --overwrite", file=build.state_path)
            if landmarks:  # they only feed the report, so a resumed build may take new ones
                build.update_state(landmarks=str(landmarks))
            return build
        if not overwrite:
            if build.replacement.exists():
                raise InputError("already holds a build and an unfinished replacement of it (an interrupted "
                                 f"--overwrite, in {build.replacement.root.name}); pass --resume to continue "
                                 "the replacement or --overwrite to start it again", file=build.root)
            raise InputError("already holds a build; pass --resume to continue it or --overwrite "
                             "to replace it", file=build.root)
        # The old build stays whole until its replacement is complete (see finish_build);
        # an unfinished replacement from an earlier --overwrite is ours to drop.
        build = build.replacement
        shutil.rmtree(build.root, ignore_errors=True)
    elif build.root.exists() and any(p.name != LOCK_NAME for p in build.root.iterdir()) and not overwrite:
        raise InputError("exists, is not empty and holds no build; choose an empty or new folder",
                         file=build.root)
    build.root.mkdir(parents=True, exist_ok=True)
    build.save_state({**record, "stages": {}})
    if facts is not None:
        build.keep_checked_manifest(manifest, facts)
    return build


def finish_build(build: BuildFolder) -> BuildFolder:
    """Return the build folder after its build finished: a replacement (``--overwrite``) is swapped in first.

    The replacement's outputs (:data:`stackbuild.folder.REPLACED`) take the old ones' places, the
    old ones are deleted, and the folder the build now lives in is returned; any other build is
    returned as it is.
    """
    if build.home == build.root:
        return build
    home = BuildFolder(build.home)
    names = [n for n in REPLACED if (build.root / n).exists()]
    atomic_write_text(build.root / SWAP_RECORD, json.dumps({"bring": names}) + "\n")
    complete_replacement(home)
    return home


def refuse_while_replaced(build: BuildFolder, command: str) -> None:
    """Raise :class:`InputError` when ``build`` has an unfinished replacement (an interrupted ``--overwrite``).

    A change made to the old build now (an update, added markers) would be thrown away, silently,
    when ``build --resume`` finishes the replacement and swaps it in.
    """
    if build.replacement.exists() and not (build.replacement.root / SWAP_RECORD).exists():
        raise InputError(f"{command}: this build has an unfinished replacement (an interrupted --overwrite, in "
                         f"{build.replacement.root.name}) that would discard the change when it is finished; run "
                         "'stackbuild build ... --resume' to finish it first, or delete "
                         f"{build.replacement.root} to keep this build", file=build.root)


def complete_replacement(folder: BuildFolder) -> bool:
    """Finish a swap of a finished replacement into ``folder``; return True if there was one to finish.

    Rolled forward from any point: every name the swap record lists that is still in the
    replacement is moved in (the old one moved aside first), every other output of the old
    build is moved aside, then what was set aside and the replacement's leftovers (its scratch)
    are deleted. A replacement without a swap record is unfinished and left alone (for
    ``build --resume``, or for ``build --overwrite`` to drop).
    """
    new_root = folder.replacement.root
    try:
        bring = json.loads((new_root / SWAP_RECORD).read_text(encoding="utf-8"))["bring"]
    except (OSError, ValueError, KeyError, TypeError):
        return False
    aside = folder.replaced_dir
    for name in REPLACED:
        new, dest = new_root / name, folder.root / name
        if name in bring and not new.exists():
            continue  # moved in before a kill
        if dest.exists():
            old = aside / name
            _remove(old)
            old.parent.mkdir(parents=True, exist_ok=True)
            os.replace(dest, old)
        if name in bring:
            dest.parent.mkdir(parents=True, exist_ok=True)
            os.replace(new, dest)
    _remove(aside)
    _remove(new_root)
    return True


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    elif path.exists() or path.is_symlink():
        path.unlink()


def assumed_scale(cfg, config, pixel_size, section_thickness) -> dict:
    """Return ``{key: value}`` of the ``[volume]`` scale keys (nm) that nobody gave: neither a flag nor the pipeline file.

    The physical scale of the volume is never silent: ``build`` says which values it
    assumed, and the build record keeps them (``assumed_scale``) for the report.
    """
    given = set()
    if config is not None:
        with open(config, "rb") as fh:  # already read and checked by load_config
            given = set(tomllib.load(fh).get("volume", {}))
    if pixel_size is not None:
        given.add("pixel_size")
    if section_thickness is not None:
        given.add("section_thickness")
    return {k: getattr(cfg.volume, k) for k in ("pixel_size", "section_thickness") if k not in given}


def _changed_settings(old: dict, new: dict) -> list[str]:
    """Return ``table.key`` names whose values differ between two settings records."""
    return sorted(f"{t}.{k}" for t in set(old) | set(new)
                  for k in set(old.get(t, {})) | set(new.get(t, {}))
                  if old.get(t, {}).get(k) != new.get(t, {}).get(k))


def _positive(value: float, name: str) -> float:
    if not value > 0:
        raise InputError(f"{name} must be > 0, got {value}")
    return value
