"""Connectivity between sites: of the material released uniformly in site i, the share inside site j at time t.

Moment method (the default).  Site i is seeded with N releases (``sites.seed_site``: scrambled Sobol points
inside the polygon, each with the covariance (A_i / (12 N)) I of its share of the area).  Each release is
propagated by the Gaussian moment equations (``moments.propagate_batch``; Jazwinski 1970) to N(m_r(t), P_r(t)),
and

    P[i, j, t] = (1/N) Σ_{r ∈ i} Pr(x ∈ polygon_j | x ~ N(m_r(t), P_r(t))),

the exact Gaussian polygon mass of ``spread.probability_inside`` (Owen's T decomposition), averaged over the
releases: the material of site i is the equal-weight Gaussian mixture of its releases.  The first time
P[i, j, t] reaches a threshold is read off the output times.  The share that has left the model's support
at t is the share of releases whose mean lies where the data leave more than 90 % of the prior velocity
variance (``FlowField.local_variance_ratio``; ``supportcheck.SUPPORT_VARIANCE_FRACTION``).

Ensemble method (``--method ensemble``, the Monte Carlo cross-check).  Particles start uniformly inside each
source site (rejection from a seeded uniform draw), follow the same SDE by Euler–Maruyama
(``ensemble.particle_paths``; Kloeden & Platen 1992) and P[i, j, t] is the share inside polygon j, with the
binomial standard error √(P (1 − P) / n).

The posterior that gives the SDE is a parameter (:func:`field_transport`): the exact
``sde.PointPosterior`` by default, or any object with ``mean_at``/``cov_at`` (e.g. a tabulated field); a
time-varying field gives its time SDE (or a tabulate.TimedTable of it), and every site releases at
``start_time_s`` (s on the model's axis), which the moments, the particles and the data-support share all see.
Releases go in batches, so memory is bounded by one batch (:func:`connect_memory_bytes` estimates it).
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import numpy as np

from ..errors import InputError
from .ensemble import particle_paths
from .methods import METHODS, make_method, method_name
from .moments import diverged
from .sde import PointPosterior, join_from_jit, sde_from_field, split_for_jit, transport_sde
from .sites import Site, cell_covariance_m2, inside_polygon, seed_site
from .spread import check_times, polygon_mass, signed_area
from .stepcheck import moment_step_s
from .supportcheck import SUPPORT_VARIANCE_FRACTION
from .supporttable import support_table
from .tabulate import FallbackTally, field_or_table_sde, propagate_with_fallback, table_fallbacks, table_region

__all__ = ["Connectivity", "connect", "connect_ensemble", "connect_from_field", "field_transport",
           "first_passage_s", "connect_memory_bytes"]

DEFAULT_THRESHOLD = 0.01
BATCH = 512                       # releases propagated and scored at once (bounds memory)
SCORE_CHUNK = 8192                # release-times scored at once
CULL_SD = 9.0                     # a site farther than this many s.d. (per axis) from a release's mean scores 0
ENSEMBLE_BATCH = 4096             # particles simulated at once
SUPPORT_CHUNK = 2048              # points per data-support evaluation (each holds an (M·d)-wide row)


@dataclass(frozen=True, eq=False)
class Connectivity:
    """Connectivity matrix of S sites at T output times.

    ``probability (S, S, T)``: [source, destination, time]; ``standard_error (S, S, T)`` for the ensemble,
    else None; ``first_passage_s (S, S)`` seconds since the release at which the probability first reaches
    ``threshold`` (NaN: never within the horizon); ``outside_support (S, T)`` share of the source's material
    outside the model's data support; ``centroid_m (S, T, 2)`` mean position of each source's material;
    ``per_site`` releases (or particles) per source; ``start_time_s`` on the model's time axis; ``step_s`` the
    RK4 (or Euler–Maruyama) step used (s; set by :func:`connect_from_field`).
    """

    sites: tuple[Site, ...]
    times_s: np.ndarray
    probability: np.ndarray
    first_passage_s: np.ndarray
    threshold: float
    outside_support: np.ndarray | None
    centroid_m: np.ndarray
    method: str
    per_site: int
    start_time_s: float = 0.0
    standard_error: np.ndarray | None = None
    frame: Any = None
    time_origin_utc: str | None = None
    step_s: float | None = None

    @property
    def names(self) -> list[str]:
        return [s.name for s in self.sites]


def first_passage_s(times_s: np.ndarray, probability: np.ndarray, threshold: float) -> np.ndarray:
    """First time (...) at which ``probability (..., T)`` ≥ threshold, NaN when never."""
    if not 0.0 < float(threshold) <= 1.0:
        raise InputError(f"threshold must be a probability in (0, 1], got {threshold}")
    reached = np.asarray(probability) >= float(threshold)
    return np.where(reached.any(-1), np.asarray(times_s)[np.argmax(reached, -1)], np.nan)


def field_transport(field: Any, *, posterior: Any = None, diffusivity_m2_s: float | None = None,
                    decorrelation_time_s: float | None = None) -> Any:
    """The field's SDE (sde.field_sde) through ``posterior`` (default ``PointPosterior.from_field(field)``); a
    time-varying field gives its time SDE (sde.sde_from_field, ``with_time``).

    K (m²/s) and τ (s) default to the field's own (τ = 0 when uncalibrated); negative or non-finite: InputError.
    """
    k = field.diffusivity_m2_s if diffusivity_m2_s is None else diffusivity_m2_s
    tau = field.decorrelation_time_s if decorrelation_time_s is None else decorrelation_time_s
    for name, value in (("diffusivity", k), ("decorrelation time", 0.0 if tau is None else tau)):
        if not (np.isfinite(float(value)) and float(value) >= 0):
            raise InputError(f"the {name} must be a finite number >= 0, got {value!r}")
    if posterior is None and getattr(field, "is_time_varying", False):
        return sde_from_field(field, diffusivity_m2_s=k, decorrelation_time_s=0.0 if tau is None else tau)
    posterior = PointPosterior.from_field(field) if posterior is None else posterior
    return transport_sde(posterior, float(k), 0.0 if tau is None else float(tau))


def connect_memory_bytes(n_sites: int, n_times: int, per_site: int, max_vertices: int, *,
                         ensemble: bool = False) -> int:
    """Estimated peak bytes beyond the loaded model: the (S, S, T) results (a few copies) and the working set.
    Moments: two batches alive at once (one propagated while the other is scored), each BATCH releases × T ×
    (6 + 2 S) float64 (means, covariances, the per-site scores and their transpose), plus one scoring chunk of
    SCORE_CHUNK release-times × S sites × (4 + 10 k) (bounds, whitened vertices and the Owen-T temporaries over
    k vertices); ensemble: ENSEMBLE_BATCH particles × T × (2 + S) (positions, inside flags) × 3 for copies."""
    results = 4 * n_sites * n_sites * n_times * 8 + n_sites * n_times * 24
    if ensemble:
        return int(results + min(ENSEMBLE_BATCH, per_site) * n_times * (2 + n_sites) * 8 * 3)
    batch = min(BATCH, n_sites * per_site)
    scoring = min(SCORE_CHUNK, batch * n_times) * n_sites * (4 + 10 * max_vertices) * 8
    return int(results + 2 * batch * n_times * (6 + 2 * n_sites) * 8 + scoring)


def _seed_all(sites: tuple[Site, ...], per_site: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Start points (S·N, 2), covariances (S·N, 2, 2) and source index (S·N,) of every release."""
    points = [seed_site(s, per_site, seed=seed + i) for i, s in enumerate(sites)]
    covs = [np.broadcast_to(cell_covariance_m2(s.area_m2, per_site), (per_site, 2, 2)) for s in sites]
    return np.concatenate(points), np.concatenate(covs), np.repeat(np.arange(len(sites)), per_site)


def _score_batch(means: np.ndarray, covs: np.ndarray, sites: tuple[Site, ...]) -> np.ndarray:
    """Probabilities (B, S, T) of releases (B, T) being inside each site.

    Only (release, time, site) triples whose mean lies within CULL_SD standard deviations of the site's bounding
    box on both axes are scored exactly (spread.polygon_mass, site by site over chunks of SCORE_CHUNK
    release-times); for the others P(inside) ≤ P(|x_a − m_a| > CULL_SD σ_a) = 2 Φ(−CULL_SD) ≈ 2·10⁻¹⁹ on an axis
    a where the box is that far, below spread.ROUNDING_FLOOR, i.e. the value probability_inside returns (0)."""
    lo = np.stack([s.polygon_m.min(0) for s in sites])
    hi = np.stack([s.polygon_m.max(0) for s in sites])
    shape = [(np.sign(signed_area(s.polygon_m)), np.ptp(s.polygon_m, axis=0).max()) for s in sites]
    m, p = means[..., :2].reshape(-1, 2), covs[..., :2, :2].reshape(-1, 2, 2)
    sd = np.sqrt(np.maximum(np.diagonal(p, axis1=-2, axis2=-1), 0.0))
    out = np.zeros((len(m), len(sites)))
    for c in range(0, len(m), SCORE_CHUNK):                 # bounds the (rows, S) temporaries
        rows = slice(c, c + SCORE_CHUNK)
        gap = np.maximum(lo - m[rows, None, :], m[rows, None, :] - hi)          # (n, S, 2); > 0: outside on that axis
        near = np.all(gap <= CULL_SD * sd[rows, None, :], axis=-1)                # (n, S)
        for j in np.flatnonzero(near.any(0)):
            r = c + np.flatnonzero(near[:, j])
            out[r, j] = polygon_mass(m[r], p[r], sites[j].polygon_m, *shape[j])
    return np.moveaxis(out.reshape(means.shape[:-1] + (len(sites),)), -1, 1)


def _outside(support: Callable | None, means: np.ndarray, times_s: np.ndarray) -> np.ndarray | None:
    """1 where the variance ratio at ``means (B, T, 2)`` at absolute ``times_s (T,)`` s exceeds the support fraction,
    in chunks of SUPPORT_CHUNK."""
    if support is None:
        return None
    flat = means.reshape(-1, means.shape[-1])
    when = np.broadcast_to(np.asarray(times_s, np.float64), means.shape[:-1]).reshape(-1)
    ratio = np.concatenate([np.asarray(support(flat[i:i + SUPPORT_CHUNK], when[i:i + SUPPORT_CHUNK]))
                            for i in range(0, len(flat), SUPPORT_CHUNK)])
    return (ratio.reshape(means.shape[:-1]) > SUPPORT_VARIANCE_FRACTION).astype(np.float64)


def _cores() -> int:
    """CPU cores this process may use (scoring threads)."""
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def _scored(means: np.ndarray, covs: np.ndarray, sites: tuple[Site, ...], support: Callable | None,
            times_s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """(probabilities inside each site (B, S, T), means (B, T, d), outside-support flags (B, T) or None) of a batch."""
    return _score_batch(means, covs, sites), means, _outside(support, means, times_s)


def connect(sde: Any, sites: tuple[Site, ...], times_s: Any, *, per_site: int = 64, method: Any = None,
            integrator: Any = None, seed: int = 0, threshold: float = DEFAULT_THRESHOLD,
            support: Callable | None = None, progress: Callable[[int], None] | None = None,
            batch: int = BATCH, fallback_sde: Any = None, start_time_s: float = 0.0) -> Connectivity:
    """Connectivity by moment propagation (module doc).  ``sde``: sde.SDE; ``sites``: Site tuple;
    ``times_s (T,)`` s since the release at ``start_time_s`` (s on the model's axis; seen by a time-dependent
    SDE), from 0; ``method`` a moments strategy (default cubature) with ``integrator`` (default RK4(600 s));
    ``support``: (points (n, 2) m, absolute times (n,) s) → variance ratio (n,) or None;
    ``progress(n)`` is called after each batch with the releases done; ``fallback_sde``: releases whose moments
    come out non-finite (they left a tabulated field's grid) are recomputed through it."""
    obj, default_rk4 = make_method("cubature")
    method = obj if method is None else method
    times = check_times(times_s)
    points, covs0, source = _seed_all(sites, per_site, seed)
    n_sites, n_times = len(sites), len(times)
    total = np.zeros((n_sites, n_sites, n_times))
    outside = np.zeros((n_sites, n_times)) if support is not None else None
    centroid = np.zeros((n_sites, n_times, 2))
    tally = FallbackTally()

    def add(sl: slice, parts: list[Any]) -> None:
        inside, means, flags = (None if p[0] is None else np.concatenate(p) for p in zip(*(f.result() for f in parts)))
        np.add.at(total, source[sl], inside)
        np.add.at(centroid, source[sl], means[..., :2])
        if flags is not None:
            np.add.at(outside, source[sl], flags)
        if progress is not None:
            progress(len(means))

    workers = _cores()
    overlap = jax.local_device_count() < workers     # a core left over: score batch k while k + 1 propagates
    with ThreadPoolExecutor(max_workers=workers) as scorer:
        pending: tuple[slice, list[Any]] | None = None
        for lo in range(0, len(points), batch):
            sl = slice(lo, lo + batch)
            means, covs = propagate_with_fallback(sde, fallback_sde, points[sl], covs0[sl], times, method=method,
                                                  integrator=integrator or default_rk4, chunk=min(batch, 256),
                                                  start_times_s=start_time_s, tally=tally)
            if diverged(means, covs):
                raise InputError("the connectivity forecast produced non-finite numbers or a covariance that is not "
                                 "positive semi-definite (the integration diverged); use a smaller --step")
            if pending is not None:
                add(*pending)
            rows = np.array_split(np.arange(len(means)), workers)
            pending = (sl, [scorer.submit(_scored, means[r], covs[r], sites, support, start_time_s + times)
                            for r in rows if len(r)])
            if not overlap:
                add(*pending)
                pending = None
        if pending is not None:
            add(*pending)
    tally.warn()
    prob = np.clip(total / per_site, 0.0, 1.0)
    return Connectivity(tuple(sites), times, prob, first_passage_s(times, prob, threshold), float(threshold),
                        None if outside is None else outside / per_site, centroid / per_site,
                        method_name(method), int(per_site))


@partial(jax.jit, static_argnames=("static",))
def _paths_jit(dynamic, static, x0, times_s, step_s, key, start_s):
    return particle_paths(join_from_jit(dynamic, static), x0, times_s, step_s, key, start_s)


def _uniform_in(site: Site, n: int, rng: np.random.Generator) -> np.ndarray:
    """n points (n, 2) uniformly distributed inside the site (rejection from its bounding box)."""
    lo, hi = site.polygon_m.min(0), site.polygon_m.max(0)
    out: list[np.ndarray] = []
    count = 0
    while count < n:
        pts = rng.uniform(lo, hi, (max(64, 2 * (n - count)), 2))
        pts = pts[inside_polygon(pts, site.polygon_m)]
        out.append(pts)
        count += len(pts)
    return np.concatenate(out)[:n]


def connect_ensemble(sde: Any, sites: tuple[Site, ...], times_s: Any, *, particles: int = 10_000,
                     step_s: float = 60.0, seed: int = 0, threshold: float = DEFAULT_THRESHOLD,
                     support: Callable | None = None, progress: Callable[[int], None] | None = None,
                     batch: int = ENSEMBLE_BATCH, start_time_s: float = 0.0) -> Connectivity:
    """Connectivity by Euler–Maruyama particles starting uniformly in each source site (module doc).

    ``particles`` per source site, ``step_s`` the Euler–Maruyama step (s), released at ``start_time_s`` (s on the
    model's axis); ``support`` as in :func:`connect`; same seed, same answer."""
    times = check_times(times_s)
    dynamic, static = split_for_jit(sde)
    rng = np.random.default_rng(int(seed))
    key = jax.random.key(int(seed))
    n_sites, n_times = len(sites), len(times)
    inside = np.zeros((n_sites, n_sites, n_times))
    outside = np.zeros((n_sites, n_times)) if support is not None else None
    centroid = np.zeros((n_sites, n_times, 2))
    for i, site in enumerate(sites):
        start = _uniform_in(site, particles, rng)
        for lo in range(0, particles, batch):
            key, sub = jax.random.split(key)
            xs = np.asarray(_paths_jit(dynamic, static, start[lo:lo + batch], times, float(step_s), sub,
                                       float(start_time_s)))                                          # (T, n, 2)
            flat = xs.reshape(-1, 2)
            for j, dest in enumerate(sites):
                inside[i, j] += inside_polygon(flat, dest.polygon_m).reshape(xs.shape[:2]).sum(1)
            centroid[i] += xs.sum(1)
            flags = _outside(support, np.swapaxes(xs, 0, 1), start_time_s + times)
            if flags is not None:
                outside[i] += flags.sum(0)
            if progress is not None:
                progress(xs.shape[1])
    prob = inside / particles
    return Connectivity(tuple(sites), times, prob, first_passage_s(times, prob, threshold), float(threshold),
                        None if outside is None else outside / particles, centroid / particles, "ensemble",
                        int(particles), standard_error=np.sqrt(prob * (1.0 - prob) / particles))


def connect_from_field(field: Any, sites: tuple[Site, ...], times_s: Any, *, method: str = "cubature",
                       per_site: int = 64, particles: int = 10_000, step_s: float | None = None, seed: int = 0,
                       threshold: float = DEFAULT_THRESHOLD, start_time_s: float = 0.0, posterior: str = "auto",
                       diffusivity_m2_s: float | None = None, decorrelation_time_s: float | None = None,
                       progress: Callable[[int], None] | None = None,
                       longest_step_s: float = 600.0) -> Connectivity:
    """Connectivity between ``sites`` in a fitted FlowField: the SDE of :func:`field_transport`, through the
    exact posterior or a table of it (``posterior`` "auto" | "exact" | "table", the rule of
    ``spread.spread_from_field``: "auto" tabulates moment methods when releases × RK4 steps ≥
    ``tabulate.TABLE_RELEASE_STEPS``, over the sites' vertices and the data extent), ``method`` a name of
    ``methods.METHODS`` (``"ensemble"``: particles per site), ``step_s`` the RK4 or Euler–Maruyama step (s; RK4 default
    ``stepcheck.moment_step_s``: ``longest_step_s``, or a quarter of the flow's time scale, or RK4's stability bound
    for the field when shorter; a longer step given is warned); adds the data-support share, the frame and the
    absolute time origin of the model."""
    if int(getattr(field, "dim", 2)) != 2:
        raise InputError("connect: sites are horizontal polygons; the model must be 2-D")
    sde = field_transport(field, diffusivity_m2_s=diffusivity_m2_s, decorrelation_time_s=decorrelation_time_s)
    if not (method in METHODS and METHODS[method].ensemble):
        step_s = moment_step_s(field, sde, step_s, longest_s=longest_step_s, start_times_s=[start_time_s],
                               horizon_s=float(np.max(times_s)))
    obj, integrator = make_method(method, particles=particles, step_s=step_s)
    corners = np.concatenate([s.polygon_m for s in sites])
    table_sde = field_or_table_sde(field, sde, corners, len(sites) * per_site, check_times(times_s), integrator,
                                   posterior, [start_time_s])
    common = dict(seed=seed, threshold=threshold, support=_support(field, table_sde, corners), progress=progress,
                  start_time_s=float(start_time_s))
    if integrator is None:
        result = connect_ensemble(sde, sites, times_s, particles=obj.particles, step_s=obj.step_s, **common)
    else:
        result = connect(sde if table_sde is None else table_sde, sites, times_s, per_site=per_site, method=obj,
                         integrator=integrator, fallback_sde=table_fallbacks(field, sde, table_sde, corners,
                                                                             check_times(times_s), [start_time_s]),
                         **common)
    origin = (getattr(field, "data_summary", None) or {}).get("time_origin_utc")
    used_s = obj.step_s if integrator is None else step_s
    return dataclasses.replace(_with_context(result, field.frame, origin, start_time_s), step_s=float(used_s))


def _support(field: Any, table_sde: Any, corners: np.ndarray) -> Callable:
    """The field's variance ratio, tabulated over the posterior table's region when there is one (supporttable:
    the exact ratio costs about as much as a release-step on the exact posterior)."""
    table = None if table_sde is None else support_table(
        field, *table_region(corners, (getattr(field, "data_summary", None) or {}).get("extent_m")))
    return field.local_variance_ratio if table is None else table


def _with_context(result: Connectivity, frame: Any, origin: str | None, start_time_s: float) -> Connectivity:
    return dataclasses.replace(result, frame=frame, time_origin_utc=origin, start_time_s=float(start_time_s))
