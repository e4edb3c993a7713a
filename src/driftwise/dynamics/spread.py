"""Releases and spread products: covariance ellipses, polygon probability, arrival time.

A release starts at ``start_m`` (metres, local frame) with an optional release
uncertainty ``cov0_m2``.  :func:`spread` propagates every release through the
SDE in one batched call and returns a :class:`Spread`: mean ``m(t)`` and
covariance ``P(t)`` of the Gaussian assumed density at output times measured
from each release's start, plus the products computed from them.

Products
--------
* **Ellipses.**  For a 2-D Gaussian N(m, P) the set ``(x − m)ᵀ P⁻¹ (x − m) ≤ c``
  with ``c = χ²₂⁻¹(level) = −2 ln(1 − level)`` holds probability ``level``
  (the Mahalanobis distance of a bivariate normal is chi-square with 2 degrees
  of freedom).  Semi-axes are ``√(c λᵢ)`` for the eigenvalues ``λᵢ`` of ``P``.
  In 3-D the horizontal (x, y) marginal is used.
* **Probability inside a polygon.**  Whiten, ``w = L⁻¹(x − m)`` with ``P = L Lᵀ``
  (an affine map keeps polygons polygons and, with ``det L > 0``, their
  orientation), so the task is the standard bivariate normal mass of a
  polygon.  That mass is the signed sum over edges ``A → B`` of the mass of the
  triangle ``(0, A, B)`` (the same decomposition as the shoelace formula for
  area; concave polygons are handled by the signs).  Each triangle is split at
  the foot ``F`` of the perpendicular from the origin onto line ``AB``
  (distance ``h``); the right triangle ``(0, F, F + s·t̂)`` has mass

      G(s) = atan(s / h) / 2π − T(h, s / h),

  the wedge of angle ``atan(s/h)`` minus its part beyond the line, which is
  Owen's T function ``T(h, a) = P(X > h, 0 < Y < aX)`` (Owen 1956, "Tables for
  computing bivariate normal probabilities", Ann. Math. Statist. 27, 1075–1090).
  So triangle ``(0, A, B)`` has signed mass ``sign(A × B)·(G(s_B) − G(s_A))``.
  ``scipy.special.owens_t`` evaluates T to double precision, so the result is
  exact up to rounding: absolute error ≈ 1e-15 per edge (tested against a
  closed form, scipy's ``multivariate_normal.cdf`` and Monte Carlo); sums
  below ``ROUNDING_FLOOR`` = 1e-14 are cancellation residue and reported as 0.
  A singular covariance (a release without uncertainty at t = 0) is
  regularised by ``(1e-9 · polygon size)² I``: the probability becomes the
  indicator of the mean being inside (½ exactly on an edge).
* **First arrival.**  The first output time at which that probability reaches a
  threshold (resolution: the output interval).
"""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass, field
from typing import Any

import jax
import numpy as np
import pandas as pd
from scipy.special import owens_t
from scipy.stats import chi2

from ..data.utctime import iso_utc
from ..errors import InputError
from .ensemble import EulerMaruyama, simulate
from .methods import DEFAULT_PARTICLES, make_method, method_name
from .moments import RK4, SphericalCubature, diverged
from .sde import sde_from_field
from .stepcheck import step_for
from .supportcheck import (  # noqa: F401
    SupportWarning,
    path_support,
    warn_beyond_time_span,
    warn_left_support,
    warn_unsupported_releases,
)
from .tabulate import field_or_table_sde, propagate_with_fallback, table_fallbacks

LEVELS = (0.5, 0.9, 0.95)
ROUNDING_FLOOR = 1e-14   # polygon probabilities below this are rounding residue (see module doc)


# ------------------------------------------------------------------ releases
@dataclass(frozen=True, eq=False)
class Release:
    """One release: start position ``start_m (d,)`` in metres (local frame), start time
    ``start_time_s`` (the model's time axis, seconds), optional release uncertainty
    ``cov0_m2 (d, d)`` in m² (default: none, a point release) and a ``name``."""

    start_m: np.ndarray
    start_time_s: float = 0.0
    cov0_m2: np.ndarray | None = None
    name: str = ""

    def __post_init__(self) -> None:
        label = f"release {self.name!r}" if self.name else "release"
        start = np.asarray(self.start_m, dtype=np.float64)
        if start.ndim != 1 or start.size not in (2, 3) or not np.all(np.isfinite(start)):
            raise InputError(f"{label}: start_m must be 2 or 3 finite numbers (metres), got {self.start_m!r}")
        d = start.size
        cov = np.zeros((d, d)) if self.cov0_m2 is None else np.asarray(self.cov0_m2, dtype=np.float64)
        if cov.shape != (d, d) or not np.all(np.isfinite(cov)):
            raise InputError(f"{label}: cov0_m2 must be a finite {d}x{d} matrix, got shape {cov.shape}")
        cov = 0.5 * (cov + cov.T)
        if np.linalg.eigvalsh(cov).min() < -1e-9 * max(1.0, np.abs(cov).max()):
            raise InputError(f"{label}: cov0_m2 is not positive semi-definite")
        if not np.isfinite(float(self.start_time_s)):
            raise InputError(f"{label}: start_time_s must be finite")
        object.__setattr__(self, "start_m", start)
        object.__setattr__(self, "cov0_m2", cov)
        object.__setattr__(self, "start_time_s", float(self.start_time_s))
        object.__setattr__(self, "name", str(self.name))


def as_releases(releases: Any) -> tuple[Release, ...]:
    """A tuple of named :class:`Release` from a Release, a sequence of them, or positions (d,) / (R, d) in metres."""
    if isinstance(releases, Release):
        releases = [releases]
    elif not (isinstance(releases, (list, tuple)) and releases and isinstance(releases[0], Release)):
        starts = np.asarray(releases, dtype=np.float64)
        starts = starts[None] if starts.ndim == 1 else starts
        if starts.ndim != 2 or starts.shape[0] == 0:
            raise InputError(f"releases: give Release objects or an (R, d) array of start positions, got shape {starts.shape}")
        releases = [Release(start) for start in starts]
    out = []
    for i, rel in enumerate(releases):
        if not isinstance(rel, Release):
            raise InputError(f"releases[{i}]: expected a Release, got {type(rel).__name__}")
        out.append(rel if rel.name else dataclasses.replace(rel, name=f"r{i + 1}"))
    dims = {r.start_m.size for r in out}
    if len(dims) != 1:
        raise InputError(f"releases: all releases need the same dimension, got {sorted(dims)}")
    return tuple(out)


def check_times(times_s: Any) -> np.ndarray:
    """Output times (T,) in seconds since each release: finite, strictly increasing, starting at 0."""
    times = np.atleast_1d(np.asarray(times_s, dtype=np.float64))
    if times.ndim != 1 or not np.all(np.isfinite(times)):
        raise InputError("times_s: give a 1-D list of finite times in seconds since the release")
    if times[0] != 0.0 or np.any(np.diff(times) <= 0):
        raise InputError("times_s: must start at 0 (the release) and increase strictly")
    return times


# ------------------------------------------------------------------ result
@dataclass(frozen=True, eq=False)
class Spread:
    """Forecast of R releases at T output times.

    ``times_s (T,)`` seconds since each release's start (``times_s[0] == 0``);
    ``means (R, T, d)`` metres and ``covs (R, T, d, d)`` m² in the model's local frame;
    ``mean_lonlat (R, T, 2)`` degrees when the model's frame is lon/lat;
    ``semi_axes_m (R, T, len(levels), 2)`` (major, minor) and ``orientation_deg (R, T)``
    (major axis, counter-clockwise from local +x/east) of the horizontal ellipses;
    with a polygon: ``polygon_m (k, 2)``, ``probability (R, T)``, and for a threshold
    ``first_arrival_s`` (per release, seconds since its start, or None);
    ``time_origin_utc`` the ISO-8601 UTC instant of ``start_time_s = 0`` when the model knows it;
    for the ensemble its Monte Carlo standard errors ``mean_se_m (R, T, d)`` and ``cov_se_m2 (R, T, d, d)``
    (:class:`driftwise.dynamics.ensemble.EnsembleResult`) and its ``particles``, else None;
    ``support`` (:class:`~driftwise.dynamics.supportcheck.PathSupport`, forecasts from a fitted field) the
    variance ratio, distance to the data and ``outside_support`` flag (R, T) along the mean paths.
    """

    method: str
    releases: tuple[Release, ...]
    times_s: np.ndarray
    means: np.ndarray
    covs: np.ndarray
    frame: Any = None
    mean_lonlat: np.ndarray | None = None
    levels: tuple[float, ...] = LEVELS
    semi_axes_m: np.ndarray = field(default=None)  # type: ignore[assignment]
    orientation_deg: np.ndarray = field(default=None)  # type: ignore[assignment]
    polygon_m: np.ndarray | None = None
    probability: np.ndarray | None = None
    threshold: float | None = None
    first_arrival_s: tuple[float | None, ...] | None = None
    time_origin_utc: str | None = None
    mean_se_m: np.ndarray | None = None
    cov_se_m2: np.ndarray | None = None
    particles: int | None = None
    support: Any = None      # supportcheck.PathSupport along the mean paths (forecasts from a fitted field)

    @property
    def dim(self) -> int:
        """Spatial dimension d."""
        return int(self.means.shape[-1])

    @property
    def bearing_deg(self) -> np.ndarray:
        """Compass bearing (R, T) of the ellipses' major axes in [0, 180): see :func:`bearing_deg`."""
        return bearing_deg(self.orientation_deg, self.means, self.frame)

    @property
    def start_times_utc(self) -> list[str] | None:
        """ISO-8601 UTC start of each release, or None when the model has no time origin."""
        return None if self.time_origin_utc is None else iso_utc(self.time_origin_utc, [r.start_time_s for r in self.releases])

    def times_utc(self, r: int) -> list[str] | None:
        """ISO-8601 UTC of each output time (T,) of release ``r``, or None without a time origin."""
        if self.time_origin_utc is None:
            return None
        return iso_utc(self.time_origin_utc, self.releases[r].start_time_s + np.asarray(self.times_s))

    def ellipses(self, level: float = 0.95, n: int = 72) -> np.ndarray:
        """Ellipse polygons (R, T, n, 2) in metres, counter-clockwise, open rings."""
        return ellipse(self.means, self.covs, level=level, n=n)


def make_spread(method: str, releases: tuple[Release, ...], times_s: np.ndarray, means: np.ndarray,
                covs: np.ndarray, *, frame: Any = None, polygon_m: Any = None,
                threshold: float | None = None, time_origin_utc: str | None = None) -> Spread:
    """Assemble a :class:`Spread` from propagated moments and compute its products.

    ``time_origin_utc``: ISO-8601 UTC of the model's time zero (tracks with absolute times), else None."""
    means, covs = np.asarray(means, np.float64), np.asarray(covs, np.float64)
    covs = 0.5 * (covs + np.swapaxes(covs, -1, -2))
    axes = np.stack([semi_axes(covs, level) for level in LEVELS], axis=-2)
    lonlat = None
    if frame is not None and getattr(frame, "kind", "metric") == "lonlat":
        lon, lat = frame.to_lonlat(means[..., :2].reshape(-1, 2))
        lonlat = np.stack([np.asarray(lon), np.asarray(lat)], -1).reshape(means.shape[:-1] + (2,))
    out = Spread(method, releases, times_s, means, covs, frame, lonlat, LEVELS, axes, orientation_deg(covs),
                 time_origin_utc=time_origin_utc)
    return out if polygon_m is None else with_polygon(out, polygon_m, threshold)


def with_polygon(spread: Spread, polygon_m: Any, threshold: float | None = None) -> Spread:
    """``spread`` with ``probability`` inside ``polygon_m (k, 2)`` (metres) and, for a threshold, first arrivals."""
    polygon = check_polygon(polygon_m)
    prob = probability_inside(spread.means, spread.covs, polygon)
    arrival = None if threshold is None else _first_arrival(spread.times_s, prob, threshold)
    return dataclasses.replace(spread, polygon_m=polygon, probability=prob,
                               threshold=None if threshold is None else float(threshold), first_arrival_s=arrival)


# ------------------------------------------------------------------ propagation

def _moments(sde: Any, releases: tuple[Release, ...], times: np.ndarray, method: Any, integrator: Any,
             key: Any, fallback: Any = None) -> tuple[np.ndarray, np.ndarray, dict[str, Any]]:
    """Means (R, T, d) and covariances (R, T, d, d): one propagate_batch call (non-finite releases rerun
    through the ``fallback`` SDE when given), or one ensemble per release; and for the ensemble its Monte Carlo
    errors (the :class:`Spread` fields mean_se_m, cov_se_m2, particles)."""

    means0 = np.stack([r.start_m for r in releases])
    covs0 = np.stack([r.cov0_m2 for r in releases])
    starts = np.array([r.start_time_s for r in releases])
    if not isinstance(method, EulerMaruyama):
        means, covs = propagate_with_fallback(sde, fallback, means0, covs0, times, method=method,
                                              integrator=integrator or RK4(), start_times_s=starts)
        return means, covs, {}
    if key is None:
        raise InputError("the ensemble method needs an explicit random key (key=jax.random.key(seed))")
    results = [simulate(sde, m0, c0, times, method=method, key=k, start_time_s=t0)
               for m0, c0, t0, k in zip(means0, covs0, starts, jax.random.split(key, len(releases)))]
    errors = {"mean_se_m": np.stack([np.asarray(r.mean_se) for r in results]),
              "cov_se_m2": np.stack([np.asarray(r.cov_se) for r in results]), "particles": int(method.particles)}
    return np.stack([np.asarray(r.mean) for r in results]), np.stack([np.asarray(r.cov) for r in results]), errors


def spread_releases(sde: Any, releases: Any, times_s: Any, *, method: Any = None, integrator: Any = None,
           key: Any = None, frame: Any = None, polygon_m: Any = None, threshold: float | None = None,
           time_origin_utc: str | None = None, fallback_sde: Any = None) -> Spread:
    """Forecast releases through an Itô SDE (driftwise.dynamics.sde.SDE).

    ``releases``: Release(s) or start positions (d,)/(R, d) in metres; ``times_s (T,)`` seconds since each
    release, from 0.  ``method``: a moments strategy (default SphericalCubature(), Arasaratnam & Haykin 2009;
    also Unscented, GaussHermite, Linearize), integrated by ``integrator`` (default RK4(step_s=600)) in one
    batched ``moments.propagate_batch`` call, or ``ensemble.EulerMaruyama(...)`` (then ``key`` is required).
    ``frame`` (tracks.Frame) adds ``mean_lonlat``; ``polygon_m (k, 2)`` adds probabilities and, with a
    ``threshold``, first arrivals; ``time_origin_utc`` (ISO-8601 UTC of the time axis' zero) adds absolute
    times to the outputs.  Each release starts at its ``start_time_s`` (absolute, the model's time axis):
    a time-dependent SDE (``sde.with_time``) is integrated from there (t = start + time since release);
    for a steady SDE the start times only label the outputs.  ``fallback_sde``: for
    moment methods, releases whose moments come out non-finite (e.g. they left a tabulated field's grid) are
    recomputed through it.
    """

    method = SphericalCubature() if method is None else method
    name = method_name(method)
    rels, times = as_releases(releases), check_times(times_s)
    means, covs, errors = _moments(sde, rels, times, method, integrator, key, fallback_sde)
    if diverged(means, covs):
        raise InputError(f"the {name} forecast produced non-finite numbers or a covariance that is not positive "
                         "semi-definite (the integration diverged); use a smaller step")
    spread = make_spread(name, rels, times, means, covs, frame=frame, polygon_m=polygon_m, threshold=threshold,
                         time_origin_utc=time_origin_utc)
    return dataclasses.replace(spread, **errors)




def spread_from_field(field: Any, releases: Any, times_s: Any, *, method: str = "cubature",
                      particles: int = DEFAULT_PARTICLES, step_s: float | None = None,
                      diffusivity_m2_s: float | None = None, decorrelation_time_s: float | None = None,
                      seed: int = 0, gauss_hermite_order: int = 3, polygon_m: Any = None,
                      threshold: float | None = None, posterior: str = "auto") -> Spread:
    """Forecast releases in a fitted FlowField: SDE μ = posterior mean, D = 2(K I + τ(1 − e^{−a/τ}) Σ) at release age a (sde.sde_from_field).
    A time-varying field (``field.is_time_varying``) gives μ(x, t), Σ(x, t) at absolute time t = release start + age.

    ``method`` is a name in :data:`driftwise.dynamics.methods.METHODS` ("cubature" default); ``step_s`` the RK4 step (default
    :func:`driftwise.dynamics.stepcheck.moment_step_s`: 600 s, or a quarter of the flow's time scale, or RK4's
    stability bound for the field when shorter; a longer step given is warned) or the
    Euler–Maruyama step (default :func:`driftwise.dynamics.methods.default_ensemble_step_s`: 5 min, or a 20th of
    the flow's time scale when shorter) for ``"ensemble"`` with ``particles``; K and τ default to the
    model's own; ``seed`` seeds the ensemble; the model's ``time_origin_utc`` (data summary; absent in
    model files from before it was recorded) gives the outputs absolute times.  Other arguments as in
    :func:`spread_releases`.  ``posterior``: "exact" evaluates the posterior at every point
    (sde.PointPosterior); "table" interpolates it from a grid (tabulate.tabulate_field over
    tabulate.table_region, error ≤ tabulate.TABLE_TOLERANCE; releases leaving the grid are rerun exactly); "auto"
    (default) tabulates for moment methods when releases × RK4 steps ≥ tabulate.TABLE_RELEASE_STEPS.
    """

    rels = as_releases(releases)
    sde = sde_from_field(field, diffusivity_m2_s=diffusivity_m2_s, decorrelation_time_s=decorrelation_time_s)
    step_s = step_for(field, sde, method, step_s, longest_s=600.0, start_times_s=[r.start_time_s for r in rels],
                      horizon_s=float(np.max(times_s)))
    obj, integrator = make_method(method, particles=particles, step_s=step_s, gauss_hermite_order=gauss_hermite_order)
    dim = int(getattr(field, "dim", rels[0].start_m.size))
    if rels[0].start_m.size != dim:
        raise InputError(f"releases have {rels[0].start_m.size} coordinates but the model is {dim}-D")
    warn_unsupported_releases(field, rels)
    starts = [r.start_time_s for r in rels]
    warn_beyond_time_span(field, min(starts), max(starts) + float(np.max(times_s)))
    starts_m, start_times = np.stack([r.start_m for r in rels]), [r.start_time_s for r in rels]
    table_sde = field_or_table_sde(field, sde, starts_m, len(rels), check_times(times_s),
                                   None if isinstance(obj, EulerMaruyama) else integrator, posterior, start_times)
    summary = getattr(field, "data_summary", None) or {}
    out = spread_releases(sde if table_sde is None else table_sde, rels, times_s, method=obj, integrator=integrator,
                          key=jax.random.key(int(seed)), frame=getattr(field, "frame", None), polygon_m=polygon_m,
                          threshold=threshold, time_origin_utc=summary.get("time_origin_utc"),
                          fallback_sde=table_fallbacks(field, sde, table_sde, starts_m, check_times(times_s),
                                                       start_times))
    support = path_support(field, out.means, np.array([r.start_time_s for r in rels])[:, None] + out.times_s[None, :]
                           if sde.with_time else None)
    warn_left_support([r.name for r in rels], out.times_s, support)
    return dataclasses.replace(out, support=support)


# ------------------------------------------------------------------ ellipses
def _horizontal(mean: Any, cov: Any) -> tuple[np.ndarray, np.ndarray]:
    mean, cov = np.asarray(mean, np.float64), np.asarray(cov, np.float64)
    if mean.shape[-1] < 2 or cov.shape[-2:] != (mean.shape[-1],) * 2:
        raise InputError(f"mean (..., d) and cov (..., d, d) with d >= 2 expected, got {mean.shape} and {cov.shape}")
    return mean[..., :2], cov[..., :2, :2]


def _eig2(cov: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Closed-form eigen-decomposition of symmetric 2x2 blocks: (λ_major, λ_minor, angle_rad of the major axis)."""
    a, b, d = cov[..., 0, 0], 0.5 * (cov[..., 0, 1] + cov[..., 1, 0]), cov[..., 1, 1]
    centre, radius = 0.5 * (a + d), np.hypot(0.5 * (a - d), b)
    return centre + radius, np.maximum(centre - radius, 0.0), 0.5 * np.arctan2(2.0 * b, a - d)


def chi2_radius2(level: float) -> float:
    """c with P(χ²₂ ≤ c) = level (scipy.stats.chi2.ppf(level, 2) = −2 ln(1 − level))."""
    if not 0.0 < float(level) < 1.0:
        raise InputError(f"ellipse level must be strictly between 0 and 1, got {level}")
    return float(chi2.ppf(level, 2))


def semi_axes(cov: Any, level: float = 0.95) -> np.ndarray:
    """Semi-axes (..., 2) = (major, minor) in metres of the ``level`` ellipse of the (x, y) marginal of ``cov``."""
    cov = np.asarray(cov, np.float64)[..., :2, :2]
    major, minor, _ = _eig2(cov)
    return np.sqrt(chi2_radius2(level) * np.stack([major, minor], -1))


def orientation_deg(cov: Any) -> np.ndarray:
    """Angle (...) in degrees of the major axis, counter-clockwise from +x (east), in (−90, 90]."""
    return np.degrees(_eig2(np.asarray(cov, np.float64)[..., :2, :2])[2])


def bearing_deg(angle_ccw_deg: Any, mean: Any, frame: Any = None) -> np.ndarray:
    """Compass bearing in [0, 180) degrees clockwise from north (an axis: θ ≡ θ + 180°) of axes at
    ``angle_ccw_deg (...)`` from local +x through points ``mean (..., d)`` m.  Metric frame: 90° − angle
    (from local +y); lon/lat frame: geodesic azimuth (pyproj.Geod.inv, WGS 84) to the point 1 m along the
    axis, which removes the AEQD grid convergence off the frame centre (true north)."""
    angle = np.asarray(angle_ccw_deg, np.float64)
    if frame is None or getattr(frame, "kind", "metric") != "lonlat":
        return np.mod(90.0 - angle, 180.0)
    from pyproj import Geod

    p = np.asarray(mean, np.float64)[..., :2].reshape(-1, 2)
    step = np.stack([np.cos(np.radians(angle)), np.sin(np.radians(angle))], -1).reshape(-1, 2)
    lon0, lat0 = frame.to_lonlat(p)
    lon1, lat1 = frame.to_lonlat(p + step)
    azimuth, _, _ = Geod(ellps="WGS84").inv(np.asarray(lon0), np.asarray(lat0), np.asarray(lon1), np.asarray(lat1))
    return np.mod(np.asarray(azimuth), 180.0).reshape(angle.shape)


def ellipse(mean: Any, cov: Any, level: float = 0.95, n: int = 72) -> np.ndarray:
    """Polygon (..., n, 2) of the ``level`` ellipse of N(mean, cov), horizontal marginal in 3-D.

    Vertices ``m + √c·R·diag(√λ)·(cos t, sin t)`` at ``t = 2πk/n``: counter-clockwise, lying on
    the ellipse, ring not closed.  Shapes: mean (..., d), cov (..., d, d), metres.
    """
    m, p = _horizontal(mean, cov)
    major, minor, angle = _eig2(p)
    t = 2.0 * np.pi * np.arange(int(n)) / int(n)
    r = np.sqrt(chi2_radius2(level))
    u = r * np.sqrt(major)[..., None] * np.cos(t)
    v = r * np.sqrt(minor)[..., None] * np.sin(t)
    c, s = np.cos(angle)[..., None], np.sin(angle)[..., None]
    return np.stack([m[..., 0, None] + c * u - s * v, m[..., 1, None] + s * u + c * v], -1)


# ------------------------------------------------------------------ polygon probability
def check_polygon(polygon: Any, *, what: str = "polygon") -> np.ndarray:
    """Vertices (k, 2) of a simple polygon in metres: finite, ≥ 3 distinct, non-zero area; a closing vertex is dropped."""
    poly = np.asarray(polygon, dtype=np.float64)
    if poly.ndim != 2 or poly.shape[1] != 2 or not np.all(np.isfinite(poly)):
        raise InputError(f"{what}: need a (k, 2) array of finite x, y vertices, got shape {poly.shape}")
    if len(poly) > 1 and np.all(poly[0] == poly[-1]):
        poly = poly[:-1]
    if len(poly) < 3:
        raise InputError(f"{what}: need at least 3 distinct vertices, got {len(poly)}")
    size = np.ptp(poly, axis=0).max()
    if abs(signed_area(poly)) <= 1e-12 * size**2:
        raise InputError(f"{what}: the vertices enclose no area")
    return poly


def signed_area(polygon: np.ndarray) -> float:
    """Shoelace area (positive for counter-clockwise vertices), units of the coordinates squared."""
    x, y = polygon[:, 0], polygon[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def _edge_mass(ax: np.ndarray, ay: np.ndarray, bx: np.ndarray, by: np.ndarray) -> np.ndarray:
    """Signed standard-normal mass of triangles (0, a, b); a = (ax, ay), b = (bx, by) whitened vertices (...).

    sign(a × b)·(G(s_b) − G(s_a)), G(s) = atan(s/h)/2π − T(h, s/h) (Owen 1956; see module doc).  The two
    arctangents are taken as one, atan(s_b/h) − atan(s_a/h) = atan2(h (s_b − s_a), h² + s_a s_b) (the tangent
    subtraction formula; both angles lie in (−π/2, π/2), so their difference in (−π, π) and the cosine of it has
    the sign of h² + s_a s_b).
    """
    dx, dy = bx - ax, by - ay
    length = np.hypot(dx, dy)
    cross = ax * dy - ay * dx
    ok = (length > 0) & (cross != 0)
    length = np.where(ok, length, 1.0)
    h = np.where(ok, np.abs(cross) / length, 1.0)
    s_a = (ax * dx + ay * dy) / length
    s_b = (bx * dx + by * dy) / length
    angle = np.arctan2(h * (s_b - s_a), h * h + s_a * s_b) / (2.0 * np.pi)
    return np.where(ok, np.sign(cross) * (angle - owens_t(h, s_b / h) + owens_t(h, s_a / h)), 0.0)


def probability_inside(mean: Any, cov: Any, polygon: Any) -> np.ndarray:
    """P(x ∈ polygon) for x ~ N(mean, cov): shape (...) for mean (..., d), cov (..., d, d), polygon (k, 2).

    Exact up to rounding (Owen's T decomposition, see the module doc); concave polygons
    are fine; in 3-D the horizontal (x, y) marginal is used.  Units: metres.
    """
    poly = check_polygon(polygon)
    m, p = _horizontal(mean, cov)
    return polygon_mass(m, p, poly, np.sign(signed_area(poly)), np.ptp(poly, axis=0).max())


def polygon_mass(mean: np.ndarray, cov: np.ndarray, vertices: np.ndarray, orientation: Any, size_m: Any) -> np.ndarray:
    """:func:`probability_inside` of checked polygons: horizontal ``mean (..., 2)``, ``cov (..., 2, 2)`` against
    ``vertices (..., k, 2)`` (broadcast; a polygon padded by repeating a vertex adds zero-length edges, which
    carry no mass), ``orientation (...)`` the sign of each polygon's signed area and ``size_m (...)`` its largest
    side of the bounding box (sets the regularisation of a singular covariance).  Shape: the broadcast (...)."""
    eps = (1e-9 * np.asarray(size_m, np.float64)) ** 2
    a, b, d = cov[..., 0, 0] + eps, 0.5 * (cov[..., 0, 1] + cov[..., 1, 0]), cov[..., 1, 1] + eps
    if np.any(a * d - b * b < -1e-9 * np.maximum(a * d, eps * eps)) or np.any(a <= 0) or np.any(d <= 0):
        raise InputError("probability_inside: cov is not positive semi-definite")
    l11 = np.sqrt(a)
    l21 = b / l11
    l22 = np.sqrt(np.maximum(d - l21**2, eps))
    w0 = (vertices[..., 0] - mean[..., 0, None]) / l11[..., None]                       # (..., k) whitened
    w1 = (vertices[..., 1] - mean[..., 1, None] - l21[..., None] * w0) / l22[..., None]
    total = np.sum(_edge_mass(w0, w1, np.roll(w0, -1, axis=-1), np.roll(w1, -1, axis=-1)), -1) * orientation
    return np.where(total < ROUNDING_FLOOR, 0.0, np.minimum(total, 1.0))


def _first_arrival(times_s: np.ndarray, prob: np.ndarray, threshold: float) -> tuple[float | None, ...]:
    if not 0.0 < float(threshold) <= 1.0:
        raise InputError(f"threshold must be in (0, 1], got {threshold}")
    reached = prob >= float(threshold)
    return tuple(float(times_s[np.argmax(row)]) if row.any() else None for row in reached)


def first_arrival_time(spread: Spread, polygon: Any, threshold: float) -> tuple[float | None, ...]:
    """Per release, the first output time (seconds since its start) at which P(inside polygon) ≥ threshold, else None."""
    return _first_arrival(spread.times_s, probability_inside(spread.means, spread.covs, polygon), threshold)


# ------------------------------------------------------------------ inputs: release and polygon files
def _columns(table: Any) -> dict[str, str]:
    return {str(c).strip().lstrip("\ufeff").lower(): c for c in table.columns}


def _start_times_s(values: Any, path: str, column: str) -> np.ndarray:
    """Seconds (numbers, the model's time axis) or ISO-8601 (→ seconds since 1970-01-01 UTC; no zone = UTC)."""
    numbers = pd.to_numeric(values, errors="coerce")
    if not numbers.isna().any():
        return numbers.to_numpy(np.float64)
    stamps = pd.to_datetime(values.astype(str), format="ISO8601", utc=True, errors="coerce")
    bad = np.flatnonzero(stamps.isna().to_numpy())
    if bad.size:
        raise InputError(f"{path}: row {bad[0] + 2}, column {column!r}: cannot read {values.iloc[bad[0]]!r} "
                         "as seconds or an ISO-8601 time")
    micro = stamps.dt.as_unit("us").astype("int64").to_numpy()
    return micro / 1e6


def _xy_from_table(table: Any, path: str, frame: Any) -> np.ndarray:
    """Positions (n, 2) in metres from x, y (local metres) or lon, lat (degrees) columns."""
    cols = _columns(table)
    keys = ("x", "y") if {"x", "y"} <= cols.keys() else ("x_m", "y_m") if {"x_m", "y_m"} <= cols.keys() \
        else ("lon", "lat") if {"lon", "lat"} <= cols.keys() else None
    if keys is None:
        raise InputError(f"{path}: needs columns x,y (metres) or lon,lat (degrees); the columns are "
                         f"{', '.join(map(str, table.columns)) or 'none'}")
    values = np.stack([_numbers(table[cols[k]], path, k) for k in keys], -1)
    if keys[0] != "lon":
        return values
    if frame is None or getattr(frame, "kind", "metric") != "lonlat":
        raise InputError(f"{path}: gives lon,lat but the model was fitted in a local metric frame; give x,y in metres")
    bad = np.flatnonzero((np.abs(values[:, 0]) > 360) | (np.abs(values[:, 1]) > 90))
    if bad.size:
        raise InputError(f"{path}: row {bad[0] + 2}: ({values[bad[0], 0]}, {values[bad[0], 1]}) is not a lon, lat in degrees")
    return frame.from_lonlat(values[:, 0], values[:, 1])


def _numbers(series: Any, path: str, column: str) -> np.ndarray:
    values = pd.to_numeric(series, errors="coerce").to_numpy(np.float64)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        raise InputError(f"{path}: row {bad[0] + 2}, column {column!r}: {series.iloc[bad[0]]!r} is not a finite number")
    return values


def read_releases(path: Any, *, frame: Any = None, dim: int = 2) -> tuple[Release, ...]:
    """Releases from a CSV: x,y[,z] (metres) or lon,lat[,z] (degrees; a lon/lat model's frame) columns and
    optional ``start_time`` (seconds, or ISO-8601 → seconds since 1970 UTC), ``name`` and ``sd_m`` (isotropic
    release standard deviation, metres).  Rows are numbered as a spreadsheet shows them (header = row 1)."""
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False)
    except (OSError, ValueError, pd.errors.ParserError) as err:
        raise InputError(f"{path}: cannot read the releases file ({err})") from None
    if table.empty:
        raise InputError(f"{path}: has no release rows")
    cols = _columns(table)
    xy = _xy_from_table(table, str(path), frame)
    z_key = next((k for k in ("z", "z_m") if k in cols), None)
    if (z_key is not None) != (dim == 3):
        raise InputError(f"{path}: the model is {dim}-D, so the file needs {'a z column' if dim == 3 else 'no z column'}")
    starts = xy if z_key is None else np.column_stack([xy, _numbers(table[cols[z_key]], str(path), z_key)])
    t0 = _start_times_s(table[cols["start_time"]], str(path), "start_time") if "start_time" in cols else np.zeros(len(table))
    sd = _numbers(table[cols["sd_m"]], str(path), "sd_m") if "sd_m" in cols else np.zeros(len(table))
    if np.any(sd < 0):
        raise InputError(f"{path}: row {int(np.argmax(sd < 0)) + 2}, column 'sd_m': must be >= 0")
    names = table[cols["name"]].astype(str).tolist() if "name" in cols else [""] * len(table)
    return as_releases([Release(s, t, (v**2) * np.eye(dim), n) for s, t, v, n in zip(starts, t0, sd, names)])


def read_polygon(path: Any, *, frame: Any = None) -> np.ndarray:
    """Polygon vertices (k, 2) in metres from GeoJSON (the first Polygon's exterior ring, lon/lat, needs a
    lon/lat model) or CSV (x,y metres or lon,lat degrees columns, one vertex per row)."""
    text_path = str(path)
    if text_path.lower().endswith((".geojson", ".json")):
        try:
            with open(path, encoding="utf-8") as handle:
                data = json.load(handle)
        except (OSError, ValueError) as err:
            raise InputError(f"{path}: cannot read the polygon file ({err})") from None
        ring = _first_polygon_ring(data, text_path)
        table = pd.DataFrame({"lon": ring[:, 0], "lat": ring[:, 1]})
    else:
        try:
            table = pd.read_csv(path, dtype=str, keep_default_na=False)
        except (OSError, ValueError, pd.errors.ParserError) as err:
            raise InputError(f"{path}: cannot read the polygon file ({err})") from None
    return check_polygon(_xy_from_table(table, text_path, frame), what=text_path)


def _first_polygon_ring(data: Any, path: str) -> np.ndarray:
    """Exterior ring (k, 2) of the first Polygon in a GeoJSON object (FeatureCollection, Feature or geometry)."""
    stack = [data]
    while stack:
        item = stack.pop(0)
        if not isinstance(item, dict):
            continue
        if item.get("type") == "Polygon":
            try:
                ring = np.asarray(item["coordinates"][0], dtype=np.float64)
            except (KeyError, IndexError, TypeError, ValueError):
                raise InputError(f"{path}: the Polygon has no readable exterior ring") from None
            if ring.ndim != 2 or ring.shape[1] < 2:
                raise InputError(f"{path}: the Polygon's exterior ring must be a list of [lon, lat] positions")
            return ring[:, :2]
        stack += item.get("features", []) + [item.get("geometry")]
    raise InputError(f"{path}: contains no GeoJSON Polygon")

