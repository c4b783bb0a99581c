"""The 3-D tissue phantom, rendered one section at a time in the true frame.

The tissue is built from random objects laid out in fixed blocks of space
(256 px x 256 px x 16 sections), each block with its own random stream, so any
crop of the true frame shows the same tissue:

* cells: a Voronoi partition of seed points with dark membranes along the
  bisectors, each cell with its own brightness, seeds creeping slowly in z;
* mitochondria-like ellipsoids (dark, with a darker rim), cut obliquely;
* vesicles (small dark rings), many gathered in clusters;
* band-pass cytoplasm texture that decorrelates over a few sections.

All of it is then carried sideways with depth by a smooth slant field v(x, y)
(plus an optional common drift), so structures run obliquely through the stack:
the content at true point p in section z is the base content at
``p - (z - z_ref) * (v(p) + drift)``. Intensities are on an 8-bit scale, dark
membranes on a bright cytoplasm as in backscatter EM.
"""
from __future__ import annotations

import math

import cv2
import numpy as np

from .layout import rng, true_shape
from .params import SynthParams
from .space import BLOCK, ZBLOCK, KEY as _KEY, blocks as _blocks, draw as _draw, membranes as _membranes, \
    noise_slab, sixteenths as _fx
from .tissue import realistic_layers

_TAG_CELLS, _TAG_MITO, _TAG_VES, _TAG_CLUSTER, _TAG_TEX, _TAG_SLANT = 21, 22, 23, 24, 25, 26
_TEX_SLAB = 2.0  # sections over which the texture decorrelates
_MITO_RZ, _VES_RZ = 12.0, 0.9
FILL_FRACTION = 0.3  # share of cells that carry the fill marker


# -- slant field ---------------------------------------------------------------

def slant_model(params: SynthParams) -> dict:
    """Return the slant field as a JSON-able record of plane waves minus their affine part.

    ``v(p) = sum_j a_j sin(k_j . p + phi_j) - (M [x, y, 1])``, scaled so that the
    largest ``|v|`` on the true frame equals ``params.slant``; ``M`` removes the
    mean and linear part over the true frame, so the slant has no net drift,
    rotation or stretch (those would be indistinguishable from section motion).
    """
    h, w = true_shape(params)
    g = rng(params, _TAG_SLANT)
    k = 2 * math.pi / (params.slant_wavelength * w)
    ang = g.uniform(0, math.pi, 3)
    waves = [{"k": [k * math.cos(a), k * math.sin(a)], "phase": float(g.uniform(0, 2 * math.pi)),
              "amp": [float(math.cos(b)), float(math.sin(b))]}
             for a, b in zip(ang, g.uniform(0, 2 * math.pi, 3))]
    rec = {"waves": waves, "correction": [[0.0] * 3, [0.0] * 3], "z_ref": (params.sections - 1) / 2.0,
           "drift": list(map(float, params.drift))}
    xs, ys = np.arange(0, w, 8.0), np.arange(0, h, 8.0)
    vx, vy = slant_grid(rec, xs, ys)
    gx, gy = np.meshgrid(xs, ys)
    design = np.column_stack([gx.ravel(), gy.ravel(), np.ones(gx.size)])
    coef, *_ = np.linalg.lstsq(design, np.column_stack([vx.ravel(), vy.ravel()]), rcond=None)
    rx, ry = vx - (design @ coef[:, 0]).reshape(vx.shape), vy - (design @ coef[:, 1]).reshape(vy.shape)
    peak = float(np.sqrt(rx ** 2 + ry ** 2).max())
    f = params.slant / peak if peak > 0 else 0.0
    for wv in waves:
        wv["amp"] = [a * f for a in wv["amp"]]
    rec["correction"] = (coef.T * f).tolist()
    return rec


def slant_grid(model: dict, xs: np.ndarray, ys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return ``(vx, vy)`` of the slant on the grid ``xs`` x ``ys`` (shape ``(len(ys), len(xs))``)."""
    xs, ys = np.asarray(xs, np.float64), np.asarray(ys, np.float64)
    m = np.asarray(model["correction"])
    # sin(a + b) = sin a cos b + cos a sin b makes every term separable, so the whole
    # field is one small matrix product: v = Y @ X.T with X, Y holding the 1-D factors.
    cols_x, cols_y = [xs, np.ones_like(xs)], []
    for wv in model["waves"]:
        (kx, ky), ph = wv["k"], wv["phase"]
        cols_x += [np.sin(kx * xs), np.cos(kx * xs)]
    big_x = np.column_stack(cols_x)
    out = []
    for axis in range(2):
        cols_y = [np.full_like(ys, -m[axis, 0]), -(m[axis, 1] * ys + m[axis, 2])]
        for wv in model["waves"]:
            (kx, ky), ph, a = wv["k"], wv["phase"], wv["amp"][axis]
            cols_y += [a * np.cos(ky * ys + ph), a * np.sin(ky * ys + ph)]
        out.append(np.column_stack(cols_y) @ big_x.T)
    return out[0], out[1]


def slant_at(model: dict, points: np.ndarray) -> np.ndarray:
    """Return the slant ``v(p)`` (px per section, without the drift) at ``(N, 2)`` ``(x, y)`` points."""
    p = np.asarray(points, np.float64).reshape(-1, 2)
    v = np.zeros_like(p)
    for wv in model["waves"]:
        s = np.sin(p @ np.asarray(wv["k"]) + wv["phase"])
        v += s[:, None] * np.asarray(wv["amp"])[None, :]
    m = np.asarray(model["correction"])
    return v - (p @ m[:, :2].T + m[:, 2])


# -- objects per block ----------------------------------------------------------

def _cells(params, x0, x1, y0, y1):
    """Seeds (x, y, vx, vy, brightness, fill flag) of all cells in blocks touching the box."""
    out = []
    for bx, by in _blocks(x0, x1, y0, y1):
        g = rng(params, _TAG_CELLS, bx + _KEY, by + _KEY)
        n = g.poisson(BLOCK * BLOCK / params.cell_size ** 2)
        xy = g.uniform(0, BLOCK, (n, 2)) + [bx * BLOCK, by * BLOCK]
        creep = g.normal(0, 0.08, (n, 2))
        level = g.uniform(-1, 1, (n, 1))
        fill = (g.uniform(0, 1, (n, 1)) < FILL_FRACTION).astype(float)
        out.append(np.hstack([xy, creep, level, fill]))
    return np.vstack(out)


def _objects(params, tag, x0, x1, y0, y1, z, reach, make):
    out = []
    for bz in range(math.floor((z - reach) / ZBLOCK), math.floor((z + reach) / ZBLOCK) + 1):
        for bx, by in _blocks(x0, x1, y0, y1):
            g = rng(params, tag, bx + _KEY, by + _KEY, bz + _KEY)
            out.extend(make(g, bx * BLOCK, by * BLOCK, bz * ZBLOCK))
    return out


def _make_mito(g, x0, y0, z0):
    n = g.poisson(1.6)
    return [(x0 + g.uniform(0, BLOCK), y0 + g.uniform(0, BLOCK), z0 + g.uniform(0, ZBLOCK),
             g.uniform(22, 50), g.uniform(10, 18), g.uniform(3, _MITO_RZ), g.uniform(0, 180))
            for _ in range(n)]


def _make_clusters(g, x0, y0, z0):
    n = g.poisson(1.5)
    return [(x0 + g.uniform(0, BLOCK), y0 + g.uniform(0, BLOCK), z0 + g.uniform(0, ZBLOCK),
             int(g.integers(12, 30)), int(g.integers(0, 2 ** 31))) for _ in range(n)]


def _make_vesicles(g, x0, y0, z0):
    n = g.poisson(60)
    return [(x0 + g.uniform(0, BLOCK), y0 + g.uniform(0, BLOCK), z0 + g.uniform(0, ZBLOCK),
             g.uniform(3.5, 6.0)) for _ in range(n)]


def _cluster_members(cluster):
    x, y, z, n, key = cluster
    g = np.random.default_rng(key)
    xy = g.normal(0, 22, (n, 2)) + [x, y]
    zs = g.normal(0, 1.2, n) + z
    r = g.uniform(3.5, 6.0, n)
    return [(a, b, c, d) for (a, b), c, d in zip(xy, zs, r)]


# -- rendering ----------------------------------------------------------------------

def _texture(params, z, ox, oy, h, w):
    """Band-pass noise, unit variance, that blends between slabs of a few sections."""
    j = math.floor(z / _TEX_SLAB)
    f = z / _TEX_SLAB - j
    a = noise_slab(params, _TAG_TEX, j, ox, oy, h, w)
    if f == 0:
        return a
    b = noise_slab(params, _TAG_TEX, j + 1, ox, oy, h, w)
    return ((1 - f) * a + f * b) / math.sqrt((1 - f) ** 2 + f ** 2)


def _base_layers(params, z, ox, oy, h, w, markers):
    """Render the unslanted tissue of section ``z`` on the box (origin ``ox, oy``, size ``h, w``)."""
    x0, x1, y0, y1 = ox - BLOCK / 2, ox + w + BLOCK / 2, oy - BLOCK / 2, oy + h + BLOCK / 2
    cells = _cells(params, x0, x1, y0, y1)
    seeds = cells[:, :2] + z * cells[:, 2:4]
    dist, per_cell = _membranes(np.hstack([seeds, cells[:, 2:]]), ox, oy, h, w)
    tex = _texture(params, z, ox, oy, h, w)

    mito = [m for m in _objects(params, _TAG_MITO, x0, x1, y0, y1, z, _MITO_RZ, _make_mito) if abs(z - m[2]) < m[5]]
    clusters = _objects(params, _TAG_CLUSTER, x0, x1, y0, y1, z, 6, _make_clusters)
    ves = _objects(params, _TAG_VES, x0, x1, y0, y1, z, 1, _make_vesicles)
    ves += [v for c in clusters for v in _cluster_members(c)]
    ves = [v for v in ves if abs(z - v[2]) < _VES_RZ]

    def ellipse(img, m, ox, oy, thick):
        f = math.sqrt(1 - ((z - m[2]) / m[5]) ** 2)
        cv2.ellipse(img, (_fx(m[0] - ox), _fx(m[1] - oy)), (_fx(max(m[3] * f, 1)), _fx(max(m[4] * f, 1))),
                    m[6], 0, 360, 255, thick, cv2.LINE_AA, 4)

    def ring(img, v, ox, oy, thick):
        r = v[3] * math.sqrt(1 - ((z - v[2]) / _VES_RZ) ** 2)
        cv2.circle(img, (_fx(v[0] - ox), _fx(v[1] - oy)), _fx(max(r, 1)), 255, thick, cv2.LINE_AA, 4)

    m_fill = _draw((h, w), ox, oy, mito, lambda i, m, a, b: ellipse(i, m, a, b, -1))
    m_rim = _draw((h, w), ox, oy, mito, lambda i, m, a, b: ellipse(i, m, a, b, 2))
    v_fill = _draw((h, w), ox, oy, ves, lambda i, v, a, b: ring(i, v, a, b, -1))
    v_rim = _draw((h, w), ox, oy, ves, lambda i, v, a, b: ring(i, v, a, b, 2))
    memb = np.exp(-dist ** 2 / (2 * 1.3 ** 2))

    em = 170 + 9 * per_cell(4) + 13 * tex
    em = em * (1 - m_fill) + m_fill * (108 + 10 * tex) - 55 * m_rim - 25 * v_fill - 60 * v_rim
    em *= 1 - 0.72 * memb
    layers = {"em": np.clip(cv2.GaussianBlur(em, (0, 0), 0.7), 0, 255)}
    if markers:
        layers["fill"] = per_cell(5) * (1 - memb)
        near = [(c[0], c[1], 0.0, 28.0 * math.exp(-(z - c[2]) ** 2 / (2 * 2.0 ** 2))) for c in clusters]
        layers["puncta"] = _draw((h, w), ox, oy, [c for c in near if c[3] > 3],
                                 lambda i, v, a, b: cv2.circle(i, (_fx(v[0] - a), _fx(v[1] - b)), _fx(v[3]),
                                                               255, -1, cv2.LINE_AA, 4))
    return layers


def phantom_layers(params: SynthParams, z: int, shape: tuple[int, int] | None = None,
                   markers: bool = False) -> dict[str, np.ndarray]:
    """Return the true-frame images of section ``z``: ``"em"`` and, with ``markers``, ``"fill"``, ``"puncta"``.

    Parameters
    ----------
    params : SynthParams
        The sample description (seed, cell size, slant, drift, ...).
    z : int
        Section number.
    shape : (int, int), optional
        ``(height, width)`` of the crop of the true frame starting at (0, 0);
        default the whole true frame (:func:`stackbuild.synth.layout.true_shape`).
    markers : bool
        Also render the two marker layers (fill of labelled cells in [0, 1],
        vesicle-cluster puncta in [0, 1]).

    Returns
    -------
    dict of str to ndarray
        float32 images of ``shape``; ``"em"`` in grey levels on an 8-bit scale.
    """
    h, w = true_shape(params) if shape is None else shape
    if params.content == "realistic":
        return realistic_layers(params, z, (h, w), markers)
    model = slant_model(params)
    xs, ys = np.arange(w, dtype=np.float64), np.arange(h, dtype=np.float64)
    vx, vy = slant_grid(model, xs, ys)
    dz = z - model["z_ref"]
    dx = (vx + model["drift"][0]) * dz
    dy = (vy + model["drift"][1]) * dz
    m = int(math.ceil(max(np.abs(dx).max(), np.abs(dy).max()))) + 2
    base = _base_layers(params, z, -m, -m, h + 2 * m, w + 2 * m, markers)
    mapx = (xs[None, :] - dx + m).astype(np.float32)
    mapy = (ys[:, None] - dy + m).astype(np.float32)
    return {k: cv2.remap(v, mapx, mapy, cv2.INTER_LINEAR, borderMode=cv2.BORDER_REFLECT) for k, v in base.items()}


def phantom_section(params: SynthParams, z: int, shape: tuple[int, int] | None = None) -> np.ndarray:
    """Return the undistorted EM image of section ``z`` in the true frame (float32, 8-bit scale).

    See :func:`phantom_layers` for the parameters.
    """
    return phantom_layers(params, z, shape)["em"]
