"""The alignment-error probe, part 2: each plane's jitter from the stored pair shifts, in runs of planes.

:func:`jitter_run` is one task: a run of ``RUN`` present planes (its *core*)
with :func:`stackbuild.qc.reuse.probe_reach` planes of context on each side.
It reads the stored shifts of the pairs among those planes
(:mod:`stackbuild.qc.probe`), solves the chain along z for every block
(:func:`stackbuild.qc.zchain.block_jitter`), takes the median over each
block's neighbours, and returns for each core plane a few sums (blocks, mean
square, matching noise, the largest block and where). Its per-region values
and a sample of blocks go to ``DIR/qc/measured/runs/<first core plane>.json``
with the run's fingerprint (the fingerprints of every pair it read, the stack
and the settings), for ``regions.csv``, ``blocks.csv`` and the region figure.

The runs are fixed by position in the stack, and each core plane's estimate
depends only on the pairs within its run's window, so a re-report that solves
one run again gives the numbers a full report would.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .settings import ReportSettings
from .zchain import block_jitter, plane_summary, section_error, weighted_sums

#: core planes per run task
RUN = 16


@dataclass(frozen=True)
class RunJob:
    """What one run task needs (small and picklable)."""

    build: str
    core: tuple[int, ...]             # planes whose estimate this run gives
    window: tuple[int, ...]           # core plus context, increasing
    stack: tuple[int, ...]            # every present plane (the whole-stack line)
    pairs: tuple[tuple[int, int], ...]  # stored pairs among the window's planes
    fingerprint: str
    settings: ReportSettings
    grid: tuple[int, int]             # block grid (rows, columns)
    points0: tuple                    # block centres, level-0 px ((x, y), ...)
    region: tuple[int, ...]           # region of each block


def runs_of(present: list[int], reach: int) -> list[tuple[list[int], list[int]]]:
    """Return ``(core, window)`` per run: ``RUN`` present planes each, with ``reach`` more on each side."""
    out = []
    for i in range(0, len(present), RUN):
        core = present[i:i + RUN]
        out.append((core, present[max(0, i - reach):i + RUN + reach]))
    return out


def jitter_run(job: RunJob) -> dict:
    """Solve one run of planes from the stored pair shifts; return ``{"planes": {z: sums}, "sigma"}`` (on a worker)."""
    from .reuse import read_pair, write_run

    st = job.settings
    zs = list(job.window)
    index = {z: i for i, z in enumerate(zs)}
    nb = len(job.points0)
    la, lb, shifts = [], [], []
    for a, b in job.pairs:
        got = read_pair(job.build, a, b)
        if got is None:
            continue
        s, c = got
        s = np.where((np.nan_to_num(c, nan=-1.0) >= st.probe_min_confidence)[:, None], s, np.nan)
        la.append(index[a])
        lb.append(index[b])
        shifts.append(s)
    planes: dict[int, dict] = {}
    result = {"planes": planes, "sigma": None}
    if not la or not nb:
        write_run(job.build, job.core[0], job.fingerprint, result, [], [])
        return result
    jit = block_jitter(np.asarray(zs, float), np.asarray(la), np.asarray(lb), np.stack(shifts),
                       window=st.slow_window, stack=np.asarray(job.stack, float))
    if st.probe_neighbourhood > 1:
        jit.jitter, jit.noise_var = replace_outliers(jit.jitter, jit.noise_var, job.grid, st.probe_neighbourhood)
    keep = [index[z] for z in job.core]
    summ = plane_summary(jit)
    pts0 = np.asarray(job.points0, float)
    for i in keep:
        planes[zs[i]] = {"n": int(summ["n"][i]), "sum_sq": float(summ["sum_sq"][i]),
                         "sum_noise": float(summ["sum_noise"][i]), "max": float(summ["max"][i]),
                         "at_xy": pts0[int(summ["argmax"][i])].tolist()}
    result["sigma"] = None if not np.isfinite(jit.sigma) else float(jit.sigma)
    regions = _region_sums(jit, keep, np.asarray(job.region), [zs[i] for i in keep])
    sample = _sample_rows(zs, keep, pts0, jit, np.asarray(job.region), st.blocks_per_region)
    write_run(job.build, job.core[0], job.fingerprint, result, regions, sample)
    return result


def _region_sums(jit, keep: list[int], region: np.ndarray, zs: list[int]) -> list[dict]:
    """Return per core plane and region: blocks, shrink-weighted sums of squares and noise (for ``regions.csv``)."""
    mag2 = (jit.jitter[keep] ** 2).sum(axis=2)
    ok = np.isfinite(mag2)
    rows = []
    for r in np.unique(region):
        m = region == r
        n, sq, noise = weighted_sums(mag2[:, m], jit.shrink[keep][:, m], jit.noise_var[keep][:, m], ok[:, m])
        for k, z in enumerate(zs):
            if n[k]:
                rows.append({"z": z, "region": int(r), "n": int(n[k]), "sum_sq": float(sq[k]),
                             "sum_noise": float(noise[k])})
    return rows


def _sample_rows(zs, keep, pts0, jit, region, count: int) -> list[dict]:
    """Return block rows of a deterministic sample of ``count`` blocks per region (all when ``count < 0``)."""
    rows = []
    for r in np.unique(region):
        idx = np.flatnonzero(region == r)
        pick = idx if count < 0 or count >= len(idx) else idx[np.linspace(0, len(idx) - 1, count).round().astype(int)]
        for k in np.unique(pick):
            for i in keep:
                jx, jy = jit.jitter[i, k]
                if np.isfinite(jx):
                    rows.append({"z": zs[i], "x_px": round(float(pts0[k, 0]), 1), "y_px": round(float(pts0[k, 1]), 1),
                                 "error_dx": round(float(jx), 3), "error_dy": round(float(jy), 3),
                                 "error": round(float(np.hypot(jx, jy)), 3)})
    return rows


def region_rows(stored_runs, boxes: dict[int, list[float]], sigma: float | None) -> list[dict]:
    """Return one row per region over the stack: box (level-0 px), blocks, error over the stack, worst plane.

    ``stored_runs`` yields the stored run documents one at a time (never all planes at once).
    """
    acc: dict[int, list] = {r: [0, 0.0, 0.0, None, None, 0] for r in boxes}
    for doc in stored_runs:
        for row in doc.get("regions", []):
            a = acc.setdefault(row["region"], [0, 0.0, 0.0, None, None, 0])
            a[0] += row["n"]
            a[1] += row["sum_sq"]
            a[2] += row["sum_noise"]
            est, _ = section_error(row["n"], row["sum_sq"], row["sum_noise"])
            if est is not None and (a[4] is None or est > a[4]):
                a[3], a[4] = row["z"], est
    rows = []
    for r, (n, sq, noise, wz, we, _) in sorted(acc.items()):
        box = boxes.get(r) or [None] * 4
        rows.append({"region": r, "x0_px": box[0], "y0_px": box[1], "x1_px": box[2], "y1_px": box[3],
                     "blocks": n, "noise_px": sigma, "error_px": section_error(n, sq, noise)[0] if n else None,
                     "worst_z": wz, "worst_error_px": we})
    return rows


#: normalised median residual above which a block is taken for an outlier: the test of Westerweel & Scarano
#: (2005), whose threshold 2 was set for smooth flow fields; on a field that varies from block to block (as
#: alignment error does) 2 replaces a third of the blocks and 3 about 15 % (tests/test_qc_metrics.py)
OUTLIER_LIMIT = 3.0
#: measured neighbours a block needs for the test (rule of thumb, no source)
MIN_NEIGHBOURS = 3


def replace_outliers(jitter: np.ndarray, noise_var: np.ndarray, grid: tuple[int, int], size: int):
    """Return the jitter with outlier blocks replaced by their neighbours' median, and the noise variance to match.

    A block that follows content of its own (an organelle ending, a false match the chain could
    not reject) disagrees with its ``size x size`` neighbours; an alignment error, smooth or
    rough, is shared with them or at least no further from their median than they are from
    each other. The normalised median test of Westerweel & Scarano (2005) tells the two apart,
    per component: ``|u - m| / (r + eps)`` with ``m`` the median of the neighbours (the block
    itself left out), ``r`` the median of their own distances to ``m`` and ``eps`` the block's
    matching-noise standard deviation (the paper's "acceptable fluctuation level", 0.1 px for
    its data); a block above :data:`OUTLIER_LIMIT` in either component is replaced by ``m``
    and keeps the share of matching noise left after a median (:func:`_median_noise_share`).

    Replacing every block by the median instead (the probe until ``ESTIMATE_VERSION`` 2) also
    took away real error that varies from block to block: on stacks of 2 x 2 tile sections it
    halved the estimate (realistic/long seed 0, ``slow_window`` 9, mean over the planes: 0.24 px
    with every block replaced, 0.39 px with the outliers only and shrink-weighted sums; 0.77 px
    true, about 0.45 px of it jitter about a 9-plane line).

    References
    ----------
    J. Westerweel and F. Scarano, "Universal outlier detection for PIV data",
    Exp. Fluids 39 (2005) 1096-1100, doi:10.1007/s00348-005-0016-6.
    """
    import warnings

    z, b, _ = jitter.shape
    gy, gx = grid
    r = size // 2
    cube = jitter.reshape(z, gy, gx, 2)
    pad = np.full((z, gy + 2 * r, gx + 2 * r, 2), np.nan)
    pad[:, r:r + gy, r:r + gx] = cube
    near = np.stack([pad[:, i:i + gy, j:j + gx] for i in range(size) for j in range(size) if (i, j) != (r, r)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a block without neighbours keeps its own value
        med = np.nanmedian(near, axis=0)
        spread = np.nanmedian(np.abs(near - med[None]), axis=0)
    eps = np.sqrt(np.maximum(np.nan_to_num(noise_var, nan=0.0), 0.0) / 2.0).reshape(z, gy, gx, 1)
    score = np.abs(cube - med) / (spread + np.maximum(eps, 1e-3))
    out = np.isfinite(score) & (score > OUTLIER_LIMIT)
    # a median of fewer than MIN_NEIGHBOURS blocks says nothing about the block: it is kept
    out = out.any(axis=-1) & (np.isfinite(near[..., 0]).sum(axis=0) >= MIN_NEIGHBOURS)
    fixed = np.where(out[..., None], med, cube).reshape(z, b, 2)
    share = np.where(out.reshape(z, b), _median_noise_share(noise_var, grid, size), 1.0)
    return fixed, noise_var * share


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
