"""Marker images probed again, or new markers: add a channel manifest to a finished build.

Rows of the new manifest whose ``(section, channel)`` the build already has
replace those images; other rows are added (a new marker, or a marker on more
sections). The merged manifest is kept in ``DIR/manifests/channels.NNNN.csv``
(the user's files are never edited), the build is pointed at it, and only the
channel stage and the marker pyramids run: EM transforms and EM pixels are not
touched. Marker planes whose registration did not change keep their bytes (see
the plane fingerprints in :mod:`stackbuild.render.fingerprint`).
"""
from __future__ import annotations

import csv
import io
from pathlib import Path

from ..errors import InputError
from ..folder import BuildFolder
from ..manifest import ChannelEntry, read_channel_manifest
from ..transforms.store import atomic_write_text


def merged_channels(old: list[ChannelEntry], new: list[ChannelEntry]) -> str:
    """Return the CSV text of ``old`` with ``new``'s rows merged in by (section, channel)."""
    incoming = {(e.section, e.channel) for e in new}
    rows = [e for e in old if (e.section, e.channel) not in incoming] + list(new)
    rows.sort(key=lambda e: (e.channel, e.section))
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["section", "channel", "path", "pixel_size", "x", "y"])
    for e in rows:
        w.writerow([e.section, e.channel, str(e.path), repr(e.pixel_size),
                    "" if e.x is None else repr(e.x), "" if e.y is None else repr(e.y)])
    return buf.getvalue()


def add_channels(build: BuildFolder, channels: Path, *, workers=None, scheduler=None,
                 show_progress: bool = True) -> dict:
    """Merge a channel manifest into a build, register the markers and write their pyramids; return facts.

    Raises
    ------
    InputError
        A bad manifest, or a row for a section without tiles (nothing is changed then).
    """
    from . import stages
    from .cluster import client_mapper, dask_client
    from .progress import ProgressBar
    from .start import refuse_while_replaced

    refuse_while_replaced(build, "channels --merge")
    new = read_channel_manifest(Path(channels).resolve())
    have = set(build.tile_manifest().sections)
    stray = next((e for e in new if e.section not in have), None)
    if stray is not None:
        raise InputError(f"section {stray.section} has no tiles in this build (nothing was changed)",
                         file=channels, row=stray.row, section=stray.section)
    state = build.load_state()
    old = read_channel_manifest(state["channels"]) if state.get("channels") else []
    replaced = sorted({(e.section, e.channel) for e in new} & {(e.section, e.channel) for e in old})
    n = 1 + sum(1 for _ in build.manifests_dir.glob("channels.*.csv")) if build.manifests_dir.is_dir() else 1
    merged = (build.manifests_dir / f"channels.{n:04d}.csv").resolve()
    atomic_write_text(merged, merged_channels(old, new))
    read_channel_manifest(merged)  # the merged file is checked before the build points at it
    build.update_state(channels=str(merged))
    show = show_progress
    with dask_client(workers, scheduler) as client:
        stages.channels_stage(build, client_mapper(client, ProgressBar("channels", show)))
        facts = stages.render_channels_stage(build, progress=ProgressBar("markers", show),
                                             mapper=client_mapper(client))
    return {"manifest": str(merged), "added": len(new) - len(replaced), "replaced": len(replaced),
            "channels": sorted({e.channel for e in new}), "render": facts}
