"""The transition density of consecutive fixes through the field's Itô SDE.

For consecutive fixes x_k (at t_k) and x_{k+1} (at t_k + Δt_k) of one track, each the true
position plus N(0, R) error with R = σ_pos² I, the true position at t_k is taken as
N(x_k, R); its Gaussian moments are propagated over Δt_k through

    dx = μ(x) dt + L(x) dβ,   D = L Lᵀ = 2 (K I + τ (1 − e^{−a/τ}) Σ(x))

(:mod:`driftwise.dynamics.sde`; a the time since t_k) by the assumed-density moment equations
of :mod:`driftwise.dynamics.moments` (Jazwinski 1970; Maybeck 1982, vol. 2), giving N(m_k, P_k);
for a time-dependent SDE (a time-varying flow) each transition is integrated from its own fix's
absolute time t_k (μ(x, t), D(x, t) with t = t_k + a);
the next fix then has the density

    log p(x_{k+1} | x_k) = log N(x_{k+1} | m_k, P_k + R)                        (nats).

Each transition is integrated by :class:`FixedStepRK4`: a fixed number of RK4 substeps (a
static ``substeps``), the first n_k = min(substeps, ⌈Δt_k/step_s⌉) of length Δt_k/n_k and the rest of
length zero (an RK4 step of length 0 returns its state unchanged).  The loop is a fixed-length
``jax.lax.scan``, so reverse-mode ``jax.grad`` runs through it (moments.RK4 picks its substep
count from the data in a ``fori_loop``, which reverse mode cannot differentiate).  Irregular
Δt and gaps are ordinary input: every transition has its own step; a transition longer than
``substeps × step_s`` takes ``substeps`` longer steps.

Transitions are vmapped in chunks (``jax.lax.map``) and the whole computation is a pure jax
function of the SDE's parameters.  :class:`ParamPosterior` evaluates a field's posterior from
its raw parameters differentiably (no eigendecomposition), for the fit through this density
(:mod:`driftwise.dynamics.transitionfit`).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from functools import partial
from typing import Any, Callable

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.linalg import solve_triangular

from .. import smallmatrix
from ..data.observations import velocity_observations
from ..errors import InputError
from ..gp.field import FieldParams, inducing_cholesky
from .moments import SphericalCubature, propagate_one, rk4_step
from .sde import SDE, join_from_jit, split_for_jit

__all__ = ["TransitionSet", "transition_set", "FixedStepRK4", "ParamPosterior", "log_likelihoods",
           "transition_log_likelihoods", "gaussian_log_density"]


@dataclass(frozen=True, eq=False)
class TransitionSet:
    """Consecutive fixes of the same track.

    ``start_m`` (n, d) fix x_k, ``end_m`` (n, d) fix x_{k+1}, ``dt_s`` (n,) Δt_k > 0,
    ``track_index`` (n,), ``position_error_m`` σ_pos of one fix per component (m),
    ``start_time_s`` (n,) t_k, the absolute time of fix x_k (s, the model's time axis; None when unknown,
    which only a steady SDE accepts).
    """

    start_m: np.ndarray
    end_m: np.ndarray
    dt_s: np.ndarray
    track_index: np.ndarray
    position_error_m: float
    start_time_s: np.ndarray | None = None

    @property
    def n(self) -> int:
        return int(self.dt_s.shape[0])

    @property
    def dim(self) -> int:
        return int(self.start_m.shape[1])

    def take(self, idx: Any) -> "TransitionSet":
        """The transitions at rows ``idx``."""
        return dataclasses.replace(self, start_m=self.start_m[idx], end_m=self.end_m[idx], dt_s=self.dt_s[idx],
                                   track_index=self.track_index[idx],
                                   start_time_s=None if self.start_time_s is None else self.start_time_s[idx])


def transition_set(tracks_or_observations: Any, *, position_error_m: float = 10.0) -> TransitionSet:
    """The transitions of driftwise Tracks (or of velocity Observations, whose pairs of fixes are
    x_k = mid − v Δt/2 at t_k = t_mid − Δt/2, x_{k+1} = mid + v Δt/2).  Raises InputError on non-finite or
    empty input."""
    data = tracks_or_observations
    if hasattr(data, "velocity_m_s") and hasattr(data, "dt_s"):
        obs = data
    elif hasattr(data, "track_id") and hasattr(data, "position_m"):
        obs = velocity_observations(data, position_error_m=position_error_m)
    else:
        raise InputError(f"transitions need driftwise Tracks or Observations, got {type(data).__name__}")
    mid, dt = np.asarray(obs.position_m, float), np.asarray(obs.dt_s, float)
    half = 0.5 * np.asarray(obs.velocity_m_s, float) * dt[:, None]
    trans = TransitionSet(mid - half, mid + half, dt, np.asarray(obs.track_index), float(obs.position_error_m),
                          np.asarray(obs.time_s, float) - 0.5 * dt)
    _validate(trans)
    return trans


def _validate(trans: TransitionSet) -> None:
    if trans.n == 0:
        raise InputError("transitions: no pair of consecutive fixes in one track")
    bad = ~(np.isfinite(trans.dt_s) & (trans.dt_s > 0))
    bad |= ~np.all(np.isfinite(trans.start_m) & np.isfinite(trans.end_m), axis=1)
    if bad.any():
        raise InputError(f"transition {int(np.argmax(bad))}: time step must be > 0 and positions finite")
    if trans.start_time_s is not None and not (np.shape(trans.start_time_s) == trans.dt_s.shape
                                                and np.all(np.isfinite(trans.start_time_s))):
        raise InputError("transitions: start_time_s must be one finite time (s) per transition")
    if not (np.isfinite(trans.position_error_m) and trans.position_error_m >= 0):
        raise InputError(f"position error must be a finite number of metres ≥ 0, got {trans.position_error_m!r}")


# ---------------------------------------------------------------- fixed-step integrator


@partial(jax.tree_util.register_dataclass, data_fields=["step_s"], meta_fields=["substeps"])
@dataclass(frozen=True)
class FixedStepRK4:
    """RK4 with a fixed number of substeps per output interval (reverse-mode differentiable).

    An interval of length Δt uses n = min(``substeps``, ⌈Δt/``step_s``⌉) equal steps of Δt/n and
    ``substeps`` − n steps of length zero, all inside one fixed-length scan.  Global error O(h⁴).
    ``step_s`` is traced data, ``substeps`` static (it sets the scan length).  Each step is rematerialised
    in reverse mode (``jax.checkpoint``): the backward pass keeps only the state between steps and recomputes
    the four stages, instead of stacking every stage's kernel intermediates over the scan (same values; the
    saving is in DEVELOPERS.md's benchmark record).
    """

    step_s: float = 900.0
    substeps: int = 16

    def integrate(self, f: Callable, y0: Any, times_s: jax.Array) -> Any:
        """States at times_s (T,) for y' = f(y), y(times_s[0]) = y0: (T, n) for an array y0 (n,), a pytree of
        such stacks for a pytree y0 (no flattening of a structured state, whose slices cost a pad each in reverse
        mode)."""
        slots = jnp.arange(self.substeps)
        step = jax.checkpoint(partial(rk4_step, f))

        def interval(y, span):
            count = jnp.clip(jnp.ceil(span / self.step_s * (1.0 - 1e-12)), 1, self.substeps)
            hs = jnp.where(slots < count, span / count, 0.0)
            y = jax.lax.scan(lambda state, h: (step(state, h), None), y, hs)[0]
            return y, y

        _, ys = jax.lax.scan(interval, y0, jnp.diff(times_s))
        return jax.tree.map(lambda first, rest: jnp.concatenate([first[None], rest]), y0, ys)


def substeps_for(dt_s: np.ndarray, step_s: float, max_substeps: int = 32) -> int:
    """The static substep count covering the longest Δt at ``step_s`` (at most ``max_substeps``)."""
    return int(np.clip(np.ceil(np.max(dt_s) / step_s * (1.0 - 1e-12)), 1, max_substeps))


# ---------------------------------------------------------------- differentiable posterior
@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class ParamPosterior:
    """A field's posterior at single points, differentiable in its raw parameters.

    With L_Z the inducing Cholesky factor and q(w) = N(m, S Sᵀ) (Titsias 2009; Hensman et al. 2013):
        mean(x) = K(x, Z) α,   α = L_Z^{−T} m
        cov(x)  = K(x, x) − K(x, Z) G K(x, Z)ᵀ,   G = W Wᵀ − (W S)(W S)ᵀ,   W = L_Z^{−T}
    G (M·d × M·d) is formed once per parameter value, so a point costs one (d × M·d)(M·d × M·d) product.
    Same values as FlowField.mean_at / cov_between(x, x); unlike PointPosterior (eigh of I − SSᵀ,
    whose gradient is undefined at repeated eigenvalues, e.g. at the prior) it has finite gradients
    everywhere.  ``tag`` is static and tells this pytree apart from PointPosterior under jit.
    """

    kernel: Any
    inducing_m: jax.Array
    alpha: jax.Array
    cov_weight: jax.Array
    tag: str = dataclasses.field(default="param-posterior", metadata=dict(static=True))

    @classmethod
    def from_params(cls, params: FieldParams, *, jitter_multiple: float) -> "ParamPosterior":
        """Build from FieldParams (one Cholesky, one triangular inverse, two (M·d)³ products)."""
        chol = inducing_cholesky(params, jitter_multiple=jitter_multiple)
        eye = jnp.eye(chol.shape[0], dtype=chol.dtype)
        whiten = solve_triangular(chol, eye, lower=True).T
        spread = whiten @ params.q_sqrt
        weight = whiten @ whiten.T - spread @ spread.T
        return cls(params.kernel, params.inducing_m, whiten @ params.q_mean, 0.5 * (weight + weight.T))

    def mean_at(self, x: jax.Array) -> jax.Array:
        """Posterior mean velocity at x (d,) m → (d,) m/s: Σ_j K(x, z_j) α_j (MatrixKernel.weighted_sum)."""
        return self.kernel.weighted_sum(x, self.inducing_m, self.alpha.reshape(-1, x.shape[-1]))

    def cov_at(self, x: jax.Array) -> jax.Array:
        """Posterior velocity covariance at x (d,) m → (d, d) m²/s², symmetrised."""
        kxz = self.kernel.gram_matrix(x[None, :], self.inducing_m)
        cov = self.kernel.block(x, x) - kxz @ self.cov_weight @ kxz.T
        return 0.5 * (cov + cov.T)


# ---------------------------------------------------------------- the likelihood
def gaussian_log_density(x: jax.Array, mean: jax.Array, cov: jax.Array) -> jax.Array:
    """log N(x | mean, cov) for one d-vector (nats), by Cholesky (smallmatrix: no batched LAPACK under vmap)."""
    chol = smallmatrix.cholesky(0.5 * (cov + cov.T))
    z = smallmatrix.solve_lower(chol, x - mean)
    return -0.5 * (z @ z + x.shape[-1] * jnp.log(2.0 * jnp.pi)) - 0.5 * smallmatrix.log_det_from_cholesky(chol)


def log_likelihoods(sde: SDE, method: Any, integrator: Any, start_m: jax.Array, end_m: jax.Array,
                    dt_s: jax.Array, position_var_m2: jax.Array, chunk: int, start_time_s: Any = None) -> jax.Array:
    """log N(x_{k+1} | m_k, P_k + R) per transition, shape (n,) (traceable, differentiable).

    start_m, end_m (n, d) m; dt_s (n,) s; position_var_m2 σ_pos² (m²); ``chunk`` transitions per vmap;
    ``start_time_s`` (n,) the fixes' absolute times t_k (s) for a time-dependent SDE, else None.
    """
    d = start_m.shape[-1]
    r = position_var_m2 * jnp.eye(d, dtype=start_m.dtype)

    def one(row):
        x0, x1, dt, t0 = row
        means, covs = propagate_one(sde, method, integrator, x0, r, jnp.stack([jnp.zeros_like(dt), dt]),
                                    0.0 if t0 is None else t0)
        return gaussian_log_density(x1, means[-1], covs[-1] + r)

    return jax.lax.map(one, (start_m, end_m, dt_s, start_time_s), batch_size=min(int(chunk), start_m.shape[0]))


@partial(jax.jit, static_argnames=("static", "method", "chunk"))
def _log_likelihoods_jit(dynamic, static, method, integrator, start, end, dt, var, chunk, t0=None):
    return log_likelihoods(join_from_jit(dynamic, static), method, integrator, start, end, dt, var, chunk, t0)


def transition_log_likelihoods(sde: SDE, transitions: TransitionSet, *, method: Any = SphericalCubature(),
                               integrator: FixedStepRK4 | None = None, step_s: float = 900.0,
                               chunk: int = 256) -> np.ndarray:
    """log p(x_{k+1} | x_k) (n,) nats for every transition (module docstring), as numpy.

    ``integrator`` defaults to FixedStepRK4(step_s, substeps covering the longest Δt, at most 32).
    A time-dependent SDE starts each transition at its fix's own time ``transitions.start_time_s``.
    """
    _validate(transitions)
    if integrator is None:
        integrator = FixedStepRK4(float(step_s), substeps_for(transitions.dt_s, step_s))
    if sde.with_time and transitions.start_time_s is None:
        raise InputError("transitions: a time-varying flow needs the fixes' times (start_time_s)")
    t0 = jnp.asarray(transitions.start_time_s) if sde.with_time else None
    dynamic, static = split_for_jit(sde)
    out = _log_likelihoods_jit(dynamic, static, method, integrator, jnp.asarray(transitions.start_m),
                               jnp.asarray(transitions.end_m), jnp.asarray(transitions.dt_s),
                               jnp.asarray(transitions.position_error_m**2), int(chunk), t0)
    return np.asarray(out)
