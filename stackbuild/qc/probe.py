"""The alignment-error probe as region tasks: each task follows one region of the output down the stack.

One task holds one region (``region_size`` level-0 px square, plus a margin)
of at most ``spans + 1`` planes at a time, band-passed float32: at the
defaults (region 2048 px, 2 spans, measured at level 0) about 3 x 2.2k x 2.2k
x 4 B = 60 MB, whatever the section's size. It returns per-plane sums (see
:func:`stackbuild.qc.zchain.plane_summary`), per-link apparent-motion figures
and a few sampled block rows, never block data of the whole region stack.
The driver adds the sums per plane and keeps one row per region.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .planes import PlaneSource, data_mask, open_planes
from .settings import ReportSettings
from .subpixel import bandpass, match_points
from .zchain import block_jitter, plane_summary


@dataclass(frozen=True)
class RegionJob:
    """What one probe task needs (small and picklable)."""

    build: str
    written: bool
    max_factor: float
    box: tuple[int, int, int, int]          # x0, y0, x1, y1 of block centres, level pixels
    z: tuple[int, ...]                      # present planes measured, increasing
    settings: ReportSettings
    stack: tuple[int, ...] = ()             # every present plane (default z): the whole-stack line


def probe_geometry(source: PlaneSource, settings: ReportSettings, width0: float, height0: float):
    """Return ``(spacing, half, search, margin)`` in level pixels for a plane of ``width0 x height0`` level-0 px."""
    f = source.factor
    # probe_spacing apart, wider on large planes so that a plane holds about probe_blocks blocks
    spacing = max(float(settings.probe_spacing), float(np.sqrt(width0 * height0 / max(settings.probe_blocks, 1))))
    half = max(4, int(round(settings.probe_half_size / f)))
    search = max(2, int(round(settings.probe_max_shift / f)))
    margin = half + search + 3 + int(np.ceil((settings.probe_reach + 3 * settings.probe_coarse_sigma) / f))
    return max(2, int(round(spacing / f))), half, search, margin


def regions(source: PlaneSource, settings: ReportSettings, present: list[int]) -> list[tuple[int, int, int, int]]:
    """Return the block-centre boxes ``(x0, y0, x1, y1)`` (level px, half-open) of the probe tasks."""
    h, w = source.data.shape[-2] // source.bin, source.data.shape[-1] // source.bin
    spacing, half, search, margin = probe_geometry(source, settings, w * source.factor, h * source.factor)
    inner = half + search + 3
    xs = np.arange(inner + spacing // 2, w - inner, spacing)
    ys = np.arange(inner + spacing // 2, h - inner, spacing)
    if not len(xs) or not len(ys):
        return []
    step = max(1, int(round(settings.region_size / source.factor / spacing)))  # blocks per region edge
    out = []
    for i in range(0, len(ys), step):
        for j in range(0, len(xs), step):
            gy, gx = ys[i:i + step], xs[j:j + step]
            out.append((int(gx[0]), int(gy[0]), int(gx[-1]) + 1, int(gy[-1]) + 1))
    return out


def _read(source: PlaneSource, z: int, box, margin: int, settings: ReportSettings):
    """Return the band-passed window (NaN where there is no data) and its top-left level pixel."""
    x0, y0, x1, y1 = box
    h, w = source.data.shape[-2] // source.bin, source.data.shape[-1] // source.bin
    wx0, wy0 = max(0, x0 - margin), max(0, y0 - margin)
    wx1, wy1 = min(w, x1 + margin), min(h, y1 + margin)
    img = source.window(z, wy0, wy1, wx0, wx1)
    valid = data_mask(img)
    if not valid.any():
        return None, (wx0, wy0)
    fill = float(img[valid].mean())
    f = source.factor
    band = bandpass(np.where(valid, img, fill), settings.probe_fine_sigma / f, settings.probe_coarse_sigma / f)
    band[~valid] = np.nan
    return band, (wx0, wy0)


def probe_region(job: RegionJob) -> dict:
    """Measure one region down the stack; return per-plane sums, link figures and sampled blocks (runs on a worker)."""
    st = job.settings
    source = open_planes(job.build, max_factor=job.max_factor, written=job.written)
    h, w = source.data.shape[-2] // source.bin, source.data.shape[-1] // source.bin
    spacing, half, search, margin = probe_geometry(source, st, w * source.factor, h * source.factor)
    x0, y0, x1, y1 = job.box
    gx, gy = np.meshgrid(np.arange(x0, x1, spacing), np.arange(y0, y1, spacing))
    pts = np.column_stack([gx.ravel(), gy.ravel()])
    zs = list(job.z)
    recent: dict[int, tuple] = {}
    la, lb, shifts, conf = [], [], [], []
    for i, z in enumerate(zs):
        band, corner = _read(source, z, job.box, margin, st)
        recent[i] = (band, corner)
        recent.pop(i - st.probe_spans - 1, None)
        for k in range(1, st.probe_spans + 1):
            if i - k < 0:
                continue
            fa, ca = recent[i - k]
            la.append(i - k)
            lb.append(i)
            if fa is None or band is None:
                shifts.append(np.full((len(pts), 2), np.nan))
                conf.append(np.full(len(pts), np.nan))
                continue
            local = pts - np.asarray(corner)
            start = _coarse_offsets(fa, band, local, half, st.probe_reach / source.factor, st.probe_min_confidence)
            s, c = match_points(fa, band, local, half=half, search=search, min_ncc=st.probe_min_confidence,
                                offsets=start)
            shifts.append(s * source.factor)
            conf.append(c)
    nz = len(zs)
    if not la:
        shifts_arr = np.zeros((0, len(pts), 2))
    else:
        shifts_arr = np.stack(shifts)
    jit = block_jitter(np.asarray(zs, float), np.asarray(la, int), np.asarray(lb, int), shifts_arr,
                       window=st.slow_window, stack=np.asarray(job.stack or zs, float)) if la else None
    if jit is not None and st.probe_neighbourhood > 1:
        jit.jitter = _spatial_median(jit.jitter, gx.shape, st.probe_neighbourhood)
        jit.noise_var = jit.noise_var * _median_noise_share(jit.noise_var, gx.shape, st.probe_neighbourhood)
    pts0 = source.to_level0(pts)
    out = {"box": [float(v) for v in (*source.to_level0([[x0, y0]])[0], *source.to_level0([[x1 - 1, y1 - 1]])[0])],
           "z": zs, "blocks": len(pts), "sigma": None if jit is None or not np.isfinite(jit.sigma) else jit.sigma}
    if jit is None:
        out["planes"] = None
    else:
        s = plane_summary(jit)
        out["planes"] = {"n": s["n"].tolist(), "sum_sq": s["sum_sq"].tolist(), "sum_noise": s["sum_noise"].tolist(),
                         "max": s["max"].tolist(),
                         "max_at": [pts0[k].tolist() for k in s["argmax"]]}
    out["links"] = _link_rows(la, lb, zs, shifts_arr, conf)
    out["sample"] = _sample_rows(zs, pts0, jit, shifts_arr, la, lb, st.blocks_per_region)
    return out


def _spatial_median(jitter: np.ndarray, grid: tuple[int, int], size: int) -> np.ndarray:
    """Return the jitter with each block replaced by the component-wise median of its ``size x size`` neighbours.

    Alignment errors are smooth over several blocks (and a misplaced tile covers several); a
    single block that follows content of its own (an organelle ending, a false match that the
    chain could not reject) is not an alignment error. NaN (unmeasured) blocks are skipped.
    The neighbourhoods are stacked as shifted views of a NaN-padded grid and reduced at once
    (one ``nanmedian`` call instead of one Python call per block).
    """
    import warnings

    z, b, _ = jitter.shape
    gy, gx = grid
    r = size // 2
    cube = jitter.reshape(z, gy, gx, 2)
    pad = np.full((z, gy + 2 * r, gx + 2 * r, 2), np.nan)
    pad[:, r:r + gy, r:r + gx] = cube
    stack = np.stack([pad[:, i:i + gy, j:j + gx] for i in range(size) for j in range(size)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # an all-NaN neighbourhood gives NaN, as it should
        out = np.nanmedian(stack, axis=0)
    out[np.isnan(cube)] = np.nan
    return out.reshape(z, b, 2)


def _median_noise_share(noise_var: np.ndarray, grid: tuple[int, int], size: int) -> np.ndarray:
    """Return the share of a block's matching-noise variance left after the median over its neighbours.

    The median of ``k`` independent normal values has about ``pi / (2 k)`` of their variance
    (its asymptotic efficiency 2 / pi for normal data; a textbook result, cited from memory); the
    noise subtracted from the mean square must shrink with it, or it takes real error away
    (the realistic phantom's middle planes read 0.1-0.2 px against 0.5 px true before).
    """
    z, b = noise_var.shape
    gy, gx = grid
    r = size // 2
    have = np.isfinite(noise_var).reshape(z, gy, gx)
    pad = np.zeros((z, gy + 2 * r, gx + 2 * r))
    pad[:, r:r + gy, r:r + gx] = have
    k = sum(pad[:, i:i + gy, j:j + gx] for i in range(size) for j in range(size))
    return np.clip(np.pi / (2.0 * np.maximum(k, 1.0)), 0.0, 1.0).reshape(z, b)


def _coarse_offsets(fixed, moving, pts, half: int, reach: float, min_ncc: float, factor: int = 4) -> np.ndarray:
    """Return whole-pixel starting shifts from a ``factor``-times reduced match reaching ``reach`` pixels.

    Planes off by more than the fine search (a rotated or badly warped section) are still found;
    blocks without a trustworthy coarse match start from zero.
    """
    import cv2

    if reach <= 0:
        return np.zeros_like(pts)
    h, w = fixed.shape
    size = (max(1, w // factor), max(1, h // factor))
    small = [cv2.resize(np.nan_to_num(a, nan=0.0), size, interpolation=cv2.INTER_AREA) for a in (fixed, moving)]
    valid = [cv2.resize(np.isfinite(a).astype(np.float32), size, interpolation=cv2.INTER_AREA) > 0.999
             for a in (fixed, moving)]
    for s_, v_ in zip(small, valid):
        s_[~v_] = np.nan
    c_pts = np.round(pts / factor).astype(int)
    d, _ = match_points(small[0], small[1], c_pts, half=max(4, half // factor),
                        search=max(2, int(np.ceil(reach / factor))), min_ncc=min_ncc, refine=False)
    out = np.where(np.isfinite(d), np.round(d * factor), 0.0)
    return out.astype(int)


def _link_rows(la, lb, zs, shifts, conf) -> list[dict]:
    """Return apparent motion per link: blocks matched, median and 95th percentile of the shift length."""
    rows = []
    for k, (a, b) in enumerate(zip(la, lb)):
        mag = np.hypot(shifts[k, :, 0], shifts[k, :, 1])
        ok = np.isfinite(mag)
        rows.append({"z_from": zs[a], "z_to": zs[b], "n": int(ok.sum()),
                     "tried": int((~np.isnan(conf[k])).sum()), "beyond": int(np.isneginf(conf[k]).sum()),
                     "median": float(np.median(mag[ok])) if ok.any() else None,
                     "p95": float(np.percentile(mag[ok], 95)) if ok.any() else None})
    return rows


def _sample_rows(zs, pts0, jit, shifts, la, lb, count: int) -> list[dict]:
    """Return block rows of a deterministic sample of blocks (all blocks when ``count < 0``)."""
    if jit is None or not len(pts0):
        return []
    nb = len(pts0)
    pick = np.arange(nb) if count < 0 or count >= nb else np.linspace(0, nb - 1, count).round().astype(int)
    rows = []
    span1 = {b: k for k, (a, b) in enumerate(zip(la, lb)) if b - a == 1}
    for k in np.unique(pick):
        for i, z in enumerate(zs):
            jx, jy = jit.jitter[i, k]
            if not np.isfinite(jx):
                continue
            link = span1.get(i)
            dx, dy = (shifts[link, k] if link is not None else (np.nan, np.nan))
            rows.append({"z": z, "x_px": round(float(pts0[k, 0]), 1), "y_px": round(float(pts0[k, 1]), 1),
                         "error_dx": round(float(jx), 3), "error_dy": round(float(jy), 3),
                         "error": round(float(np.hypot(jx, jy)), 3),
                         "motion_dx": None if not np.isfinite(dx) else round(float(dx), 3),
                         "motion_dy": None if not np.isfinite(dy) else round(float(dy), 3)})
    return rows


def measure_error(build_dir, source: PlaneSource, present: list[int], settings: ReportSettings, *,
                  written: bool, max_factor: float, mapper=map, reuse: bool = True) -> list[dict]:
    """Run the probe over every region through ``mapper``; return one result per region over all ``present`` planes.

    With ``reuse``, the sums stored in ``DIR/qc/measured/probe.json`` are kept for every plane
    whose fingerprint (:func:`stackbuild.qc.reuse.plane_fingerprints`) is unchanged, and the
    probe runs only over the changed planes plus their reach on each side as context
    (:func:`stackbuild.qc.reuse.context_runs`); results of the context planes are dropped.
    The new sums are stored for the next report.
    """
    import json

    from ..folder import BuildFolder
    from ..transforms.store import atomic_write_text
    from .reuse import MEASURED, changed_planes, context_runs, plane_fingerprints, probe_reach

    folder = BuildFolder(build_dir)
    boxes = regions(source, settings, present)
    fps = plane_fingerprints(folder, source, present, settings)
    path = folder.qc_dir / MEASURED / "probe.json"
    old = {}
    if reuse and path.is_file():
        try:
            old = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            old = {}
    same_boxes = [list(map(float, b)) for b in old.get("boxes", [])] == [list(map(float, b)) for b in boxes]
    changed = changed_planes(old.get("fingerprints", {}) if same_boxes else {}, fps)
    if not same_boxes or not old.get("regions") or len(changed) == len(present):
        runs = [list(present)] if present else []
    else:
        runs = context_runs(changed, present, probe_reach(settings))
    jobs = [RegionJob(str(build_dir), written, max_factor, box, tuple(run), settings, tuple(present))
            for run in runs for box in boxes]
    new = list(mapper(probe_region, jobs))
    by_box: dict[int, list[dict]] = {}
    for k, r in enumerate(new):
        by_box.setdefault(k % len(boxes), []).append(r)
    results = []
    for i in range(len(boxes)):
        base = old["regions"][i] if runs != [list(present)] else None
        results.append(merge_region(base, by_box.get(i, []), set(changed), present))
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_text(path, json.dumps({"boxes": [list(b) for b in boxes], "fingerprints": {str(z): f for z, f in fps.items()},
                                        "regions": results}) + "\n")
    return results


_PLANE_KEYS = ("n", "sum_sq", "sum_noise", "max", "max_at")


def merge_region(base: dict | None, parts: list[dict], changed: set[int], present: list[int]) -> dict:
    """Return one region's result over ``present`` planes: ``parts`` (new runs) for changed planes, ``base`` else.

    Without ``base`` the parts are taken whole (a full run is one part). Link rows are
    re-measured pairs of planes; a new row replaces the stored row of the same pair.
    """
    if base is None and len(parts) == 1:
        return parts[0]
    rows: dict[int, tuple] = {}
    links: dict[tuple[int, int], dict] = {}
    sample: dict[int, list] = {}
    for src, keep in ([(base, lambda z: z not in changed)] if base else []) + [(p, lambda z: z in changed) for p in parts]:
        p = src.get("planes")
        for i, z in enumerate(src["z"]):
            if keep(z):
                rows[z] = tuple(p[k][i] for k in _PLANE_KEYS) if p else None
                sample[z] = [r for r in src.get("sample", []) if r["z"] == z]
        for link in src.get("links", []):
            if keep(link["z_from"]) or keep(link["z_to"]) or src is base:
                links[(link["z_from"], link["z_to"])] = link
    zs = [z for z in present if z in rows]
    first = base or parts[0]
    have = [rows[z] for z in zs if rows[z] is not None]
    planes = None
    if have:
        planes = {k: [rows[z][j] if rows[z] is not None else (0 if k != "max" else -1.0) for z in zs]
                  for j, k in enumerate(_PLANE_KEYS)}
        planes["max_at"] = [rows[z][4] if rows[z] is not None else [0.0, 0.0] for z in zs]
    sig = [s for s in [first.get("sigma")] + [p.get("sigma") for p in parts] if s is not None]
    return {"box": first["box"], "z": zs, "blocks": first["blocks"], "sigma": float(np.median(sig)) if sig else None,
            "planes": planes, "links": [links[k] for k in sorted(links)],
            "sample": [r for z in zs for r in sample.get(z, [])]}
