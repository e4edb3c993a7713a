"""The hyperparameters of a full-batch fit by L-BFGS-B on Titsias' collapsed bound.

When every step sees all rows with q at its exact optimum (``q_update="auto"``, the default, and
"natural" on N ≤ 16 × batch_size), the objective is a smooth, deterministic function of the log
hyperparameters θ alone, the collapsed bound (Titsias 2009, eq. 9)

    F(θ) = log N(y | 0, Q_θ + R_θ) − ½ tr(R_θ⁻¹ (K_θ − Q_θ)),   Q_θ = K_xz K_zz⁻¹ K_zx,

evaluated with its gradient by :func:`driftwise.gp.variational.natural_elbo` at γ = 1 (one projection;
nats).  A quasi-Newton method suits such a function better than Adam's fixed step: L-BFGS-B (Byrd, Lu,
Nocedal & Zhu 1995, "A limited memory algorithm for bound constrained optimization", via
scipy.optimize.minimize) builds a curvature model from the last gradients and takes steps of the
length the line search (Moré & Thuente 1994) accepts.  On the 5,000-fix benchmark file
(tests/benchmarks/bench_everyday.py) it reached a bound 338 nats higher than Adam's plateau in half
the evaluations (DEVELOPERS.md, "Benchmark record").

One iteration is one "step" of the schedule: the plateau is checked every ``patience`` iterations on
the bound itself, a checkpoint is written every ``every_steps`` iterations, and a resumed fit restarts
L-BFGS-B from the checkpoint's hyperparameters (its curvature memory is not kept, so it reaches the
same plateau along a slightly different path).  A trial point whose bound or gradient is not finite
is answered with a large value, so the line search steps back from it.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Callable

import jax
import numpy as np
from jax.flatten_util import ravel_pytree
from scipy.optimize import minimize

from . import field as fld
from .variational import natural_elbo

__all__ = ["maximise_bound", "merge_trainable", "negative_bound", "split_trainable"]

_PENALTY = 1e6   # a non-finite trial point scores |F₀| × 1e6 + 1e6 nats below the start


def split_trainable(params: fld.FieldParams, names: tuple[str, ...], z_scale) -> dict[str, Any]:
    """The trainable leaves; Z enters divided by the inducing spacing so one step size suits all."""
    return {name: getattr(params, name) / z_scale if name == "inducing_m" else getattr(params, name)
            for name in names}


def merge_trainable(params: fld.FieldParams, trainable: dict[str, Any], z_scale) -> fld.FieldParams:
    values = {name: value * z_scale if name == "inducing_m" else value for name, value in trainable.items()}
    return dataclasses.replace(params, **values)


@jax.jit(static_argnames=("names", "jitter_multiple"))
def negative_bound(flat, params, batch, n_total, z_scale, *, names, jitter_multiple):
    """(−F(θ), −∇F(θ)) at the flat trainable vector ``flat`` (the leaves of :func:`split_trainable`, raveled)."""
    _, unravel = ravel_pytree(split_trainable(params, names, z_scale))

    def objective(x):
        value, _ = natural_elbo(merge_trainable(params, unravel(x), z_scale), batch, n_total, 1.0,
                                jitter_multiple=jitter_multiple)
        return -value

    return jax.value_and_grad(objective)(flat)


def maximise_bound(state, batch, n_total: float, *, names: tuple[str, ...], z_scale: float, steps: int,
                   after_step: Callable[[Any], Any]):
    """L-BFGS-B iterations from ``state`` (a :class:`driftwise.gp.schedule.TrainState`) until ``steps`` in all,
    or until ``after_step`` (called with the state after each iteration: plateau check, checkpoint, progress)
    returns a converged state → the last state.  The state's q is left as it was (the finish sets it exactly)."""
    if state.step >= steps or state.converged:
        return state
    x0, unravel = ravel_pytree(split_trainable(state.params, names, z_scale))
    jitter = state.jitter_multiple

    def evaluate(x):
        value, grad = negative_bound(np.asarray(x), state.params, batch, n_total, z_scale, names=names,
                                     jitter_multiple=jitter)
        return float(value), np.asarray(grad, dtype=np.float64)

    start = np.asarray(x0, dtype=np.float64)
    first = [evaluate(start)]          # scipy's first call asks for the start again: answered from here
    if not math.isfinite(first[0][0]):
        raise RuntimeError(f"fit: the ELBO is not finite at the starting hyperparameters (step {state.step}); "
                           "the data may hold extreme velocities (check units and --max-speed)")
    penalty = abs(first[0][0]) * _PENALTY + _PENALTY
    last = [state]

    def fun(x):
        value, grad = first.pop() if first and np.array_equal(x, start) else evaluate(x)
        if not (math.isfinite(value) and np.all(np.isfinite(grad))):
            return penalty, np.zeros_like(grad)
        return value, grad

    def callback(intermediate_result):
        params = merge_trainable(last[0].params, unravel(intermediate_result.x), z_scale)
        now = dataclasses.replace(last[0], params=params, step=last[0].step + 1,
                                  history=last[0].history + (-float(intermediate_result.fun),))
        last[0] = after_step(now)
        if last[0].converged or last[0].step >= steps:
            raise StopIteration

    result = minimize(fun, start, jac=True, method="L-BFGS-B", callback=callback,
                      options={"maxiter": steps - state.step, "ftol": 0.0, "gtol": 0.0, "maxls": 40})
    if last[0].step < steps and not last[0].converged and result.status != 1:
        # scipy stopped by itself (no further decrease along the search direction): a maximum to working precision
        last[0] = dataclasses.replace(last[0], converged=True)
    return last[0]
