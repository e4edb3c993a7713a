"""Calibration of the eddy diffusivity K and the velocity decorrelation time τ from observed transitions.

For a fix x_i at t_i and the same track at t_i + λ (lag λ), the moment propagator started
from N(x_i, σ² I) gives N(m_λ, P_λ) for the true position; the later fix is that position
plus N(0, σ² I) error, so

    log p(x_j | x_i; K, τ) = log N(x_j | m_λ, P_λ(K, τ) + σ² I).

The calibration maximises the mean of these over every start fix and every lag in
``lags_s`` (a composite likelihood: overlapping windows count as independent, which keeps
the maximiser consistent but makes the curvature-based spread too small; it is reported as
a rough guide only), over θ = (log K, log τ), with L-BFGS-B (scipy.optimize.minimize)
inside bounds and the exact gradient of a jitted jax objective.  Two routes:

* Linearize with RK4 (default).  Linearized moments (Maybeck 1982, vol. 2, §12.3) have
  dm/dt = μ(m), independent of P, and dP/dt = J P + P Jᵀ + 2(K I + w_τ(a) Σ(m)) with
  w_τ(a) = τ(1 − e^{−a/τ}) at release age a.  In the RK4 step of the joint (m, P) ODE the
  mean stages never see P, so the mean path and, at each of its four stages per step,
  J = ∂μ/∂x and Σ are computed once (:func:`linearized_path`); each likelihood evaluation
  then re-runs only the d × d covariance RK4 with those stage values — the same numbers as
  moments.propagate_batch with Linearize() and that RK4, at microseconds per evaluation
  whatever M, differentiated in reverse mode through a fixed-length scan.
* Any other moment method (e.g. SphericalCubature): the sigma points move with P, so the
  propagator runs inside the objective and jax.jacfwd differentiates through it (forward
  mode: the RK4/Dopri5 loops have data-dependent trip counts, i.e. while loops, which
  reverse mode cannot differentiate; with two parameters forward mode is as cheap).
  Exact for that method but costly for a large field (each evaluation is a full forecast).

A time-varying field (``is_time_varying``) takes route 2 with its time SDE (sde.timed_field_sde),
each start forecast from its own fix time: route 1's stage values would depend on each start's time.

K and τ are told apart by how the spread grows with lag (K: linear; the velocity-error
term: quadratic for lags ≪ τ, linear beyond) and by the spatial variation of Σ(x).
"""

from __future__ import annotations

import dataclasses
import functools
import json
from dataclasses import dataclass
from typing import Any, Callable

import jax
import jax.numpy as jnp
import numpy as np
from scipy.optimize import minimize

from .. import smallmatrix
from ..data.datascales import DataScales, data_scales
from ..data.observations import velocity_observations
from ..data.tracks import Tracks, in_model_frame
from ..data.windows import forecast_windows
from ..errors import InputError
from ..files import plain
from ..gp.field import batch_from_observations
from ..gp.variational import exact_q
from ..units import format_duration
from .moments import RK4, Linearize, propagate_one, substep_counts
from .sde import PointPosterior, field_drift, timed_field_sde, transport_sde, velocity_memory_weight

# Lags, bounds and the RK4 step follow the data (driftwise.data.datascales): up to 5 lags from 2 sampling
# intervals to a third of the median track duration (hourly 3-day tracks: 2, 4, 7, 13, 24 h), K within
# 1e-5 … 1e3 × step²/Δt, τ within min(1 s, Δt/10) … 30 d, RK4 substeps of the longest lag / 48.
RK4_STEPS_PER_LONGEST_LAG = 48


def _posterior_of(field: Any) -> Any:
    """The single-point posterior (pytree with mean_at, cov_at) of a FlowField, or the object itself (also a
    time-varying field, evaluated through its own mean_at(x, t_s=…) and cov_between)."""
    if getattr(field, "is_time_varying", False) or (hasattr(field, "cov_at") and hasattr(field, "mean_at")):
        return field
    return PointPosterior.from_field(field)




@dataclass(frozen=True)
class Calibration:
    """The estimated K (m²/s) and τ (s) with the optimiser's record.

    ``mean_log_likelihood`` (nats per transition) at the optimum over ``n_transitions`` transitions from
    ``n_starts`` start fixes in ``n_folds`` folds at ``lags_s``; ``initial`` (K, τ) start; ``at_bound`` per
    parameter; ``log_std`` rough standard errors of log K and log τ (composite likelihood: too small).
    """

    diffusivity_m2_s: float
    decorrelation_time_s: float
    mean_log_likelihood: float
    n_transitions: int
    n_starts: int
    n_folds: int
    lags_s: tuple[float, ...]
    position_error_m: float
    converged: bool
    iterations: int
    message: str
    initial: tuple[float, float]
    at_bound: dict[str, bool]
    log_std: dict[str, float]
    method: str

    def to_dict(self) -> dict[str, Any]:
        """The record stored in the model file's ``fit.calibration`` (same keys as before this type existed)."""
        record = dataclasses.asdict(self)
        record["lags_s"] = list(self.lags_s)
        record["initial"] = {"diffusivity_m2_s": self.initial[0], "decorrelation_time_s": self.initial[1]}
        record["objective"] = "mean Gaussian transition log likelihood (composite)"
        return record


@dataclass(frozen=True)
class Transitions:
    """Start fixes and the same tracks at the calibration lags.

    ``start_m`` (R, d) start fixes, ``times_s`` (1 + L,) = (0, lags), ``observed_m`` (R, L, d)
    the track at t_start + lag (linear interpolation between fixes), ``obs_var_m2`` (R, L) its
    error variance per component, ``weight`` (R, L) 1 where observed, 0 elsewhere and for the
    padding rows (R is padded to a multiple of 128 so similar calls share one compilation);
    ``start_time_s`` (R,) the start fixes' own times (s).
    """

    start_m: np.ndarray
    times_s: np.ndarray
    observed_m: np.ndarray
    obs_var_m2: np.ndarray
    weight: np.ndarray
    start_time_s: np.ndarray | None = None


def _tracks_from_observations(obs) -> Any:
    """Rebuild the fixes behind finite-difference observations: x_a = mid − v Δt/2, x_b = mid + v Δt/2."""

    idx = np.asarray(obs.track_index)
    mid, dt = np.asarray(obs.position_m), np.asarray(obs.dt_s)
    half = 0.5 * np.asarray(obs.velocity_m_s) * dt[:, None]
    last = np.r_[idx[1:] != idx[:-1], True]
    pos = np.concatenate([mid - half, (mid + half)[last]])
    time = np.concatenate([np.asarray(obs.time_s) - 0.5 * dt, (np.asarray(obs.time_s) + 0.5 * dt)[last]])
    ids = np.concatenate([idx, idx[last]])
    order = np.lexsort((time, ids))
    return Tracks(track_id=np.array([str(i) for i in ids[order]], dtype=object), time_s=time[order],
                  position_m=pos[order], source="observations")


def calibration_scales(data: Any) -> DataScales:
    """The scales (driftwise.data.datascales) of Tracks, or of the fixes behind velocity Observations."""
    if hasattr(data, "velocity_m_s") and hasattr(data, "dt_s"):
        data = _tracks_from_observations(data)
    return data_scales(data)


def transitions_from_tracks(tracks_or_observations, *, lags_s, position_error_m: float,
                            max_starts: int | None = 600, frame: Any = None, floor_m2: float = 0.0) -> Transitions:
    """Every fix after a track's first as a start, with the same track at each lag later.

    At most ``max_starts`` starts, evenly spaced over all (deterministic).  Tracks are
    re-projected into ``frame`` (the model's) when given; Observations are turned back into fixes.
    ``floor_m2`` is added to every observation variance (keeps σ = 0 finite).
    """

    data = tracks_or_observations
    if hasattr(data, "velocity_m_s") and hasattr(data, "dt_s"):
        data = _tracks_from_observations(data)
    elif frame is not None:
        data = in_model_frame(data, frame)
    lags = np.sort(np.asarray(lags_s, dtype=float))
    try:
        win = forecast_windows(data, lags, step_s=float(lags.max()), max_starts=max_starts)
    except InputError:
        raise InputError(f"{getattr(data, 'source', 'tracks')}: calibration needs a track observed for "
                         f"{format_duration(lags.min())} after a fix; no track is; give shorter lags or fit "
                         "with --no-calibrate") from None
    keep = np.searchsorted(win.times_s, lags)
    valid = win.valid[:, keep]
    pad = (-valid.shape[0]) % 128
    rows = np.r_[np.arange(valid.shape[0]), np.zeros(pad, dtype=int)]
    observed = np.where(valid[..., None], win.observed_m[:, keep], 0.0)[rows]
    obs_var = (position_error_m**2 * win.obs_var_factor[:, keep] + floor_m2)[rows]
    weight = np.concatenate([valid.astype(float), np.zeros((pad, lags.size))])
    return Transitions(win.start_m[rows], np.concatenate([[0.0], lags]), observed, obs_var, weight,
                       win.start_time_s[rows])


def _mean_log_likelihood(means, covs, observed, obs_var, weight):
    """Weighted mean of log N(x_obs | m, P + obs_var I); means (R, L, d), covs (R, L, d, d)."""
    d = means.shape[-1]
    chol = jnp.vectorize(smallmatrix.cholesky, signature="(d,d)->(d,d)")(covs + obs_var[..., None, None] * jnp.eye(d))
    z = jnp.vectorize(smallmatrix.solve_lower, signature="(d,d),(d)->(d)")(chol, observed - means)
    logdet = jnp.vectorize(smallmatrix.log_det_from_cholesky, signature="(d,d)->()")(chol)
    logp = -0.5 * (jnp.sum(z * z, axis=-1) + logdet + d * jnp.log(2.0 * jnp.pi))
    return jnp.sum(jnp.where(weight > 0, logp, 0.0) * weight) / jnp.sum(weight)


# ----- route 1: linearized moments along a fixed mean path (Linearize + RK4)
_RK4_STAGE_FRACTIONS = np.array([0.0, 0.5, 0.5, 1.0])


def rk4_substeps(times_s: np.ndarray, step_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(h (S,), age at each substep's start (S,), index of the substep ending at each output (T−1,)).

    The grid of moments.RK4: every output interval cut into ceil(Δt/step_s) equal substeps.
    """

    spans = np.diff(np.asarray(times_s, dtype=float))
    counts = np.asarray(substep_counts(jnp.asarray(spans), float(step_s)), dtype=int)
    hs = np.repeat(spans / counts, counts)
    ages = np.concatenate([[0.0], np.cumsum(hs)[:-1]])
    return hs, ages, np.cumsum(counts) - 1


def linearized_path(posterior: Any, starts_m: Any, hs: np.ndarray, chunk: int = 256):
    """RK4 mean paths from ``starts_m`` (R, d) and, at every stage, J = ∂μ/∂x and Σ.

    Returns (means (R, S, d) after each substep, jac (R, S, 4, d, d) s⁻¹, sigma (R, S, 4, d, d)
    m²/s²) for substeps ``hs`` (S,) s; the stage states are those of the joint RK4 step.
    """
    mu = jax.tree_util.Partial(field_drift, posterior)

    def one(x0):
        def step(x, h):
            k1 = mu(x)
            x2 = x + 0.5 * h * k1
            k2 = mu(x2)
            x3 = x + 0.5 * h * k2
            k3 = mu(x3)
            x4 = x + h * k3
            stages = jnp.stack([x, x2, x3, x4])
            x_new = x + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + mu(x4))
            return x_new, (x_new, jax.vmap(jax.jacfwd(mu))(stages), jax.vmap(posterior.cov_at)(stages))

        return jax.lax.scan(step, x0, hs)[1]

    starts = jnp.asarray(starts_m)
    return jax.lax.map(one, starts, batch_size=min(int(chunk), starts.shape[0]))


_linearized_path_jit = jax.jit(linearized_path, static_argnames=("chunk",))


def linearized_covariances(log_k: jax.Array, log_tau: jax.Array, jac: jax.Array, sigma: jax.Array,
                           hs: jax.Array, ages: jax.Array, cov0: jax.Array) -> jax.Array:
    """Covariances (R, S, d, d) m² after each substep for K = e^{log_k}, τ = e^{log_tau}.

    RK4 on dP/dt = J P + P Jᵀ + 2(K I + τ(1 − e^{−a/τ}) Σ) with the stage values of
    :func:`linearized_path`; cov0 (R, d, d) at age 0.
    """
    k, tau = jnp.exp(log_k), jnp.exp(log_tau)
    eye = jnp.eye(cov0.shape[-1], dtype=cov0.dtype)
    weights = velocity_memory_weight(tau, ages[:, None] + hs[:, None] * _RK4_STAGE_FRACTIONS)   # (S, 4)

    def step(p, inputs):
        jac_s, sigma_s, h, w = inputs                       # (R, 4, d, d), (R, 4, d, d), (), (4,)

        def rate(q, i):
            jq = jac_s[:, i] @ q
            return jq + jnp.swapaxes(jq, -1, -2) + 2.0 * (k * eye + w[i] * sigma_s[:, i])

        k1 = rate(p, 0)
        k2 = rate(p + 0.5 * h * k1, 1)
        k3 = rate(p + 0.5 * h * k2, 2)
        p = p + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + rate(p + h * k3, 3))
        return p, p

    _, covs = jax.lax.scan(step, cov0, (jnp.swapaxes(jac, 0, 1), jnp.swapaxes(sigma, 0, 1), hs, weights))
    return jnp.swapaxes(covs, 0, 1)


@jax.jit
def _path_value_and_grad(theta, means, jac, sigma, hs, ages, cov0, out_index, observed, obs_var, weight):
    """(−mean log likelihood, gradient) in θ = (log K, log τ) by the covariance-only RK4 (reverse mode)."""
    def f(th):
        covs = linearized_covariances(th[0], th[1], jac, sigma, hs, ages, cov0)[:, out_index]
        return -_mean_log_likelihood(means, covs, observed, obs_var, weight)

    return jax.value_and_grad(f)(theta)


# ----- route 2: any moment method, forward-mode gradient through the propagator
def _propagated_log_likelihood(theta, posterior, method, integrator, chunk, means0, covs0, times_s,
                               observed, obs_var, weight, starts_s=None):
    """Mean log likelihood through the propagator; a time-varying field (``starts_s`` (R,) given) uses its
    time SDE from each start's own time."""
    if starts_s is None:
        sde = transport_sde(posterior, jnp.exp(theta[0]), jnp.exp(theta[1]))
    else:
        sde = timed_field_sde(posterior, jnp.exp(theta[0]), jnp.exp(theta[1]), True)

    def one(release):
        return propagate_one(sde, method, integrator, release[0], release[1], times_s,
                             0.0 if release[2] is None else release[2])

    if chunk >= means0.shape[0]:
        means, covs = jax.vmap(one)((means0, covs0, starts_s))
    else:
        means, covs = jax.lax.map(one, (means0, covs0, starts_s), batch_size=chunk)
    return _mean_log_likelihood(means[:, 1:], covs[:, 1:], observed, obs_var, weight)


@functools.partial(jax.jit, static_argnames=("method", "chunk"))
def propagated_value_and_grad(theta, posterior, method, integrator, chunk, means0, covs0, times_s, observed, obs_var,
                              weight, starts_s=None):
    """(−mean log likelihood, gradient) with the propagator inside (jax.jacfwd)."""
    def f(th):
        value = -_propagated_log_likelihood(th, posterior, method, integrator, chunk, means0, covs0, times_s,
                                            observed, obs_var, weight, starts_s)
        return value, value

    grad, value = jax.jacfwd(f, has_aux=True)(theta)
    return value, grad


def transition_objective(field: Any, trans: Transitions, sigma: float, method: Any, integrator: Any, chunk: int):
    """θ ↦ (value, gradient) as floats/numpy for scipy, by route 1 (Linearize + RK4) or route 2."""

    posterior = _posterior_of(field)
    data = (jnp.asarray(trans.observed_m), jnp.asarray(trans.obs_var_m2), jnp.asarray(trans.weight))
    r, d = trans.start_m.shape
    timed = bool(getattr(posterior, "is_time_varying", False))
    if isinstance(method, Linearize) and isinstance(integrator, RK4) and not timed:
        hs, ages, out_index = rk4_substeps(trans.times_s, float(integrator.step_s))
        hs_j = jnp.asarray(hs)
        means, jac, sig = _linearized_path_jit(posterior, jnp.asarray(trans.start_m), hs_j, chunk=min(r, 256))
        out = jnp.asarray(out_index)
        cov0 = jnp.asarray(np.broadcast_to(sigma**2 * np.eye(d), (r, d, d)))
        parts = (means[:, out], jac, sig, hs_j, jnp.asarray(ages), cov0, out)

        def evaluate(theta):
            return _path_value_and_grad(jnp.asarray(theta), *parts, *data)
    else:
        covs0 = jnp.asarray(np.broadcast_to(sigma**2 * np.eye(d), (r, d, d)))
        args = (posterior, method, integrator, int(min(chunk, r)), jnp.asarray(trans.start_m), covs0,
                jnp.asarray(trans.times_s))
        starts = jnp.asarray(trans.start_time_s) if timed else None

        def evaluate(theta):
            return propagated_value_and_grad(jnp.asarray(theta), *args, *data, starts)

    def fun(theta):
        value, grad = evaluate(theta)
        return float(value), np.asarray(grad, dtype=float)

    return fun


def calibrate_transport(field: Any, tracks_or_observations, *, lags_s=None,
                        position_error_m: float | None = None, method: Any = None, integrator: Any = None,
                        max_starts: int | None = 600, initial: tuple[float, float] | None = None,
                        chunk: int = 4096) -> "Calibration":
    """Estimate the eddy diffusivity K (m²/s) and decorrelation time τ (s) from fit-set transitions.

    Maximises the mean transition log likelihood of the section comment above over
    θ = (log K, log τ) with L-BFGS-B inside bounds set by the data's scales (:func:`_bounds`), from
    ``initial`` (default:
    the field's K and τ, else 1 m²/s and 1 h).  ``field`` is a FlowField or any pytree with
    ``mean_at(x)``/``cov_at(x)`` (e.g. a known analytic field) — or a list of fields with a
    list of track sets of the same length (cross-validation folds: field i forecasts the
    tracks i it was not fitted on; the likelihood is pooled over all folds).  ``method``: a
    moments strategy, default ``Linearize()`` (the exact fast route); ``lags_s`` default: the
    data's (:attr:`driftwise.data.datascales.DataScales.calibration_lags_s`, from the first track set);
    ``integrator`` default RK4 with steps of the longest lag / 48 (30 min for a 24 h lag);
    ``position_error_m`` defaults to the field's; ``max_starts`` is
    shared among the folds.  Use the fit set only: calibrating on held-out tracks would leak
    them into the score.  Returns a :class:`Calibration` (K, τ, the optimiser's record, the number of
    transitions and rough log-space standard errors).
    """


    fields, datas = _folds(field, tracks_or_observations)
    scales = calibration_scales(datas[0])
    lags_s = scales.calibration_lags_s if lags_s is None else lags_s
    method = Linearize() if method is None else method
    integrator = RK4(step_s=max(lags_s) / RK4_STEPS_PER_LONGEST_LAG) if integrator is None else integrator
    sigma = _calibration_sigma(fields[0], position_error_m)
    per_fold = None if max_starts is None else max(1, int(max_starts) // len(fields))
    transitions = [transitions_from_tracks(data, lags_s=lags_s, position_error_m=sigma, max_starts=per_fold,
                                           frame=getattr(f, "frame", None), floor_m2=(1e-3 * scales.median_step_m)**2)
                   for f, data in zip(fields, datas)]
    fun = _pooled([transition_objective(f, t, sigma, method, integrator, chunk) for f, t in zip(fields, transitions)],
                  [float(t.weight.sum()) for t in transitions])
    bounds = _bounds(scales)
    theta0 = np.clip(np.log(_initial_transport(fields[0], initial)), [b[0] for b in bounds], [b[1] for b in bounds])
    result = _minimise(fun, theta0, bounds)
    k, tau = (float(v) for v in np.exp(result.x))
    return Calibration(
        diffusivity_m2_s=k, decorrelation_time_s=tau, mean_log_likelihood=-float(result.fun),
        n_transitions=int(sum(t.weight.sum() for t in transitions)),
        n_starts=int(sum(np.count_nonzero(t.weight.sum(axis=1)) for t in transitions)), n_folds=len(fields),
        lags_s=tuple(float(v) for v in transitions[0].times_s[1:]), position_error_m=sigma,
        converged=bool(result.success), iterations=int(result.nit), message=str(result.message),
        initial=(float(np.exp(theta0[0])), float(np.exp(theta0[1]))), at_bound=_at_bounds(result.x, bounds),
        log_std=_log_std(fun, result.x, int(sum(t.weight.sum() for t in transitions)), bounds),
        method=type(method).__name__)


GRID_POINTS = 7   # per parameter, in log space, for the fallback start of :func:`_minimise`


def _minimise(fun: Callable, theta0: np.ndarray, bounds) -> Any:
    """L-BFGS-B from ``theta0``; when it stops abnormally (a line search that found no decrease, typically where
    the likelihood turns non-finite) or ends at a non-finite value, start again from the best finite point of a
    7 × 7 grid over the log-space bounds and keep the better optimum.  A non-finite value at a trial point is
    reported to the optimiser as +1e300 with a zero gradient, so its line search backs off instead of failing."""
    def safe(theta):
        value, grad = fun(theta)
        if not (np.isfinite(value) and np.all(np.isfinite(grad))):
            return 1e300, np.zeros_like(np.asarray(theta, dtype=float))
        return value, grad

    options = {"maxiter": 100, "ftol": 1e-12, "gtol": 1e-8}
    result = minimize(safe, theta0, jac=True, method="L-BFGS-B", bounds=bounds, options=options)
    if result.success and result.fun < 1e300:
        return result
    axes = [np.linspace(lo, hi, GRID_POINTS) for lo, hi in bounds]
    starts = np.stack(np.meshgrid(*axes), -1).reshape(-1, 2)
    values = np.array([safe(theta)[0] for theta in starts])
    retry = minimize(safe, starts[int(np.argmin(values))], jac=True, method="L-BFGS-B", bounds=bounds, options=options)
    return retry if retry.fun <= result.fun else result


def _bounds(scales: DataScales) -> list[tuple[float, float]]:
    """log-space L-BFGS-B bounds of (K, τ) from the data's scales (driftwise.data.datascales)."""
    return [tuple(np.log(scales.diffusivity_bounds_m2_s)), tuple(np.log(scales.decorrelation_time_bounds_s))]


def _folds(field: Any, data: Any) -> tuple[list[Any], list[Any]]:
    if not isinstance(field, (list, tuple)):
        return [field], [data]
    if not isinstance(data, (list, tuple)) or len(data) != len(field) or not field:
        raise InputError("calibration folds: give as many track sets as fields (one per fold)")
    return list(field), list(data)


def _pooled(funs: list[Callable], weights: list[float]) -> Callable:
    """θ ↦ Σ_f w_f fun_f(θ) / Σ_f w_f for (value, gradient) pairs."""
    total = float(sum(weights))

    def fun(theta):
        value, grad = 0.0, np.zeros(2)
        for f, w in zip(funs, weights):
            v, g = f(theta)
            value, grad = value + w * v / total, grad + w * g / total
        return value, grad

    return fun


def posterior_refit(field: Any, tracks) -> Any:
    """``field`` with its variational posterior q recomputed from ``tracks`` only (same hyperparameters).

    The ELBO-optimal Gaussian q for fixed kernel, inducing points, K and σ₀ (Titsias 2009) —
    one linear solve, so a cross-validation fold costs a fraction of a refit.  The
    hyperparameters were learnt on all tracks, which leaves the folds slightly optimistic.
    """


    obs = velocity_observations(tracks, position_error_m=float(field.position_error_m))
    params = exact_q(field.params, batch_from_observations(obs), jitter_multiple=field.jitter_multiple)
    return dataclasses.replace(field, params=params)


def cross_validation_folds(tracks, refit: Callable[[Any], Any], *, folds: int = 2) -> tuple[list[Any], list[Any]]:
    """(fields, held-out tracks): track j goes to fold j mod ``folds``; field i = ``refit`` on the other folds."""
    if not hasattr(tracks, "select") or not hasattr(tracks, "unique_ids"):
        raise InputError("cross-validated calibration needs Tracks (with track ids), not velocity observations; "
                         "give the tracks or use folds=1")
    ids = [str(i) for i in tracks.unique_ids]
    if not (isinstance(folds, int) and 2 <= folds <= len(ids)):
        raise InputError(f"cross-validated calibration needs 2 <= folds <= number of tracks ({len(ids)}), "
                         f"got {folds!r}")
    fields, held = [], []
    for f in range(folds):
        test = set(ids[f::folds])
        fields.append(refit(tracks.select([i for i in ids if i not in test])))
        held.append(tracks.select(sorted(test)))
    return fields, held


def _calibration_sigma(field: Any, position_error_m: float | None) -> float:
    sigma = getattr(field, "position_error_m", None) if position_error_m is None else position_error_m
    if sigma is None:
        raise InputError("calibration needs the position error of a fix: give position_error_m (m)")
    sigma = float(sigma)
    if not (np.isfinite(sigma) and sigma >= 0):
        raise InputError(f"position_error_m must be a finite number of metres >= 0, got {sigma!r}")
    return sigma


def _initial_transport(field: Any, initial: tuple[float, float] | None) -> np.ndarray:
    """(K, τ) to start from, positive (the caller clips them into the data's bounds)."""
    if initial is not None:
        return np.maximum(np.asarray(initial, dtype=float), 1e-300)
    k = getattr(field, "diffusivity_m2_s", None)
    tau = getattr(field, "decorrelation_time_s", None)
    return np.array([1.0 if k is None else max(float(k), 1e-300), 3600.0 if tau is None else max(float(tau), 1e-300)])


def _at_bounds(theta: np.ndarray, bounds) -> dict[str, bool]:
    names = ("diffusivity_m2_s", "decorrelation_time_s")
    return {n: bool(min(abs(t - lo), abs(t - hi)) < 1e-6) for n, t, (lo, hi) in zip(names, theta, bounds)}


def _log_std(fun: Callable, theta: np.ndarray, n: int, bounds=None) -> dict[str, float]:
    """Rough standard errors of log K and log τ from the curvature of the total negative log likelihood.

    Hessian by differences of the exact gradient over a 1e-3 step, kept inside ``bounds`` (one-sided at a
    bound); √diag of its inverse, or, when the Hessian is (nearly) singular, 1/√H_ii for the identified
    parameter and inf for the other; inf for both when a gradient there is not finite.
    """
    step = 1e-3
    lows, highs = (np.array([b[0] for b in bounds]), np.array([b[1] for b in bounds])) if bounds else (None, None)
    hess = np.empty((2, 2))
    for j in range(2):
        e = np.zeros(2)
        e[j] = step
        up, down = theta + e, theta - e
        if bounds:
            up, down = np.minimum(up, highs), np.maximum(down, lows)
        hess[:, j] = (fun(up)[1] - fun(down)[1]) / max(up[j] - down[j], 1e-12)
    if not np.all(np.isfinite(hess)):
        return {"log_diffusivity": float("inf"), "log_decorrelation_time": float("inf")}
    hess = n * 0.5 * (hess + hess.T)
    diag = np.diag(hess)
    det = np.linalg.det(hess)
    if np.all(diag > 0) and det > 1e-8 * diag[0] * diag[1]:
        std = np.sqrt(np.diag(np.linalg.inv(hess)))
    else:
        std = np.where(diag > 1e-8 * max(diag.max(), 1e-300), 1.0 / np.sqrt(np.abs(diag) + 1e-300), np.inf)
    return {"log_diffusivity": float(std[0]), "log_decorrelation_time": float(std[1])}



def calibrate(field: Any, tracks_or_observations, *, folds: int = 2, refit: Callable[[Any], Any] | None = None,
              lags_s=None, max_starts: int | None = 1000, method: Any = None) -> Any:
    """The FlowField with K and τ replaced by calibrated values (see :func:`calibrate_transport`).

    Give the tracks the field was fitted on.  With ``folds`` ≥ 2 (default 2) the calibration is
    cross-validated by track: fold i's tracks are forecast by the field refitted without them
    (``refit(tracks) -> FlowField``; default :func:`posterior_refit`, the same hyperparameters
    with q recomputed) and K, τ maximise the pooled likelihood of those out-of-sample
    transitions.  ``folds=1`` lets the field forecast its own fit tracks, which it has partly
    learnt, so the spread comes out optimistic.  The returned field's ``diffusivity_m2_s`` and
    ``decorrelation_time_s`` (so every forecast and the saved model) use the calibrated values;
    ``fit_info["calibration"]`` keeps the previous ones and the optimiser's record.  The
    variational posterior itself is unchanged.  ``lags_s`` default: from the data's sampling interval
    and track durations (:attr:`driftwise.data.datascales.DataScales.calibration_lags_s`).
    After a transition fit (``fit_info["likelihood"] == "transitions"``) K was estimated by the fit's own
    likelihood: the field keeps its K and τ and the calibrated pair is stored as ``fit_info["calibration_check"]``.
    """
    lags_s = calibration_scales(tracks_or_observations).calibration_lags_s if lags_s is None else lags_s
    if folds == 1:
        fields, data = field, tracks_or_observations
    else:
        refit = functools.partial(posterior_refit, field) if refit is None else refit
        fields, data = cross_validation_folds(tracks_or_observations, refit, folds=folds)
    found = calibrate_transport(fields, data, lags_s=lags_s, max_starts=max_starts, method=method,
                                       position_error_m=field.position_error_m,
                                       initial=(field.diffusivity_m2_s, field.decorrelation_time_s or 3600.0))
    k, tau, info = found.diffusivity_m2_s, found.decorrelation_time_s, {**found.to_dict(), "folds": int(folds)}
    meta = json.loads(field.metadata_json)
    record = meta.setdefault("fit", {})
    record["calibration"] = plain({
        **info, "diffusivity_m2_s_before": field.diffusivity_m2_s,
        "decorrelation_time_s_before": field.decorrelation_time_s,
        "decorrelation_time_source_before": record.get("decorrelation_time_source")})
    source = "calibrated: transition likelihood on the fit tracks" + (
        f" ({folds}-fold cross-validated by track)" if folds != 1 else " (in sample)")
    if record.get("likelihood") == "transitions":   # K came from the transition fit's own bound: this is a check
        record["calibration_check"] = {"diffusivity_m2_s": float(k), "decorrelation_time_s": float(tau),
                                       "source": source}
        return dataclasses.replace(field, metadata_json=json.dumps(meta, sort_keys=True))
    record["decorrelation_time_source"] = record["diffusivity_source"] = source
    params = dataclasses.replace(field.params, log_diffusivity_m2_s=jnp.log(jnp.asarray(k, dtype=jnp.float64)))
    return dataclasses.replace(field, params=params, decorrelation_time_s=float(tau),
                               metadata_json=json.dumps(meta, sort_keys=True))
