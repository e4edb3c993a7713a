"""The data-support ratio of a steady field on a grid, for the many points of a many-release answer.

``FlowField.local_variance_ratio`` (tr Σ_loc / tr K_loc, the share of the prior velocity variance the data
leave; supportcheck) costs a triangular solve with the (M·d)² factor per point: about 45 µs at M = 256, d = 2
on one core, so a connectivity run scoring 10⁶ releases at 30 output times would spend about 20 minutes on it.
The ratio is as smooth as the posterior covariance (it varies on the kernel's length scale), so it is
evaluated exactly once at the nodes of a regular grid and interpolated multilinearly
(``scipy.interpolate.RegularGridInterpolator``).  Linear interpolation errs by at most h²/8 · max|∂²r| per axis
(e.g. de Boor 1978, A Practical Guide to Splines, ch. 2; from memory); the error is *measured*, not assumed:
the grid is refined (n → 2n − 1 nodes per axis) until the largest absolute error on CHECK_POINTS random off-grid
points is ≤ ``tolerance`` (default 0.02, against the 0.9 support threshold).  Points off the grid get the
exact ratio.  A time-varying field's ratio depends on time: it is not tabulated (:func:`support_table` → None).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.interpolate import RegularGridInterpolator

__all__ = ["SUPPORT_TOLERANCE", "SupportTable", "support_table"]

SUPPORT_TOLERANCE = 0.02   # largest absolute error of the interpolated variance ratio
START_NODES = 17           # nodes per axis of the first grid
MAX_SUPPORT_NODES = 70_000  # refinement stops here (a 2-D 257² grid); the exact ratio is used beyond
CHECK_POINTS = 4000        # random off-grid points on which the error is measured


@dataclass(frozen=True, eq=False)
class SupportTable:
    """Variance ratio on a grid: ``axes`` per-axis node coordinates (m), ``values`` the exact ratio at the nodes,
    ``error`` the largest absolute interpolation error measured; ``exact`` the field's own ratio (off the grid)."""

    axes: tuple[np.ndarray, ...]
    values: np.ndarray
    error: float
    exact: Any

    def __call__(self, points_m: Any, times_s: Any = None) -> np.ndarray:
        """Ratio (n,) at ``points_m`` (n, d) m: interpolated on the grid, exact off it (``times_s`` unused: steady)."""
        x = np.atleast_2d(np.asarray(points_m, np.float64))
        lo = np.array([a[0] for a in self.axes])
        hi = np.array([a[-1] for a in self.axes])
        on = np.all((x >= lo) & (x <= hi), axis=1)
        out = np.empty(len(x))
        out[on] = RegularGridInterpolator(self.axes, self.values, method="linear")(x[on]) if on.any() else 0.0
        if not on.all():
            out[~on] = np.asarray(self.exact(x[~on]))
        return out


def _build(field: Any, lo: np.ndarray, hi: np.ndarray, n: int) -> tuple[tuple[np.ndarray, ...], np.ndarray]:
    axes = tuple(np.linspace(lo[a], hi[a], n) for a in range(lo.size))
    nodes = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, lo.size)
    return axes, np.asarray(field.local_variance_ratio(nodes)).reshape((n,) * lo.size)


def support_table(field: Any, region_min_m: Any, region_max_m: Any, *, tolerance: float = SUPPORT_TOLERANCE,
                  seed: int = 0) -> SupportTable | None:
    """The ratio of a steady ``field`` tabulated over the box [region_min_m, region_max_m] (d,) m with a measured
    error ≤ ``tolerance`` (module doc); None for a time-varying field or when the grid would need more than
    MAX_SUPPORT_NODES nodes (the caller then uses the exact ratio)."""
    if getattr(field, "is_time_varying", False):
        return None
    lo, hi = np.asarray(region_min_m, np.float64), np.asarray(region_max_m, np.float64)
    check = np.random.default_rng(seed).uniform(lo, hi, (CHECK_POINTS, lo.size))
    truth = np.asarray(field.local_variance_ratio(check))
    n = START_NODES
    while n**lo.size <= MAX_SUPPORT_NODES:
        axes, values = _build(field, lo, hi, n)
        error = float(np.max(np.abs(RegularGridInterpolator(axes, values)(check) - truth)))
        if error <= tolerance:
            return SupportTable(axes, values, error, field.local_variance_ratio)
        n = 2 * n - 1
    return None
