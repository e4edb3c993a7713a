"""The RK4 step of a moment forecast in a fitted field: the default that follows the flow, and RK4's stability
bound for the field's moment equations, measured on a grid over the data (:func:`moment_step_s`).

The moment equations dP/dt = J P + P Jᵀ + … (J = ∇μ) have the eigenvalues λ_i + λ_j of J's, and RK4 is stable for
|hλ| up to about 2.8 along the real and imaginary axes (Hairer & Wanner 1996, "Solving Ordinary Differential
Equations II", §IV.2; from memory), so a step h with |λ|max h ≤ :data:`STABLE_TURN` = 1.39 keeps P inside it.  Past
it the propagated covariance grows without bound or turns indefinite, and a forecast, a connectivity or a
back-tracked map comes out wrong while looking finite (a tank's Taylor–Green cells at a 5-min step: exit 0).
"""

from __future__ import annotations

import math
import warnings
from functools import partial
from typing import Any, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from ..units import format_duration
from .methods import METHODS, default_ensemble_step_s, default_moment_step_s
from .sde import join_from_jit, split_for_jit
from .transitionstep import STABLE_TURN

__all__ = ["StepWarning", "stable_step_s", "moment_step_s", "step_for"]

GRID_POINTS = 12          # per axis over the data's extent (2-D: 144 points, 3-D: 1,728)
TIME_POINTS = 13          # over the first day of a time-varying forecast (every 2 h: a tide's phases)


class StepWarning(UserWarning):
    """The RK4 step given is beyond its stability bound for the field."""


@partial(jax.jit, static_argnames=("static",))
def _gradients(dynamic, static, points, times):
    """∇μ (T, n, d, d) 1/s at ``points`` (n, d) × ``times`` (T,)."""
    sde = join_from_jit(dynamic, static)

    def at_time(t):
        return jax.lax.map(jax.jacfwd(lambda x: sde.drift_at(x, t)), points, batch_size=min(256, points.shape[0]))

    return jax.lax.map(at_time, times)


def stable_step_s(sde: Any, points_m: np.ndarray, times_s: Sequence[float]) -> tuple[float, float]:
    """(:data:`STABLE_TURN` / max |λ(∇μ)|, max |λ(∇μ)|) in (s, 1/s) over ``points_m`` (n, d) m × ``times_s`` (s; used
    by a time-dependent SDE); (inf, 0) for a uniform flow.  The eigenvalues by numpy on the host (a batched LAPACK
    call under jax's vmap can stall the CPU thread pool, see :mod:`driftwise.smallmatrix`)."""
    dynamic, static = split_for_jit(sde)
    grads = np.asarray(_gradients(dynamic, static, jnp.asarray(points_m, jnp.float64),
                                  jnp.asarray(np.atleast_1d(times_s), jnp.float64)))
    lam = float(np.max(np.abs(np.linalg.eigvals(grads))))
    return (STABLE_TURN / lam if lam > 0 else math.inf), lam


def _data_grid(field: Any) -> np.ndarray | None:
    """A GRID_POINTS-per-axis grid over the data's extent (``data_summary`` ``extent_m``), None when unknown."""
    extent = (getattr(field, "data_summary", None) or {}).get("extent_m")
    if not extent:
        return None
    axes = [np.linspace(lo, hi, GRID_POINTS) for lo, hi in zip(extent["min"], extent["max"])]
    return np.stack(np.meshgrid(*axes), -1).reshape(-1, len(axes))


def moment_step_s(field: Any, sde: Any, step_s: float | None, *, longest_s: float,
                  start_times_s: Sequence[float] = (0.0,), horizon_s: float = 0.0) -> float:
    """The RK4 step (s) of a moment method in ``field`` (``sde`` its forecast SDE): ``step_s`` when given, with a
    :class:`StepWarning` when it is beyond RK4's stability bound on a grid over the data (:func:`stable_step_s`);
    otherwise :func:`~driftwise.dynamics.methods.default_moment_step_s` (``longest_s``, or a quarter of the flow's
    time scale), shortened to the stability bound when that is shorter.  A time-dependent SDE is checked at
    :data:`TIME_POINTS` times over the first day after the earliest start (over the horizon when shorter); a field
    without a recorded data extent is not checked."""
    points = _data_grid(field)
    if points is None:
        return default_moment_step_s(field, longest_s) if step_s is None else float(step_s)
    first = float(np.min(start_times_s))
    times = first + np.linspace(0.0, min(max(horizon_s, 0.0), 86400.0), TIME_POINTS) if sde.with_time else [0.0]
    stable, lam = stable_step_s(sde, points, times)
    if step_s is None:
        return float(min(default_moment_step_s(field, longest_s), stable))
    if step_s > stable:
        warnings.warn(f"the RK4 step {format_duration(step_s)} is beyond RK4's stability bound for this field, "
                      f"{format_duration(stable)} ({STABLE_TURN} / the largest velocity-gradient eigenvalue over the "
                      f"data, {lam:.3g}/s): the propagated covariances can grow without bound or turn indefinite; "
                      f"use a step of {format_duration(stable)} or less (--step)", StepWarning, stacklevel=2)
    return float(step_s)


def step_for(field: Any, sde: Any, method: Any, step_s: float | None, *, longest_s: float,
             start_times_s: Sequence[float] = (0.0,), horizon_s: float = 0.0) -> float | None:
    """The step (s) of ``method`` (a name of :data:`~driftwise.dynamics.methods.METHODS`, or a method object, whose
    ``step_s`` is returned as given): :func:`default_ensemble_step_s` for the ensemble, :func:`moment_step_s` for
    the moment methods (the other arguments as there)."""
    if method not in METHODS:
        return step_s
    if METHODS[method].ensemble:
        return default_ensemble_step_s(field) if step_s is None else step_s
    return moment_step_s(field, sde, step_s, longest_s=longest_s, start_times_s=start_times_s, horizon_s=horizon_s)
