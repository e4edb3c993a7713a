"""Where the data are: a thinned copy of the fix positions kept with a model, and distances to it.

A forecast or a map far from every fix rests on the prior alone (a zero-mean stationary prior
plus the background's linear terms), so the tools say *how far* a point lies from the data
before they run.  A model file cannot hold millions of fixes, so :func:`thin_support` keeps one
fix per occupied cell of a regular grid over the data's bounding box: ``CELLS_ACROSS`` cells
along the longest side, the cell doubled until at most ``MAX_SUPPORT_POINTS`` cells are
occupied.  Every fix then lies within one cell diagonal, √d · ``cell_m``, of a kept one (kept
coordinates are rounded to 1 % of a cell), so :func:`distance_to_data_m` (the Euclidean distance
to the nearest kept fix, scipy's k-d tree) is the distance to the nearest fix to within
``tolerance_m`` = 1.01 √d · ``cell_m``.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.spatial import cKDTree

from ..errors import InputError

__all__ = ["CELLS_ACROSS", "MAX_SUPPORT_POINTS", "distance_to_data_m", "support_record", "thin_support"]

CELLS_ACROSS = 128
MAX_SUPPORT_POINTS = 2000


def thin_support(position_m) -> tuple[np.ndarray, float]:
    """(kept fixes (k, d) m, cell side m): the first fix in each occupied grid cell (module docstring)."""
    x = np.asarray(position_m, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] == 0 or not np.all(np.isfinite(x)):
        raise InputError("the data support needs at least one finite position (n, d) in metres")
    low = x.min(axis=0)
    side = float(np.max(x.max(axis=0) - low))
    cell = side / CELLS_ACROSS if side > 0 else 1.0
    while True:
        keys = np.floor((x - low) / cell).astype(np.int64)
        _, first = np.unique(keys, axis=0, return_index=True)
        if first.size <= MAX_SUPPORT_POINTS:
            return x[np.sort(first)], cell
        cell *= 2.0


def support_record(position_m) -> dict:
    """The JSON record a model keeps: ``points_m`` (rounded to 1 % of a cell) and ``cell_m``."""
    points, cell = thin_support(position_m)
    decimals = max(0, -math.floor(math.log10(cell / 100.0)))
    return {"points_m": np.round(points, decimals).tolist(), "cell_m": cell,
            "tolerance_m": 1.01 * math.sqrt(points.shape[1]) * cell,
            "method": f"one fix per occupied cell of a {CELLS_ACROSS}-across grid (coarsened to at most "
                      f"{MAX_SUPPORT_POINTS} cells); distances to the data are exact within tolerance_m"}


def distance_to_data_m(support: dict, points_m) -> np.ndarray:
    """Distance (n,) m from each of ``points_m`` (n, d) to the nearest kept fix of ``support``
    (a :func:`support_record`), exact to within its ``tolerance_m``."""
    kept = np.asarray(support["points_m"], dtype=np.float64)
    x = np.asarray(points_m, dtype=np.float64)
    if kept.ndim != 2 or x.ndim != 2 or kept.shape[1] != x.shape[1]:
        raise InputError(f"points of shape {x.shape} do not match the data support of shape {kept.shape}")
    return cKDTree(kept).query(x)[0]
