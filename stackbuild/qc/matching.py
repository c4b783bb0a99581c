"""The probe's block matching between the same window of two planes (pure: arrays in, shifts out).

:func:`match_planes` finds each block's shift in two passes of the project's one estimator
(:mod:`stackbuild.align.blockmatch`): a whole-pixel first pass on ``COARSE``-times reduced blocks
that reaches far, then the sub-pixel pass at the measured level around its answer.
:class:`PlaneBlocks` holds one plane's blocks and their spectra, made once and matched against
every partner plane. Used by the pair tasks of :mod:`stackbuild.qc.probe`.
"""
from __future__ import annotations

import functools

import numpy as np

#: the first pass works on blocks reduced this many times
COARSE = 4
#: spectral normalisation of the probe's fine matches (``power`` of match_block_pairs: 1 = phase correlation, as the
#: estimator is checked). Tried on the realistic phantom (bench_qc.py --agreement, 8 sections, seeds 0 and 2):
#: plain cross-correlation (0) with the band applied as on both blocks (sigma x sqrt 2) read the middle planes'
#: error 0.26-0.33 px against 0.50-0.56 px true (8/8 and 8/8 sections within the bar; phase correlation 0.17-0.22,
#: 8/8 and 6/8), but single blocks of skimage's camera moved by a known shift were then off by up to 1.5 px (at 1:
#: 0.02 px); kept at 1
POWER = 1.0


#: a first-pass answer up to this fraction of the fine search is matched around 0 (see match_planes)
NEAR = 0.5


def _coarse_sizes(half: int, reach: int) -> tuple[int, int]:
    """Return ``(half, search)`` of the reduced first pass (reduced pixels).

    It searches a little beyond ``reach`` (3 reduced pixels), so that a block found just beyond
    is marked as such rather than refused as a peak on the edge of the search.
    """
    return max(4, half // COARSE), max(2, int(np.ceil(reach / COARSE)) + 3)


class _Window:
    """A window of one plane as read (its stored dtype) with its data mask; blocks are cut as float32 with NaN.

    With ``masked`` (a function of raw pixels giving their data mask, :func:`data_mask`) the mask is
    made only where blocks are cut, each block's part with 4 px around it: the 5 x 5 opening of
    :func:`data_mask` reaches 4 px, so this is the window's mask exactly, at a fraction of the
    pixels (the probe's blocks cover about a seventh of a window). ``raw`` may be a
    :class:`~stackbuild.qc.windowread.LazyWindow`: its pixels are then decoded where blocks are cut.
    """

    def __init__(self, raw, valid: np.ndarray | None = None, masked=None):
        self._lazy = raw if hasattr(raw, "fill_all") else None
        self._raw = raw.array if self._lazy is not None else raw
        self._valid, self._masked = valid, masked

    @property
    def raw(self) -> np.ndarray:
        """Return the whole window's pixels (every one decoded)."""
        if self._lazy is not None:
            self._lazy.fill_all()
        return self._raw

    @property
    def valid(self) -> np.ndarray:
        """Return the data mask of the whole window (made on first use)."""
        if self._valid is None:
            self._valid = np.isfinite(self.raw) if self._masked is None else self._masked(self.raw)
        return self._valid

    def any_data(self) -> bool:
        """Return whether the window holds any data (a non-zero pixel always survives the mask's opening)."""
        if self._valid is None and self._masked is not None:
            return self._lazy.any_data() if self._lazy is not None else bool(self._raw.any())
        return bool(self.valid.any())

    def release(self) -> None:
        """Let go of what a lazy window holds to decode more of itself (its chunks); later cuts read them again."""
        if self._lazy is not None:
            self._lazy.release()

    def _mask(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        if self._valid is not None or self._masked is None:
            return self.valid[y0:y1, x0:x1]
        h, w = self._raw.shape
        a0, b0, a1, b1 = max(0, y0 - 4), max(0, x0 - 4), min(h, y1 + 4), min(w, x1 + 4)
        return self._masked(self._raw[a0:a1, b0:b1])[y0 - a0:y1 - a0, x0 - b0:x1 - b0]

    def cut(self, centres: np.ndarray, r: int) -> np.ndarray:
        """Return ``(N, 2r+1, 2r+1)`` blocks around integer ``(x, y)`` centres; NaN outside the window or its data."""
        h, w = self._raw.shape
        out = np.full((len(centres), 2 * r + 1, 2 * r + 1), np.nan, np.float32)
        for k, (x, y) in enumerate(np.asarray(centres, int)):
            x0, y0, x1, y1 = max(0, x - r), max(0, y - r), min(w, x + r + 1), min(h, y + r + 1)
            if x1 > x0 and y1 > y0:
                if self._lazy is not None:  # the block and the 4 px its data mask looks at
                    self._lazy.fill(y0 - 4, y1 + 4, x0 - 4, x1 + 4)
                dst = out[k, y0 - (y - r):y1 - (y - r), x0 - (x - r):x1 - (x - r)]
                np.copyto(dst, self._raw[y0:y1, x0:x1], where=self._mask(y0, y1, x0, x1), casting="unsafe")
        return out


def _cut(img: np.ndarray, centres: np.ndarray, r: int) -> np.ndarray:
    """Return ``(N, 2r+1, 2r+1)`` blocks of ``img`` around integer ``(x, y)`` centres; NaN outside ``img``."""
    return (img if isinstance(img, _Window) else _Window(img)).cut(centres, r)


def _reduced(img: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """Return ``img`` reduced ``COARSE`` times by area means (float32); NaN where any of a cell's pixels is no data.

    No data is NaN in ``img``, or where ``valid`` is False when given (a window as read,
    whose no-data pixels hold 0).
    """
    import cv2

    if valid is None:
        valid, img = np.isfinite(img), np.nan_to_num(img, nan=0.0)
    h, w = img.shape
    size = (max(1, w // COARSE), max(1, h // COARSE))
    src = img if img.dtype in (np.uint8, np.uint16, np.float32, np.float64) else img.astype(np.float32)
    small = cv2.resize(src, size, interpolation=cv2.INTER_AREA).astype(np.float32)
    small[cv2.resize(valid.astype(np.uint8) * 255, size, interpolation=cv2.INTER_AREA) < 255] = np.nan
    return small


class PlaneBlocks:
    """One plane's probe blocks in a window: float32 patches (NaN off data) and their windowed spectra, made once.

    A plane takes part in ``2 x probe_spans`` pairs; its blocks are cut and transformed once and
    matched against every partner (as :func:`stackbuild.align.blockmatch.match_spectra` allows),
    instead of once per pair. Each patch reaches :func:`~stackbuild.align.blockmatch.block_reach`
    around its point, so the matcher's recut at the found shift reads real pixels.
    """

    def __init__(self, window, points: np.ndarray, plan):
        from ..align.blockmatch import block_spectra

        r = plan.reach
        pts = np.asarray(points, int).reshape(-1, 2)
        self.stack = _cut(window, pts, r)
        self.rows = np.arange(len(pts))
        self.spectra = block_spectra(self.stack, np.broadcast_to(np.array([r, r]), (len(pts), 2)), plan, self.rows)

    def subset(self, idx: np.ndarray):
        """Return the spectra of blocks ``idx`` (same rows of :attr:`stack`), whitened spectra included.

        All of them: the spectra themselves, no copy. The whitened spectra made once per plane
        serve every pair (before, each pair whitened both sides again: a fifth of the match).
        """
        from ..align.blockmatch import BlockSpectra

        sp = self.spectra
        if len(idx) == len(sp.xy):
            return sp
        return BlockSpectra(sp.xy[idx], sp.usable[idx], sp.spec[idx], sp.sums[idx],
                            None if sp.white is None else sp.white[idx])


@functools.lru_cache(maxsize=8)
def fine_plan(half: int, search: int, fine_sigma: float, coarse_sigma: float):
    """Return the matcher's plan of the probe's fine pass (as :func:`stackbuild.align.blockmatch.match_block_pairs` makes it).

    Made once per process for each size (a plan is read-only: its band, window and norm).
    """
    from ..align.blockmatch import match_plan

    return match_plan(half, search, fine_sigma=fine_sigma, coarse_sigma=coarse_sigma, power=POWER)


@functools.lru_cache(maxsize=8)
def coarse_plan(half: int, reach: int, fine_sigma: float, coarse_sigma: float):
    """Return the matcher's plan of the probe's first pass, on ``COARSE``-times reduced blocks (whole-pixel peak)."""
    from ..align.blockmatch import match_plan

    ch, cs = _coarse_sizes(half, reach)
    return match_plan(ch, cs, fine_sigma=max(fine_sigma / COARSE, 0.5), coarse_sigma=max(coarse_sigma / COARSE, 2.0))


def match_planes(fixed: np.ndarray, moving: np.ndarray, points: np.ndarray, *, half: int, search: int, reach: int,
                 fine_sigma: float, coarse_sigma: float, small=None, blocks=None, coarse_blocks=None):
    """Return the shift, band-passed NCC and beyond-reach mark of each block between two windows of two planes.

    Parameters
    ----------
    fixed, moving : ndarray, shape (H, W)
        The same window of two planes (this level's pixels, float32, NaN where there is no data;
        or a window as read with its data mask, :class:`_Window`).
    points : ndarray of int, shape (N, 2)
        Block centres ``(x, y)`` in the window.
    half, search : int
        Flat half-width of a block's window and the shift searched around the first answer.
    reach : int
        The first pass, on ``COARSE``-times reduced blocks, finds shifts up to this; 0 skips it.
    fine_sigma, coarse_sigma : float
        Band of the match (pixels): structure finer than ``fine_sigma`` and shading coarser
        than ``coarse_sigma`` have little say (see ``match_block_pairs``).
    small : tuple of ndarray, optional
        The two windows already reduced by :func:`_reduced` (computed when omitted).
    blocks : tuple of PlaneBlocks, optional
        The two planes' blocks at ``points`` (:class:`PlaneBlocks` with :func:`fine_plan`), made
        once per plane by the caller (made here when omitted).
    coarse_blocks : tuple of PlaneBlocks, optional
        The same for the first pass: blocks of the reduced windows at ``rint(points / COARSE)``
        with :func:`coarse_plan`.

    Returns
    -------
    shifts : ndarray, shape (N, 2)
        ``(dx, dy)``: the content of ``fixed`` around a point is in ``moving`` around point + shift; NaN
        where no match was made.
    ncc : ndarray, shape (N,)
        Normalised cross-correlation of the band-passed blocks at the match (NaN where unmatched).
    beyond : ndarray of bool, shape (N,)
        The first pass put the match farther than ``reach``: the plane is off by more than the probe sees.

    Notes
    -----
    Both passes are the project's one estimator, :mod:`stackbuild.align.blockmatch` (band-limited
    phase correlation with unbiased sub-pixel refinement; its docstring has the references), for
    all blocks at once: the first (whole-pixel peak) and, for blocks whose first answer is within
    ``NEAR x search`` of 0 (the usual case in an aligned volume), the second from the planes' own block
    spectra (:class:`PlaneBlocks`, :func:`~stackbuild.align.blockmatch.match_spectra`); only blocks the
    first pass moved further are cut again around its answer
    (:func:`~stackbuild.align.blockmatch.match_block_pairs`).
    """
    from ..align.blockmatch import match_block_pairs, match_spectra

    pts = np.asarray(points, int).reshape(-1, 2)
    n = len(pts)
    start = np.zeros((n, 2), int)
    beyond = np.zeros(n, bool)
    if reach > search and n:
        cplan = coarse_plan(half, reach, fine_sigma, coarse_sigma)
        if coarse_blocks is None:
            fs, ms = small if small is not None else (_reduced(fixed), _reduced(moving))  # (arrays only)
            cp = np.rint(pts / COARSE).astype(int)
            coarse_blocks = (PlaneBlocks(fs, cp, cplan), PlaneBlocks(ms, cp, cplan))
        cf, cm = coarse_blocks
        res = match_spectra(cf.spectra, cm.spectra, cm.stack, cplan, False, cm.rows)
        ok = np.isfinite(res.shifts[:, 0])
        d = np.where(ok[:, None], res.shifts * COARSE, 0.0)
        far = np.abs(d).max(axis=1)
        beyond = ok & (far > reach)
        # a first answer within half the fine search leaves the match well inside the fine pass's window
        # around 0: matched from the planes' own spectra, not cut again (16 % of blocks on the standard
        # phantom answer one reduced pixel, 4 px, from matching noise)
        start = np.where((beyond | (far <= NEAR * search))[:, None], 0, np.rint(d)).astype(int)
    shifts = np.full((n, 2), np.nan)
    ncc = np.full(n, np.nan)
    plan = fine_plan(half, search, fine_sigma, coarse_sigma)
    if blocks is None:
        blocks = (PlaneBlocks(fixed, pts, plan), PlaneBlocks(moving, pts, plan))
    still = np.flatnonzero(~(start != 0).any(axis=1))
    if still.size:
        bf, bm = blocks
        res = match_spectra(bf.subset(still), bm.subset(still), bm.stack, plan, True, still)
        shifts[still], ncc[still] = res.shifts, res.ncc
    moved = np.flatnonzero((start != 0).any(axis=1))
    if moved.size:
        r = half + search + 1
        res = match_block_pairs(_cut(fixed, pts[moved], r), _cut(moving, pts[moved] + start[moved], r), search,
                                half_size=half, fine_sigma=fine_sigma, coarse_sigma=coarse_sigma, power=POWER)
        shifts[moved], ncc[moved] = res.shifts + start[moved], res.ncc
    shifts[beyond] = np.nan
    ncc[beyond] = np.nan
    return shifts, ncc, beyond
