"""One Adam step of a fit, and a compiled group of them: the optimiser of minibatch fits.

Adam (Kingma & Ba 2015, "Adam: a method for stochastic optimization", via optax) moves the log
hyperparameters — and q's mean and square root for ``q_update="adam"``, the inducing points when they are
learned — along the gradient of the ELBO (:func:`driftwise.gp.field.elbo`, or :func:`natural_elbo` after q's
natural-gradient step, Hensman, Fusi & Lawrence 2013).  Its learning rate lives in the optimiser state, so a
checkpoint keeps it and a failed step can halve it.  Full-batch fits with q exact use L-BFGS-B instead
(:mod:`driftwise.gp.quasinewton`).
"""

from __future__ import annotations

import dataclasses
import functools

import jax
import jax.numpy as jnp
import optax

from . import field as fld
from .quasinewton import merge_trainable, split_trainable
from .schedule import Schedule
from .variational import natural_elbo

__all__ = ["GROUP_STEPS", "optimiser_step", "optimiser_steps", "optimizer", "trainable_names", "with_learning_rate"]

GROUP_STEPS = 10          # full-batch steps per compiled loop (progress every group: a few seconds)
HYPER_NAMES = ("kernel", "log_diffusivity_m2_s", "log_noise_floor_m_s")


def optimizer() -> optax.GradientTransformation:
    """Adam whose learning rate lives in the state (so it is checkpointed and can be halved)."""
    return optax.inject_hyperparams(optax.adam, hyperparam_dtype=jnp.float64)(learning_rate=Schedule().learning_rate)


def trainable_names(q_update: str, learn_inducing: bool) -> tuple[str, ...]:
    """The FieldParams leaves Adam moves: the hyperparameters, q too for "adam", Z when learned."""
    names = HYPER_NAMES + (("q_mean", "q_sqrt_raw") if q_update == "adam" else ())
    return names + (("inducing_m",) if learn_inducing else ())


def _all_finite(tree) -> jax.Array:
    return jnp.all(jnp.array([jnp.all(jnp.isfinite(leaf)) for leaf in jax.tree_util.tree_leaves(tree)]))


@jax.jit(static_argnames=("names", "q_update", "jitter_multiple"))
def optimiser_step(params, opt_state, batch, n_total, gamma, z_scale, *, names, q_update, jitter_multiple):
    """One optimiser step → (params, opt_state, ELBO estimate at the step's start, all finite?).

    "natural": q takes its natural-gradient step (γ = 1 on all rows: the exact optimum) and Adam moves the
    hyperparameters along the ELBO's gradient at the new q, both from one projection (:func:`natural_elbo`);
    "adam": Adam moves q with them."""
    trainable = split_trainable(params, names, z_scale)
    if q_update == "natural":
        def objective(values):
            return natural_elbo(merge_trainable(params, values, z_scale), batch, n_total, gamma, jitter_multiple=jitter_multiple)

        (value, stepped), grads = jax.value_and_grad(objective, has_aux=True)(trainable)
        params = dataclasses.replace(params, q_mean=stepped.q_mean, q_sqrt_raw=stepped.q_sqrt_raw)
    else:
        def objective(values):
            return fld.elbo(merge_trainable(params, values, z_scale), batch, n_total, jitter_multiple=jitter_multiple)

        value, grads = jax.value_and_grad(objective)(trainable)
    updates, new_state = optimizer().update(jax.tree_util.tree_map(jnp.negative, grads), opt_state, trainable)
    new_params = merge_trainable(params, optax.apply_updates(trainable, updates), z_scale)
    ok = jnp.isfinite(value) & _all_finite(grads) & _all_finite((new_params.q_mean, new_params.q_sqrt_raw))
    return new_params, new_state, value, ok


@jax.jit(static_argnames=("names", "q_update", "jitter_multiple"))
def optimiser_steps(params, opt_state, batch, n_total, gamma, z_scale, count, *, names, q_update, jitter_multiple):
    """Up to GROUP_STEPS :func:`optimiser_step` calls on the same rows in one compiled loop (``count`` ≤ GROUP_STEPS,
    traced) → (params, opt_state, ELBO values (GROUP_STEPS,), accepted).  ``accepted`` counts the leading steps whose
    ELBO and gradient were finite; the state returned is the one after them (a non-finite step changes nothing and
    ends the group).  One loop keeps XLA's working buffers for all its steps instead of mapping them afresh each step.
    """
    def body(i, carry):
        p, o, values, accepted = carry
        new_p, new_o, value, ok = optimiser_step(p, o, batch, n_total, gamma, z_scale, names=names, q_update=q_update,
                                                 jitter_multiple=jitter_multiple)
        keep = ok & (accepted == i)
        pick = functools.partial(jnp.where, keep)
        return (jax.tree_util.tree_map(pick, new_p, p), jax.tree_util.tree_map(pick, new_o, o),
                values.at[i].set(value), accepted + keep.astype(accepted.dtype))

    values = jnp.full(GROUP_STEPS, jnp.nan, dtype=jnp.float64)
    return jax.lax.fori_loop(0, count, body, (params, opt_state, values, jnp.asarray(0, dtype=jnp.int32)))


def with_learning_rate(opt_state, learning_rate: float):
    hyper = dict(opt_state.hyperparams, learning_rate=jnp.asarray(learning_rate, dtype=jnp.float64))
    return opt_state._replace(hyperparams=hyper)
