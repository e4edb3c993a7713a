"""Closed-form updates of the variational distribution q(w) = N(m, SSᵀ) of a FlowField.

With Φ = K(X, Z) L_Z^{−T} (whitened inducing values, see :mod:`driftwise.gp.field`) and
R = diag(r_n), the ELBO-optimal q for fixed hyperparameters has natural parameters

    Λ = (SSᵀ)^{−1} = I + Φᵀ R⁻¹ Φ,      η = Λ m = Φᵀ R⁻¹ y

(Titsias 2009, "Variational learning of inducing variables in sparse Gaussian
processes", eq. 10, in whitened form).  Both sums run over observations, so they are
accumulated chunk by chunk for any N (:func:`exact_q`); on a minibatch B scaled by
N/|B| they give the target of a natural-gradient step θ ← (1 − γ)θ + γθ̂_B (Hensman,
Fusi & Lawrence 2013, "Gaussian processes for big data", §3; γ = 1 on all data is
the optimum itself).  All functions are pure and jit-able; shapes use M·d for the
number of whitened inducing values.
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.linalg import solve_triangular

from . import field as fld

__all__ = ["CHUNK", "data_precision", "exact_q", "full_elbo", "natural_from_q", "natural_step", "q_from_natural"]

CHUNK = 8192  # observations per chunk in the exact passes


def natural_from_q(q_mean: jax.Array, q_sqrt: jax.Array) -> tuple[jax.Array, jax.Array]:
    """(Λ, η) = ((SSᵀ)^{−1}, Λm) of q(w) = N(m, SSᵀ); shapes (M·d, M·d), (M·d,)."""
    s_inv = solve_triangular(q_sqrt, jnp.eye(q_sqrt.shape[0], dtype=q_sqrt.dtype), lower=True)
    precision = s_inv.T @ s_inv
    return precision, precision @ q_mean


def q_from_natural(precision: jax.Array, eta: jax.Array) -> tuple[jax.Array, jax.Array]:
    """Inverse of :func:`natural_from_q`: m = Λ^{−1}η and lower-triangular S with SSᵀ = Λ^{−1}.

    Λ is factored in reversed order (JΛJ = UUᵀ, so Λ = (JUJ)(JUJ)ᵀ with JUJ upper
    triangular) and S = (JUJ)^{−T}, as in :func:`driftwise.gp.field.optimal_q`.
    """
    upper = jnp.linalg.cholesky(precision[::-1, ::-1])[::-1, ::-1]
    s = solve_triangular(upper.T, jnp.eye(precision.shape[0], dtype=precision.dtype), lower=True)
    return s @ (s.T @ eta), s


def with_q(params: fld.FieldParams, mean: jax.Array, sqrt: jax.Array) -> fld.FieldParams:
    """``params`` with q(w) = N(``mean``, ``sqrt`` ``sqrt``ᵀ)."""
    return dataclasses.replace(params, q_mean=mean, q_sqrt_raw=fld.q_sqrt_raw_from(sqrt))


def data_precision(params: fld.FieldParams, batch: fld.ObservationBatch, *,
                   jitter_multiple) -> tuple[jax.Array, jax.Array]:
    """(Σ_n Φ_nᵀ R_n⁻¹ Φ_n, Σ_n Φ_nᵀ R_n⁻¹ y_n) over ``batch``, Φ = K(X, Z) L_Z^{−T} (b·d, M·d).

    The likelihood's contribution to the natural parameters of q(w) (Titsias 2009, eq. 10 in
    whitened form): the optimal q on these observations alone has Λ = I + the first term
    and Λm = the second.
    """
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    if params.is_time_varying:
        phi_t = fld.batch_projection(params, chol, batch).reshape(-1, params.q_mean.shape[0]).T
    else:
        kzx = params.kernel.gram_matrix(params.inducing_m, batch.position_m)     # (M·d, b·d)
        phi_t = solve_triangular(chol, kzx, lower=True)                          # Φᵀ
    weight = jnp.repeat(1.0 / fld.noise_variance_m2_s2(params, batch), batch.position_m.shape[1])
    return (phi_t * weight) @ phi_t.T, phi_t @ (weight * batch.velocity_m_s.reshape(-1))


def natural_step(params: fld.FieldParams, batch: fld.ObservationBatch, n_total, gamma, *,
                 jitter_multiple) -> fld.FieldParams:
    """θ ← (1 − γ) θ + γ θ̂_B in natural parameters (Hensman et al. 2013, §3), θ̂_B = (I + (N/b) ΦᵀR⁻¹Φ,
    (N/b) ΦᵀR⁻¹y) the optimum for minibatch B scaled to N observations; γ = 1 gives θ̂_B itself."""
    lam_data, eta_data = data_precision(params, batch, jitter_multiple=jitter_multiple)
    scale = n_total / batch.position_m.shape[0]
    lam_old, eta_old = natural_from_q(params.q_mean, params.q_sqrt)
    eye = jnp.eye(lam_old.shape[0], dtype=lam_old.dtype)
    lam = (1 - gamma) * lam_old + gamma * (eye + scale * lam_data)
    eta = (1 - gamma) * eta_old + gamma * scale * eta_data
    return with_q(params, *q_from_natural(lam, eta))


natural_step_jit = jax.jit(natural_step, static_argnames=("jitter_multiple",))
_chunk_precision = jax.jit(data_precision, static_argnames=("jitter_multiple",))


@jax.jit(static_argnames=("jitter_multiple",))
def _chunk_log_likelihood(params, batch, *, jitter_multiple):
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    return jnp.sum(fld.expected_log_likelihood(params, batch, chol))


def take(batch: fld.ObservationBatch, idx) -> fld.ObservationBatch:
    """Rows ``idx`` of every array of ``batch``."""
    return jax.tree_util.tree_map(lambda a: a[idx], batch)


def chunks(n: int) -> list[np.ndarray]:
    """Row indices 0…n−1 split into near-equal chunks of at most CHUNK (at most two distinct sizes)."""
    return np.array_split(np.arange(n), max(1, math.ceil(n / CHUNK)))


def for_model(params: fld.FieldParams, batch: fld.ObservationBatch) -> fld.ObservationBatch:
    """``batch`` as ``params`` use it: a steady model drops the times, so its compiled programs are the steady ones."""
    return batch if params.is_time_varying or batch.time_s is None else batch.without_time()


def exact_q(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float) -> fld.FieldParams:
    """The ELBO-optimal q(w) on all of ``batch`` (any size), accumulated over chunks of ≤ 8192 rows."""
    batch = for_model(params, batch)
    size = params.q_mean.shape[0]
    lam, eta = jnp.eye(size), jnp.zeros(size)
    for idx in chunks(batch.position_m.shape[0]):
        d_lam, d_eta = _chunk_precision(params, take(batch, idx), jitter_multiple=jitter_multiple)
        lam, eta = lam + d_lam, eta + d_eta
    return with_q(params, *q_from_natural(lam, eta))


def full_elbo(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float) -> float:
    """ELBO over all observations: Σ_n E_q log N(y_n | v(x_n), R_n) − KL(q ‖ p) (nats), chunked."""
    batch = for_model(params, batch)
    total = sum(float(_chunk_log_likelihood(params, take(batch, idx), jitter_multiple=jitter_multiple))
                for idx in chunks(batch.position_m.shape[0]))
    return total - float(fld.kl_divergence(params))


@jax.jit(static_argnames=("jitter_multiple",))
def mean_speed_squared(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float) -> jax.Array:
    """Σ_n |μ(x_n, t_n)|² with μ = K(x, Z) L_Z^{−T} m, the posterior mean at the observations (m²/s²)."""
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    if params.is_time_varying:
        return jnp.sum((fld.batch_projection(params, chol, batch) @ params.q_mean) ** 2)
    x = batch.position_m
    alpha = solve_triangular(chol.T, params.q_mean, lower=False)
    return jnp.sum((params.kernel.gram_matrix(x, params.inducing_m) @ alpha) ** 2)
