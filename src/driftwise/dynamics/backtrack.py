"""Back-tracking: where and when was something released, given where it was found?

Candidates are release points x₀ on a regular grid over a region (cell centres, spacing h) and release times
t_r = t_ref − l for lags l on a grid over the window (t_ref: the earliest find).  Each candidate point is
released as a point (P₀ = 0) and propagated forward once by the Gaussian moment equations
(``moments.propagate_batch``; Jazwinski 1970) to every age a = t_k − t_r at which a find k was made.  In a
steady field one propagation per point serves every candidate time; a field that varies in time (tides) is
propagated once per point and candidate time, from t_r (``sde.with_time``).  A find k at y_k with position
error covariance R_k = sd_k² I has likelihood

    L_k(x₀, t_r) = N(y_k | m(x₀, t_k − t_r), P(x₀, t_k − t_r) + R_k),

several finds of the same release multiply (independent given the release), and with a uniform prior over
the region and window (every cell and lag equally likely) the posterior is

    p(x₀, t_r | finds) ∝ Π_k L_k(x₀, t_r),      normalised over all cells and lags,

a probability per cell (not a density; divide by h² for one).  ``probability (L, ny, nx)`` per candidate
time and ``marginal (ny, nx)`` summed over time; the highest-probability regions at 50/90 % are the smallest
sets of cells holding that share (``hpd_levels``).  For a uniform stream U and diffusivity K the exact
posterior of x₀ at one lag l is N(y − U l, 2 K l I + R) (tests/dynamics/test_backtrack.py).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import logsumexp

from ..errors import InputError
from .connectivity import field_transport
from .methods import make_method, method_name
from .moments import diverged
from .stepcheck import moment_step_s
from .tabulate import FallbackTally, field_or_table_sde, propagate_with_fallback, table_fallbacks

__all__ = ["Finds", "BacktrackMap", "backtrack", "candidate_grid", "hpd_levels", "backtrack_memory_bytes",
           "backtrack_from_field", "forward_moments", "posterior_map", "needed_ages"]

BATCH = 1024


@dataclass(frozen=True, eq=False)
class Finds:
    """K finds of one release: positions ``position_m (K, 2)`` (local frame), times ``time_s (K,)`` on the
    model's time axis and position standard deviations ``sd_m (K,)`` (isotropic, metres)."""

    position_m: np.ndarray
    time_s: np.ndarray
    sd_m: np.ndarray

    def __post_init__(self) -> None:
        pos = np.atleast_2d(np.asarray(self.position_m, np.float64))
        t = np.atleast_1d(np.asarray(self.time_s, np.float64))
        sd = np.broadcast_to(np.asarray(self.sd_m, np.float64), t.shape).copy()
        if pos.shape != (len(t), 2) or not (np.all(np.isfinite(pos)) and np.all(np.isfinite(t))):
            raise InputError(f"finds: need (K, 2) finite positions and K finite times, got {pos.shape} and {t.shape}")
        if not np.all(np.isfinite(sd) & (sd > 0)):
            raise InputError("finds: the position standard deviation (--sd) must be a positive length")
        object.__setattr__(self, "position_m", pos)
        object.__setattr__(self, "time_s", t)
        object.__setattr__(self, "sd_m", sd)


@dataclass(frozen=True, eq=False)
class BacktrackMap:
    """Posterior over release cell and time.

    ``x_m (nx,)``, ``y_m (ny,)`` cell centres (local frame); ``release_times_s (L,)`` candidate release times
    on the model's time axis; ``probability (L, ny, nx)`` sums to 1; ``marginal (ny, nx)`` over time;
    ``by_time (L,)`` over space; ``most_probable`` = (x_m, y_m, release_time_s) of the most probable cell and
    time; ``log_evidence`` log Σ Π_k L_k over the candidates (nats, minus log of their number); ``step_s`` the RK4
    step used (s; set by :func:`backtrack_from_field`).
    """

    x_m: np.ndarray
    y_m: np.ndarray
    release_times_s: np.ndarray
    probability: np.ndarray
    finds: Finds
    method: str
    log_evidence: float
    frame: Any = None
    time_origin_utc: str | None = None
    step_s: float | None = None

    @property
    def marginal(self) -> np.ndarray:
        return self.probability.sum(0)

    @property
    def by_time(self) -> np.ndarray:
        return self.probability.sum((1, 2))

    @property
    def cell_area_m2(self) -> float:
        return float(abs((self.x_m[1] - self.x_m[0]) * (self.y_m[1] - self.y_m[0])))

    @property
    def most_probable(self) -> tuple[float, float, float]:
        k, iy, ix = np.unravel_index(int(np.argmax(self.probability)), self.probability.shape)
        return float(self.x_m[ix]), float(self.y_m[iy]), float(self.release_times_s[k])

    def mean_cov(self, k: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean (2,) m and covariance (2, 2) m² of the release point (candidate time ``k``, or all)."""
        p = self.marginal if k is None else self.probability[k] / self.probability[k].sum()
        gx, gy = np.meshgrid(self.x_m, self.y_m)
        pts = np.stack([gx, gy], -1).reshape(-1, 2)
        w = p.ravel() / p.sum()
        mean = w @ pts
        d = pts - mean
        return mean, (d * w[:, None]).T @ d


def candidate_grid(region_m: Any, spacing_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Cell centres x (nx,), y (ny,) of a regular grid of ``spacing_m`` over ``region_m = (x0, y0, x1, y1)``."""
    x0, y0, x1, y1 = (float(v) for v in region_m)
    if not (x1 > x0 and y1 > y0 and spacing_m > 0):
        raise InputError(f"region: need x0 < x1, y0 < y1 and a positive spacing, got {region_m} and {spacing_m}")
    nx, ny = max(2, int(np.ceil((x1 - x0) / spacing_m))), max(2, int(np.ceil((y1 - y0) / spacing_m)))
    hx, hy = (x1 - x0) / nx, (y1 - y0) / ny
    return x0 + hx * (np.arange(nx) + 0.5), y0 + hy * (np.arange(ny) + 0.5)


def backtrack_memory_bytes(n_candidates: int, n_ages: int, n_lags: int) -> int:
    """Estimated peak bytes: moments kept for every candidate and age (6 float64: mean, covariance), the
    log-likelihood and probability maps (candidates × lags, a few copies) and one batch's working set."""
    return int(8 * (n_candidates * n_ages * 6 + 4 * n_candidates * n_lags + BATCH * n_ages * 60))


def hpd_levels(probability: np.ndarray, shares: tuple[float, ...] = (0.5, 0.9)) -> list[float]:
    """Per share, the cell probability at which the cells at or above it first hold that share of the total
    (the highest-probability region); cells ≥ the level form the region."""
    values = np.sort(np.asarray(probability, float).ravel())[::-1]
    cum = np.cumsum(values) / values.sum()
    return [float(values[min(int(np.searchsorted(cum, s)), values.size - 1)]) for s in shares]


def needed_ages(finds: Finds, release_times_s: Any) -> np.ndarray:
    """Sorted unique ages (A,) from 0: every t_k − t_r of the finds and candidate release times (s)."""
    ages = finds.time_s[:, None] - np.atleast_1d(np.asarray(release_times_s, np.float64))[None, :]
    if np.any(ages < 0):
        raise InputError("backtrack: every candidate release time must be at or before every find")
    return np.unique(np.round(np.concatenate([[0.0], ages.ravel()]), 6))


def _log_likelihood(means: np.ndarray, covs: np.ndarray, finds: Finds, index: np.ndarray) -> np.ndarray:
    """Σ_k log N(y_k | m, P + R_k) for a batch: means (B, A, 2), covs (B, A, 2, 2) → (B, L)."""
    total = 0.0
    for k in range(len(finds.time_s)):
        m, p = means[:, index[k], :2], covs[:, index[k], :2, :2] + finds.sd_m[k] ** 2 * np.eye(2)
        d = finds.position_m[k] - m
        det = p[..., 0, 0] * p[..., 1, 1] - p[..., 0, 1] * p[..., 1, 0]
        maha = (p[..., 1, 1] * d[..., 0] ** 2 - 2 * p[..., 0, 1] * d[..., 0] * d[..., 1]
                + p[..., 0, 0] * d[..., 1] ** 2) / det
        total = total + (-0.5 * maha - 0.5 * np.log(det) - np.log(2 * np.pi))
    return total


def forward_moments(sde: Any, points_m: np.ndarray, ages_s: np.ndarray, *, method: str = "cubature",
                    step_s: float | None = None, progress: Callable[[int], None] | None = None,
                    batch: int = BATCH, fallback_sde: Any = None, start_time_s: float | None = None,
                    tally: FallbackTally | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Means (C, A, 2) m and covariances (C, A, 2, 2) m² of point releases at ``points_m (C, 2)`` after
    ``ages_s (A,)`` (from 0, increasing), in batches; ``method`` a moment method of ``methods.METHODS``;
    ``fallback_sde``: candidates that leave a tabulated field's grid are recomputed through it;
    ``start_time_s``: the release time on the model's axis (s; used by a time-dependent SDE); ``tally``: counts
    the candidates rerun through ``fallback_sde`` (the caller warns once; None: one warning here)."""
    obj, integrator = make_method(method, step_s=step_s)
    if integrator is None:
        raise InputError("backtrack: use a moment method (the ensemble cannot give a likelihood per candidate)")
    count = FallbackTally() if tally is None else tally
    means = np.empty((len(points_m), len(ages_s), 2))
    covs = np.empty((len(points_m), len(ages_s), 2, 2))
    for lo in range(0, len(points_m), batch):
        starts = points_m[lo:lo + batch]
        m, c = propagate_with_fallback(sde, fallback_sde, starts, np.zeros((len(starts), 2, 2)), ages_s, method=obj,
                                       integrator=integrator, chunk=min(batch, 256), start_times_s=start_time_s,
                                       tally=count)
        means[lo:lo + batch], covs[lo:lo + batch] = np.asarray(m)[..., :2], np.asarray(c)[..., :2, :2]
        if diverged(means[lo:lo + batch], covs[lo:lo + batch]):
            raise InputError("backtrack: the forecast of the candidate releases produced non-finite numbers or a "
                             "covariance that is not positive semi-definite (the integration diverged); use a "
                             "smaller --step")
        if progress is not None:
            progress(len(starts))
    if tally is None:
        count.warn("candidate releases")
    return means, covs


def posterior_map(x_m: np.ndarray, y_m: np.ndarray, release_times_s: Any, finds: Finds, ages_s: np.ndarray,
                  means: np.ndarray, covs: np.ndarray, method: str = "cubature") -> BacktrackMap:
    """Normalised posterior over cells × candidate times from :func:`forward_moments` of the grid's cell
    centres (row-major over y then x) at ``ages_s`` (which must hold every t_k − t_r)."""
    times = np.atleast_1d(np.asarray(release_times_s, np.float64))
    ages = finds.time_s[:, None] - times[None, :]
    if np.any(ages < 0):
        raise InputError("backtrack: every candidate release time must be at or before every find")
    loglik = _log_likelihood(means, covs, finds, _age_index(ages_s, ages))
    return _normalised(x_m, y_m, times, finds, loglik, method)


def _age_index(ages_s: np.ndarray, ages: np.ndarray) -> np.ndarray:
    """Positions of ``ages`` (any shape) in the propagated ``ages_s``; InputError when one is missing."""
    index = np.searchsorted(np.round(ages_s, 6), np.round(ages, 6))
    if np.any(index >= len(ages_s)) or not np.allclose(np.asarray(ages_s)[np.minimum(index, len(ages_s) - 1)], ages):
        raise InputError("backtrack: the propagated ages do not include every find time minus release time")
    return index


def _normalised(x_m: np.ndarray, y_m: np.ndarray, times: np.ndarray, finds: Finds, loglik: np.ndarray,
                method: str) -> BacktrackMap:
    """The BacktrackMap of log-likelihoods ``loglik (C, L)`` (cells row-major over y then x, L times)."""
    loglik = np.where(np.isfinite(loglik), loglik, -np.inf)
    norm = logsumexp(loglik)
    if not np.isfinite(norm):
        raise InputError("backtrack: no candidate release explains the find(s); widen --region or --window")
    prob = np.exp(loglik - norm).T.reshape(len(times), len(y_m), len(x_m))
    return BacktrackMap(np.asarray(x_m), np.asarray(y_m), times, prob, finds, method,
                        float(norm - np.log(loglik.size)))


def backtrack(sde: Any, finds: Finds, x_m: np.ndarray, y_m: np.ndarray, release_times_s: Any, *,
              method: str = "cubature", step_s: float | None = None,
              progress: Callable[[int], None] | None = None, batch: int = BATCH,
              fallback_sde: Any = None) -> BacktrackMap:
    """Posterior over release cell (grid ``x_m``, ``y_m``) and time (``release_times_s (L,)``) given ``finds``
    (module doc): :func:`forward_moments` of every cell centre to every needed age, then :func:`posterior_map`.
    ``sde``: sde.SDE; ``method``: a moment method of ``methods.METHODS`` with RK4 ``step_s``; ``fallback_sde`` as in
    :func:`forward_moments`."""
    ages = needed_ages(finds, release_times_s)
    gx, gy = np.meshgrid(x_m, y_m)
    points = np.stack([gx, gy], -1).reshape(-1, 2)
    name = method_name(make_method(method)[0])
    common = {"method": method, "step_s": step_s, "progress": progress, "batch": batch, "fallback_sde": fallback_sde}
    if not getattr(sde, "with_time", False):
        means, covs = forward_moments(sde, points, ages, **common)
        return posterior_map(x_m, y_m, release_times_s, finds, ages, means, covs, name)
    times = np.atleast_1d(np.asarray(release_times_s, np.float64))
    loglik = np.empty((len(points), len(times)))
    tally = FallbackTally()
    for j, t_r in enumerate(times):                 # a time-varying field: one propagation per candidate time
        ages_j = needed_ages(finds, [t_r])
        means, covs = forward_moments(sde, points, ages_j, start_time_s=float(t_r), tally=tally, **common)
        loglik[:, j] = _log_likelihood(means, covs, finds, _age_index(ages_j, finds.time_s[:, None] - t_r))[:, 0]
    tally.warn(f"candidate releases ({len(points)} points × {len(times)} release times)")
    return _normalised(x_m, y_m, times, finds, loglik, name)


def backtrack_from_field(field: Any, finds: Finds, region_m: Any, spacing_m: float, release_times_s: Any, *,
                         method: str = "cubature", step_s: float | None = None, posterior: str = "auto",
                         diffusivity_m2_s: float | None = None, decorrelation_time_s: float | None = None,
                         progress: Callable[[int], None] | None = None,
                         longest_step_s: float = 600.0) -> BacktrackMap:
    """:func:`backtrack` in a fitted FlowField: the SDE of ``connectivity.field_transport`` through the exact
    posterior or a table of it (``posterior`` "auto" | "exact" | "table", the rule of ``spread.spread_from_field``:
    "auto" tabulates when candidates × RK4 steps ≥ ``tabulate.TABLE_RELEASE_STEPS``, over the region and the data
    extent), candidates on a ``spacing_m`` grid over ``region_m = (x0, y0, x1, y1)``; ``step_s`` the RK4 step (s; default
    ``stepcheck.moment_step_s``: ``longest_step_s``, or a quarter of the flow's time scale, or RK4's stability bound
    for the field when shorter; a longer step given is warned).  A time-varying field is
    propagated from every candidate time (its table spans the window and the finds)."""
    if int(getattr(field, "dim", 2)) != 2:
        raise InputError("backtrack: the model must be 2-D")
    sde = field_transport(field, diffusivity_m2_s=diffusivity_m2_s, decorrelation_time_s=decorrelation_time_s)
    x, y = candidate_grid(region_m, spacing_m)
    x0, y0, x1, y1 = (float(v) for v in region_m)
    times = np.atleast_1d(np.asarray(release_times_s, np.float64))
    step_s = moment_step_s(field, sde, step_s, longest_s=longest_step_s, start_times_s=times,
                           horizon_s=float(np.max(finds.time_s) - np.min(times)))
    rk4 = make_method(method, step_s=step_s)[1]
    per_time = len(times) if getattr(field, "is_time_varying", False) else 1     # propagations per candidate point
    corners, ages = [[x0, y0], [x1, y1]], needed_ages(finds, release_times_s)
    table_sde = field_or_table_sde(field, sde, corners, len(x) * len(y) * per_time, ages, rk4, posterior,
                                   start_times_s=times)
    result = backtrack(sde if table_sde is None else table_sde, finds, x, y, release_times_s, method=method,
                       step_s=step_s, progress=progress,
                       fallback_sde=table_fallbacks(field, sde, table_sde, corners, ages, times))
    origin = (getattr(field, "data_summary", None) or {}).get("time_origin_utc")
    return dataclasses.replace(result, frame=field.frame, time_origin_utc=origin, step_s=float(step_s))
