"""The "realistic" tissue family: content that changes between sections as serial-section EM does.

What persists from one section to the next, and what does not:

* cell membranes persist. Cells are a Voronoi partition of seed points, and
  every seed moves sideways with depth in a direction of its own, at 0.5 to
  2.5 px per section, plus a drift common to the whole block (``params.drift``,
  or, when that is (0, 0), 1 to 2 px per section in a direction drawn from the
  seed). Profiles are ``params.cell_size`` apart on average (40 px for a dense
  neuropil-like tangle of thin processes);
* organelles (dark ellipses with a darker rim) last a few sections (half-depth
  1.5 to 4 sections) and move in directions of their own;
* vesicle-sized dots (about 10 px across), many of them gathered around
  cluster centres that persist for a few sections, are drawn afresh in every
  section: no dot is seen twice;
* cytoplasm texture (band-pass noise) is independent from section to section.

The content of section ``z`` is rendered directly in the true frame: a cell
seed ``s`` sits at ``s + (z - z_ref) (v_cell + drift)`` with ``z_ref`` the
middle section. Random objects are laid out in fixed blocks of space (see
:mod:`stackbuild.synth.phantom`), so any crop of the true frame shows the same
tissue. Intensities are on an 8-bit scale, dark membranes on bright cytoplasm.
"""
from __future__ import annotations

import math

import cv2
import numpy as np

from .layout import rng
from .params import SynthParams
from .space import BLOCK, ZBLOCK, KEY as _KEY, blocks as _blocks, draw as _draw, membranes as _membranes, \
    noise_slab, sixteenths as _fx

_TAG_CELLS, _TAG_ORG, _TAG_DOTS, _TAG_CLUSTER, _TAG_TEX, _TAG_DRIFT = 41, 42, 43, 44, 45, 46
SPEED = (0.5, 2.5)  # px per section, each cell's own sideways motion
DRIFT = (1.0, 2.0)  # px per section, the common drift drawn when params.drift is (0, 0)
_ORG_RZ = (1.5, 4.0)  # organelle half-depth, sections
_CLUSTER_RZ = 2.5  # cluster half-depth scale (Gaussian sigma), sections
_DOT_R = (4.0, 6.0)  # vesicle radius, px
_BACKGROUND_DOTS = 40  # free dots per 256 x 256 block and section
_CLUSTER_DOTS = 30  # dots at a cluster's centre depth
_ORGANELLES = 4.0  # organelles per 256 x 256 block and 16 sections
FILL_FRACTION = 0.3  # share of cells that carry the fill marker


def common_drift(params: SynthParams) -> tuple[float, float]:
    """Return the drift (vx, vy) shared by all structures, px per section."""
    if any(params.drift):
        return float(params.drift[0]), float(params.drift[1])
    g = rng(params, _TAG_DRIFT)
    a, m = g.uniform(0, 2 * math.pi), g.uniform(*DRIFT)
    return m * math.cos(a), m * math.sin(a)


def motion_record(params: SynthParams) -> dict:
    """Return the truth's ``slant`` record for this family: no smooth field, the common drift, per-cell speeds.

    The record has the keys of :func:`stackbuild.synth.phantom.slant_model`
    (``waves`` empty, ``correction`` zero), so :meth:`Truth.slant` returns the
    common drift; ``cell_speed`` gives the range of each cell's own motion.
    """
    return {"waves": [], "correction": [[0.0] * 3, [0.0] * 3], "z_ref": (params.sections - 1) / 2.0,
            "drift": list(common_drift(params)), "cell_speed": list(SPEED), "content": "realistic"}


def _reach(params: SynthParams, z: float) -> float:
    """Return the farthest a structure can have moved from its place at ``z_ref``, px."""
    vx, vy = common_drift(params)
    return abs(z - (params.sections - 1) / 2.0) * (SPEED[1] + math.hypot(vx, vy))


def _cells(params, z, x0, x1, y0, y1):
    """Return rows (x, y at section z, brightness, fill flag) of every cell that can reach the box."""
    vx, vy = common_drift(params)
    dz = z - (params.sections - 1) / 2.0
    m = _reach(params, z)
    out = []
    for bx, by in _blocks(x0 - m, x1 + m, y0 - m, y1 + m):
        g = rng(params, _TAG_CELLS, bx + _KEY, by + _KEY)
        n = g.poisson(BLOCK * BLOCK / params.cell_size ** 2)
        xy = g.uniform(0, BLOCK, (n, 2)) + [bx * BLOCK, by * BLOCK]
        speed, angle = g.uniform(*SPEED, n), g.uniform(0, 2 * math.pi, n)
        level = g.uniform(-1, 1, n)
        fill = (g.uniform(0, 1, n) < FILL_FRACTION).astype(float)
        x = xy[:, 0] + dz * (speed * np.cos(angle) + vx)
        y = xy[:, 1] + dz * (speed * np.sin(angle) + vy)
        out.append(np.column_stack([x, y, level, fill]))
    cells = np.vstack(out)
    pad = BLOCK / 2
    keep = (cells[:, 0] > x0 - pad) & (cells[:, 0] < x1 + pad) & (cells[:, 1] > y0 - pad) & (cells[:, 1] < y1 + pad)
    return cells[keep]


def _moving(params, tag, z, x0, x1, y0, y1, reach, draw_block):
    """Collect objects of blocks of space (z-blocks within ``reach`` sections) that can be seen at ``z``."""
    m = (SPEED[1] + math.hypot(*common_drift(params))) * (reach + 1)
    out = []
    for bz in range(math.floor((z - reach) / ZBLOCK), math.floor((z + reach) / ZBLOCK) + 1):
        for bx, by in _blocks(x0 - m, x1 + m, y0 - m, y1 + m):
            g = rng(params, tag, bx + _KEY, by + _KEY, bz + _KEY)
            out.extend(draw_block(g, bx * BLOCK, by * BLOCK, bz * ZBLOCK))
    return out


def _organelles(params, z, box):
    """Return (x, y, a, b, angle) of organelle profiles cut by section ``z``."""
    vx, vy = common_drift(params)

    def block(g, x0, y0, z0):
        n = g.poisson(_ORGANELLES)
        rows = []
        for _ in range(n):
            x, y, zc = x0 + g.uniform(0, BLOCK), y0 + g.uniform(0, BLOCK), z0 + g.uniform(0, ZBLOCK)
            a, b, rz, ang = g.uniform(18, 45), g.uniform(9, 16), g.uniform(*_ORG_RZ), g.uniform(0, 180)
            s, d = g.uniform(*SPEED), g.uniform(0, 2 * math.pi)
            t = abs(z - zc) / rz
            if t < 1:
                f = math.sqrt(1 - t * t)
                dz = z - zc
                rows.append((x + dz * (s * math.cos(d) + vx), y + dz * (s * math.sin(d) + vy), a * f, b * f, ang))
        return rows

    return _moving(params, _TAG_ORG, z, *box, _ORG_RZ[1], block)


def _clusters(params, z, box):
    """Return (x, y, strength, key) of vesicle-cluster centres near section ``z`` (strength 1 at their centre depth)."""
    vx, vy = common_drift(params)

    def block(g, x0, y0, z0):
        n = g.poisson(1.5)
        rows = []
        for _ in range(n):
            x, y, zc = x0 + g.uniform(0, BLOCK), y0 + g.uniform(0, BLOCK), z0 + g.uniform(0, ZBLOCK)
            key = int(g.integers(0, 2 ** 31))
            dz = z - zc
            rows.append((x + dz * vx, y + dz * vy, math.exp(-dz * dz / (2 * _CLUSTER_RZ ** 2)), key))
        return rows

    return [c for c in _moving(params, _TAG_CLUSTER, z, *box, 3 * _CLUSTER_RZ, block) if c[2] > 0.05]


def _dots(params, z, box, clusters):
    """Return ``(n, 3)`` rows (x, y, radius) of vesicle dots drawn afresh for section ``z``."""
    x0, x1, y0, y1 = box
    out = []
    for bx, by in _blocks(x0, x1, y0, y1):
        g = rng(params, _TAG_DOTS, z + _KEY, bx + _KEY, by + _KEY)
        n = g.poisson(_BACKGROUND_DOTS)
        out.append(np.column_stack([g.uniform(0, BLOCK, (n, 2)) + [bx * BLOCK, by * BLOCK], g.uniform(*_DOT_R, n)]))
    for x, y, strength, key in clusters:
        # each cluster its own stream, so a crop of the frame sees the same dots
        g = rng(params, _TAG_DOTS, z + _KEY, key)
        k = g.poisson(_CLUSTER_DOTS * strength)
        out.append(np.column_stack([g.normal(0, 20, (k, 2)) + [x, y], g.uniform(*_DOT_R, k)]))
    return np.vstack(out)


def realistic_layers(params: SynthParams, z: int, shape: tuple[int, int],
                     markers: bool = False) -> dict[str, np.ndarray]:
    """Return the true-frame images of section ``z`` of the realistic family (crop from (0, 0) of ``shape``).

    Parameters
    ----------
    params : SynthParams
        The sample description (``content`` = "realistic").
    z : int
        Section number.
    shape : (int, int)
        ``(height, width)`` of the crop.
    markers : bool
        Also render ``"fill"`` (labelled cells, [0, 1]) and ``"puncta"``
        (vesicle-cluster centres, [0, 1]).

    Returns
    -------
    dict of str to ndarray
        float32 images; ``"em"`` in grey levels on an 8-bit scale.
    """
    h, w = shape
    box = (-BLOCK / 2, w + BLOCK / 2, -BLOCK / 2, h + BLOCK / 2)
    cells = _cells(params, z, *box)
    dist, per_cell = _membranes(cells, 0, 0, h, w)
    tex = noise_slab(params, _TAG_TEX, z, 0, 0, h, w)
    org = _organelles(params, z, box)
    clusters = _clusters(params, z, box)
    dots = _dots(params, z, (0, w, 0, h), clusters)

    def ellipse(img, m, thick):
        cv2.ellipse(img, (_fx(m[0]), _fx(m[1])), (_fx(max(m[2], 1)), _fx(max(m[3], 1))), m[4], 0, 360, 255,
                    thick, cv2.LINE_AA, 4)

    def dot(img, d, thick):
        cv2.circle(img, (_fx(d[0]), _fx(d[1])), _fx(d[2]), 255, thick, cv2.LINE_AA, 4)

    o_fill = _draw((h, w), 0, 0, org, lambda i, m, a, b: ellipse(i, m, -1))
    o_rim = _draw((h, w), 0, 0, org, lambda i, m, a, b: ellipse(i, m, 2))
    d_fill = _draw((h, w), 0, 0, dots, lambda i, d, a, b: dot(i, d, -1))
    d_rim = _draw((h, w), 0, 0, dots, lambda i, d, a, b: dot(i, d, 2))
    memb = np.exp(-dist ** 2 / (2 * 1.3 ** 2))

    em = 170 + 9 * per_cell(2) + 16 * tex
    em = em * (1 - o_fill) + o_fill * (108 + 12 * tex) - 55 * o_rim - 30 * d_fill - 55 * d_rim
    em *= 1 - 0.72 * memb
    layers = {"em": np.clip(cv2.GaussianBlur(em, (0, 0), 0.7), 0, 255)}
    if markers:
        layers["fill"] = per_cell(3) * (1 - memb)
        near = [(c[0], c[1], 28.0 * c[2]) for c in clusters if 28.0 * c[2] > 3]
        layers["puncta"] = _draw((h, w), 0, 0, near,
                                 lambda i, v, a, b: cv2.circle(i, (_fx(v[0]), _fx(v[1])), _fx(v[2]), 255, -1,
                                                               cv2.LINE_AA, 4))
    return layers
