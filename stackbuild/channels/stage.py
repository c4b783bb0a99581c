"""The channel stage: register every marker image to its EM section by mutual information.

For each row of the channel manifest the EM section is rendered at the
marker's resolution (section frame, ``scale = round(marker pixel size / EM
pixel size)``), a first guess ``channel pixel -> section pixel`` is made from
the pixel-size ratio and the manifest's ``x, y`` (or centred on the section
when they are absent), and :func:`register_mutual_information` refines it.

Stored record (``store.save_doc("channels", ..., section=s)``), one per section::

    {"section": s, "em_pixel_size_nm": float,
     "channels": {name: {
        "path", "row", "pixel_size_nm", "em_scale" (the render scale k),
        "registered": bool,
        "transform": {"type": "affine", "axes": ["x", "y"], "affine": 2x3,
                      "input": "channel", "output": "section"},   # (x, y) pixel-centre convention
        "initial": the same form, the first guess,
        "measure": "normalized_mutual_information", "bins": int,
        "feature": "edges" | "density" | "intensity" (what was registered; null if blank),
        "feature_scale": EM render scale of the features, "distinctness_by_feature": {kind: z},
        "gain": NMI of the best start-search value minus the search's median, "gain_by_feature": {kind: gain},
        "measure_before", "measure_after": float (1 unrelated .. 2 identical),
        "distinctness": robust z-score of the best start-search value (see register_mutual_information),
        "shift_from_given": [dx, dy] section px at the image centre, or null when x, y are absent,
        "rotation_deg", "scale_ratio" (found scale / pixel-size ratio),
        "flags": ["blank" | "too_small" | "low_mi" | "wild_scale" | "ambiguous" | "at_search_limit"],
        "failure": one line (only when a registration was rejected), "seconds"}}}

A rejected registration (``"low_mi"``: too little mutual information at the
optimum; ``"wild_scale"``: a scale far from the pixel-size ratio;
``"at_search_limit"``: an optimum at the edge of the searched range) keeps
``registered: false`` and the first guess as its ``transform``, like a blank
image: the marker pyramid leaves its plane empty and landmarks are not
measured against it. Its measures (``measure_after``, ``scale_ratio``, ...)
describe the rejected optimum.

Manifest ``x, y`` convention: the section-pixel position of the image's first
block, as in :func:`stackbuild.sampler.render_region`; channel pixel
``(c, r)`` is nominally centred at ``(x + rho c + (rho - 1) / 2, y + rho r + (rho - 1) / 2)``
with ``rho`` the pixel-size ratio.
"""
from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass

import numpy as np
import tifffile

from ..errors import InputError
from ..manifest import ChannelEntry
from ..sampler import render_region
from ..folder import BuildFolder
from ..tiles import SectionTiles
from ..transforms.store import TransformStore
from ..transforms.records import ChannelRegistration
from ..transforms.types import Affine2D
from .features import whole_block_mean, em_feature, marker_feature
from .mutual_info import register_mutual_information
from .settings import AUTO_KINDS, ChannelSettings, check_settings

log = logging.getLogger(__name__)
DOC_KIND = "channels"
MEASURE = "normalized_mutual_information"
#: Marker-side smoothing per feature, marker pixels (set on the synthetic sample, no source).
MARKER_SIGMA = {"edges": 1.0, "density": 1.5, "intensity": 0.0}


@dataclass(frozen=True)
class _ChannelJob:
    """One (section, channel) registration: small and picklable."""

    transforms: str
    entry: ChannelEntry
    em_pixel_size: float
    settings: ChannelSettings


def em_scale(channel_pixel_size: float, em_pixel_size: float) -> int:
    """Return the EM render scale for a channel: ``round(channel / EM pixel size)``, at least 1."""
    return max(1, int(round(channel_pixel_size / em_pixel_size)))


def initial_guess(entry: ChannelEntry, em_pixel_size: float, bbox) -> Affine2D:
    """Return the first-guess ``channel pixel -> section pixel`` map (see the module docstring)."""
    rho = entry.pixel_size / em_pixel_size
    if entry.x is not None and entry.y is not None:
        tx, ty = entry.x + (rho - 1) / 2, entry.y + (rho - 1) / 2
    else:
        x0, y0, x1, y1 = bbox
        tx = (x0 + x1) / 2 - rho * (entry.width - 1) / 2
        ty = (y0 + y1) / 2 - rho * (entry.height - 1) / 2
    return Affine2D(np.array([[rho, 0.0, tx], [0.0, rho, ty]]))


def feature_render_scale(k: int, feature_scale: int) -> int:
    """Return the EM render scale of the feature images: the largest divisor of ``k`` at most ``k / feature_scale``."""
    target = max(1, k // max(1, feature_scale))
    return max(d for d in range(1, target + 1) if k % d == 0)


def _em_at_scale(stitch, k: int, fine: int | None = None):
    """Return ``(image, mask, fixed -> section map)``: the section mosaic rendered at scale ``fine`` (default ``k``).

    The fixed grid (``fixed -> section``) is always that of scale ``k``; with
    ``fine`` dividing ``k`` the image is ``k // fine`` times larger and its
    blocks of ``k // fine`` pixels are the fixed pixels.
    """
    fine = k if fine is None else fine
    x0, y0, x1, y1 = stitch.bbox()
    X0, Y0 = math.floor(x0 + 0.5), math.floor(y0 + 0.5)
    w = max(1, math.ceil((x1 - 0.5 - X0 + 1) / fine))
    h = max(1, math.ceil((y1 - 0.5 - Y0 + 1) / fine))
    img, weight = render_region(stitch, None, X0, Y0, w, h, scale=fine, return_weight=True,
                                tiles=SectionTiles(stitch))
    to_section = Affine2D(np.array([[k, 0.0, X0 + (k - 1) / 2], [0.0, k, Y0 + (k - 1) / 2]]))
    return img, weight > 0, to_section


def _feature_pair(kind: str, em_fine, mask_fine, moving, fine: int, k: int, st: ChannelSettings):
    """Return the fixed (EM, channel grid) and moving (marker) feature images of one kind."""
    size = st.membrane_px if kind == "edges" else st.vesicle_px
    spread = st.cluster_px if kind == "density" else 0.0
    fixed = em_feature(em_fine, mask_fine, kind, fine, k, size, spread)
    return fixed, marker_feature(moving, kind, MARKER_SIGMA[kind])


def _register_features(em_fine, mask_fine, moving, start: Affine2D, fine: int, k: int, st: ChannelSettings,
                       judge):
    """Register the marker by NMI of feature images; return ``(kind, map, info, rejection, tried)``.

    With ``feature = "auto"`` every kind of :data:`AUTO_KINDS` is tried; among
    those ``judge(map, info)`` does not reject (it returns ``None`` or
    ``(flag, reason)``), the one whose best placement gains the most NMI over
    a chance placement (``info["gain"]``) is kept; if every kind is rejected,
    the largest gain, with its rejection. ``tried``: ``kind -> (gain, distinctness)``.

    Notes
    -----
    Gains are compared, not distinctness (the robust z-score of the optimum):
    a z-score is in units of each landscape's own spread, which is tiny for a
    feature pair with no relation, so a chance peak of an unrelated pair could
    outscore a true but broad peak of a related one (on the shipped sample a
    punctate marker's edge map won with z 3.8 against its density map's 3.2
    and was placed 46 EM px off; the gains were 0.002 and 0.018).
    """
    fmask = whole_block_mean(mask_fine.astype(np.float32), k // fine) > 0.999
    kinds = AUTO_KINDS if st.feature == "auto" else (st.feature,)
    results, tried = [], {}
    for kind in kinds:
        fixed, mov = _feature_pair(kind, em_fine, mask_fine, moving, fine, k, st)
        fixed = fixed[:fmask.shape[0], :fmask.shape[1]]
        found, info = register_mutual_information(
            fixed, mov, start, st.model, bins=st.bins, max_offset=st.max_offset / k,
            max_rotation=st.max_rotation, fixed_mask=fmask[:fixed.shape[0], :fixed.shape[1]])
        tried[kind] = (float(info["gain"]), float(info["distinctness"]))
        results.append((kind, found, info, judge(found, info)))
    accepted = [r for r in results if r[3] is None] or results
    best = max(accepted, key=lambda r: r[2]["gain"])
    return (*best, tried)


def rejection(a: np.ndarray, rho: float, info: dict, st: ChannelSettings):
    """Return ``(flag, reason)`` if a found registration must not be used, else ``None``.

    Parameters
    ----------
    a : ndarray, 2 x 2
        Linear part of the found ``channel pixel -> section pixel`` map.
    rho : float
        The pixel-size ratio (marker / EM), the expected scale.
    info : dict
        What :func:`register_mutual_information` says of it: ``"after"`` (NMI at
        the found map), ``"gain"`` (NMI of the best searched placement over the
        search's median) and ``"at_limit"`` (the optimum lies at the edge of the
        searched shifts). The initial guess has no rotation, so the found
        rotation is measured from zero.
    st : ChannelSettings
        ``min_measure``, ``min_gain``, ``max_scale_change``, ``max_offset`` and ``max_rotation``.
    """
    if not info["after"] >= st.min_measure:
        return "low_mi", (f"normalised mutual information {info['after']:.4f} at the best placement is below "
                          f"min_measure {st.min_measure:g}")
    if not info["gain"] >= st.min_gain:
        return "low_mi", (f"the best placement shares only {info['gain']:.4f} more normalised mutual information "
                          f"than a chance placement (min_gain {st.min_gain:g})")
    scales = np.linalg.svd(a, compute_uv=False) / rho
    worst = float(scales[np.argmax(np.abs(scales - 1))])
    if not abs(worst - 1) <= st.max_scale_change or np.linalg.det(a) <= 0:
        return "wild_scale", (f"found scale is {worst:.3f} x the pixel-size ratio {rho:g} (more than "
                              f"max_scale_change {st.max_scale_change:g} away)")
    turn = math.degrees(math.atan2(a[1, 0] - a[0, 1], a[0, 0] + a[1, 1]))
    if info["at_limit"] or abs(turn) >= st.max_rotation:
        return "at_search_limit", (f"the best placement lies at the edge of the searched range (max_offset "
                                   f"{st.max_offset:g} section px, max_rotation {st.max_rotation:g} degrees; "
                                   f"found {turn:.1f} degrees), so the true one may lie beyond it")
    return None


def _is_blank(img: np.ndarray) -> bool:
    lo, hi = np.percentile(img, [0.5, 99.5])
    return not hi > lo


def register_channel(job: _ChannelJob) -> dict:
    """Register one marker image to its section; return its stored record (runs on a worker)."""
    t0 = time.perf_counter()
    e, st = job.entry, job.settings
    stitch = TransformStore(job.transforms).load_stitch(e.section)
    k = em_scale(e.pixel_size, job.em_pixel_size)
    guess = initial_guess(e, job.em_pixel_size, stitch.bbox())
    rec = {"section": e.section, "channel": e.channel, "path": str(e.path), "row": e.row,
           "pixel_size_nm": e.pixel_size, "em_scale": k, "registered": False,
           "initial": _frames(guess), "transform": _frames(guess), "measure": MEASURE, "bins": st.bins,
           "feature": None,
           "measure_before": None, "measure_after": None, "distinctness": None, "shift_from_given": None,
           "rotation_deg": 0.0, "scale_ratio": 1.0, "flags": []}
    moving = tifffile.imread(e.path).astype(np.float32)
    if _is_blank(moving):
        rec["flags"].append("blank")
        rec["seconds"] = round(time.perf_counter() - t0, 3)
        return rec
    fine = feature_render_scale(k, st.feature_scale)
    em_fine, mask_fine, to_section = _em_at_scale(stitch, k, fine)
    if min(em_fine.shape) * fine < 8 * k:  # the section is under 8 marker pixels across: nothing to match
        rec["flags"].append("too_small")
        rec["seconds"] = round(time.perf_counter() - t0, 3)
        return rec
    start = guess.then(to_section.inverse())
    rho = e.pixel_size / job.em_pixel_size

    def judge(found, info):
        return rejection(found.then(to_section).matrix[:, :2], rho, info, st)

    kind, found, info, rejected, tried = _register_features(em_fine, mask_fine, moving, start, fine, k, st, judge)
    result = found.then(to_section)
    a = result.matrix[:, :2]
    centre = np.array([[(e.width - 1) / 2, (e.height - 1) / 2]])
    shift = (result.apply(centre) - guess.apply(centre))[0]
    rec.update(feature=kind, feature_scale=fine, gain=info["gain"],
               gain_by_feature={kk: g for kk, (g, _) in tried.items()},
               distinctness_by_feature={kk: z for kk, (_, z) in tried.items()},
               measure_before=info["before"], measure_after=info["after"], distinctness=info["distinctness"],
               rotation_deg=math.degrees(math.atan2(a[1, 0] - a[0, 1], a[0, 0] + a[1, 1])),
               scale_ratio=math.sqrt(abs(np.linalg.det(a))) / rho)
    if e.x is not None and e.y is not None:
        rec["shift_from_given"] = [float(shift[0]), float(shift[1])]
    if rejected is None:
        rec.update(registered=True, transform=_frames(result))
    else:  # the stored map stays the first guess and ``registered`` false: nothing renders or measures it
        rec["flags"].append(rejected[0])
        rec["failure"] = failure_line(e, rejected[1])
    if info["distinctness"] < st.min_distinctness:
        rec["flags"].append("ambiguous")
    if info["at_limit"] and "at_search_limit" not in rec["flags"]:
        rec["flags"].append("at_search_limit")
    rec["seconds"] = round(time.perf_counter() - t0, 3)
    return rec


def failure_line(entry: ChannelEntry, reason: str) -> str:
    """Return the one line that says a marker registration was rejected: where, which image, why."""
    return (f"section {entry.section}: marker {entry.channel!r} ({entry.path}) not registered: {reason}; "
            "no transform stored, its plane stays empty")


def _frames(affine: Affine2D) -> dict:
    return {**affine.to_json(), "input": "channel", "output": "section"}


def channel_affine(rec: dict) -> Affine2D:
    """Return the stored ``channel pixel -> section pixel`` map of one channel record (frames checked)."""
    return ChannelRegistration.from_json(rec).to_section


def _jobs(folder: BuildFolder, entries: list[ChannelEntry], settings: ChannelSettings) -> list[_ChannelJob]:
    """Return one job per manifest row; refuse rows whose section has no stitch record."""
    store = folder.store
    stitched = set(store.sections_with("stitch"))
    source = folder.load_state().get("channels")
    for e in entries:
        if e.section not in stitched:
            raise InputError(f"channel {e.channel!r} is for section {e.section}, which has no stitch record "
                             "(lost, not in the tile manifest, or not stitched yet)",
                             file=source, row=e.row, section=e.section)
    em_px = folder.config.volume.pixel_size
    return [_ChannelJob(str(store.root), e, em_px, settings) for e in entries]


def run(folder: BuildFolder, settings: ChannelSettings, *, mapper, progress=None) -> dict:
    """Return counts of the marker images of ``folder`` registered to their sections (the channels stage).

    Stores one ``channels`` record per section.

    Parameters
    ----------
    folder : BuildFolder
        The build folder (stitch records and a channel manifest needed).
    settings : ChannelSettings
        Model, histogram bins and search range.
    mapper : callable(fn, items) -> iterable
        How per-(section, channel) work is spread (``map`` runs it here).
    progress : callable(done, total), optional
        Called before and after the registrations.

    Returns
    -------
    dict
        ``registered`` and ``flagged`` counts, ``failed`` (one line per
        rejected registration, each also logged as a warning), ``channels``
        (names), ``sections`` (with records), ``seconds``.

    Raises
    ------
    InputError
        For bad settings, or a manifest row whose section has no stitch record
        (naming the channel manifest and its line); nothing is stored then.
    """
    t0 = time.perf_counter()
    check_settings(settings)
    entries = folder.channel_manifest()
    jobs = _jobs(folder, entries, settings)
    if progress is not None:
        progress(0, len(jobs))
    records = list(mapper(register_channel, jobs))
    by_section: dict[int, dict] = {}
    for rec in records:
        by_section.setdefault(rec["section"], {})[rec["channel"]] = rec
    for s, chans in sorted(by_section.items()):
        folder.store.save_doc(DOC_KIND, {"section": s, "em_pixel_size_nm": folder.config.volume.pixel_size,
                                         "channels": chans}, section=s)
    if progress is not None:
        progress(len(jobs), len(jobs))
    failed = [r["failure"] for r in sorted(records, key=lambda r: (r["section"], r["channel"])) if r.get("failure")]
    for line in failed:
        log.warning(line)
    return {"registered": sum(r["registered"] for r in records),
            "flagged": sum(bool(r["flags"]) for r in records), "failed": failed,
            "channels": sorted({r["channel"] for r in records}), "sections": sorted(by_section),
            "seconds": time.perf_counter() - t0}


def run_channels(build_dir, settings: ChannelSettings, *, mapper=map, progress=None) -> dict:
    """Return :func:`run` on the build folder at ``build_dir``."""
    return run(BuildFolder(build_dir), settings, mapper=mapper, progress=progress)


def channel_level(channel_pixel_size: float, em_pixel_size: float) -> int:
    """Return the EM pyramid level whose pixel is closest (in log scale) to the channel pixel, >= 0."""
    return max(0, int(round(math.log2(channel_pixel_size / em_pixel_size))))


def channel_table(folder: BuildFolder) -> dict[str, dict[int, dict]]:
    """Return ``name -> {section: record}`` of every stored channel registration."""
    table: dict[str, dict[int, dict]] = {}
    for s in folder.store.sections_with(DOC_KIND):
        doc = folder.store.load_doc(DOC_KIND, section=s) or {}
        for name, rec in doc.get("channels", {}).items():
            table.setdefault(name, {})[s] = rec
    return table


def channel_records(folder: BuildFolder, name: str, canvas) -> tuple[int, dict[int, dict]]:
    """Return ``(level, {section: record})`` of channel ``name``: its EM level and its registrations."""
    recs = channel_table(folder).get(name, {})
    if not recs:
        return 0, {}
    return channel_level(min(r["pixel_size_nm"] for r in recs.values()), canvas.pixel_size_nm), recs
