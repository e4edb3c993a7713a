"""Test geometry shared by the recovery tests: where "near the data" is."""

from __future__ import annotations

import numpy as np
from scipy.spatial import Delaunay


def circumradius_m(tri: Delaunay) -> np.ndarray:
    """Circumradius R = abc / (4 · area) of every Delaunay triangle (m)."""
    a, b, c = (tri.points[tri.simplices[:, i]] for i in range(3))
    ab, bc, ca = (np.linalg.norm(p - q, axis=1) for p, q in ((a, b), (b, c), (c, a)))
    area2 = np.abs((b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1]) - (b[:, 1] - a[:, 1]) * (c[:, 0] - a[:, 0]))
    return ab * bc * ca / np.maximum(2.0 * area2, 1e-300)


def grid_inside_alpha_shape(points_m: np.ndarray, alpha_m: float, n: int = 50) -> np.ndarray:
    """Nodes of an n × n grid over the data's box inside their alpha shape (Edelsbrunner, Kirkpatrick & Seidel
    1983): the Delaunay triangles of circumradius ≤ α; α → ∞ gives the convex hull."""
    lo, hi = points_m.min(axis=0), points_m.max(axis=0)
    gx, gy = np.meshgrid(np.linspace(lo[0], hi[0], n), np.linspace(lo[1], hi[1], n))
    grid = np.column_stack([gx.ravel(), gy.ravel()])
    tri = Delaunay(points_m)
    simplex = tri.find_simplex(grid)
    inside = simplex >= 0
    inside[inside] = circumradius_m(tri)[simplex[inside]] <= alpha_m
    return grid[inside]
