"""Monte Carlo baseline: Euler–Maruyama particles on the same SDE as `moments`.

x_{k+1} = x_k + μ(x_k) h + L(x_k) √h ξ_k,  ξ_k ~ N(0, I),  L Lᵀ = D
(Kloeden & Platen 1992, "Numerical Solution of Stochastic Differential
Equations": strong order 1/2, weak order 1).  Particles start from
N(mean0, cov0) and are simulated in chunks; each chunk adds its shifted power
sums up to fourth order to float64 accumulators, so memory is bounded by one
chunk whatever the particle count, and the sample mean, covariance and their
Monte Carlo standard errors follow exactly from the sums (no second pass).
For a time-dependent SDE (``SDE.with_time``) each step evaluates μ and L at the
step's start time t_k = start + age (the Itô left point).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp

from ..errors import InputError
from .moments import psd_cholesky, substep_counts, validate_release, validate_start_times, validate_times
from .sde import SDE, join_from_jit, split_for_jit

__all__ = ["EulerMaruyama", "EnsembleResult", "simulate", "particle_paths"]


@dataclass(frozen=True)
class EulerMaruyama:
    """Ensemble options: `particles`, the Euler–Maruyama step ≤ `step_s` (s), and
    `chunk`, the particles simulated at once (memory ~ chunk · T · d floats).

    Each output interval is cut into ceil(Δt/step_s) equal steps.  The particles
    are simulated in ceil(particles/chunk) chunks of equal size (at most `chunk`),
    so the last chunk is not padded with particles that are thrown away (10,000
    particles in chunks of 4,096 simulated 12,288).  The same key, particles and
    chunk give the same result.
    """

    particles: int = 10_000
    step_s: float = 60.0
    chunk: int = 4096


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class EnsembleResult:
    """Sample moments of the ensemble at the output times.

    mean (T, d) m; cov (T, d, d) m² (unbiased, 1/(N − 1));
    mean_se (T, d) = sqrt(diag(cov)/N); cov_se (T, d, d) = sqrt((m₂₂ − c²)/N),
    m₂₂ the sample fourth central moment E[(x_i − m_i)²(x_j − m_j)²];
    samples (N, d) final-time positions when requested, else None.
    """

    mean: jax.Array
    cov: jax.Array
    mean_se: jax.Array
    cov_se: jax.Array
    samples: jax.Array | None = None
    particles: int = field(default=0, metadata=dict(static=True))


def _paths(sde: SDE, method: EulerMaruyama, mean0, chol0, times_s, key, start_s=0.0) -> jax.Array:
    """Positions (T, chunk, d) of one chunk of particles at the output times; ``start_s`` the release's
    absolute start time (s), seen only by a time-dependent SDE."""
    k_init, k_path = jax.random.split(key)
    x0 = mean0 + jax.random.normal(k_init, (method.chunk, mean0.shape[-1])) @ chol0.T
    return particle_paths(sde, x0, times_s, method.step_s, k_path, start_s)


def particle_paths(sde: SDE, x0: jax.Array, times_s: jax.Array, step_s: Any, key: jax.Array,
                   start_s: Any = 0.0) -> jax.Array:
    """Euler–Maruyama positions (T, n, d) at ``times_s`` (T,) s of particles starting at ``x0`` (n, d) m at
    absolute time ``start_s`` (s; seen only by a time-dependent SDE).

    Each output interval is cut into ceil(Δt/step_s) equal steps (traceable; jit at the caller)."""

    def em_step(h, state):
        x, k, age = state  # age: time since the release (s), for a diffusion that depends on it
        k, sub = jax.random.split(k)
        drift, rate = jax.vmap(lambda z: sde.drift_and_rate(z, age, start_s + age))(x)   # one table read per point
        noise = jnp.einsum("nij,nj->ni", jax.vmap(psd_cholesky)(rate), jax.random.normal(sub, x.shape))
        return x + h * drift + jnp.sqrt(h) * noise, k, age + h

    def interval(state, span):
        n = substep_counts(span, step_s)
        state = jax.lax.fori_loop(0, n, lambda _, s: em_step(span / n, s), state)
        return state, state[0]

    _, xs = jax.lax.scan(interval, (x0, key, jnp.zeros((), dtype=x0.dtype)), jnp.diff(times_s))
    return jnp.concatenate([x0[None], xs])


def _power_sums(xs: jax.Array, shift: jax.Array, valid: jax.Array) -> jax.Array:
    """Σ_n w_n u⊗u⊗u⊗u with u = (1, x − shift): (T, d+1, d+1, d+1, d+1)."""
    y = xs - shift[:, None, :]
    u = jnp.concatenate([jnp.ones_like(y[..., :1]), y], axis=-1)  # (T, n, d+1)
    uu = (u[..., :, None] * u[..., None, :]).reshape(u.shape[0], u.shape[1], -1)
    sums = jnp.einsum("tna,tnb,n->tab", uu, uu, valid.astype(u.dtype))
    k = u.shape[-1]
    return sums.reshape(-1, k, k, k, k)


def _moments_from_sums(sums: jax.Array, shift: jax.Array):
    """Sample mean, covariance, their standard errors from power sums at one time."""
    n = sums[0, 0, 0, 0]
    d = sums.shape[0] - 1
    ybar = sums[0, 0, 0, 1:] / n
    v = jnp.concatenate([-ybar[:, None], jnp.eye(d, dtype=sums.dtype)], axis=1)  # (d, d+1)
    m2 = v @ sums[0, 0] @ v.T  # Σ (y − ȳ)(y − ȳ)ᵀ
    m4 = jnp.einsum("abce,ja,jb,kc,ke->jk", sums, v, v, v, v) / n
    cov = m2 / (n - 1.0)
    cov_se = jnp.sqrt(jnp.maximum(m4 - (m2 / n) ** 2, 0.0) / n)
    return shift + ybar, cov, jnp.sqrt(jnp.diagonal(cov) / n), cov_se


@partial(jax.jit, static_argnames=("static", "method", "keep_samples"))
def _simulate_jit(dynamic, static, method, keep_samples, mean0, cov0, times_s, key, start_s=None):
    sde = join_from_jit(dynamic, static)
    start_s = 0.0 if start_s is None else start_s
    chol0 = psd_cholesky(cov0)
    n_chunks = -(-method.particles // method.chunk)
    keys = jax.random.split(key, n_chunks)
    first = _paths(sde, method, mean0, chol0, times_s, keys[0], start_s)
    shift = jnp.mean(first, axis=1)  # a nearby centre keeps the power sums well conditioned

    def valid(i):
        return i * method.chunk + jnp.arange(method.chunk) < method.particles

    def add_chunk(sums, i):
        xs = _paths(sde, method, mean0, chol0, times_s, keys[i], start_s)
        return sums + _power_sums(xs, shift, valid(i)), xs[-1] if keep_samples else None

    # the first chunk outside the loop (it sets the shift), the others in a scan: no branch inside the loop
    sums, finals = jax.lax.scan(add_chunk, _power_sums(first, shift, valid(0)), jnp.arange(1, n_chunks))
    mean, cov, mean_se, cov_se = jax.vmap(_moments_from_sums)(sums, shift)
    finals = jnp.concatenate([first[-1][None], finals]) if keep_samples else None
    samples = finals.reshape(-1, mean0.shape[-1])[: method.particles] if keep_samples else None
    return EnsembleResult(mean, cov, mean_se, cov_se, samples, method.particles)


def _validate_method(method: EulerMaruyama) -> EulerMaruyama:
    if not isinstance(method, EulerMaruyama):
        raise InputError(f"method must be EulerMaruyama(...), got {method!r}.")
    if not (isinstance(method.particles, int) and method.particles >= 2):
        raise InputError(f"EulerMaruyama particles must be an integer >= 2, got {method.particles!r}.")
    if not (isinstance(method.chunk, int) and method.chunk >= 1):
        raise InputError(f"EulerMaruyama chunk must be an integer >= 1, got {method.chunk!r}.")
    if not (float(method.step_s) > 0):
        raise InputError(f"EulerMaruyama step_s must be > 0 seconds, got {method.step_s!r}.")
    chunks = -(-method.particles // min(method.chunk, method.particles))
    return EulerMaruyama(method.particles, float(method.step_s), -(-method.particles // chunks))


def simulate(
    sde: SDE,
    mean0: Any,
    cov0: Any,
    times_s: Any,
    *,
    method: EulerMaruyama = EulerMaruyama(),
    key: jax.Array,
    keep_samples: bool = False,
    start_time_s: float | None = None,
) -> EnsembleResult:
    """Euler–Maruyama ensemble of one release: sample moments at times_s (T,).

    mean0 (d,) m, cov0 (d, d) m² (initial positions ~ N(mean0, cov0); zeros for
    a point release); times_s seconds since the release, from 0, increasing;
    key a jax.random key (required, keyword-only); ``start_time_s`` the release's
    absolute start (s; required by a time-dependent SDE, ignored by a steady one).
    With keep_samples the final-time positions (N, d) are returned too.  Raises
    InputError on bad input.
    """
    mean, cov = validate_release(mean0, cov0, "release")
    times = validate_times(times_s)
    start = validate_start_times(sde, start_time_s, ())
    method = _validate_method(method)
    dynamic, static = split_for_jit(sde)
    return _simulate_jit(dynamic, static, method, bool(keep_samples), mean, cov, times, key, start)
