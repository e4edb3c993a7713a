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
number of whitened inducing values.  The full-data passes (:func:`exact_q`, :func:`full_elbo`) compute
their per-chunk statistics on every device of every process (driftwise.devices, jax.shard_map) and sum
them on the host in chunk order, so the result does not depend on the number of devices.
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.linalg import solve_triangular
from jax.sharding import PartitionSpec

from .. import devices
from . import field as fld

__all__ = ["CHUNK", "chunk_statistics", "data_precision", "exact_q", "full_elbo", "natural_elbo", "natural_from_q",
           "natural_step", "q_from_natural", "traced_elbo"]

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
                   jitter_multiple, mask=None) -> tuple[jax.Array, jax.Array]:
    """(Σ_n Φ_nᵀ R_n⁻¹ Φ_n, Σ_n Φ_nᵀ R_n⁻¹ y_n) over ``batch``, Φ = K(X, Z) L_Z^{−T} (b·d, M·d);
    rows with ``mask`` (b,) 0 are left out (their weight R_n⁻¹ is multiplied by it).

    The likelihood's contribution to the natural parameters of q(w) (Titsias 2009, eq. 10 in
    whitened form): the optimal q on these observations alone has Λ = I + the first term
    and Λm = the second.
    """
    phi_t = _projection_t(params, fld.inducing_cholesky(params, jitter_multiple=jitter_multiple), batch)
    weight = 1.0 / fld.noise_variance_m2_s2(params, batch)
    weight = jnp.repeat(weight if mask is None else weight * mask, batch.position_m.shape[1])
    return (phi_t * weight) @ phi_t.T, phi_t @ (weight * batch.velocity_m_s.reshape(-1))


def _projection_t(params: fld.FieldParams, chol, batch: fld.ObservationBatch) -> jax.Array:
    """Φᵀ = L_Z^{−1} K(Z, X), shape (M·d, b·d) (rows of Φ point-major, component-minor)."""
    if params.is_time_varying:
        return fld.batch_projection(params, chol, batch).reshape(-1, params.q_mean.shape[0]).T
    kzx = params.kernel.gram_matrix(params.inducing_m, batch.position_m)     # (M·d, b·d)
    return solve_triangular(chol, kzx, lower=True)


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


def natural_elbo(params: fld.FieldParams, batch: fld.ObservationBatch, n_total, gamma, *,
                 jitter_multiple) -> tuple[jax.Array, fld.FieldParams]:
    """:func:`natural_step` and then :func:`driftwise.gp.field.elbo` at the new q, from one Φ → (ELBO nats,
    ``params`` with the new q).

    With G = Φᵀ R⁻¹ Φ (the statistic of the step itself) the two q-dependent sums of the ELBO are traces,
    Σ_n ‖Φ_n‖²/r_n = tr G and Σ_n ‖Φ_n S‖²/r_n = tr(S Sᵀ G), so

        ELBO = (N/b) {Σ_n −½ [d log 2π r_n + (‖y_n − Φ_n m‖² + tr K(x_n, x_n)) / r_n] + ½ [tr G − tr(S Sᵀ G)]} − KL,

    the same number as :func:`driftwise.gp.field.elbo` with one b·d × (M·d)² product (and its gradient) in
    place of three.  Differentiable in the hyperparameters; the new q enters as a constant (stop_gradient),
    so with γ = 1 on all rows the gradient is that of Titsias' (2009) collapsed bound, as in the loop that
    first sets q and then differentiates the ELBO at it.
    """
    phi_t, r, weight, gram = _statistics(params, batch, jitter_multiple)
    b = batch.position_m.shape[0]
    y = batch.velocity_m_s.reshape(-1)
    scale = n_total / b
    lam_old, eta_old = natural_from_q(params.q_mean, params.q_sqrt)
    eye = jnp.eye(gram.shape[0], dtype=gram.dtype)
    lam = (1 - gamma) * lam_old + gamma * (eye + scale * jax.lax.stop_gradient(gram))
    eta = (1 - gamma) * eta_old + gamma * scale * jax.lax.stop_gradient(phi_t @ (weight * y))
    stepped = with_q(params, *jax.lax.stop_gradient(q_from_natural(lam, eta)))
    return _elbo_from_statistics(stepped, batch, n_total, phi_t, r, gram), stepped


@jax.jit(static_argnames=("jitter_multiple",))
def traced_elbo(params: fld.FieldParams, batch: fld.ObservationBatch, n_total, *, jitter_multiple) -> jax.Array:
    """:func:`driftwise.gp.field.elbo` at ``params``' own q, by the traces of G as in :func:`natural_elbo`
    (one b·d × (M·d)² product instead of per-observation projections; nats)."""
    phi_t, r, _, gram = _statistics(params, batch, jitter_multiple)
    return _elbo_from_statistics(params, batch, n_total, phi_t, r, gram)


def _statistics(params: fld.FieldParams, batch: fld.ObservationBatch, jitter_multiple):
    """(Φᵀ (F, b·d), r (b,), R⁻¹ per row (b·d,), G = Φᵀ R⁻¹ Φ (F, F))."""
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    if params.is_time_varying:
        phi_t = _projection_t(params, chol, batch)
    else:   # L_Z⁻¹ once (F³/3), then a product: XLA's triangular solve on F × b·d is several times slower
        inverse = solve_triangular(chol, jnp.eye(chol.shape[0], dtype=chol.dtype), lower=True)
        phi_t = inverse @ params.kernel.gram_matrix(params.inducing_m, batch.position_m)
    r = fld.noise_variance_m2_s2(params, batch)
    weight = jnp.repeat(1.0 / r, batch.position_m.shape[1])
    return phi_t, r, weight, (phi_t * weight) @ phi_t.T


def _elbo_from_statistics(params: fld.FieldParams, batch: fld.ObservationBatch, n_total, phi_t, r, gram):
    """(N/b) {Σ_n −½ [d log 2π r_n + (‖y_n − Φ_n m‖² + tr K_nn)/r_n] + ½ [tr G − tr(S Sᵀ G)]} − KL at params' q."""
    b, d = batch.position_m.shape
    sqrt = params.q_sqrt
    resid = jnp.sum(((batch.velocity_m_s.reshape(-1) - phi_t.T @ params.q_mean) ** 2).reshape(b, d), axis=1)
    data_term = jnp.sum(d * jnp.log(2.0 * jnp.pi * r) + (resid + fld.prior_trace(params, batch)) / r)
    trace_term = jnp.trace(gram) - jnp.sum(gram * (sqrt @ sqrt.T))
    return n_total / b * (-0.5 * data_term + 0.5 * trace_term) - fld.kl_divergence(params)


def _chunk_natural(params: fld.FieldParams, batch: fld.ObservationBatch, mask: jax.Array, jitter_multiple: float):
    """:func:`data_precision` of one chunk whose rows with ``mask`` 0 (padding) count for nothing."""
    return data_precision(params, batch, jitter_multiple=jitter_multiple, mask=mask)


def _chunk_log_likelihood(params: fld.FieldParams, batch: fld.ObservationBatch, mask: jax.Array,
                          jitter_multiple: float) -> jax.Array:
    """Σ_n mask_n E_q log N(y_n | v(x_n), r_n I) over one chunk (nats)."""
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    return jnp.sum(jnp.where(mask > 0, fld.expected_log_likelihood(params, batch, chol), 0.0))


@jax.jit(static_argnames=("statistic", "jitter_multiple", "mesh"))
def _per_chunk(params, chunked, mask, *, statistic, jitter_multiple, mesh):
    """``statistic`` of every chunk (C, …), each device computing its own chunks (jax.shard_map)."""
    def local(p, b, m):
        return jax.lax.map(lambda bm: statistic(p, bm[0], bm[1], jitter_multiple), (b, m))

    rows = PartitionSpec(devices.AXIS)
    return jax.shard_map(local, mesh=mesh, in_specs=(PartitionSpec(), rows, rows), out_specs=rows)(params, chunked, mask)


def chunk_statistics(statistic, params: fld.FieldParams, batch: fld.ObservationBatch, *,
                     jitter_multiple: float, mesh=None):
    """``statistic`` (a per-chunk function above) on every chunk of ``batch``, as numpy arrays (C, …).

    The rows are cut into C = ⌈N / CHUNK⌉ chunks of equal size (the last padded with masked copies of
    row 0), the chunks are split over the devices of ``mesh`` (default devices.mesh(): all devices of all
    processes; padded with fully masked chunks to a multiple of its size) and gathered back, so the caller
    sums them in chunk order: the same sum for any number of devices."""
    over = devices.mesh() if mesh is None else mesh
    n = batch.position_m.shape[0]
    count = max(1, math.ceil(n / CHUNK))
    size = math.ceil(n / count)
    total = math.ceil(count / over.size) * over.size
    idx = np.concatenate([np.arange(n), np.zeros(total * size - n, dtype=int)])
    mask = (np.arange(total * size) < n).astype(np.float64).reshape(total, size)
    chunked = jax.tree_util.tree_map(lambda a: devices.shard_rows(np.asarray(a)[idx].reshape((total, size) + a.shape[1:]),
                                                                   over)[0], batch)
    out = _per_chunk(devices.replicate(params, over), chunked, devices.shard_rows(mask, over)[0],
                     statistic=statistic, jitter_multiple=jitter_multiple, mesh=over)
    return jax.tree_util.tree_map(lambda a: devices.gather_rows(a, count), out)


def take(batch: fld.ObservationBatch, idx) -> fld.ObservationBatch:
    """Rows ``idx`` of every array of ``batch``."""
    return jax.tree_util.tree_map(lambda a: a[idx], batch)


def chunks(n: int) -> list[np.ndarray]:
    """Row indices 0…n−1 split into near-equal chunks of at most CHUNK (at most two distinct sizes)."""
    return np.array_split(np.arange(n), max(1, math.ceil(n / CHUNK)))


def for_model(params: fld.FieldParams, batch: fld.ObservationBatch) -> fld.ObservationBatch:
    """``batch`` as ``params`` use it: a steady model drops the times, so its compiled programs are the steady ones."""
    return batch if params.is_time_varying or batch.time_s is None else batch.without_time()


def exact_q(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float,
            mesh=None) -> fld.FieldParams:
    """The ELBO-optimal q(w) on all of ``batch`` (any size): Λ = I + Σ_chunks ΦᵀR⁻¹Φ, η = Σ_chunks ΦᵀR⁻¹y
    (Titsias 2009, eq. 10), the chunks' statistics computed on all devices (:func:`chunk_statistics`)
    and summed in chunk order."""
    lam_chunks, eta_chunks = chunk_statistics(_chunk_natural, params, for_model(params, batch),
                                              jitter_multiple=jitter_multiple, mesh=mesh)
    lam, eta = np.eye(params.q_mean.shape[0]), np.zeros(params.q_mean.shape[0])
    for d_lam, d_eta in zip(lam_chunks, eta_chunks):
        lam, eta = lam + d_lam, eta + d_eta
    return _with_natural_q(params, jnp.asarray(lam), jnp.asarray(eta))


@jax.jit
def _with_natural_q(params: fld.FieldParams, lam: jax.Array, eta: jax.Array) -> fld.FieldParams:
    """``params`` with the q of natural parameters (Λ, η), in one compiled program."""
    return with_q(params, *q_from_natural(lam, eta))


def full_elbo(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float, mesh=None) -> float:
    """ELBO over all observations: Σ_n E_q log N(y_n | v(x_n), R_n) − KL(q ‖ p) (nats), chunked over all devices."""
    per_chunk = chunk_statistics(_chunk_log_likelihood, params, for_model(params, batch),
                                 jitter_multiple=jitter_multiple, mesh=mesh)
    return float(sum(float(v) for v in per_chunk)) - float(_kl_divergence(params))


_kl_divergence = jax.jit(fld.kl_divergence)


@jax.jit(static_argnames=("jitter_multiple",))
def mean_speed_squared(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float) -> jax.Array:
    """Σ_n |μ(x_n, t_n)|² with μ = K(x, Z) L_Z^{−T} m, the posterior mean at the observations (m²/s²)."""
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    if params.is_time_varying:
        return jnp.sum((fld.batch_projection(params, chol, batch) @ params.q_mean) ** 2)
    x = batch.position_m
    alpha = solve_triangular(chol.T, params.q_mean, lower=False)
    return jnp.sum((params.kernel.gram_matrix(x, params.inducing_m) @ alpha) ** 2)
