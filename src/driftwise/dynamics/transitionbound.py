"""The expected transition log-likelihood of consecutive fixes under a field's variational posterior.

The fit through the transition density (:mod:`driftwise.dynamics.transitionfit`) needs, for each pair of
fixes x_k → x_{k+1} over Δt_k, the expectation over the field posterior q of the transition log density,
E_q log p(x_{k+1} | x_k, v) — the data term of the variational bound (Titsias 2009; Hensman, Fusi &
Lawrence 2013), the same form as the velocity fit's E_q log N(y | v(x), r I).  Given the field v, the
particle follows dx = v(x) dt + √(2K) dβ; started from N(x_k, R) (R = σ_pos² I) its Gaussian moments
(Jazwinski 1970; Maybeck 1982, vol. 2) obey

    dm/dt = E[v(x)],   dP/dt = C + Cᵀ + 2K I,   C = E[v(x)(x − m)ᵀ],   x ~ N(m, P),

with the expectations by the moment method (cubature, linearization, …) of
:mod:`driftwise.dynamics.moments`.  Under q, v = μ + δv with μ the posterior mean and δv the field
error of covariance Σ(x); to first order the end mean moves by δm with dδm/dt = J̄ δm + δv(x(t)),
J̄ = E[∂μ/∂x] over N(m, P), and an error with autocorrelation e^{−|s|/τ} along the path (Taylor 1921) gives
V = Cov_q[δm]:

    dV/dt = J̄ V + V J̄ᵀ + 2 τ (1 − e^{−a/τ}) Σ(m(a)),        a the time since t_k,

(the rate the forecast SDE adds to its diffusion, :mod:`driftwise.dynamics.sde`).  The expected log
density of the next fix under x_{k+1} ~ N(m + δm, P + R) is then, exactly for Gaussian δm,

    E_q log N(x_{k+1} | m + δm, P + R) = log N(x_{k+1} | m, P + R) − ½ tr((P + R)⁻¹ V)     (nats).

The velocity uncertainty is a penalty (its trace term), not extra variance: the forecast's
predictive density log N(x_{k+1} | m, P + V + R) would let V take the place of the random walk and
bias K low (Jankowiak, Pleiss & Gardner 2020 describe that effect of predictive objectives for
sparse GPs; measured here: 3-h fixes in the Lamb–Oseen vortex gave K 0.49 m²/s against 1).

Approximations, stated: the Gaussian closure of the moment equations; δm linear in δv; Σ taken at
the mean m (it varies on the kernel's length scale, the particle cloud is far smaller), and along the
mean path linear in time between its values at the two fixes,

    Σ(m(a)) ≈ (1 − a/Δt) Σ(x_k) + (a/Δt) Σ(x_{k+1})

(the mean path starts at x_k and ends at x_{k+1} up to the fix's error and the misfit; exact for a
Σ linear in x along a straight path, tests/dynamics/test_transitionbound.py); and V
propagated with the expected Jacobian J̄ = C P⁻¹ that the moment method already gives (Stein's lemma,
:func:`expected_jacobian`; equal to ∂μ/∂x at m for a linear μ and for linearization, and otherwise within
O(P ∂³μ) of it: the gradient's variation over the cloud, ~ (150 m / 2 km)² for 3-h fixes in a 2-km eddy).
Cost: no derivative of the kernel is evaluated (the Jacobian at m was, and its reverse-mode derivative
dominated a step); the posterior covariance (one (d × Md)(Md × Md) product) is evaluated twice per
transition, at its fixes, outside the RK4 loop (it was once per RK4 stage: 28 times for 7 substeps), while
the cheap posterior mean (one d × Md row) is what the cubature points see.
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp

from .. import smallmatrix
from .moments import psd_cholesky
from .sde import SDE, field_drift, velocity_memory_weight
from .transitions import gaussian_log_density

__all__ = ["bound_rates", "expected_jacobian", "expected_log_likelihoods"]


def _isotropic_rate(diffusivity_m2_s: jax.Array, x: jax.Array) -> jax.Array:
    """2 K I (m²/s), the random walk's rate matrix, the same at every x (d,)."""
    return 2.0 * diffusivity_m2_s * jnp.eye(x.shape[-1], dtype=x.dtype)


def _random_walk_sde(posterior: Any, diffusivity_m2_s: jax.Array) -> SDE:
    """dx = μ(x) dt + √(2K) dβ: the posterior-mean drift without the velocity-uncertainty term."""
    return SDE(drift=jax.tree_util.Partial(field_drift, posterior),
               diffusion=jax.tree_util.Partial(_isotropic_rate, diffusivity_m2_s))


def expected_jacobian(cross: jax.Array, cov: jax.Array) -> jax.Array:
    """J̄ = C P⁻¹ (1/s), the expected velocity gradient E[∂μ/∂x] over x ~ N(m, P) by Stein's lemma
    (E[μ(x)(x − m)ᵀ] = E[∂μ/∂x] P for Gaussian x), from the moment method's C (d, d) m²/s and P (d, d) m².

    P⁻¹ is taken on P's positive part: the factor of :func:`~driftwise.dynamics.moments.psd_cholesky` drops the
    columns whose pivot is at most 1e-13 of the largest variance, and J̄ has no component along them.  That covers
    P = 0 (J̄ = 0; there V = 0 too) and an RK4 stage whose P is indefinite: a stage is an extrapolation
    P + h (C + Cᵀ + …), not a covariance, and for a cloud drawn out by shear over a step that turns the flow by
    ~1 rad it loses definiteness (seen: eigenvalue −2·10⁴ m² against +7·10⁵ m², 3-h fixes 1 km from a 2-km
    eddy's centre), where a plain Cholesky returns NaN."""
    chol = psd_cholesky(cov)
    kept = jnp.diagonal(chol) > 0
    safe = chol + jnp.diag(jnp.where(kept, 0.0, 1.0).astype(cov.dtype))     # unit pivot in a dropped column
    inner = jnp.where(kept[:, None], smallmatrix.solve_lower(safe, cross.T), 0.0)
    return jnp.where(kept[:, None], smallmatrix.solve_upper(safe.T, inner), 0.0).T


def bound_rates(method: Any, posterior: Any, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array,
                field_cov: tuple[jax.Array, jax.Array, jax.Array], state: tuple[jax.Array, ...]) -> tuple[jax.Array, ...]:
    """d/dt of (m (d,) m, P (d, d) m², V (d, d) m², a s) of the module docstring; exactly symmetric.

    ``field_cov`` (Σ(x_k), Σ(x_{k+1}) (d, d) m²/s², Δt s): Σ along the path, linear in the age a."""
    mean, cov, var, age = state
    sigma_start, sigma_end, span = field_cov
    along = jnp.clip(age / span, 0.0, 1.0)
    e_drift, cross, e_diff = method.expectations(_random_walk_sde(posterior, diffusivity_m2_s), mean, cov, 0.0)
    dp = (cross + cross.T) + 0.5 * (e_diff + e_diff.T)                           # as moments.moment_rates
    flux = expected_jacobian(cross, cov) @ var
    weight = velocity_memory_weight(decorrelation_time_s, age)
    dv = (flux + flux.T) + 2.0 * weight * (sigma_start + along * (sigma_end - sigma_start))
    return e_drift, dp, dv, jnp.ones_like(age)


def _one(method, integrator, posterior, k, tau, r, row):
    """E_q log p(x1 | x0) for one transition row (x0 (d,), x1 (d,), Δt)."""
    x0, x1, dt = row
    field_cov = (posterior.cov_at(x0), posterior.cov_at(x1), dt)

    def f(state):
        return bound_rates(method, posterior, k, tau, field_cov, state)

    y0 = (x0, r, jnp.zeros_like(r), jnp.zeros((), x0.dtype))
    mean, cov, var, _ = (stack[-1] for stack in integrator.integrate(f, y0, jnp.stack([jnp.zeros_like(dt), dt])))
    total = cov + r
    penalty = jnp.trace(smallmatrix.cho_solve(smallmatrix.cholesky(0.5 * (total + total.T)), 0.5 * (var + var.T)))
    return gaussian_log_density(x1, mean, total) - 0.5 * penalty


def expected_log_likelihoods(posterior: Any, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array,
                             method: Any, integrator: Any, start_m: jax.Array, end_m: jax.Array, dt_s: jax.Array,
                             position_var_m2: jax.Array, chunk: int) -> jax.Array:
    """E_q log p(x_{k+1} | x_k) (n,) nats (module docstring), traceable and differentiable.

    ``posterior`` has ``mean_at``/``cov_at`` (ParamPosterior or PointPosterior); K m²/s, τ s; ``integrator``
    a FixedStepRK4 (reverse-mode differentiable); start_m, end_m (n, d) m; dt_s (n,) s; σ_pos² m².
    """
    d = start_m.shape[-1]
    r = position_var_m2 * jnp.eye(d, dtype=start_m.dtype)
    k = jnp.asarray(diffusivity_m2_s, start_m.dtype)
    tau = jnp.asarray(decorrelation_time_s, start_m.dtype)

    def one(row):
        return _one(method, integrator, posterior, k, tau, r, row)

    return jax.lax.map(one, (start_m, end_m, dt_s), batch_size=min(int(chunk), start_m.shape[0]))
