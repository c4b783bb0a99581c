"""Per-section distortion: how each imaged section departs from the true tissue.

A section frame point ``q`` shows the tissue at the true frame point

    p = A_k q + w_k(q),

with ``A_k`` an affine map (rotation up to ``rotation`` degrees, independent
x / y stretch up to ``scale``, shift up to ``offset`` px, all about the section
centre) and ``w_k`` a smooth elastic warp of at most ``warp`` px whose mean and
linear part over the section are zero (so it cannot be mistaken for part of
``A_k``). ``w_k`` is a :class:`~stackbuild.transforms.DisplacementField` on a
coarse grid (bilinear between nodes), built from Gaussian-smoothed random node
displacements (standard family) or from a random 5 x 5 control grid over the
section interpolated by a cubic spline (realistic family).
"""
from __future__ import annotations

import math

import numpy as np
from scipy.ndimage import gaussian_filter, map_coordinates

from ..transforms import Affine2D, DisplacementField
from .layout import TAG_AFFINE, TAG_FIELD, rng, section_centre, section_shape, true_centre
from .params import SynthParams

FIELD_SPACING = 64.0
_FIELD_PAD = 2  # nodes beyond the canvas on each side
_FIELD_SMOOTH = 2.5  # Gaussian sigma, in nodes
CONTROL_POINTS = 5  # control grid per side of the realistic family's warps


def section_affine(params: SynthParams, section: int) -> Affine2D:
    """Return the affine part ``A_k`` of the section -> true map."""
    g = rng(params, TAG_AFFINE, section)
    angle = math.radians(g.uniform(-params.rotation, params.rotation))
    sx, sy = 1.0 + g.uniform(-params.scale, params.scale, 2)
    shift = g.uniform(-params.offset, params.offset, 2)
    c, s = math.cos(angle), math.sin(angle)
    m = np.array([[c, -s], [s, c]]) @ np.diag([sx, sy])
    t = true_centre(params) + shift - m @ section_centre(params)
    return Affine2D(np.column_stack([m, t]))


def section_field(params: SynthParams, section: int) -> DisplacementField:
    """Return the elastic part ``w_k`` of the section -> true map (max length ``params.warp``)."""
    h, w = section_shape(params)
    nx = int(math.ceil((w - 1) / FIELD_SPACING)) + 1 + 2 * _FIELD_PAD
    ny = int(math.ceil((h - 1) / FIELD_SPACING)) + 1 + 2 * _FIELD_PAD
    origin = (-_FIELD_PAD * FIELD_SPACING, -_FIELD_PAD * FIELD_SPACING)
    g = rng(params, TAG_FIELD, section)
    if params.warp == 0:
        return DisplacementField(np.zeros((ny, nx, 2), np.float32), origin, FIELD_SPACING)
    if params.content == "realistic":
        v = _control_grid_nodes(g, h, w, origin, nx, ny)
    else:
        raw = g.standard_normal((ny, nx, 2))
        v = np.stack([gaussian_filter(raw[..., i], _FIELD_SMOOTH, mode="nearest") for i in range(2)], -1)
    # Remove the affine part of the interpolated field over the canvas; bilinear interpolation
    # reproduces affine functions exactly, so subtracting it at the nodes removes it everywhere inside.
    qx, qy = np.meshgrid(np.linspace(0, w - 1, 48), np.linspace(0, h - 1, 48))
    q = np.column_stack([qx.ravel(), qy.ravel(), np.ones(qx.size)])
    dense = field_at(DisplacementField(v, origin, FIELD_SPACING), q[:, :2])
    coef, *_ = np.linalg.lstsq(q, dense, rcond=None)
    gx, gy = np.meshgrid(origin[0] + FIELD_SPACING * np.arange(nx), origin[1] + FIELD_SPACING * np.arange(ny))
    v = v - (np.column_stack([gx.ravel(), gy.ravel(), np.ones(gx.size)]) @ coef).reshape(v.shape)
    peak = np.sqrt(((dense - q @ coef) ** 2).sum(-1)).max()
    v *= params.warp / peak
    # nodes beyond the canvas only matter for marker images; keep them within the bound too
    v /= np.maximum(np.sqrt((v ** 2).sum(-1, keepdims=True)) / params.warp, 1.0)
    return DisplacementField(v.astype(np.float32), origin, FIELD_SPACING)


def _control_grid_nodes(g: np.random.Generator, h: int, w: int, origin, nx: int, ny: int) -> np.ndarray:
    """Return field nodes ``(ny, nx, 2)`` interpolated (cubic spline) from a random 5 x 5 control grid over the canvas.

    Nodes beyond the canvas take the value of the nearest control point's edge
    (the spline is clamped there), so marker images see a bounded warp.
    """
    control = g.standard_normal((CONTROL_POINTS, CONTROL_POINTS, 2))
    gx = (origin[0] + FIELD_SPACING * np.arange(nx)) / max(w - 1, 1) * (CONTROL_POINTS - 1)
    gy = (origin[1] + FIELD_SPACING * np.arange(ny)) / max(h - 1, 1) * (CONTROL_POINTS - 1)
    cy, cx = np.meshgrid(np.clip(gy, 0, CONTROL_POINTS - 1), np.clip(gx, 0, CONTROL_POINTS - 1), indexing="ij")
    return np.stack([map_coordinates(control[..., i], [cy, cx], order=3, mode="nearest") for i in range(2)], -1)


def field_at(field: DisplacementField, points: np.ndarray) -> np.ndarray:
    """Return the warp ``w(q)`` at ``(N, 2)`` ``(x, y)`` points, bilinear between nodes, clamped outside.

    Notes
    -----
    Same model as :meth:`DisplacementField.displacement`, evaluated in float64
    with exact weights (that method goes through ``cv2.remap``, whose bilinear
    weights are quantised to 1/32 of a node, too coarse for a 1e-3 px truth).
    """
    q = np.asarray(points, np.float64).reshape(-1, 2)
    ny, nx = field.vectors.shape[:2]
    gx = np.clip((q[:, 0] - field.origin[0]) / field.spacing, 0, nx - 1)
    gy = np.clip((q[:, 1] - field.origin[1]) / field.spacing, 0, ny - 1)
    v = field.vectors.astype(np.float64)
    return np.column_stack([map_coordinates(v[..., i], [gy, gx], order=1, mode="nearest") for i in range(2)])


def section_to_true(affine: Affine2D, field: DisplacementField, points: np.ndarray) -> np.ndarray:
    """Return ``A q + w(q)`` for ``(N, 2)`` section-frame ``(x, y)`` points."""
    q = np.asarray(points, np.float64).reshape(-1, 2)
    return affine.apply(q) + field_at(field, q)


def true_to_section(affine: Affine2D, field: DisplacementField, points: np.ndarray,
                    tol: float = 1e-6, max_iter: int = 100) -> np.ndarray:
    """Return the section-frame points that map to the ``(N, 2)`` true-frame points.

    Notes
    -----
    Solves ``q = A^-1 (p - w(q))`` by fixed-point iteration, which contracts
    because the warp's gradient is far below 1 (a few px over tens of px).
    """
    p = np.asarray(points, np.float64).reshape(-1, 2)
    inv = affine.inverse()
    q = inv.apply(p)
    for _ in range(max_iter):
        nxt = inv.apply(p - field_at(field, q))
        done = np.abs(nxt - q).max(initial=0.0) < tol
        q = nxt
        if done:
            break
    return q


def section_to_true_grid(affine: Affine2D, field: DisplacementField, xs: np.ndarray,
                         ys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return true-frame ``(px, py)`` of the section grid ``xs`` x ``ys`` (shape ``(len(ys), len(xs))``)."""
    xs, ys = np.asarray(xs, np.float64), np.asarray(ys, np.float64)
    gx, gy = np.meshgrid(xs, ys)
    d = field_at(field, np.column_stack([gx.ravel(), gy.ravel()])).reshape(*gx.shape, 2)
    m = affine.matrix
    px = m[0, 0] * xs[None, :] + m[0, 1] * ys[:, None] + m[0, 2] + d[..., 0]
    py = m[1, 0] * xs[None, :] + m[1, 1] * ys[:, None] + m[1, 2] + d[..., 1]
    return px, py
