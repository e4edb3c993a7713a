"""Gridded products of a fitted 2-D field (``driftwise map``): mean, s.d., divergence, vorticity, data support.

Velocities in a lon/lat frame are rotated from the frame's axes to true east/north with the local
Jacobian of the projection (WGS 84 geodesics, pyproj.Geod); divergence and vorticity are the exact
GP derivative posteriors of :mod:`driftwise.diagnostics.physics`, in the frame's metres.
"""

from __future__ import annotations

import dataclasses
import math
import warnings

import jax
import jax.numpy as jnp
import numpy as np
from pyproj import Geod

from ..data.datascales import MAP_CELLS, map_spacing_m
from ..dynamics.supportcheck import SUPPORT_VARIANCE_FRACTION, SupportWarning, warn_beyond_time_span
from ..errors import InputError
from ..units import format_length
from .physics import SUPPORT_RATIO, divergence_posterior, vorticity_posterior
from .tidalellipse import TidalEllipses, tidal_ellipses
from .timewindow import TimeWindow, data_span_s, padded_rows, span_average, window_velocity

__all__ = ["FieldGrid", "east_north_jacobian", "ellipse_grid", "field_extent_m", "field_grid", "support_time_s"]


@dataclasses.dataclass(frozen=True)
class FieldGrid:
    """A fitted 2-D field sampled on a regular grid; arrays are (n_y, n_x) unless noted.

    x_m, y_m              grid axes (n_x,), (n_y,) in the model's local metric frame, m, increasing
    components            ("x", "y") for a metric frame; ("eastward", "northward") for a lon/lat frame,
                          where the velocity is rotated from the frame's axes to true east/north
    mean_m_s, std_m_s     posterior mean and standard deviation of the two components, (n_y, n_x, 2), m/s
    divergence_s, divergence_std_s, vorticity_s, vorticity_std_s   posterior mean and std, s⁻¹
    variance_ratio        tr Σ_post / tr K_prior of the stationary part (1 = the data taught nothing here)
    supported             variance_ratio < ``SUPPORT_RATIO`` (the data constrain the field)
    lon_deg, lat_deg      (n_y, n_x) node longitudes/latitudes for a lon/lat frame, else None
    reasons               {"divergence"|"vorticity": why it is zero by construction}
    distance_to_data_m    distance from each node to the nearest fitted observation, m
    """

    x_m: np.ndarray
    y_m: np.ndarray
    components: tuple[str, str]
    mean_m_s: np.ndarray
    std_m_s: np.ndarray
    divergence_s: np.ndarray
    divergence_std_s: np.ndarray
    vorticity_s: np.ndarray
    vorticity_std_s: np.ndarray
    variance_ratio: np.ndarray
    supported: np.ndarray
    lon_deg: np.ndarray | None
    lat_deg: np.ndarray | None
    reasons: dict
    frame: object
    kernel_family: str
    distance_to_data_m: np.ndarray | None = None


def field_extent_m(field) -> tuple[np.ndarray, np.ndarray]:
    """(lower, upper) corners (2,) in m of the region a field describes: the data bounding box
    stored with the model when present, else the inducing points' bounding box."""
    extent = field.data_summary.get("extent_m")
    if isinstance(extent, dict) and "min" in extent and "max" in extent:
        return np.asarray(extent["min"], dtype=np.float64), np.asarray(extent["max"], dtype=np.float64)
    z = np.asarray(field.params.inducing_m)
    return z.min(axis=0), z.max(axis=0)


def east_north_jacobian(frame, points_m: np.ndarray, *, step_m: float = 1.0) -> np.ndarray:
    """J (n, 2, 2) mapping a frame vector (x, y) to ground (east, north) at each point (n, 2) m.

    Column a is the ground displacement (m east, m north) of a ``step_m`` step along frame
    axis a, from the WGS 84 geodesic azimuth and length (pyproj.Geod.inv), divided by the step.
    """
    geod = Geod(ellps="WGS84")
    lon0, lat0 = frame.to_lonlat(points_m)
    jac = np.empty((points_m.shape[0], 2, 2))
    for a in range(2):
        lon1, lat1 = frame.to_lonlat(points_m + step_m * np.eye(2)[a])
        azimuth, _, dist = geod.inv(lon0, lat0, lon1, lat1)
        rad = np.radians(azimuth)
        jac[:, 0, a], jac[:, 1, a] = dist * np.sin(rad) / step_m, dist * np.cos(rad) / step_m
    return jac


def field_grid(field, *, spacing_m: float | None = None, cells_across: int = MAP_CELLS,
               max_nodes: int = 250_000, window: TimeWindow | None = None) -> FieldGrid:
    """Sample a 2-D field on a grid over its extent (:func:`field_extent_m`).

    ``spacing_m`` defaults to the data's own map step (:func:`driftwise.data.datascales.map_spacing_m`:
    the 1-2-5 number nearest the longer side / ``cells_across``, so a 1 m tank gets 1 cm and a 40 km
    bay 500 m); nodes are multiples of the spacing.  Before the derivative posteriors (the costly part)
    a :class:`SupportWarning` says how many nodes lie outside the data support (variance ratio > 0.9)
    and how far the farthest is from the data (``distance_to_data_m``, also kept per node).  Mean and covariance from
    ``field.predict`` (rotated to east/north, mean J m and covariance J Σ Jᵀ, for a lon/lat
    frame); divergence and vorticity from :func:`divergence_posterior` /
    :func:`vorticity_posterior` (exact GP derivatives in the frame's metres).  A time-varying field is taken over a
    ``window`` (:mod:`driftwise.diagnostics.timewindow`: the field at one time, or by default its time mean over the
    data's time span), for the velocity and the derivatives alike; its support mask is taken at the window's time (for
    an average, the middle of the data's time span).
    """
    if field.dim != 2:
        raise InputError(f"gridded export supports 2-D fields; this model is {field.dim}-D")
    lo, hi = field_extent_m(field)
    if spacing_m is None:
        spacing_m = map_spacing_m(max(float(np.max(hi - lo)), 1e-9) * MAP_CELLS / cells_across)
    if not (math.isfinite(spacing_m) and spacing_m > 0.0):
        raise InputError(f"--spacing must be a positive distance, got {spacing_m!r} m")
    counts = [math.ceil(hi[a] / spacing_m) - math.floor(lo[a] / spacing_m) + 1 for a in range(2)]
    if counts[0] * counts[1] > max_nodes:
        raise InputError(f"a {format_length(spacing_m)} grid over the model's {format_length(hi[0] - lo[0])} × "
                         f"{format_length(hi[1] - lo[1])} "
                         f"extent has {counts[0] * counts[1]} nodes (limit {max_nodes}); choose a larger --spacing")
    axes = [(math.floor(lo[a] / spacing_m) + np.arange(counts[a])) * spacing_m for a in range(2)]
    shape = (axes[1].size, axes[0].size)
    gx, gy = np.meshgrid(*axes)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    window = window if field.is_time_varying else None
    if field.is_time_varying:
        window = span_average(field) if window is None else window
        times = np.concatenate([np.ravel(np.asarray(t, np.float64)) for t, part in zip(window.times_s, window.parts)
                                if part in (None, "slow")] + [np.zeros(0)])      # the steady/harmonic terms: t = 0
        if times.size:
            warn_beyond_time_span(field, float(times.min()), float(times.max()), "the map", stacklevel=4)
        mean, cov = window_velocity(field, points, window)
        ratio = field.local_variance_ratio(points, support_time_s(field, window))
    else:
        mean, cov = field.predict(points)
        ratio = field.local_variance_ratio(points)
    distance = field.distance_to_data_m(points)
    _warn_outside(ratio, distance)
    frame, lon, lat, components = field.frame, None, None, ("x", "y")
    if getattr(frame, "kind", "metric") == "lonlat":
        jac = east_north_jacobian(frame, points)
        mean, cov = np.einsum("nab,nb->na", jac, mean), np.einsum("nab,nbc,ndc->nad", jac, cov, jac)
        lon, lat = (v.reshape(shape) for v in frame.to_lonlat(points))
        components = ("eastward", "northward")
    div, vort = (posterior(field, points, window=window) for posterior in (divergence_posterior, vorticity_posterior))
    std = np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))
    return FieldGrid(axes[0], axes[1], components, mean.reshape(*shape, 2), std.reshape(*shape, 2),
                     div.mean.reshape(shape), div.std.reshape(shape), vort.mean.reshape(shape),
                     vort.std.reshape(shape), ratio.reshape(shape), (ratio < SUPPORT_RATIO).reshape(shape),
                     lon, lat, {p.quantity: p.reason for p in (div, vort) if p.reason}, frame, field.kernel_family,
                     distance.reshape(shape))


def _warn_outside(ratio: np.ndarray, distance_m: np.ndarray) -> None:
    outside = ratio > SUPPORT_VARIANCE_FRACTION
    if outside.any():
        warnings.warn(f"{int(outside.sum())} of {outside.size} grid nodes ({100 * outside.mean():.0f} %) lie outside "
                      f"the model's data support (the data leave over {100 * SUPPORT_VARIANCE_FRACTION:.0f} % of the "
                      f"prior velocity variance there), up to {format_length(float(distance_m[outside].max()))} from "
                      "the nearest data: their values are the prior's; the variables variance_ratio, supported and "
                      "distance_to_data_m mark them", SupportWarning, stacklevel=3)


def support_time_s(field, window: TimeWindow) -> float:
    """The time (s on the track file's axis) at which a window's support mask is taken: the time of a window at
    one time (its weighted mean time), the middle of the data's time span for any other window."""
    if window.parts == (None,):
        weights = np.asarray(window.weights[0])
        return float(np.asarray(window.times_s[0]) @ weights / weights.sum())
    start, end = data_span_s(field)
    return 0.5 * (start + end)


def ellipse_grid(field, grid: FieldGrid) -> dict[str, TidalEllipses]:
    """Tidal current ellipses of every constituent of a time-varying ``field`` at the nodes of ``grid``:
    {constituent: TidalEllipses of (n_y · n_x,) values, row-major as the grid}.

    The amplitudes (a_u, a_v, b_u, b_v) and their 4 × 4 posterior covariance come from
    ``field.harmonic_posterior``; in a lon/lat frame both amplitude vectors are rotated to true east/north with
    the same Jacobian J as the velocity (mean (J a, J b), covariance (J ⊕ J) Σ (J ⊕ J)ᵀ), so the inclination is
    counter-clockwise from true east.  Then :func:`~driftwise.diagnostics.tidalellipse.tidal_ellipses`."""
    gx, gy = np.meshgrid(grid.x_m, grid.y_m)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    out = {}
    for name in field.constituents:
        mean, cov = _harmonic_batch(field, points, name)
        if grid.lon_deg is not None:
            jac = east_north_jacobian(grid.frame, points)
            both = np.zeros((points.shape[0], 4, 4))
            both[:, :2, :2], both[:, 2:, 2:] = jac, jac
            mean, cov = np.einsum("nab,nb->na", both, mean), np.einsum("nab,nbc,ndc->nad", both, cov, both)
        out[name] = tidal_ellipses(mean, cov)
    return out


def _harmonic_batch(field, points: np.ndarray, constituent: str) -> tuple[np.ndarray, np.ndarray]:
    """``field.harmonic_posterior`` at every row of ``points`` (n, 2): means (n, 4) and covariances (n, 4, 4)."""
    x = jnp.asarray(padded_rows(points))
    mean, cov = jax.lax.map(lambda p: field.harmonic_posterior(p, constituent), x, batch_size=256)
    n = points.shape[0]
    return np.asarray(mean)[:n], np.asarray(cov)[:n]
