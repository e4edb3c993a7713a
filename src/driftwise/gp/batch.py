"""Velocity observations as the fit sees them: :class:`ObservationBatch` and the noise variance r_n.

Likelihood of finite-difference velocities y_n (b, d) (:mod:`driftwise.data.observations`):
y_n ~ N(v(x_n, t_n), r_n I) with r_n = K_diff · 2/Δt_n + 2σ_pos²/Δt_n² + σ₀² (random walk, position error,
floor; m²/s²).  The midpoint times t_n travel with the batch (``time_s``) for time-varying models; a steady
fit drops them so that its compiled code is exactly the steady one.
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError

__all__ = ["ObservationBatch", "batch_from_observations", "noise_variance_m2_s2"]


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class ObservationBatch:
    """A minibatch of b velocity observations.

    position_m                      (b, d) segment midpoints, m
    velocity_m_s                    (b, d) finite-difference velocities, m/s
    random_walk_coefficient_s_inv   (b,)   2/Δt, 1/s  (multiplies K_diff)
    position_noise_var_m2_s2        (b,)   2σ_pos²/Δt², m²/s²
    time_s                          (b,)   midpoint times on the track file's axis, s (None: not carried)
    """

    position_m: jax.Array
    velocity_m_s: jax.Array
    random_walk_coefficient_s_inv: jax.Array
    position_noise_var_m2_s2: jax.Array
    time_s: jax.Array | None = None

    @property
    def size(self) -> int:
        """b."""
        return self.position_m.shape[0]

    def without_time(self) -> ObservationBatch:
        """The same observations without their times (what a steady model uses)."""
        return dataclasses.replace(self, time_s=None)


def _noise_coefficients(obs) -> tuple[np.ndarray, np.ndarray]:
    """(2/Δt, 2σ_pos²/Δt²) per observation from ``dt_s`` and ``position_error_m`` (validated here)."""
    dt = np.asarray(obs.dt_s, dtype=np.float64)
    bad = ~(np.isfinite(dt) & (dt > 0.0))
    if np.any(bad):
        raise InputError(f"observation {int(np.argmax(bad))}: time step dt_s must be positive, got {dt[bad][0]!r}")
    sigma = np.broadcast_to(np.asarray(obs.position_error_m, dtype=np.float64), dt.shape)
    if np.any(~np.isfinite(sigma) | (sigma < 0.0)):
        raise InputError("position_error_m must be a non-negative finite distance in metres")
    return 2.0 / dt, 2.0 * sigma**2 / dt**2


def _times(obs, n: int) -> np.ndarray | None:
    if getattr(obs, "time_s", None) is None:
        return None
    time = np.asarray(obs.time_s, dtype=np.float64).reshape(-1)
    if time.shape != (n,):
        raise InputError(f"observations: time_s must have shape ({n},), got {time.shape}")
    if not np.all(np.isfinite(time)):
        raise InputError(f"velocity observation {int(np.argmax(~np.isfinite(time)))}: time_s is NaN or infinite")
    return time


def batch_from_observations(obs, idx=None) -> ObservationBatch:
    """An :class:`ObservationBatch` from a ``tracks.Observations`` (all rows, or rows ``idx``), with the midpoint
    times when ``obs`` has ``time_s``."""
    position = np.asarray(obs.position_m, dtype=np.float64)
    velocity = np.asarray(obs.velocity_m_s, dtype=np.float64)
    if position.ndim != 2 or velocity.shape != position.shape:
        raise InputError(f"observations need position_m and velocity_m_s of equal shape (n, d), got "
                         f"{position.shape} and {velocity.shape}")
    walk, pos_noise = _noise_coefficients(obs)
    if walk.shape != (position.shape[0],) or pos_noise.shape != walk.shape:
        raise InputError(f"observations: dt_s must have shape ({position.shape[0]},), got {walk.shape}")
    time = _times(obs, position.shape[0])
    if idx is not None:
        idx = np.asarray(idx)
        position, velocity, walk, pos_noise = position[idx], velocity[idx], walk[idx], pos_noise[idx]
        time = None if time is None else time[idx]
    return ObservationBatch(jnp.asarray(position), jnp.asarray(velocity), jnp.asarray(walk), jnp.asarray(pos_noise),
                            None if time is None else jnp.asarray(time))


def noise_variance_m2_s2(params, batch: ObservationBatch) -> jax.Array:
    """r_n = K_diff · 2/Δt_n + 2σ_pos²/Δt_n² + σ₀², shape (b,), m²/s² (``params`` a FieldParams)."""
    return (params.diffusivity_m2_s * batch.random_walk_coefficient_s_inv
            + batch.position_noise_var_m2_s2 + params.noise_floor_m_s**2)
