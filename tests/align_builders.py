"""Ground-truth stacks for the align tests (invented data; a helper module, not a test module).

The invented specimen: a block of packed cells with dark granules, whose
outlines may drift steadily sideways through the block ("slant"). Each
section is the true slice seen through its own random affine and a smooth
random warp, as the cutting and imaging would distort it.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np
from scipy import ndimage


def _texture(rng, shape, cell=28.0):
    """Cell outlines (zero crossings of smooth noise) plus granules, float32 in about [0, 1]."""
    h, w = shape
    n = ndimage.gaussian_filter(rng.standard_normal(shape), cell / 4)
    n /= n.std()
    outline = np.exp(-(n / 0.25) ** 2)
    fine = ndimage.gaussian_filter(rng.standard_normal(shape), 1.5)
    fine /= fine.std()
    granules = ndimage.gaussian_filter((rng.random(shape) < 0.002).astype(float), 2.0)
    granules /= granules.max()
    img = 0.6 - 0.35 * outline - 0.4 * granules + 0.06 * fine
    return img.astype(np.float32)


def _smooth_field(rng, shape, amplitude, wavelength):
    """A smooth random 2-component field on ``shape`` with max magnitude ``amplitude``."""
    h, w = shape
    ys, xs = np.mgrid[0:h, 0:w].astype(np.float64)
    out = np.zeros((h, w, 2))
    for comp in range(2):
        for _ in range(3):
            kx, ky = rng.normal(0, 1, 2) * 2 * np.pi / wavelength
            out[..., comp] += np.cos(kx * xs + ky * ys + rng.uniform(0, 2 * np.pi))
    mag = np.hypot(out[..., 0], out[..., 1]).max()
    # amplitude 0 means no field (the random numbers are still drawn, so the rest of a
    # stack does not change with it)
    return (out * (amplitude / mag) if amplitude > 0 else 0.0 * out).astype(np.float32)


def _deaffine(field_xy, lo, hi, step=8):
    """Remove the least-squares affine part over ``[lo, hi)^2`` of a field (so no affine model can absorb it)."""
    h, w = field_xy.shape[:2]
    ys, xs = np.mgrid[lo:hi:step, lo:hi:step]
    design = np.column_stack([xs.ravel(), ys.ravel(), np.ones(xs.size)])
    full = np.stack(np.mgrid[0:h, 0:w][::-1], -1).reshape(-1, 2)
    out = field_xy.copy()
    for c in range(2):
        coef, *_ = np.linalg.lstsq(design, field_xy[lo:hi:step, lo:hi:step, c].ravel(), rcond=None)
        out[..., c] -= (np.column_stack([full, np.ones(len(full))]) @ coef).reshape(h, w)
    return out


@dataclass
class Stack:
    """Sections and their truth: ``section_to_true(z, q)`` for section pixels ``q``."""

    images: dict[int, np.ndarray]
    affines: dict[int, np.ndarray] = field(default_factory=dict)   # 2x3, section -> true
    warps: dict[int, np.ndarray] = field(default_factory=dict)     # (h, w, 2) on section pixels
    margin: float = 0.0

    def section_to_true(self, z, q):
        """Map ``(N, 2)`` section pixels of ``z`` to the true frame."""
        m = self.affines[z]
        w = self.warps[z]
        d = np.stack([cv2.remap(w[..., c], q[:, :1].astype(np.float32), q[:, 1:].astype(np.float32),
                                cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)[:, 0]
                      for c in range(2)], 1)
        return (q + d) @ m[:, :2].T + m[:, 2]


def make_stack(n=20, size=768, seed=0, rotation=3.0, offset=100.0, scale=0.02, warp=8.0,
               slant=0.0, lost=(), damaged=(), blank=(), sizes=None):
    """Return a :class:`Stack` of ``n`` sections of ``size`` px (numbered 0..n-1, ``lost`` left out).

    Section pixel ``q`` shows the true slice at ``A_z (q + w_z(q))``; the true slice
    ``z`` at point ``x`` shows the base texture at ``x - z * s(x)`` (``s`` = slant
    field, px per section, affine part removed, largest magnitude ``slant``).
    """
    rng = np.random.default_rng(seed)
    pad = int(offset + 2 * warp + size * 0.1 + abs(slant) * n + 40)
    big = size + 2 * pad
    base = _texture(rng, (big, big))
    s_field = np.zeros((big, big, 2), np.float32)
    if slant:
        s_field = _deaffine(_smooth_field(rng, (big, big), 1.0, 0.6 * size), pad, pad + size)
        s_field = s_field.astype(np.float32)
        inner = s_field[pad:pad + size, pad:pad + size]
        s_field *= slant / np.hypot(inner[..., 0], inner[..., 1]).max()
    st = Stack({}, margin=pad)
    c = (size - 1) / 2.0
    for z in range(n):
        h = w = size if sizes is None else sizes.get(z, size)
        a = np.deg2rad(rng.uniform(-rotation, rotation))
        sx, sy = 1 + rng.uniform(-scale, scale, 2)
        lin = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]]) @ np.diag([sx, sy])
        t = np.array([pad + c, pad + c]) + rng.uniform(-offset, offset, 2) - lin @ [c, c]
        wf = _smooth_field(rng, (h, w), warp, 500.0)
        if z in lost:
            continue
        ys, xs = np.mgrid[0:h, 0:w].astype(np.float32)
        qx, qy = xs + wf[..., 0], ys + wf[..., 1]
        tx = lin[0, 0] * qx + lin[0, 1] * qy + t[0]
        ty = lin[1, 0] * qx + lin[1, 1] * qy + t[1]
        tx, ty = tx.astype(np.float32), ty.astype(np.float32)
        if slant:
            sxf = cv2.remap(s_field[..., 0], tx, ty, cv2.INTER_LINEAR)
            syf = cv2.remap(s_field[..., 1], tx, ty, cv2.INTER_LINEAR)
            tx, ty = tx - z * sxf, ty - z * syf
        img = cv2.remap(base, tx.astype(np.float32), ty.astype(np.float32), cv2.INTER_LINEAR)
        img += rng.normal(0, 0.02, img.shape).astype(np.float32)
        if z in damaged:       # a fold: a band of a fifth of the area turned dark and smeared
            band = slice(int(0.4 * h), int(0.6 * h))
            img[band] = ndimage.gaussian_filter(img[band], 6) * 0.3
        if z in blank:
            img[:] = 0.5
        st.images[z] = img
        st.affines[z] = np.column_stack([lin, t])
        st.warps[z] = wf
    return st


def residuals(stack: Stack, aligns: dict, step=32, border=120, skip=()):
    """Return ``{z: (N, 2)}`` residuals after removing the part shared by all sections.

    For aligned grid points ``p`` (inside every section, ``border`` px from the
    edge of the mean section frame), ``r = section_to_true(aligned_to_section(p)) - p``,
    then the per-point mean over sections is subtracted (one common warp).
    """
    size = min(im.shape[0] for im in stack.images.values())
    ys, xs = np.mgrid[border:size - border:step, border:size - border:step]
    p = np.column_stack([xs.ravel(), ys.ravel()]).astype(np.float64)
    zs = [z for z in sorted(aligns) if z not in skip]
    r = np.stack([stack.section_to_true(z, aligns[z].aligned_to_section(p)) - p for z in zs])
    r -= r.mean(axis=0, keepdims=True)
    return dict(zip(zs, r))


def rms(r):
    """RMS magnitude of ``(..., 2)`` residual vectors."""
    return float(np.sqrt(np.mean(np.sum(np.asarray(r) ** 2, axis=-1))))


def p95(r):
    """95th percentile of residual magnitudes."""
    return float(np.percentile(np.hypot(np.asarray(r)[..., 0], np.asarray(r)[..., 1]), 95))


def split_linear(r: dict):
    """Return ``(linear, rest)``: the per-point straight-line-in-z part of residuals and what is left.

    A field that changes linearly with z is invisible to second differences
    (it is what a steady slant looks like), so ``rest`` is what the elastic
    stage is answerable for. Sections are placed by their numbers.
    """
    zs = np.array(sorted(r), float)
    big = np.stack([r[int(z)] for z in zs])
    zc = (zs - zs.mean())[:, None, None]
    lin = big.mean(0) + zc * (zc * big).sum(0) / (zc ** 2).sum()
    return lin, big - lin


def small_settings(**kw):
    """Settings sized for the small test sections (not a test)."""
    from stackbuild.align.settings import AlignSettings
    base = dict(work_scale=2, elastic_scale=2, grid_spacing=64, match_half_size=16, match_max_shift=10,
                max_features=2500)
    base.update(kw)
    return AlignSettings(**base)



def true_stitch(sample, build) -> None:
    """Write stitch records with the TRUE tile positions of a synthetic sample (isolates alignment from stitching)."""
    from stackbuild.manifest import read_tile_manifest
    from stackbuild.synth import load_truth
    from stackbuild.transforms import SectionStitch, TilePlacement, TransformStore
    manifest = read_tile_manifest(Path(sample) / "tiles.csv")
    truth = load_truth(sample)
    store = TransformStore(Path(build) / "transforms")
    for z in manifest.sections:
        pos = truth.tile_positions(z)
        tiles = [TilePlacement(t.tile, str(t.path), t.width, t.height, t.x, t.y, *pos[t.tile])
                 for t in manifest.section_tiles(z)]
        store.save_stitch(SectionStitch(z, manifest.section_tiles(z)[0].dtype, tiles))
