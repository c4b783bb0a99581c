"""Transform types: 2-D affine maps and displacement fields on a regular grid.

All points are ``(N, 2)`` arrays of ``(x, y)``; see :mod:`stackbuild.transforms`
for the frame and pixel-centre conventions.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Affine2D:
    """An affine map ``p -> A @ p + t`` on ``(x, y)`` points.

    Parameters
    ----------
    matrix : array_like, shape (2, 3)
        ``[[a, b, tx], [c, d, ty]]`` acting on column vectors ``(x, y, 1)``.
    """

    matrix: np.ndarray

    def __post_init__(self):
        m = np.asarray(self.matrix, dtype=np.float64)
        if m.shape == (3, 3):
            m = m[:2]
        if m.shape != (2, 3) or not np.all(np.isfinite(m)):
            raise ValueError(f"affine matrix must be a finite 2x3 array, got {m.shape}")
        object.__setattr__(self, "matrix", m)

    @classmethod
    def identity(cls) -> "Affine2D":
        """Return the identity map."""
        return cls(np.eye(2, 3))

    @classmethod
    def translation(cls, tx: float, ty: float) -> "Affine2D":
        """Return the map ``p -> p + (tx, ty)``."""
        return cls(np.array([[1.0, 0.0, tx], [0.0, 1.0, ty]]))

    @classmethod
    def similarity(cls, scale: float = 1.0, angle: float = 0.0, tx: float = 0.0, ty: float = 0.0,
                   center: tuple[float, float] = (0.0, 0.0)) -> "Affine2D":
        """Return scale and rotation (radians, counter-clockwise in x-y) about ``center``, then a shift."""
        c, s = scale * np.cos(angle), scale * np.sin(angle)
        a = np.array([[c, -s], [s, c]])
        cx, cy = center
        t = np.array([cx, cy]) - a @ np.array([cx, cy]) + np.array([tx, ty])
        return cls(np.column_stack([a, t]))

    @property
    def homogeneous(self) -> np.ndarray:
        """Return the 3x3 homogeneous matrix."""
        return np.vstack([self.matrix, [0.0, 0.0, 1.0]])

    def apply(self, points: np.ndarray) -> np.ndarray:
        """Return the images of ``(N, 2)`` ``(x, y)`` points."""
        p = np.asarray(points, dtype=np.float64)
        return p @ self.matrix[:, :2].T + self.matrix[:, 2]

    def inverse(self) -> "Affine2D":
        """Return the inverse map."""
        return Affine2D(np.linalg.inv(self.homogeneous))

    def then(self, other: "Affine2D") -> "Affine2D":
        """Return the map that applies ``self`` first, then ``other``."""
        return Affine2D(other.homogeneous @ self.homogeneous)

    def to_json(self) -> dict:
        """Return an OME-NGFF-style ``affine`` record (rows for output x, y; axes x, y)."""
        return {"type": "affine", "axes": ["x", "y"], "affine": self.matrix.tolist()}

    @classmethod
    def from_json(cls, rec: dict) -> "Affine2D":
        """Read a record written by :meth:`to_json`."""
        if rec.get("type") != "affine":
            raise ValueError(f"expected an affine record, got type {rec.get('type')!r}")
        return cls(np.asarray(rec["affine"], dtype=np.float64))


@dataclass(frozen=True)
class DisplacementField:
    """A smooth displacement field sampled on a regular grid: ``p -> p + d(p)``.

    Parameters
    ----------
    vectors : ndarray, shape (ny, nx, 2), float32
        ``(dx, dy)`` at grid node ``[j, i]``, in pixels.
    origin : (float, float)
        ``(x, y)`` of node ``[0, 0]`` in the field's input frame.
    spacing : float
        Node spacing in pixels (same in x and y).

    Notes
    -----
    Between nodes the field is interpolated bilinearly; beyond the grid it is
    held at the nearest node (clamped).
    """

    vectors: np.ndarray
    origin: tuple[float, float]
    spacing: float

    def __post_init__(self):
        v = np.asarray(self.vectors, dtype=np.float32)
        if v.ndim != 3 or v.shape[2] != 2 or min(v.shape[:2]) < 1:
            raise ValueError(f"displacement vectors must have shape (ny, nx, 2), got {v.shape}")
        if not np.all(np.isfinite(v)):
            raise ValueError("displacement vectors must be finite")
        if not self.spacing > 0:
            raise ValueError(f"spacing must be > 0, got {self.spacing}")
        object.__setattr__(self, "vectors", v)
        object.__setattr__(self, "origin", (float(self.origin[0]), float(self.origin[1])))
        object.__setattr__(self, "spacing", float(self.spacing))

    @classmethod
    def zeros(cls, shape: tuple[int, int], origin=(0.0, 0.0), spacing: float = 1.0) -> "DisplacementField":
        """Return a field of zeros with ``shape = (ny, nx)`` nodes."""
        return cls(np.zeros((*shape, 2), np.float32), origin, spacing)

    def nodes(self) -> np.ndarray:
        """Return the ``(ny * nx, 2)`` ``(x, y)`` positions of the nodes, row by row (the order of ``vectors``)."""
        ny, nx = self.vectors.shape[:2]
        gx, gy = np.meshgrid(self.origin[0] + self.spacing * np.arange(nx),
                             self.origin[1] + self.spacing * np.arange(ny))
        return np.column_stack([gx.ravel(), gy.ravel()])

    def displacement(self, points: np.ndarray) -> np.ndarray:
        """Return ``d(p)`` at ``(N, 2)`` ``(x, y)`` points (float64)."""
        p = np.asarray(points, dtype=np.float64)
        gx = ((p[:, 0] - self.origin[0]) / self.spacing).astype(np.float32)
        gy = ((p[:, 1] - self.origin[1]) / self.spacing).astype(np.float32)
        return self._sample(gx, gy).reshape(-1, 2).astype(np.float64)

    def displacement_grid(self, xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
        """Return ``d`` on the grid ``xs`` (columns) x ``ys`` (rows), shape ``(len(ys), len(xs), 2)``.

        Bilinear interpolation is separable on a grid, so it is done along x
        for every node row, then along y: the same values as :meth:`displacement`.
        """
        ny, nx = self.vectors.shape[:2]
        ix, fx = self._axis_weights(xs, self.origin[0], nx)
        iy, fy = self._axis_weights(ys, self.origin[1], ny)
        v = self.vectors
        rows = v[:, ix] * (1 - fx)[None, :, None] + v[:, np.minimum(ix + 1, nx - 1)] * fx[None, :, None]
        out = rows[iy] * (1 - fy)[:, None, None] + rows[np.minimum(iy + 1, ny - 1)] * fy[:, None, None]
        return out.astype(np.float32)

    def _axis_weights(self, coords, origin: float, n: int):
        g = np.clip((np.asarray(coords, np.float64) - origin) / self.spacing, 0, n - 1)
        i = np.minimum(np.floor(g).astype(np.intp), max(n - 2, 0))
        return i, (g - i).astype(np.float32)

    def _sample(self, gx: np.ndarray, gy: np.ndarray) -> np.ndarray:
        """Exact bilinear interpolation of the nodes at fractional grid coordinates (clamped)."""
        ny, nx = self.vectors.shape[:2]
        gx = np.clip(np.asarray(gx, np.float64), 0, nx - 1)
        gy = np.clip(np.asarray(gy, np.float64), 0, ny - 1)
        ix = np.minimum(np.floor(gx).astype(np.intp), max(nx - 2, 0))
        iy = np.minimum(np.floor(gy).astype(np.intp), max(ny - 2, 0))
        fx = (gx - ix)[..., None]
        fy = (gy - iy)[..., None]
        v = self.vectors
        ix1 = np.minimum(ix + 1, nx - 1)
        iy1 = np.minimum(iy + 1, ny - 1)
        top = v[iy, ix] * (1 - fx) + v[iy, ix1] * fx
        bottom = v[iy1, ix] * (1 - fx) + v[iy1, ix1] * fx
        return (top * (1 - fy) + bottom * fy).astype(np.float32)

    def apply(self, points: np.ndarray) -> np.ndarray:
        """Return ``p + d(p)`` for ``(N, 2)`` ``(x, y)`` points."""
        p = np.asarray(points, dtype=np.float64)
        return p + self.displacement(p)

    def magnitude_stats(self) -> dict:
        """Return RMS and max displacement magnitude over the nodes, in pixels."""
        mag = np.hypot(self.vectors[..., 0], self.vectors[..., 1])
        return {"rms": float(np.sqrt(np.mean(mag ** 2))), "max": float(mag.max())}
