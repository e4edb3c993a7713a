"""Time windows of a time-varying field: the field at one time, or averaged over the data's time span.

A window is a fixed linear combination of parts of v(x, t) (:mod:`driftwise.gp.temporal`) at given times,

    L v(x) = Σ_g Σ_i w_gi · part_g(x, t_gi),

so its posterior is Gaussian with mean Σ_g Σ_i w_gi m_g(x, t_gi) and covariance
Σ_g Σ_h Σ_i Σ_j w_gi w_hj C_gh((x, t_gi), (y, t_hj)), with m and C the field's ``mean_at`` and ``cov_between``
(exact for the GP; derivatives follow by differentiating both, :mod:`driftwise.diagnostics.physics`).

* **At a time t**: one term, the whole field at t (weight 1).
* **Averaged over [t_a, t_b]**: (1/T) ∫ v(x, t) dt with T = t_b − t_a.  The steady part passes unchanged; a
  constituent a_c cos ω_c t + b_c sin ω_c t averages exactly to c̄_c a_c + s̄_c b_c with
  c̄_c = [sin ω_c t]_{t_a}^{t_b} / (ω_c T) and s̄_c = −[cos ω_c t]_{t_a}^{t_b} / (ω_c T) (t on the track file's axis,
  computed as ω_c (t − t₀) + φ_c as the kernel does); the slow part s(x, t) is averaged by Gauss–Legendre quadrature
  with ``slow_nodes`` nodes (numpy.polynomial.legendre.leggauss; its Matérn-3/2 time correlation is once
  differentiable, so this is an approximation, good while T spans few slow time scales per node).

Windows are pytrees: the part names are static, the times and weights are traced, so every time reuses one
compilation.
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError

__all__ = ["TimeWindow", "at_time", "data_span_s", "padded_rows", "span_average", "window_cov", "window_mean", "window_moments", "window_velocity"]

SLOW_NODES_MAX = 12
CHUNK = 256


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class TimeWindow:
    """Σ_g Σ_i w_gi part_g(x, t_gi): per part g its times (k_g,) s on the track file's axis and weights (k_g,)."""

    times_s: tuple
    weights: tuple
    parts: tuple = dataclasses.field(default=(None,), metadata={"static": True})


def at_time(t_s: float) -> TimeWindow:
    """The whole field at time ``t_s`` (s on the track file's axis)."""
    return TimeWindow((jnp.asarray([float(t_s)]),), (jnp.ones(1),), (None,))


def data_span_s(field) -> tuple[float, float]:
    """(first, last) observation time (s on the track file's axis) the field was fitted to."""
    span = field.data_summary.get("time_span_s")
    if not span or len(span) != 2 or not all(math.isfinite(float(t)) for t in span):
        raise InputError("this time-varying model file does not record its data's time span (time_span_s); "
                         "refit it, or give the times explicitly")
    return float(span[0]), float(span[1])


def _harmonic_means(field, start_s: float, end_s: float) -> list[tuple[str, float]]:
    """(part, c̄ or s̄) of every constituent's amplitude fields over [start, end] (module docstring)."""
    kernel = field.params.kernel
    a, b, out = start_s - kernel.time_origin_s, end_s - kernel.time_origin_s, []
    for name, omega, phase in zip(kernel.constituents, kernel.omegas_rad_s, kernel.phases_rad):
        if end_s > start_s:
            cos_mean = (math.sin(omega * b + phase) - math.sin(omega * a + phase)) / (omega * (end_s - start_s))
            sin_mean = (math.cos(omega * a + phase) - math.cos(omega * b + phase)) / (omega * (end_s - start_s))
        else:
            cos_mean, sin_mean = math.cos(omega * a + phase), math.sin(omega * a + phase)
        out += [(f"{name}_cos", cos_mean), (f"{name}_sin", sin_mean)]
    return out


def span_average(field, start_s: float | None = None, end_s: float | None = None, *,
                 slow_nodes: int | None = None) -> TimeWindow:
    """(1/T) ∫ v(x, t) dt over [start, end] (default: the data's time span, :func:`data_span_s`).

    ``slow_nodes``: Gauss–Legendre nodes for the slow part (default 3 per slow time scale in the span,
    between 3 and ``SLOW_NODES_MAX``)."""
    if start_s is None or end_s is None:
        start_s, end_s = data_span_s(field)
    if not end_s >= start_s:
        raise InputError(f"time average: the end {end_s} s is before the start {start_s} s")
    terms = [("steady", 0.0, 1.0)] + [(part, 0.0, w) for part, w in _harmonic_means(field, start_s, end_s)]
    parts, times, weights = [p for p, _, _ in terms], [[t] for _, t, _ in terms], [[w] for _, _, w in terms]
    kernel = field.params.kernel
    if kernel.has_slow:
        if slow_nodes is None:
            per_scale = (end_s - start_s) / float(kernel.slow_time_scale_s)
            slow_nodes = int(min(max(math.ceil(3.0 * per_scale), 3), SLOW_NODES_MAX))
        nodes, w = np.polynomial.legendre.leggauss(int(slow_nodes))
        parts.append("slow")
        times.append(list(0.5 * (start_s + end_s) + 0.5 * (end_s - start_s) * nodes))
        weights.append(list(0.5 * w))                                    # Σ w = 1: the mean over the span
    return TimeWindow(tuple(jnp.asarray(t, dtype=jnp.float64) for t in times),
                      tuple(jnp.asarray(w, dtype=jnp.float64) for w in weights), tuple(parts))


def window_mean(field, x: jax.Array, window: TimeWindow) -> jax.Array:
    """Posterior mean (d,) m/s of the window's combination at one point x (d,) m."""
    total = jnp.zeros(x.shape[-1], dtype=x.dtype)
    for part, times, weights in zip(window.parts, window.times_s, window.weights):
        values = jax.vmap(lambda t, p=part: field.mean_at(x, p, t_s=t))(times)         # (k, d)
        total = total + weights @ values
    return total


def window_cov(field, x: jax.Array, y: jax.Array, window: TimeWindow) -> jax.Array:
    """Posterior cross-covariance (d, d) m²/s² of the window's combination at x and at y (each (d,) m)."""
    total = jnp.zeros((x.shape[-1], y.shape[-1]), dtype=x.dtype)
    groups = list(zip(window.parts, window.times_s, window.weights))
    for part_x, times_x, weights_x in groups:
        for part_y, times_y, weights_y in groups:
            def pair(s, r, px=part_x, py=part_y):
                return field.cov_between(x, y, px, py, t_x_s=s, t_y_s=r)
            blocks = jax.vmap(lambda s, r=times_y, f=pair: jax.vmap(lambda q: f(s, q))(r))(times_x)   # (k, l, d, d)
            total = total + jnp.einsum("i,j,ijab->ab", weights_x, weights_y, blocks)
    return total


@jax.jit
def window_moments(field, points: jax.Array, window: TimeWindow) -> tuple[jax.Array, jax.Array]:
    """Posterior mean (n, d) m/s and covariance (n, d, d) m²/s² of the window's combination at ``points`` (n, d)."""
    one = lambda x: (window_mean(field, x, window), window_cov(field, x, x, window))    # noqa: E731
    return jax.lax.map(one, points, batch_size=CHUNK)


def window_velocity(field, points, window: TimeWindow) -> tuple[np.ndarray, np.ndarray]:
    """As :func:`window_moments` for numpy ``points`` (n, d) m, padded to a power of two (few compilations)."""
    x = np.asarray(points, dtype=np.float64)
    n = x.shape[0]
    if n == 0:
        return np.zeros((0, field.dim)), np.zeros((0, field.dim, field.dim))
    mean, cov = window_moments(field, jnp.asarray(padded_rows(x)), window)
    return np.asarray(mean)[:n], np.asarray(cov)[:n]


def padded_rows(x: np.ndarray) -> np.ndarray:
    """Rows padded (with the first row) to a power of two ≤ ``CHUNK`` or a multiple of it: few recompilations."""
    n = x.shape[0]
    size = max(8, 1 << (n - 1).bit_length()) if n <= CHUNK else CHUNK * math.ceil(n / CHUNK)
    return np.concatenate([x, np.repeat(x[:1], size - n, axis=0)])
