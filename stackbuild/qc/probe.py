"""The alignment-error probe, part 1: block shifts per pair of planes, measured as tasks and kept.

:func:`probe_pair` is one task: up to ``PAIRS_TASK`` planes, each against the
next ``probe_spans`` present planes (or, on a re-report, only the pairs to
measure again), in up to ``probe_task_regions`` regions of the block grid (a
plane run x region share; when a plane has more regions, each share writes its
blocks to a part file and one :func:`merge_pair_parts` task per run of planes
joins them into the pair documents, so the driver still receives per-pair
summaries only). It reads the planes one region window at a time
(``region_size`` level-0 px plus a margin, in the stored dtype with its data
mask: at the defaults about 2.4k x 2.4k x 2 B = 11 MB per window, at most
``probe_spans + 1`` windows held, whatever the section's size; the chunks under a
window's blocks are read straight from the shard files, decoded only under the rows blocks
are cut from, and kept for the task's later windows within 16 MB, :mod:`stackbuild.qc.windowread`), cuts the
blocks of the probe's grid that fall in the region, and matches every block of
a pair in one batched call of the project's sub-pixel estimator
(:func:`stackbuild.align.blockmatch.match_block_pairs`): first on 4x reduced
blocks (the written pyramid level, when there is one) reaching
``probe_reach``, then at the measured level, the moving block cut around that
first answer. The shifts of each pair go to ``DIR/qc/measured/pairs/<a>-<b>.json``
stamped with the pair's fingerprint (what both planes were rendered from,
:func:`stackbuild.qc.reuse.pair_fingerprints`); the task returns a few numbers
per pair (apparent motion).

Part 2, the chain along z and each plane's jitter, is :mod:`stackbuild.qc.runs`.
:func:`measure_error` runs both: the driver holds per-pair and per-plane
summaries only.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .matching import COARSE, PlaneBlocks, _coarse_sizes, _reduced, _Window, coarse_plan, fine_plan
from .matching import match_planes  # noqa: F401 (public here too: tests and bench_qc import it from the probe)
from .windowread import WindowReader
from .planes import PlaneSource, data_mask, open_planes
from .settings import ReportSettings


@dataclass(frozen=True)
class PairJob:
    """What one pair task needs (small and picklable)."""

    build: str
    written: bool
    max_factor: float
    pairs: tuple[tuple[int, int], ...]   # (fixed plane, moving plane), fixed increasing
    fingerprints: tuple[str | None, ...]  # one per pair, stored with its shifts
    settings: ReportSettings
    made_from: tuple = ()                 # per pair: [base digest, render fingerprint of a, of b] (reuse.write_pair)
    keep: tuple = ()                      # per pair: None (measure every block) or the level-0 boxes where a plane
                                          # changed: only blocks reaching them are measured, the rest are stored
    regions: tuple = ()                   # regions of the block grid this task measures (empty: all of them)
    part: str = ""                        # set when ``regions`` is a share: the blocks go to this part file
                                          # (merged into the pair documents by :func:`merge_pair_parts`)


@dataclass(frozen=True)
class MergeJob:
    """What one merge task needs: the pairs of one run of planes and the part files holding their blocks."""

    build: str
    pairs: tuple[tuple[int, int], ...]
    fingerprints: tuple[str | None, ...]
    made_from: tuple
    parts: tuple[str, ...]
    blocks: int
    min_ncc: float
    stored: tuple = ()  # per pair: True when blocks no part holds keep their stored values (a share was dropped)


#: fixed planes per pair task: a task reads each of its planes once per region
PAIRS_TASK = 16

#: a window's chunks are decoded by Blosc block only where blocks are cut from less than this share of their rows:
#: a zstd block decoded on its own cost 1.26x its share of the whole stream's decode (1024 px uint8 chunk, 32 KiB
#: blocks: 2.14 against 1.70 ms per chunk), so lazily decoding more than about three quarters gains nothing
LAZY_ROWS = 0.75


def probe_geometry(source: PlaneSource, settings: ReportSettings, width0: float, height0: float):
    """Return ``(spacing, half, search, margin)`` in level pixels for a plane of ``width0 x height0`` level-0 px.

    ``margin`` is how far beyond a block centre the task reads: the moving block is cut up to
    ``probe_reach`` away, and the 4x reduced first pass reaches as far.
    """
    f = source.factor
    # probe_spacing apart, wider on large planes so that a plane holds about probe_blocks blocks
    spacing = max(float(settings.probe_spacing), float(np.sqrt(width0 * height0 / max(settings.probe_blocks, 1))))
    half = max(4, int(round(settings.probe_half_size / f)))
    search = max(2, int(round(settings.probe_max_shift / f)))
    reach = int(np.ceil(settings.probe_reach / f))
    ch, cs = _coarse_sizes(half, reach)
    margin = max(half + search + 1 + reach, COARSE * (ch + cs + 2)) + 1
    return max(2, int(round(spacing / f))), half, search, margin


def block_grid(source: PlaneSource, settings: ReportSettings) -> tuple[np.ndarray, tuple[int, int], np.ndarray]:
    """Return the probe's block centres ``(B, 2)`` (level px, row by row), the grid shape and each block's region.

    Regions are squares of about ``region_size`` level-0 px of the block grid; a task reads one
    region window at a time.
    """
    h, w = source.data.shape[-2] // source.bin, source.data.shape[-1] // source.bin
    spacing, half, search, _ = probe_geometry(source, settings, w * source.factor, h * source.factor)
    inner = half + search + 3
    xs = np.arange(inner + spacing // 2, w - inner, spacing)
    ys = np.arange(inner + spacing // 2, h - inner, spacing)
    gx, gy = np.meshgrid(xs, ys)
    pts = np.column_stack([gx.ravel(), gy.ravel()]).astype(int)
    step = max(1, int(round(settings.region_size / source.factor / spacing)))  # blocks per region edge
    iy, ix = np.divmod(np.arange(len(pts)), max(len(xs), 1))
    cols = -(-len(xs) // step) if len(xs) else 0
    region = (iy // step) * cols + ix // step
    return pts, (len(ys), len(xs)), region


def _coarse_source(job, source: PlaneSource) -> PlaneSource | None:
    """Return the written pyramid level ``COARSE`` times coarser than ``source`` (None when there is none).

    Its pixel ``(i, j)`` is the mean of ``source`` pixels ``COARSE i .. COARSE i + COARSE - 1``
    (the pyramid's 2 x 2 means, OME-Zarr translation checked), as the reduced copy would be.
    """
    if source.origin != "volume.zarr" or source.bin != 1:
        return None
    c = open_planes(job.build, max_factor=source.factor * COARSE, written=True)
    if c is None or c.origin != source.origin or c.bin != 1 or abs(c.factor - source.factor * COARSE) > 1e-9:
        return None
    want = np.asarray(source.offset) + source.factor * (COARSE - 1) / 2.0
    return c if np.allclose(c.offset, want, atol=1e-6 * c.factor) else None


def probe_pair(job: PairJob) -> list[dict]:
    """Measure a set of plane pairs in the task's regions, region by region; store the shifts (runs on a worker).

    Each region's window of each plane is read once and kept while a later pair still needs
    it (at most ``probe_spans + 1`` windows). A task of every region stores each pair's
    shifts and returns one summary per pair: ``z_from``, ``z_to``, ``fingerprint`` and the
    apparent motion (blocks ``n`` matched with at least ``probe_min_confidence``, ``tried``,
    ``beyond`` the reach, ``median`` and ``p95`` of the shift length, level-0 px). A task of a
    share of the regions (``job.part``) writes its blocks of every pair to its part file and
    returns ``[]``; :func:`merge_pair_parts` makes the pair documents and summaries from the parts.
    """
    from .reuse import write_measurement

    st = job.settings
    source = open_planes(job.build, max_factor=job.max_factor, written=job.written)
    pts, _, region = block_grid(source, st)
    shifts = np.full((len(job.pairs), len(pts), 2), np.nan)
    ncc = np.full((len(job.pairs), len(pts)), np.nan)
    beyond = np.zeros((len(job.pairs), len(pts)), bool)
    mine = np.unique(region) if not job.regions else np.asarray(job.regions, int)
    _measure_regions(job, source, pts, region, mine, shifts, ncc, beyond)
    if job.part:
        idx = np.flatnonzero(np.isin(region, mine))
        write_measurement(_part_path(job.build, job.part), {
            "blocks": idx.tolist(), "shifts": shifts[:, idx].tolist(), "ncc": ncc[:, idx].tolist(),
            "beyond": beyond[:, idx].tolist()})
        return []
    return _store_pairs(job, shifts, ncc, beyond, st.probe_min_confidence)


def _store_pairs(job, shifts, ncc, beyond, min_ncc: float) -> list[dict]:
    """Store each pair of ``job`` (a :class:`PairJob` or :class:`MergeJob`) with its blocks; return its summaries."""
    from .reuse import write_pair

    out = []
    for k, (a, b) in enumerate(job.pairs):
        write_pair(job.build, a, b, job.fingerprints[k], shifts[k], ncc[k], beyond[k],
                   job.made_from[k] if job.made_from else None)
        out.append({"z_from": a, "z_to": b, "fingerprint": job.fingerprints[k],
                    **link_summary(shifts[k], ncc[k], beyond[k], min_ncc)})
    return out


def _part_path(build, key: str):
    from ..folder import BuildFolder

    return BuildFolder(build).measurement_path("parts", key)


def merge_pair_parts(job: MergeJob) -> list[dict]:
    """Join the part files of one run of planes into its pair documents; return one summary per pair (on a worker).

    Holds the blocks of its pairs only (``pairs x probe_blocks`` numbers), never a plane's pixels.
    The part files are removed once the pairs are stored.
    """
    from .reuse import pair_arrays, stored_measurement, stored_pair

    n = len(job.pairs)
    shifts, ncc, beyond = np.full((n, job.blocks, 2), np.nan), np.full((n, job.blocks), np.nan), np.zeros((n, job.blocks), bool)
    for k, kept in enumerate(job.stored):
        doc = stored_pair(job.build, *job.pairs[k]) if kept else None
        if kept and (doc is None or len(doc.get("dx") or []) != job.blocks):
            raise RuntimeError(f"pair {job.pairs[k]}: stored probe blocks missing or of another grid")
        if doc is not None:
            shifts[k], ncc[k], beyond[k] = pair_arrays(doc)
    paths = [_part_path(job.build, key) for key in job.parts]
    for path in paths:
        doc = stored_measurement(path)
        if doc is None:
            raise RuntimeError(f"{path}: probe part missing or unreadable")
        idx = np.asarray(doc["blocks"], int)
        if idx.size:
            shifts[:, idx] = np.asarray(doc["shifts"], float).reshape(n, -1, 2)
            ncc[:, idx] = np.asarray(doc["ncc"], float).reshape(n, -1)
            beyond[:, idx] = np.asarray(doc["beyond"], bool).reshape(n, -1)
    out = _store_pairs(job, shifts, ncc, beyond, job.min_ncc)
    for path in paths:
        path.unlink(missing_ok=True)
    return out


def _measure_regions(job: PairJob, source: PlaneSource, pts, region, regions, shifts, ncc, beyond) -> None:
    """Fill ``shifts``, ``ncc``, ``beyond`` (pairs x blocks) for the blocks of ``regions``, one region at a time."""
    st = job.settings
    h, w = source.data.shape[-2] // source.bin, source.data.shape[-1] // source.bin
    spacing, half, search, margin = probe_geometry(source, st, w * source.factor, h * source.factor)
    f = source.factor
    reach = int(np.ceil(st.probe_reach / f))
    reduce = reach > search
    need = _blocks_to_measure(job, source, pts, margin, shifts, ncc, beyond)
    coarse = _coarse_source(job, source) if reduce else None
    plan = fine_plan(half, search, st.probe_fine_sigma / f, st.probe_coarse_sigma / f)
    cplan = coarse_plan(half, reach, st.probe_fine_sigma / f, st.probe_coarse_sigma / f) if reduce else None
    work = []  # per region with blocks to measure: its blocks, their box, the pairs and planes it measures
    for r in regions:
        whole = np.flatnonzero(region == r)
        sel = whole[need[:, whole].any(axis=0)]
        if not sel.size:
            continue  # nothing to measure here: every pair keeps its stored blocks
        # the window is the whole region's (its placement decides the reduced copy's phase), so a block measured
        # alone gives the number it gives among all of its region's
        box = (*pts[whole].min(axis=0), *(pts[whole].max(axis=0) + 1))
        active = [(a, b) for k, (a, b) in enumerate(job.pairs) if need[k, sel].any()]
        work.append((sel, box, active, sorted({z for p in active for z in p})))
    # rows of the block grid's chunks that blocks are cut from (with the data mask's 4 px and a 32-row Blosc block
    # at each end): where they are most of the rows, chunks are decoded whole, as one call of their codec
    lazy = (2 * (plan.reach + 4) + 1 + 32) < LAZY_ROWS * spacing
    reader = WindowReader(source, coarse, margin, COARSE, reduce and coarse is None,
                          [(z, box, pts[sel]) for sel, box, _, planes in work for z in planes], lazy=lazy)
    step = 0
    for sel, box, active, planes in work:
        held: dict[int, tuple] = {}
        for z in planes:
            raw, small, corner = reader.read(step)
            step += 1
            win = _Window(raw, masked=data_mask)
            if reduce and small is None:
                small = _reduced(win.raw, win.valid)
            elif small is not None:
                small, raw_small = small.astype(np.float32), small
                small[~data_mask(raw_small)] = np.nan
            here = pts[sel] - corner
            data = win.any_data()
            held[z] = (win, corner, PlaneBlocks(win, here, plan) if data else None,
                       PlaneBlocks(small, np.rint(here / COARSE).astype(int), cplan) if data and reduce else None)
            win.release()  # its blocks are cut: the window keeps the rows it copied, not its chunks
            for k, (a, b) in enumerate(job.pairs):
                if b != z or a not in held or not need[k, sel].any():
                    continue
                (fa, corner, ba, ca), (fb, _, bb, cb) = held[a], held[b]
                mine = need[k, sel]
                if ba is None or bb is None:
                    shifts[k, sel[mine]], ncc[k, sel[mine]], beyond[k, sel[mine]] = np.nan, np.nan, False
                    continue
                s_, c_, b_ = match_planes(fa, fb, pts[sel] - corner, half=half, search=search, reach=reach,
                                          fine_sigma=st.probe_fine_sigma / f, coarse_sigma=st.probe_coarse_sigma / f,
                                          blocks=(ba, bb), coarse_blocks=(ca, cb) if reduce else None)
                shifts[k, sel[mine]], ncc[k, sel[mine]], beyond[k, sel[mine]] = s_[mine] * f, c_[mine], b_[mine]
            for y in [y for y in held if not any(y in p and p[1] > z for p in active)]:
                held.pop(y)  # no later pair needs it


def _shares_to_measure(job: PairJob, source: PlaneSource, pts, region, shares) -> list[bool]:
    """Return, per share of the regions, whether any pair of ``job`` has a block to measure there.

    A pair measured whole needs every share; a pair told where its planes changed (``job.keep``)
    needs the shares holding a block whose reading reaches a changed box. A share nobody needs is
    not run: its blocks keep their stored values (:func:`merge_pair_parts`).
    """
    if not len(pts) or not all(job.keep):
        return [True] * len(shares)
    h, w = source.data.shape[-2] // source.bin, source.data.shape[-1] // source.bin
    margin = probe_geometry(source, job.settings, w * source.factor, h * source.factor)[3]
    need = np.zeros(len(pts), bool)
    for boxes in job.keep:
        need |= _reaching(source, pts, margin, boxes)
    return [bool(need[np.isin(region, share)].any()) for share in shares]


def _region_shares(region: np.ndarray, per_task: int) -> list[tuple[int, ...]]:
    """Return the regions of the block grid in shares of at most ``per_task`` (row by row)."""
    regions = [int(r) for r in np.unique(region)]
    return [tuple(regions[i:i + per_task]) for i in range(0, len(regions), max(1, per_task))]


def _blocks_to_measure(job: PairJob, source: PlaneSource, pts: np.ndarray, margin: int, shifts, ncc, beyond):
    """Return ``(pairs, blocks)`` bool: which blocks of each pair to measure; fill the kept ones from the stored pair.

    A pair with ``keep`` boxes measures only the blocks whose reading reaches a box: the task reads
    ``margin`` level px around a block centre, the data mask 4 px further and a written reduced
    level ``COARSE`` px further (counted with room to spare), each level pixel covering ``factor``
    level-0 px. Every other block is taken from the stored document, measured from the same
    pixels. A pair whose stored document does not fit (changed in the meantime) is measured whole.
    """
    from .reuse import pair_arrays, stored_pair

    need = np.ones((len(job.pairs), len(pts)), bool)
    if not job.keep or not len(pts):
        return need
    for k, boxes in enumerate(job.keep):
        if not boxes:
            continue
        doc = stored_pair(job.build, *job.pairs[k])
        if doc is None or len(doc.get("dx") or []) != len(pts):
            continue
        shifts[k], ncc[k], beyond[k] = pair_arrays(doc)
        need[k] = _reaching(source, pts, margin, boxes)
        shifts[k, need[k]], ncc[k, need[k]], beyond[k, need[k]] = np.nan, np.nan, False
    return need


def _reaching(source: PlaneSource, pts: np.ndarray, margin: int, boxes) -> np.ndarray:
    """Return which blocks' reading reaches one of the level-0 ``boxes`` (see :func:`_blocks_to_measure`)."""
    f = source.factor
    p0 = source.to_level0(pts)
    reach0 = (margin + 8 + 2 * COARSE) * f + f
    b = np.asarray(boxes, float).reshape(-1, 4)
    meets = ((p0[:, None, 0] + reach0 >= b[None, :, 0]) & (p0[:, None, 0] - reach0 <= b[None, :, 2])
             & (p0[:, None, 1] + reach0 >= b[None, :, 1]) & (p0[:, None, 1] - reach0 <= b[None, :, 3]))
    return meets.any(axis=1)


def link_summary(shifts: np.ndarray, ncc: np.ndarray, beyond: np.ndarray, min_ncc: float) -> dict:
    """Return the apparent motion of one pair: blocks matched, tried and beyond reach; median, p95 shift (px)."""
    ok = np.isfinite(shifts[:, 0]) & (np.nan_to_num(ncc, nan=-1.0) >= min_ncc)
    mag = np.hypot(shifts[ok, 0], shifts[ok, 1])
    return {"n": int(ok.sum()), "tried": int((np.isfinite(ncc) | beyond).sum()), "beyond": int(beyond.sum()),
            "median": float(np.median(mag)) if mag.size else None,
            "p95": float(np.percentile(mag, 95)) if mag.size else None}


def plane_pairs(present: list[int], spans: int) -> list[tuple[int, int]]:
    """Return the measured pairs ``(a, b)``: each present plane with the next ``spans`` present planes."""
    return [(present[i], present[j]) for i in range(len(present))
            for j in range(i + 1, min(len(present), i + spans + 1))]


@dataclass
class ProbeResult:
    """What the driver keeps of the probe: per-plane sums and per-pair figures, never block data.

    Attributes
    ----------
    planes : dict
        ``{z: {"n", "sum_sq", "sum_noise", "max", "at_xy"}}`` (see :func:`stackbuild.qc.zchain.plane_summary`).
    links : dict
        ``{(z_from, z_to): {"n", "tried", "beyond", "median", "p95"}}``: apparent motion per pair.
    sigma : float or None
        Matching noise (median over the runs), px per component.
    runs : list of int
        First core plane of every stored run (``DIR/qc/measured/runs``), for the tables and figures.
    boxes : dict
        ``{region: [x0, y0, x1, y1]}``: level-0 box of each region's block centres.
    pairs_measured, pairs_reused, runs_solved : int
        What this report measured, re-used and solved again.
    """

    planes: dict
    links: dict
    sigma: float | None
    runs: list
    boxes: dict
    pairs_measured: int = 0
    pairs_reused: int = 0
    runs_solved: int = 0


def _stored_link(doc: dict, min_ncc: float) -> dict:
    from .reuse import pair_arrays

    return link_summary(*pair_arrays(doc), min_ncc)


def _kept_boxes(old: dict | None, pair: tuple[int, int], made_from: list, changed: dict, blocks: int) -> list | None:
    """Return the level-0 boxes to re-measure a stored pair in, or None when it must be measured whole.

    The stored pair may be kept outside the boxes only when it was measured at the same level and
    settings, and each of its planes is either as it was then or is a plane of ``changed`` whose
    fingerprint before the change is the one the pair was measured from.
    """
    was = (old or {}).get("made_from")
    if not was or was[0] != made_from[0] or len(old.get("dx") or []) != blocks:
        return None
    boxes = []
    for then, now, z in zip(was[1:], made_from[1:], pair):
        if then == now:
            continue
        c = changed.get(z)
        if c is None or then is None or c.get("before") != then:
            return None
        boxes += [list(map(float, b)) for b in c.get("boxes") or []]
    return boxes or None


def measure_error(build_dir, source: PlaneSource, present: list[int], settings: ReportSettings, *,
                  written: bool, max_factor: float, mapper=map, reuse: bool = True,
                  changed: dict | None = None) -> ProbeResult:
    """Run the probe over the ``present`` planes through ``mapper``: pair tasks, then run tasks.

    With ``reuse``, a pair whose stored fingerprint equals its current one is not measured
    again, and a run whose stored fingerprint (its pairs', the stack's, the settings') is
    unchanged is not solved again; ``reuse=False`` measures and solves everything.

    ``changed`` (``{z: {"before": render fingerprint, "boxes": [[x0, y0, x1, y1], ...]}}``, level-0
    canvas px, ``x1, y1`` exclusive) says that plane ``z``, rendered from ``before`` when the stored
    pairs were measured, has changed only inside the boxes since (an update's rewritten shards). A
    pair of such a plane then measures again only the blocks whose reading reaches a box and keeps
    the others from its stored document (:func:`_blocks_to_measure`); the result equals a full
    measurement (``tests/test_qc_reuse.py``). A pair whose stored planes are not the ``before`` ones
    is measured whole.
    """
    from ..folder import BuildFolder
    from ..render.fingerprint import digest
    from .reuse import pair_base, pair_fingerprints, probe_reach, render_fingerprints, run_fingerprint, stored_pair
    from .reuse import stored_run
    from .runs import RunJob, jitter_run, runs_of

    folder = BuildFolder(build_dir)
    st = settings
    pairs = plane_pairs(present, st.probe_spans)
    planes_fp = render_fingerprints(folder, source)
    fps = pair_fingerprints(folder, source, pairs, st, planes_fp)
    base = digest(pair_base(source, st))
    made = {(a, b): [base, planes_fp.get(a), planes_fp.get(b)] for a, b in pairs}
    pts, grid, region = block_grid(source, st)
    links, todo, keep = {}, {}, {}
    for a, b in pairs:
        old = stored_pair(build_dir, a, b) if reuse and fps[(a, b)] is not None else None
        if old is not None and old.get("fingerprint") == fps[(a, b)]:
            links[(a, b)] = _stored_link(old, st.probe_min_confidence)
            continue
        todo.setdefault(a, []).append(b)
        if changed and old is not None:
            keep[(a, b)] = _kept_boxes(old, (a, b), made[(a, b)], changed, len(pts))
    index = {z: i for i, z in enumerate(present)}
    groups: dict[int, list] = {}
    for a, bs in sorted(todo.items()):
        groups.setdefault(index[a] // PAIRS_TASK, []).extend((a, b) for b in bs)
    shares = _region_shares(region, st.probe_task_regions)
    jobs, merges = [], []
    for _, g in sorted(groups.items()):
        job = PairJob(str(build_dir), written, max_factor, tuple(g), tuple(fps[p] for p in g), st,
                      tuple(made[p] for p in g), tuple(keep.get(p) for p in g))
        if len(shares) <= 1:
            jobs.append(job)
            continue
        keys = tuple(f"{g[0][0]:05d}-{i:04d}" for i in range(len(shares)))
        wanted = _shares_to_measure(job, source, pts, region, shares)
        jobs += [replace(job, regions=share, part=key) for share, key, w in zip(shares, keys, wanted) if w]
        merges.append(MergeJob(str(build_dir), job.pairs, job.fingerprints, job.made_from,
                               tuple(k for k, w in zip(keys, wanted) if w), len(pts), st.probe_min_confidence,
                               tuple(bool(b) for b in job.keep) if not all(wanted) else ()))
    fresh = set()
    results = list(mapper(probe_pair, jobs))  # every part is written before a merge reads it
    results += list(mapper(merge_pair_parts, merges)) if merges else []
    for res in results:
        for r in res:
            key = (r["z_from"], r["z_to"])
            fresh.add(key)
            links[key] = {k: v for k, v in r.items() if k not in ("z_from", "z_to", "fingerprint")}
    pts0 = source.to_level0(pts) if len(pts) else np.zeros((0, 2))
    boxes = {int(r): [round(float(v), 1) for v in (*pts0[region == r].min(axis=0), *pts0[region == r].max(axis=0))]
             for r in np.unique(region)}
    planes, sigmas, firsts, run_jobs = {}, [], [], []
    for core, window in runs_of(present, probe_reach(st)):
        inside = set(window)
        mine = {p: fps[p] for p in pairs if p[0] in inside and p[1] in inside}
        fp = run_fingerprint(mine, window, present, st)
        firsts.append(core[0])
        old = stored_run(build_dir, core[0]) if reuse and fp is not None and not (fresh & set(mine)) else None
        if old is not None and old.get("fingerprint") == fp:
            planes.update({int(z): v for z, v in old["planes"].items()})
            sigmas.append(old.get("sigma"))
            continue
        run_jobs.append(RunJob(str(build_dir), tuple(core), tuple(window), tuple(present), tuple(sorted(mine)), fp,
                               st, grid, tuple(map(tuple, pts0.tolist())), tuple(int(r) for r in region)))
    for res in mapper(jitter_run, run_jobs):
        planes.update({int(z): v for z, v in res["planes"].items()})
        sigmas.append(res["sigma"])
    sig = [s for s in sigmas if s is not None]
    return ProbeResult(planes, links, float(np.median(sig)) if sig else None, firsts, boxes,
                       pairs_measured=len(fresh), pairs_reused=len(pairs) - len(fresh), runs_solved=len(run_jobs))
