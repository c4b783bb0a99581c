"""Command line: argument parsing only; every command calls stage functions.

Exit status: 0 success, 2 bad input (one line naming the file, row or
section), 3 the report missed a ``--fail-on`` bar, 4 ``audit`` found stale or damaged planes,
1 an unexpected error.
"""
from __future__ import annotations

import argparse
import contextlib
import dataclasses
import logging
import sys
import typing
from pathlib import Path

from . import __version__
from .errors import InputError
from .run.lock import build_lock

EXIT_OK, EXIT_ERROR, EXIT_INPUT, EXIT_FAILED_BAR, EXIT_STALE = 0, 1, 2, 3, 4


# ------------------------------------------------------------------ options
def _add_cluster(p: argparse.ArgumentParser) -> None:
    g = p.add_mutually_exclusive_group()
    g.add_argument("--workers", type=int, metavar="N",
                   help="run on a local Dask cluster of N worker processes (default: one per core)")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on an existing Dask scheduler: an address such as tcp://host:8786 "
                        "or the path of a scheduler file (e.g. from dask-jobqueue on Slurm); without "
                        "--workers or --scheduler, Dask's DASK_SCHEDULER_ADDRESS is used when set")


def _add_fail_on(p: argparse.ArgumentParser, examples: str = "'align.p95>2px'") -> None:
    p.add_argument("--fail-on", action="append", metavar="RULE", default=None,
                   help=f"exit with status 3 if the report misses this bar, e.g. {examples} (repeatable)")


def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--debug", action="store_true", help="show full tracebacks and debug logging")
    p.add_argument("--quiet", action="store_true", help="draw no progress bars")


def _sections(text: str) -> list[int]:
    """Parse ``3,5-7`` into ``[3, 5, 6, 7]``."""
    out = []
    try:
        for part in text.split(","):
            a, _, b = part.partition("-")
            out.extend(range(int(a), int(b or a) + 1))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected section numbers like 3,5-7, got {text!r}") from None
    return out


def _parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(
        prog="stackbuild",
        description="Turn serial-section EM tiles into a registered, multiscale OME-Zarr volume: "
                    "stitch each section, align the sections, render the pyramid, report the quality. "
                    "Raw tiles are only read, never written.")
    top.add_argument("--version", action="version", version=f"stackbuild {__version__}")
    sub = top.add_subparsers(dest="command", metavar="COMMAND", required=True)
    _add_build(sub)
    _add_stages(sub)
    _add_plan(sub)
    _add_synth(sub)
    return top


def _add_plan(sub) -> None:
    p = sub.add_parser("plan", help="estimate what a build will cost before starting it (nothing is written)",
                       description="Print, per stage, the number of tasks, the memory of one task and of the "
                                   "driver, CPU-hours and bytes read and written, then the output's size and "
                                   "file count and the wall time on --cores cores. Give a tile manifest, or "
                                   "describe the volume with --sections, --tiles-per-section and --tile-size. "
                                   "Costs come from the stages' task graphs and rates measured on a small "
                                   "build (stackbuild/run/plan_rates.json says where and when).")
    p.add_argument("tiles", metavar="TILES_CSV", nargs="?",
                   help="tile manifest (only the CSV and one tile header are read)")
    p.add_argument("--sections", type=int, metavar="N", help="number of sections (without TILES_CSV)")
    p.add_argument("--tiles-per-section", type=int, metavar="N", help="tiles per section (without TILES_CSV)")
    p.add_argument("--tile-size", type=int, metavar="PX", help="tile side in pixels (without TILES_CSV)")
    p.add_argument("--bits", type=int, choices=(8, 16), default=8, help="bits per pixel (default 8)")
    p.add_argument("--config", metavar="PIPELINE.toml", help="pipeline settings the build will use")
    p.add_argument("--cores", type=int, default=2, metavar="N",
                   help="cores the build will run on, for the wall time (default 2)")
    p.add_argument("--this-machine", action="store_true",
                   help="scale CPU and wall time to this machine's cores: times a fixed reference workload "
                        "here (about a second) against the calibration machine's time for it")
    p.add_argument("--json", action="store_true", help="write the plan as JSON instead of a table")
    _add_common(p)


def _add_build(sub) -> None:
    b = sub.add_parser("build", help="run the whole pipeline: stitch, align, render, report",
                       description="Run every stage on a tile manifest and write the build folder DIR: "
                                   "DIR/volume.zarr (OME-Zarr 0.5), DIR/transforms/, DIR/qc/report.html.")
    b.add_argument("tiles", metavar="TILES_CSV", help="tile manifest (columns section,tile,path,x,y)")
    b.add_argument("--out", required=True, metavar="DIR", help="build folder to create")
    b.add_argument("--channels", metavar="CHANNELS_CSV",
                   help="channel manifest of molecular marker images (columns section,channel,path,pixel_size[,x,y]); "
                        "registered to the EM by mutual information and written to volume.zarr/channels/<name>")
    b.add_argument("--landmarks", metavar="LANDMARKS_CSV",
                   help="landmark file: the same spot on a raw tile and on a marker image (columns section,channel,tile,"
                        "tile_x,tile_y,marker_x,marker_y[,name]); the report lists how far the marker registration "
                        "misses each one" " (needs --channels)")
    b.add_argument("--pixel-size", type=float, metavar="NM",
                   help="nanometres per full-resolution pixel (default from --config, else 4)")
    b.add_argument("--section-thickness", type=float, metavar="NM",
                   help="nanometres between sections (default from --config, else 40)")
    b.add_argument("--config", metavar="PIPELINE.toml",
                   help="pipeline settings; see pipelines/default.toml for every key")
    g = b.add_mutually_exclusive_group()
    g.add_argument("--resume", action="store_true",
                   help="continue an interrupted build in DIR, keeping every finished section and plane; "
                        "the build's own settings are used (settings given again must match)")
    g.add_argument("--overwrite", action="store_true",
                   help="replace the build in DIR: the new one is made in DIR/.build-incoming and takes the "
                        "old one's place (build.json, transforms/, volume.zarr, qc/) only when it is complete; "
                        "until then the old build stays whole. Raw tiles are never touched")
    _add_fail_on(b)
    _add_cluster(b)
    _add_common(b)


def _add_stages(sub) -> None:
    s = sub.add_parser("stitch", help="stitch the sections of an existing build folder",
                       description="Register overlapping tiles and solve tile placements and intensity "
                                   "corrections; results go to DIR/transforms.")
    s.add_argument("dir", metavar="DIR", help="build folder")
    s.add_argument("--sections", type=_sections, metavar="LIST",
                   help="only these sections, e.g. 3,5-7 (default all)")
    s.add_argument("--resume", action="store_true", help="skip sections that already have a result")
    _add_cluster(s)
    _add_common(s)

    a = sub.add_parser("align", help="align the stitched sections of a build folder",
                       description="Feature-based affine alignment, a global solve over the stack, then "
                                   "elastic refinement; results go to DIR/transforms.")
    a.add_argument("dir", metavar="DIR", help="build folder")
    _add_cluster(a)
    _add_common(a)

    c = sub.add_parser("channels", help="register the molecular marker images of a build folder",
                       description="Co-register each marker image with its EM section by mutual "
                                   "information; results go to DIR/transforms.")
    c.add_argument("dir", metavar="DIR", help="build folder (made with --channels, or given --merge)")
    c.add_argument("--merge", metavar="CHANNELS_CSV",
                   help="channel manifest of markers probed again or new: a row for a section and channel the "
                        "build has replaces that image, other rows are added; only the channel stage and the "
                        "marker pyramids run (EM transforms and pixels are untouched)")
    _add_cluster(c)
    _add_common(c)

    r = sub.add_parser("render", help="write the multiscale OME-Zarr volume of a build folder",
                       description="Resample raw tiles through the stored transforms into "
                                   "DIR/volume.zarr, all pyramid levels in one pass.")
    r.add_argument("dir", metavar="DIR", help="build folder")
    r.add_argument("--planes", type=_sections, metavar="LIST",
                   help="re-render only these output planes (z = section - first section), e.g. 0,4-6")
    g = r.add_mutually_exclusive_group()
    g.add_argument("--resume", action="store_true", help="render only the planes not finished yet")
    g.add_argument("--overwrite", action="store_true", help="replace an existing volume.zarr")
    _add_cluster(r)
    _add_common(r)

    q = sub.add_parser("report", help="measure quality and write DIR/qc/report.html",
                       description="Compute residual metrics, draw the plots and write a self-contained "
                                   "HTML report.")
    q.add_argument("dir", metavar="DIR", help="build folder")
    _add_fail_on(q, "'align.p95>2px', 'stitch.rms>0.5px', 'flagged>0'")
    q.add_argument("--landmarks", metavar="LANDMARKS_CSV",
                   help="landmark file: the same spot on a raw tile and on a marker image (columns section,channel,tile,"
                        "tile_x,tile_y,marker_x,marker_y[,name]); the report lists how far the marker registration "
                        "misses each one" "; replaces the build's landmark file from now on")
    q.add_argument("--measure-again", action="store_true",
                   help="with --fail-on: measure the build again and rewrite the report (by default the bars are "
                        "checked against the stored qc/metrics.json in well under a second, writing nothing)")
    _add_common(q)

    u = sub.add_parser("update", help="bring re-imaged tiles or new sections into a finished build",
                       description="Replace the tiles named in NEW_TILES_CSV (same section and tile name) and add "
                                   "the others, stitch those sections again with untouched tiles held in place, "
                                   "align the stack again, and rewrite only the shards whose pixels change. "
                                   "The plan is recorded in DIR/updates/NNNN/ before anything changes; a killed "
                                   "update run again (or --resume) finishes exactly that plan.")
    u.add_argument("dir", metavar="DIR", help="build folder")
    how = u.add_mutually_exclusive_group(required=True)
    how.add_argument("--tiles", metavar="NEW_TILES_CSV",
                     help="tile manifest of the re-imaged tiles and new sections (columns section,tile,path,x,y)")
    how.add_argument("--resume", action="store_true", help="finish the update that was interrupted")
    how.add_argument("--rollback", action="store_true",
                     help="put back the transforms and tile manifest from before the latest update and "
                          "rewrite the shards that changed")
    u.add_argument("--append", action="store_true",
                   help="allow section numbers the build does not have yet (later than its first section)")
    u.add_argument("--dry-run", action="store_true",
                   help="list the sections, planes and shards the update would rewrite; write nothing")
    u.add_argument("--hold-within", type=float, default=None, metavar="PX",
                   help="a re-imaged section keeps its alignment (and its plane its bytes outside the new "
                        "tiles) unless the re-solve moves it by more than this many pixels (default 0.5); "
                        "untouched sections are always held")
    u.add_argument("--realign-neighbours", action="store_true",
                   help="with --append: existing sections matched to the new ones take the re-solved alignment "
                        "when it moves them beyond --hold-within (by default every existing plane keeps its bytes)")
    _add_fail_on(u)
    _add_cluster(u)
    _add_common(u)

    lo = sub.add_parser("locate", help="map points between volume, raw tile and stage coordinates",
                        description="Read points from IN.csv and write OUT.csv with every point in volume "
                                    "coordinates (z, y, x at level 0), raw tile coordinates (section, tile, tile_x, "
                                    "tile_y) and stage coordinates (section, stage_x, stage_y), with flags: "
                                    "lost_section, outside_volume, no_tile, outside_tissue.")
    lo.add_argument("dir", metavar="DIR", help="build folder (rendered)")
    lo.add_argument("--points", required=True, metavar="IN.csv",
                    help="points: columns z,y,x (--from volume; z_nm,y_nm,x_nm with --nm), section,tile,tile_x,"
                         "tile_y (--from tile) or section,stage_x,stage_y (--from stage); other columns are kept")
    lo.add_argument("--from", dest="source", required=True, choices=("volume", "tile", "stage"),
                    help="which coordinates IN.csv holds")
    lo.add_argument("--out", required=True, metavar="OUT.csv", help="where to write the located points")
    lo.add_argument("--nm", action="store_true", help="volume coordinates in nanometres (in and out)")
    lo.add_argument("--from-version", type=int, metavar="N",
                    help="the points were placed in transform version N (0 = as first built, k = after update k); "
                         "they are carried to --to-version through the raw tiles and moved_px says how far")
    lo.add_argument("--to-version", type=int, metavar="N", help="transform version to map into (default current)")
    _add_common(lo)

    k = sub.add_parser("audit", help="check that the volume matches its transforms and every chunk decodes",
                       description="Compare every written plane (EM and markers) with the transform records "
                                   "and settings it would be rendered from now, and decode every chunk of "
                                   "every level; list what is stale or damaged and exit with status 4 if "
                                   "anything is. Damaged planes are noted so that 'render --resume' renders "
                                   "them again, as it does stale ones.")
    k.add_argument("dir", metavar="DIR", help="build folder")
    k.add_argument("--fingerprints-only", action="store_true",
                   help="only compare fingerprints; do not read the pixels (fast)")
    _add_cluster(k)
    _add_common(k)


def _add_synth(sub) -> None:
    from .synth import SynthParams

    from .config import attribute_docs

    doc = attribute_docs(SynthParams)
    p = sub.add_parser("synth", help="write a synthetic serial-section data set with ground truth",
                       description="Synthesise a deterministic EM-like tissue phantom cut into sections "
                                   "and tiles, with marker channels and ground truth, into OUTDIR.")
    p.add_argument("outdir", metavar="OUTDIR", help="folder to write (tiles.csv, channels.csv, tiles/, "
                                                    "channels/, truth/)")
    hints = typing.get_type_hints(SynthParams)
    for f in dataclasses.fields(SynthParams):
        kind = hints[f.name]
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
        flag = "--" + f.name.replace("_", "-")
        help_text = f"{doc.get(f.name, '')} (default: {default!r})".replace("%", "%%")
        if kind is bool:
            p.add_argument(flag, action=argparse.BooleanOptionalAction, default=default, help=help_text)
        elif typing.get_origin(kind) is tuple:
            args = typing.get_args(kind)
            elem = args[0] if args else str
            nargs = "*" if (len(args) == 2 and args[1] is Ellipsis) else len(args)
            p.add_argument(flag, nargs=nargs, type=elem, default=default, help=help_text)
        else:
            p.add_argument(flag, type=kind, default=default, help=help_text)
    _add_common(p)


# ----------------------------------------------------------------- commands
def _prepare_folder(args):
    from .run.start import start_build

    return start_build(args.out, args.tiles, channels=args.channels, landmarks=args.landmarks,
                       config=args.config, pixel_size=args.pixel_size,
                       section_thickness=args.section_thickness, resume=args.resume, overwrite=args.overwrite)


def _open_build(path: str):
    from .folder import BuildFolder

    build = BuildFolder(Path(path))
    build.load_state()
    return build


def _cmd_build(args) -> int:
    from .run import stages
    from .run.cluster import dask_client
    from .run.start import finish_build

    build = _prepare_folder(args)
    _say_assumed_scale(build)
    with dask_client(args.workers, args.scheduler) as client:
        verdict = stages.run_build(build, client, resume=args.resume, fail_on=args.fail_on, show=not args.quiet)
    build = finish_build(build)  # a replacement (--overwrite) takes the old build's place only now
    _say(f"volume: {build.volume_path}\nreport: {build.report_path}")
    return _verdict_status(verdict, args.fail_on)


def _cmd_stitch(args) -> int:
    from .run import stages
    from .run.cluster import client_mapper, dask_client
    from .run.progress import ProgressBar

    build = _open_build(args.dir)
    with dask_client(args.workers, args.scheduler) as client:
        out = stages.stitch_stage(build, client_mapper(client, ProgressBar("stitch", not args.quiet)),
                                  sections=args.sections, resume=args.resume)
    _say(f"stitched {len(out)} section(s) into {build.store.root}")
    return EXIT_OK


def _cmd_align(args) -> int:
    from .run import stages
    from .run.cluster import client_mapper, dask_client
    from .run.progress import ProgressBar

    build = _open_build(args.dir)
    with dask_client(args.workers, args.scheduler) as client:
        out = stages.align_stage(build, client_mapper(client, ProgressBar("align", not args.quiet)),
                                 progress=ProgressBar("align", not args.quiet))
    _say(f"aligned {len(out)} section(s) into {build.store.root}")
    return EXIT_OK


def _cmd_channels(args) -> int:
    from .run import stages
    from .run.cluster import client_mapper, dask_client
    from .run.progress import ProgressBar

    build = _open_build(args.dir)
    if args.merge:
        from .run.markers import add_channels

        facts = add_channels(build, Path(args.merge), workers=args.workers, scheduler=args.scheduler,
                             show_progress=not args.quiet)
        _say(f"channels {', '.join(facts['channels'])}: {facts['added']} image(s) added, {facts['replaced']} "
             f"replaced; manifest {facts['manifest']}; run 'stackbuild report {args.dir}' to measure them")
        return EXIT_OK
    if not build.load_state().get("channels"):
        raise InputError("this build has no channel manifest (build it with --channels, or pass --merge "
                         "CHANNELS_CSV)", file=build.root)
    with dask_client(args.workers, args.scheduler) as client:
        out = stages.channels_stage(build, client_mapper(client, ProgressBar("channels", not args.quiet)))
    for line in out.get("failed", ()):
        print(f"stackbuild: warning: {line}", file=sys.stderr)
    _say(f"registered {out['registered']} channel image(s) into {build.store.root}"
         + (f"; {len(out['failed'])} rejected (their marker planes stay empty)" if out.get("failed") else ""))
    return EXIT_OK


def _cmd_render(args) -> int:
    from .run import stages
    from .run.cluster import client_mapper, dask_client
    from .run.progress import ProgressBar

    from .render.stage import prepare

    build = _open_build(args.dir)
    # Every check first: a refused render starts no cluster and changes nothing.
    job = prepare(build, build.config.render, planes=args.planes, resume=args.resume, overwrite=args.overwrite)
    with dask_client(args.workers, args.scheduler) if job.todo or job.overwrite \
            else contextlib.nullcontext() as client:
        stages.render_stage(build, job=job, progress=ProgressBar("render", not args.quiet),
                            mapper=client_mapper(client, ProgressBar("contrast", not args.quiet))
                            if client is not None else None)
        stages.render_channels_stage(build, overwrite=args.overwrite,
                                     progress=ProgressBar("markers", not args.quiet))
    _say(f"volume: {build.volume_path}")
    return EXIT_OK


def _cmd_report(args) -> int:
    from .run import stages
    from .run.progress import ProgressBar

    build = _open_build(args.dir)
    if args.landmarks:
        from .manifest import read_landmarks

        path = Path(args.landmarks).resolve()
        read_landmarks(path, build.tile_manifest(), build.channel_manifest())
        build.update_state(landmarks=str(path))
    if args.fail_on and not args.measure_again and not args.landmarks:
        from .qc.stage import check_bars, stale_reason

        stale = stale_reason(build)
        if stale is None:
            verdict = check_bars(build, build.config.report, args.fail_on)
            _say(f"checked against the stored {build.qc_dir / 'metrics.json'} (nothing re-measured or rewritten)")
            return _verdict_status(verdict, args.fail_on)
        print(f"stackbuild: measuring again: {stale}", file=sys.stderr)
    verdict = stages.report_stage(build, fail_on=args.fail_on, progress=ProgressBar("report", not args.quiet))
    _say(f"report: {build.report_path}")
    return _verdict_status(verdict, args.fail_on)


def _cmd_audit(args) -> int:
    from .render.audit import audit_volume
    from .run.cluster import client_mapper, dask_client
    from .run.progress import ProgressBar

    build = _open_build(args.dir)
    if args.fingerprints_only:
        report = audit_volume(build, pixels=False)
    else:
        with dask_client(args.workers, args.scheduler) as client:
            report = audit_volume(build, mapper=client_mapper(client, ProgressBar("audit", not args.quiet)))
    for pyr in report.unrecorded:
        print(f"stackbuild: volume.zarr/{pyr} has no plane record (rendered by an older stackbuild)",
              file=sys.stderr)
    for f in report.findings:
        print(f.line())
    read = "" if args.fingerprints_only else f", {report.chunks} chunks decoded"
    if report.ok:
        _say(f"volume matches its transforms: {report.planes} planes checked{read}")
        return EXIT_OK
    planes = len({(f.pyramid, f.plane) for f in report.findings})
    print(f"stackbuild: {planes} plane(s) stale or damaged; 'stackbuild render {args.dir} --resume' "
          "renders exactly these again", file=sys.stderr)
    return EXIT_STALE


def _cmd_update(args) -> int:
    from .run.update import HOLD_WITHIN, rollback_update, update_build

    build = _open_build(args.dir)
    if args.rollback:
        outcome = rollback_update(build, fail_on=args.fail_on, workers=args.workers, scheduler=args.scheduler,
                                  show_progress=not args.quiet)
    else:
        hold = HOLD_WITHIN if args.hold_within is None else args.hold_within
        outcome = update_build(build, Path(args.tiles) if args.tiles else None, append=args.append,
                               dry_run=args.dry_run, resume=args.resume, hold_within=hold,
                               realign_neighbours=args.realign_neighbours,
                               fail_on=args.fail_on, workers=args.workers, scheduler=args.scheduler,
                               show_progress=not args.quiet)
    _say("\n".join(outcome.lines))
    if outcome.verdict is None:
        return EXIT_OK
    return _verdict_status(outcome.verdict, args.fail_on)


def _cmd_locate(args) -> int:
    from .run.locate import locate_file

    build = _open_build(args.dir)
    n = locate_file(build.root, Path(args.points), Path(args.out), args.source, nm=args.nm,
                    from_version=args.from_version, to_version=args.to_version)
    _say(f"located {n} point(s): {args.out}")
    return EXIT_OK


def _cmd_plan(args) -> int:
    import json

    from .config import load_config
    from .run.plan import make_plan, plan_text
    from .run.plan_shape import VolumeShape

    described = (args.sections, args.tiles_per_section, args.tile_size)
    if args.tiles and any(v is not None for v in described):
        raise InputError("give a tile manifest or --sections/--tiles-per-section/--tile-size, not both")
    if args.tiles:
        shape = VolumeShape.from_manifest(Path(args.tiles))
    elif all(v is not None for v in described):
        shape = VolumeShape.described(*described, bits=args.bits)
    else:
        raise InputError("give a tile manifest, or all of --sections, --tiles-per-section and --tile-size")
    if args.cores < 1:
        raise InputError(f"--cores must be >= 1, got {args.cores}")
    speed = 1.0
    if args.this_machine:
        from .run.plan import load_rates
        from .run.plan_speed import speed_factors
        speed = speed_factors(load_rates())
    plan = make_plan(shape, load_config(args.config), cores=args.cores, speed=speed)
    _say(json.dumps(plan, indent=1) if args.json else plan_text(plan))
    return EXIT_OK


def _cmd_synth(args) -> int:
    from .synth import SynthParams, generate

    values = {f.name: getattr(args, f.name) for f in dataclasses.fields(SynthParams)}
    for k, v in values.items():
        if isinstance(v, list):
            values[k] = tuple(v)
    try:
        params = SynthParams(**values)
    except (TypeError, ValueError) as exc:
        raise InputError(f"bad synth option: {exc}") from None
    path = generate(Path(args.outdir), params)
    _say(f"tiles: {path}")
    return EXIT_OK


def _say_assumed_scale(build) -> None:
    """Say which physical scale values the build assumed because nobody gave them."""
    assumed = build.load_state().get("assumed_scale") or {}
    if assumed:
        names = {"pixel_size": ("pixel size", "--pixel-size NM"),
                 "section_thickness": ("section thickness", "--section-thickness NM")}
        what = " and ".join(f"{names[k][0]} {v:g} nm" for k, v in assumed.items())
        flags = " and ".join(names[k][1] for k in assumed)
        print(f"stackbuild: warning: assumed {what} (not given); pass {flags} (or set them in [volume] "
              "of --config) for the true physical scale", file=sys.stderr)


def _verdict_status(verdict, fail_on: list[str] | None) -> int:
    """Print PASSED or FAILED with the failing measures; exit 3 when a --fail-on bar is missed.

    The default bars shape the verdict and the printed word; only ``--fail-on`` bars set the exit status.
    """
    print("PASSED" if verdict.passed else "FAILED: " + "; ".join(verdict.failures))
    for line in getattr(verdict, "warnings", []):
        print(f"stackbuild: warning: {line}", file=sys.stderr)
    for line in verdict.missed_bars:
        print(f"stackbuild: quality bar missed: {line}", file=sys.stderr)
    for line in set(verdict.failures) - set(verdict.missed_bars):
        print(f"stackbuild: report verdict, default bar (see qc/report.html): {line}", file=sys.stderr)
    return EXIT_FAILED_BAR if verdict.missed_bars else EXIT_OK


def _say(text: str) -> None:
    print(text)


COMMANDS = {"build": _cmd_build, "stitch": _cmd_stitch, "align": _cmd_align, "channels": _cmd_channels,
            "render": _cmd_render,
            "report": _cmd_report, "update": _cmd_update, "locate": _cmd_locate, "synth": _cmd_synth, "plan": _cmd_plan,
            "audit": _cmd_audit}


def _say_disk_full(exc: BaseException, folder) -> bool:
    """Print the one line for a full disk and return True, or return False if ``exc`` is something else."""
    from .folder import BuildFolder
    from .run.faults import disk_full_line

    line = disk_full_line(exc, BuildFolder(Path(folder)) if folder else None)
    if line:
        print(f"stackbuild: error: {line}", file=sys.stderr)
    return bool(line)


def _skip_teardown_at_exit() -> None:
    """Make the process end without freeing its modules and objects once :func:`main` has returned.

    The interpreter's teardown (every module's dictionary cleared, every object freed) took
    0.25-0.5 s after a 2-tile ``update`` of 4-5 s (``tests/benchmarks/bench_update.py``), time spent
    after the work is done. Registered before the command runs, this hook runs after the exit
    handlers registered later and after Python has joined the non-daemon threads; it flushes the
    log handlers and the standard streams and ends the process with main()'s exit status, unless a
    child process is still alive (then the usual teardown reaps it). Files are written through
    ``with`` blocks and renamed into place, so nothing is left to flush.
    """
    import atexit
    import os

    def leave() -> None:
        code = _EXIT_STATUS.get("code")
        if code is None:  # main() did not return (argparse exited, or an exception): the usual teardown
            return
        mp = sys.modules.get("multiprocessing")
        if mp is not None and mp.active_children():
            return
        logging.shutdown()
        for stream in (sys.stdout, sys.stderr):
            with contextlib.suppress(Exception):
                stream.flush()
        os._exit(code)

    atexit.register(leave)


#: The exit status main() returned when run as the program, for :func:`_skip_teardown_at_exit`.
_EXIT_STATUS: dict[str, int] = {}


def _run_as_program() -> bool:
    """Return True when this process is the ``stackbuild`` command (its script, or ``python -m stackbuild.cli``)."""
    spec = getattr(sys.modules.get("__main__"), "__spec__", None)
    return getattr(spec, "name", None) == "stackbuild.cli" or Path(sys.argv[0]).name == "stackbuild"


def main(argv: list[str] | None = None) -> int:
    """Run the command line; return the exit status.

    Run as the program (no ``argv``, and this process is the ``stackbuild`` command), the process
    ends without the interpreter's teardown once the status is returned (:func:`_skip_teardown_at_exit`);
    a ``main([...])`` call inside another program (the tests) is not affected.
    """
    if argv is None and _run_as_program():
        _skip_teardown_at_exit()
        code = _main(None)
        _EXIT_STATUS["code"] = code if isinstance(code, int) else 1
        return code
    return _main(argv)


def _main(argv: list[str] | None) -> int:
    args = _parser().parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.debug else logging.WARNING,
                        format="%(levelname)s %(name)s: %(message)s")
    folder = args.out if args.command == "build" else getattr(args, "dir", None)
    try:
        with build_lock(folder) if folder else contextlib.nullcontext():
            return COMMANDS[args.command](args)
    except InputError as exc:
        if args.debug:
            raise
        if _say_disk_full(exc, folder):
            return EXIT_ERROR
        print(f"stackbuild: error: {exc.one_line()}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("stackbuild: interrupted; run again with --resume to continue", file=sys.stderr)
        return 130
    except Exception as exc:  # an unexpected failure: short line unless --debug
        if args.debug:
            raise
        if _say_disk_full(exc, folder):
            return EXIT_ERROR
        print(f"stackbuild: internal error: {type(exc).__name__}: {exc} (rerun with --debug for details)",
              file=sys.stderr)
        return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
