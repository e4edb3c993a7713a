"""Fitting a FlowField through the transition density of consecutive fixes: :func:`fit_transitions`.

Objective (nats), maximised over the variational posterior q(w) = N(m, S Sᵀ), the kernel
hyperparameters and log K (Titsias 2009; Hensman, Fusi & Lawrence 2013 for the bound):

    L = Σ_k [log N(x_{k+1} | m_k, P_k + R) − ½ tr((P_k + R)⁻¹ V_k)] − KL(q ‖ p),     R = σ_pos² I,

the expected transition log density under q (:mod:`driftwise.dynamics.transitionbound`): (m_k, P_k)
are the Gaussian moments at t_k + Δt_k of dx = μ(x) dt + √(2K) dβ started from N(x_k, R), μ the
posterior mean, and V_k the covariance of the end mean that the posterior velocity error Σ(x) with
decorrelation time τ causes (the term the forecast SDE adds to its diffusion as 2τ(1 − e^{−a/τ})Σ).

The approximation: the Gaussian assumed-density closure of the moment equations (Jazwinski 1970,
"Stochastic Processes and Filtering Theory"; Maybeck 1982, "Stochastic Models, Estimation and
Control", vol. 2) and the end mean linear in the field error; within those, L is the variational
bound of the velocity fit with transitions in place of finite-difference velocities.  The velocity
uncertainty is a trace penalty, not added variance: scored by the forecast's predictive density
N(m_k, P_k + V_k + R) instead, V took the place of the random walk and K came out at half the truth
(Lamb–Oseen vortex, 3-h fixes; tests/dynamics/test_transitionfit.py).

Warm start: the velocity fit (:func:`driftwise.gp.training.fit`); its τ = ℓ/U_rms is held fixed (τ only
sets V, the penalty, which a free τ would shrink to nothing: it describes q, it is not a parameter of the data).
Optimiser: Adam (Kingma & Ba 2015, optax), its rate decaying tenfold every 400 steps, on minibatches of
transitions from epoch permutations of ``numpy.random.default_rng([seed, epoch])``, the sum scaled by N/b.
Every ``patience`` steps the objective on fixed evaluation rows is checked and the fit stops once it gained
less than 1e-4 × max(|L|, N nats).  Checkpoint/resume and the progress bar as in the velocity fit
(:mod:`driftwise.gp.schedule`).

:func:`choose_likelihood` decides between the two fits from the coarseness of the fixes for the
flow, c = median_k Δt_k ‖∇μ(x_k)‖₂ (spectral norm of the fitted velocity gradient at the start
fix).  For a linear flow ẋ = J x the finite-difference velocity (x_{k+1} − x_k)/Δt differs from
the velocity at the segment midpoint by −(JΔt)² J x_k/12 + O((JΔt)³) (Taylor expansion of
e^{JΔt}), a relative bias of about c²/12: at c = 0.5 that is 2 %, below the few-percent error
of a good velocity fit; above it the straight-line velocities cut the chord of the path.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import warnings
from dataclasses import dataclass
from functools import partial
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import optax

from ..errors import InputError
from ..gp import field as fld
from ..gp.schedule import Checkpoint, Schedule, TrainConfig, TrainState, load_checkpoint, save_checkpoint
from ..gp.training import fit
from ..gp.training import fit_report as velocity_fit_report
from ..progress import Progress, Stopwatch
from .methods import METHODS, make_method, method_name
from .sde import PointPosterior
from .transitionbound import expected_log_likelihoods
from .transitions import FixedStepRK4, ParamPosterior, TransitionSet, transition_set
from .transitionstep import (STABLE_TURN, TURN_PER_STEP, _check_step, _gradient_norms, _gradients,  # noqa: F401
                             _integrable, _integrator, _sample_rows, _step_for, _turns, step_for_field)

__all__ = ["fit_report", "TRANSITION_SCHEDULE", "COARSENESS_THRESHOLD", "LIKELIHOODS", "LikelihoodChoice", "coarseness",
           "choose_likelihood", "fit_transitions", "fit_by_likelihood", "transition_checkpoint_path", "TransitionWarning"]

TRANSITION_SCHEDULE = Schedule(steps=400, batch_size=256, learning_rate=0.02, patience=20, q_update="adam")
COARSENESS_THRESHOLD = 0.5   # median Δt‖∇μ‖: finite-difference velocity bias ≈ c²/12 = 2 % (module docstring)
LIKELIHOODS = ("velocities", "transitions", "auto")
LIKELIHOOD_HELP = ("velocities: finite-difference velocities between fixes; transitions: then refit through the "
                   "transition density of consecutive fixes (moments of the flow's SDE); auto (default): transitions "
                   f"when the fixes are coarse for the flow (median dt*|grad u| above {COARSENESS_THRESHOLD:g})")
STEP_MARGIN = 0.7          # a step shortened during the fit goes to 0.7 of the needed one (_refreshed)
REL_TOL = 1e-4
DECAY_STEPS = 400          # the learning rate falls tenfold every 400 steps
EVAL_ROWS = 2048
RETRIES = 6
_TRAINABLE = ("kernel", "q_mean", "q_sqrt_raw", "log_diffusivity_m2_s")
# Adam moves every coordinate by about the learning rate at first; the M·d whitened means start at the velocity
# fit's optimum and would be knocked off it by full-size steps.  S keeps the full step: it has to tighten to what the
# transitions say (its trace penalty, transitionbound) within the few hundred steps of a fit.
LEAF_STEP = {"kernel": 1.0, "log_diffusivity_m2_s": 1.0, "q_mean": 0.3, "q_sqrt_raw": 1.0, "log_position_error_m": 1.0}
SIGMA_LEAF = "log_position_error_m"   # log σ_pos (m), trained beside the field when no position error is given
SIGMA_HOLD_STEPS = 100      # a fitted σ_pos is held at its start for the first 100 steps (fit_transitions)


ALIASING_TURN = 2.0 * math.pi / 3.0   # rad: a third of a turn, the fitted turn's 10th percentile limit (fit_transitions)
ALIASED = (
    "nine in ten pairs of consecutive fixes see the fitted field turn by more than {turn:.2g} rad between them (the "
    "10th percentile), over a third of a turn (fewer than 3 fixes per turn; a rotation sampled fewer than twice per turn "
    "is aliased, Nyquist): no pair of fixes pins the rotation down, and the field and its uncertainty can both be "
    "wrong (stranger check: 20-s fixes in a tank vortex turning 5.9 rad between them gave a 57-69 % velocity error "
    "with a posterior s.d. 7-16 times too small); use denser fixes")


class TransitionWarning(UserWarning):
    """The transition fit ran on an assumption the data could not check (see the message)."""


@dataclass(frozen=True)
class Propagation:
    """How each transition is propagated: moment method, RK4 step (s), static substep count, vmap chunk."""

    method: Any
    integrator: FixedStepRK4
    chunk: int = 256


def _propagation(method: str, trans: TransitionSet, step_s: float, max_substeps: int) -> Propagation:
    if method not in METHODS or METHODS[method].ensemble:
        moment = ", ".join(name for name, spec in METHODS.items() if not spec.ensemble)
        raise InputError(f"transition method: use a moment method ({moment}), got {method!r}")
    strategy, _ = make_method(method)
    return Propagation(strategy, _integrator(trans, step_s, max_substeps))


# ---------------------------------------------------------------------------- the objective
def objective(params: fld.FieldParams, rows: tuple, n_total, tau_s, position_var_m2, *, prop: Propagation,
              jitter_multiple: float) -> jax.Array:
    """(N/b) Σ_k log N(x_{k+1} | m_k, P_k + R) − KL(q ‖ p) on the rows (start (b, d), end (b, d), Δt (b,))."""
    post = ParamPosterior.from_params(params, jitter_multiple=jitter_multiple)
    ll = expected_log_likelihoods(post, params.diffusivity_m2_s, tau_s, prop.method, prop.integrator, *rows,
                                  position_var_m2, prop.chunk)
    return n_total / rows[0].shape[0] * jnp.sum(ll) - fld.kl_divergence(params)


def _adam_per_leaf(learning_rate) -> optax.GradientTransformation:
    """Adam with the step of each trainable leaf scaled by :data:`LEAF_STEP`."""
    def scale(updates, params=None):
        return {name: jax.tree_util.tree_map(partial(jnp.multiply, LEAF_STEP[name]), leaf)
                for name, leaf in updates.items()}

    factors = optax.stateless(scale)
    return optax.chain(optax.adam(learning_rate), factors)


def _optimizer() -> optax.GradientTransformation:
    return optax.inject_hyperparams(_adam_per_leaf, hyperparam_dtype=jnp.float64)(learning_rate=0.02)


def _all_finite(tree) -> jax.Array:
    return jnp.all(jnp.array([jnp.all(jnp.isfinite(leaf)) for leaf in jax.tree_util.tree_leaves(tree)]))


def _variance(extra: dict, var):
    """σ_pos² (m²): the trained σ's when ``extra`` holds it, else ``var``."""
    return jnp.exp(2.0 * extra[SIGMA_LEAF]) if SIGMA_LEAF in extra else var


@jax.jit(static_argnames=("prop", "jitter_multiple"))
def _step(params, extra, opt_state, rows, n_total, tau_s, var, *, prop, jitter_multiple):
    """One Adam step on the trainable leaves (the field's and ``extra``'s, e.g. log σ_pos) → (params, extra,
    opt_state, objective at the start, all finite?)."""
    def negative(trainable):
        p = dataclasses.replace(params, **{name: trainable[name] for name in _TRAINABLE})
        return -objective(p, rows, n_total, tau_s, _variance(trainable, var), prop=prop,
                          jitter_multiple=jitter_multiple)

    trainable = {**{name: getattr(params, name) for name in _TRAINABLE}, **extra}
    value, grads = jax.value_and_grad(negative)(trainable)
    updates, new_state = _optimizer().update(grads, opt_state, trainable)
    new = optax.apply_updates(trainable, updates)
    new_params = dataclasses.replace(params, **{name: new[name] for name in _TRAINABLE})
    return new_params, {name: new[name] for name in extra}, new_state, -value, jnp.isfinite(value) & _all_finite(grads)


@jax.jit(static_argnames=("prop", "jitter_multiple"))
def _sum_log_likelihood(params, rows, tau_s, var, *, prop, jitter_multiple):
    post = ParamPosterior.from_params(params, jitter_multiple=jitter_multiple)
    return jnp.sum(expected_log_likelihoods(post, params.diffusivity_m2_s, tau_s, prop.method, prop.integrator,
                                            *rows, var, prop.chunk))


# ---------------------------------------------------------------------------- the loop
@dataclass(frozen=True)
class _Problem:
    trans: TransitionSet
    prop: Propagation
    tau_s: float
    config: TrainConfig
    max_substeps: int = 32


def _refreshed(problem: _Problem, state: TrainState) -> _Problem:
    """``problem`` with the RK4 step that :func:`step_for_field`'s rule gives for the field as fitted so far, when
    that is shorter than the step in use.  The transition fit sharpens a field that the velocity fit smoothed (at
    coarse fixes its speeds come out low), so a step picked from the warm start can fall outside RK4's stability
    region as the fit goes on (6-h fixes in the Lamb–Oseen vortex: non-finite at step 192 with the warm start's
    step).  The step only shrinks, and then to :data:`STEP_MARGIN` of what is needed: a new substep count is a new
    program to compile (two, with the check's), and a field still sharpening asked for a shorter step at 5 checks in
    a row (6-h fixes: 3 → 7 substeps over steps 120–200; the fit took 191 s against 47 s for a fixed 7).  A new
    step with the same substep count is traced data, not a recompilation."""
    post = ParamPosterior.from_params(state.params, jitter_multiple=state.jitter_multiple)
    needed = _step_for(post, problem.trans, problem.tau_s)
    if not needed < problem.prop.integrator.step_s:
        return problem
    step_s = STEP_MARGIN * needed
    integrator = _integrator(problem.trans, step_s, problem.max_substeps)
    return dataclasses.replace(problem, prop=dataclasses.replace(problem.prop, integrator=integrator))


def _rows(trans: TransitionSet, idx: np.ndarray | None) -> tuple:
    t = trans if idx is None else trans.take(idx)
    return jnp.asarray(t.start_m), jnp.asarray(t.end_m), jnp.asarray(t.dt_s)


def _batch_indices(n: int, batch_size: int, seed: int, step: int) -> np.ndarray | None:
    """Slice ``step mod E`` of the permutation of epoch ``step // E`` (None = all rows)."""
    if batch_size >= n:
        return None
    epoch, slot = divmod(step, n // batch_size)
    order = np.random.default_rng([seed, epoch]).permutation(n)
    return np.sort(order[slot * batch_size:(slot + 1) * batch_size])


def _evaluation_rows(n: int, seed: int) -> np.ndarray | None:
    return None if n <= EVAL_ROWS else np.sort(np.random.default_rng([seed, 2**31 - 5]).choice(n, EVAL_ROWS, False))


def _state_variance(state: TrainState, problem: _Problem) -> float:
    """σ_pos² (m²) at ``state``: the trained σ's, or the fixes' given one."""
    return float(_variance(state.extra, problem.trans.position_error_m**2))


def _value(params, problem: _Problem, idx: np.ndarray | None, jitter: float, var: float | None = None) -> float:
    """The objective on rows ``idx`` (all when None), the sum scaled by N/b, in chunks of 1024, at σ_pos² ``var``
    (m²; None: the fixes' given one)."""
    rows = np.arange(problem.trans.n) if idx is None else idx
    var = problem.trans.position_error_m**2 if var is None else var
    total = sum(float(_sum_log_likelihood(params, _rows(problem.trans, rows[i:i + 1024]), problem.tau_s, var,
                                          prop=problem.prop, jitter_multiple=jitter))
                for i in range(0, rows.size, 1024))
    return problem.trans.n / rows.size * total - float(fld.kl_divergence(params))


def _with_learning_rate(opt_state, learning_rate: float):
    return opt_state._replace(hyperparams=dict(opt_state.hyperparams,
                                               learning_rate=jnp.asarray(learning_rate, dtype=jnp.float64)))


def _advance(state: TrainState, problem: _Problem, schedule: Schedule, factor: float = 1.0) -> TrainState | None:
    """One step at the learning rate lr₀ · 10^(−step/400) × ``factor`` (minibatch noise in Adam's steps shrinks
    with the rate; independent of ``steps``, so a resumed fit with more steps retraces a longer one); None when the
    objective or its gradient at ``state``'s parameters is not finite."""
    cfg, trans = problem.config, problem.trans
    rows = _rows(trans, _batch_indices(trans.n, cfg.batch_size, cfg.seed, state.step))
    decayed = schedule.learning_rate * 10.0 ** (-state.step / DECAY_STEPS) * factor
    params, extra, new_opt, value, ok = _step(state.params, state.extra, _with_learning_rate(state.opt_state, decayed),
                                              rows, float(trans.n), problem.tau_s, trans.position_error_m**2,
                                              prop=problem.prop, jitter_multiple=state.jitter_multiple)
    if not bool(ok):
        return None
    extra = extra if state.step >= SIGMA_HOLD_STEPS else state.extra       # σ_pos held while the field sharpens
    return dataclasses.replace(state, params=params, extra=extra, opt_state=new_opt, step=state.step + 1,
                               history=state.history + (float(value),))


def _advance_safely(state: TrainState, previous: TrainState | None, problem: _Problem,
                    schedule: Schedule) -> tuple[TrainState, TrainState, _Problem]:
    """(the state the step started from, the state after it, the problem).  Where the objective or its gradient is
    not finite at ``state``: first with the step of the field as it is now (:func:`_refreshed`), then by redoing the
    step before from ``previous`` at 1/2, 1/4, … of its learning rate (at most :data:`RETRIES` times);
    RuntimeError naming the transitions when that does not help."""
    after = _advance(state, problem, schedule)
    if after is not None:
        return state, after, problem
    refreshed = _refreshed(problem, state)
    if refreshed is not problem:
        problem, after = refreshed, _advance(state, refreshed, schedule)
        if after is not None:
            return state, after, problem
    for k in range(1, RETRIES + 1 if previous is not None else 1):
        redone = _advance(previous, problem, schedule, 0.5**k)
        after = None if redone is None else _advance(redone, problem, schedule)
        if after is not None:
            return redone, after, problem
    raise RuntimeError(_non_finite_message(state, problem))


def _non_finite_message(state: TrainState, problem: _Problem) -> str:
    """Which transitions of the step's batch have a non-finite log density, and what to check."""
    trans, cfg = problem.trans, problem.config
    idx = _batch_indices(trans.n, cfg.batch_size, cfg.seed, state.step)
    idx = np.arange(trans.n) if idx is None else idx
    post = ParamPosterior.from_params(state.params, jitter_multiple=state.jitter_multiple)
    ll = np.asarray(expected_log_likelihoods(post, state.params.diffusivity_m2_s, problem.tau_s, problem.prop.method,
                                             problem.prop.integrator, *_rows(trans, idx),
                                             _state_variance(state, problem), problem.prop.chunk))
    bad = idx[~np.isfinite(ll)]
    where = "its gradient" if bad.size == 0 else (
        f"the log density of {bad.size} of {idx.size} transitions (first: transition {int(bad[0])}, track index "
        f"{int(trans.track_index[bad[0]])}, Δt {trans.dt_s[bad[0]]:.6g} s from ({', '.join(f'{v:.6g}' for v in trans.start_m[bad[0]])}) m)")
    return (f"transition fit: {where} is not finite at step {state.step}, also after {RETRIES} retries of the step "
            f"before at smaller learning rates; the RK4 step of {problem.prop.integrator.step_s:.4g} s may be too "
            "coarse for the flow there, or the positions' units or their error may be off; "
            "--likelihood velocities fits without the transitions")


def _check(state: TrainState, problem: _Problem) -> TrainState:
    idx = _evaluation_rows(problem.trans.n, problem.config.seed)
    checks = state.checks + (_value(state.params, problem, idx, state.jitter_multiple,
                                    _state_variance(state, problem)),)
    plateau = len(checks) >= 2 and checks[-1] - checks[-2] < REL_TOL * max(abs(checks[-2]), float(problem.trans.n))
    plateau = plateau and (not state.extra or state.step > 1.5 * SIGMA_HOLD_STEPS)   # σ_pos moved for 50+ steps
    return dataclasses.replace(state, checks=checks, converged=bool(plateau))


def _train(state: TrainState, problem: _Problem, schedule: Schedule, checkpoint: Checkpoint | None,
           progress: bool) -> tuple[TrainState, _Problem, list[dict[str, Any]]]:
    """Adam steps to the plateau or ``schedule.steps``; at every check the RK4 step follows the field
    (:func:`_refreshed`).  Returns the state, the problem with the step in use at the end, and the RK4 steps used
    (``from_step``, ``step_s``, ``substeps``; one entry per change)."""
    bar = Progress(schedule.steps, initial=min(state.step, schedule.steps), enabled=progress,
                   desc="driftwise fit (transitions)")
    if state.step == 0 and not state.checks:
        state = dataclasses.replace(state, checks=(_value(state.params, problem, _evaluation_rows(
            problem.trans.n, problem.config.seed), state.jitter_multiple, _state_variance(state, problem)),))
    try:
        previous = None
        problem = _refreshed(problem, state) if state.step > 0 else problem     # resumed: the step of its field
        steps = [(state.step, problem.prop.integrator)]
        while state.step < schedule.steps and not state.converged:
            previous, state, problem = _advance_safely(state, previous, problem, schedule)
            if state.step % schedule.patience == 0:
                problem = _refreshed(problem, state)
                state = _check(state, problem)
            if problem.prop.integrator != steps[-1][1]:
                steps.append((state.step, problem.prop.integrator))
            if checkpoint is not None and state.step % checkpoint.every_steps == 0:
                save_checkpoint(checkpoint.path, state, problem.config)
            bar.update(1)
            bar.set_postfix(objective=f"{state.history[-1]:.6g}")
    except KeyboardInterrupt:
        if checkpoint is not None:
            save_checkpoint(checkpoint.path, state, problem.config)
        raise
    finally:
        bar.close()
    if checkpoint is not None:
        save_checkpoint(checkpoint.path, state, problem.config)
    return state, problem, [{"from_step": k, "step_s": float(rk4.step_s), "substeps": rk4.substeps} for k, rk4 in steps]


def _config(warm: fld.FlowField, trans: TransitionSet, prop: Propagation, schedule: Schedule, seed: int,
            fit_sigma: bool) -> TrainConfig:
    digest = hashlib.sha256()
    for array in (trans.start_m, trans.end_m, trans.dt_s, np.asarray(warm.params.q_mean)):
        digest.update(np.ascontiguousarray(array, dtype=np.float64).tobytes())
    tag = (f"transitions:{method_name(prop.method)}:{prop.integrator.step_s}:{prop.integrator.substeps}:"
           + ("sigma-fitted:" if fit_sigma else ""))
    return TrainConfig(warm.kernel_family, warm.kernel_base, int(warm.params.n_inducing), int(seed),
                       int(min(schedule.batch_size, trans.n)), False, "adam", float(schedule.natural_step),
                       float(trans.position_error_m), tag + digest.hexdigest())


def _start(warm: fld.FlowField, problem: _Problem, schedule: Schedule, checkpoint: Checkpoint | None,
           fit_sigma: bool) -> TrainState:
    params = warm.params
    extra = {SIGMA_LEAF: jnp.log(jnp.asarray(problem.trans.position_error_m, jnp.float64))} if fit_sigma else {}
    opt_state = _optimizer().init({**{name: getattr(params, name) for name in _TRAINABLE}, **extra})
    state = TrainState(params, _with_learning_rate(opt_state, schedule.learning_rate), 0, (), warm.jitter_multiple,
                       extra=extra)
    if checkpoint is not None and checkpoint.resume and checkpoint.path.exists():
        return load_checkpoint(checkpoint.path, state, problem.config)
    return state


# ---------------------------------------------------------------------------- the door
def fit_transitions(tracks_or_observations, warm: fld.FlowField, *, position_error_m: float | None = None,
                    schedule: Schedule = TRANSITION_SCHEDULE, method: str = "cubature", step_s: float | None = None,
                    max_substeps: int = 32, seed: int = 0, checkpoint: Checkpoint | None = None,
                    progress: bool = True) -> fld.FlowField:
    """Refit ``warm`` (a velocity fit of the same tracks) by maximising the transition objective L.

    ``position_error_m`` σ_pos of one fix (m), held fixed; None: fitted with the field and K (:func:`_sigma_start`).
    ``method`` a moment method of :data:`driftwise.dynamics.methods.METHODS` (cubature default,
    "linearize" the cheap option); each transition takes min(``max_substeps``, ⌈Δt/``step_s``⌉) RK4 steps,
    ``step_s`` None: from the warm field's velocity gradients (:func:`step_for_field`); at every check of the
    plateau the step shrinks to what the field as fitted so far needs, when that is shorter (:func:`_refreshed`).
    A transition longer than ``max_substeps`` starting steps is left out (counted in ``fit_info``).
    ``schedule``: at most ``steps`` Adam steps on ``batch_size`` transitions at ``learning_rate``;
    ``checkpoint`` as in :func:`driftwise.fit`.  Returns a FlowField whose ``fit_info`` records
    ``likelihood = "transitions"`` and the objective's history.
    """
    fit_sigma = position_error_m is None
    trans = transition_set(tracks_or_observations, position_error_m=0.0 if fit_sigma else position_error_m)
    if fit_sigma:
        trans = dataclasses.replace(trans, position_error_m=_sigma_start(warm, trans))
    if trans.dim != warm.dim:
        raise InputError(f"transitions are {trans.dim}-D but the warm-start field is {warm.dim}-D")
    step_s = step_for_field(warm, trans) if step_s is None else step_s
    trans, too_long = _integrable(trans, step_s, max_substeps)
    prop = _propagation(method, trans, step_s, max_substeps)
    tau = float(warm.decorrelation_time_s or 0.0)
    problem = _Problem(trans, prop, tau, _config(warm, trans, prop, schedule, seed, fit_sigma), max_substeps)
    state, problem, rk4_steps = _train(_start(warm, problem, schedule, checkpoint, fit_sigma), problem, schedule,
                                       checkpoint, progress)
    prop = problem.prop
    sigma_m = math.sqrt(_state_variance(state, problem))
    final = _value(state.params, problem, None, state.jitter_multiple, sigma_m**2)
    if not math.isfinite(final):
        raise RuntimeError("transition fit: the final objective is not finite; check the data and position error")
    turns = _turns(ParamPosterior.from_params(state.params, jitter_multiple=state.jitter_multiple), trans)
    turn, closest = float(np.median(turns)), float(np.percentile(turns, 10))
    if closest > ALIASING_TURN:
        warnings.warn(ALIASED.format(turn=closest), TransitionWarning, stacklevel=2)
    info = {**warm.fit_info, "likelihood": "transitions", "transition_objective": final,
            "transition_objective_per_transition": final / trans.n, "transition_history": list(state.history),
            "transition_steps": state.step, "transition_converged": state.converged,
            "transitions_left_out_too_long": too_long, "transition_longest_dt_s": max_substeps * float(step_s),
            "transition_checks": list(state.checks), "n_transitions": trans.n,
            "transition_method": method, "transition_step_s": float(prop.integrator.step_s),
            "transition_step_s_start": float(step_s), "transition_rk4_steps": rk4_steps,
            "coarseness_fitted": turn, "turn_p10_fitted": closest,
            "transition_substeps": prop.integrator.substeps, "velocity_fit_elbo": warm.fit_info.get("elbo"),
            "velocity_fit_diffusivity_m2_s": warm.diffusivity_m2_s,
            "decorrelation_time_source": "velocity fit: length_scale/rms_speed, held fixed in the transition fit",
            **({"position_error_source": "fitted", "position_error_start_m": trans.position_error_m} if fit_sigma
               else {})}
    return fld.FlowField.from_params(state.params, frame=warm.frame_dict, data_summary=warm.data_summary,
                                     decorrelation_time_s=tau, position_error_m=sigma_m,
                                     fit_info=info, jitter_multiple=state.jitter_multiple)


def _sigma_start(warm: fld.FlowField, trans: TransitionSet) -> float:
    """Where a fitted σ_pos starts (m): the warm field's (the tracks' estimate), at most 1 % of the median distance
    between consecutive fixes.  At coarse fixes the estimate is biased high (the path's curvature between fixes counts
    as error; data.positionerror) and a fit started there stayed near it (stranger checks: irregular fixes, 1.03 km
    → 567 m in 400 steps against a true 10 m, 50 % velocity error), while from below σ grows to what the
    transitions need.

    Why σ_pos is fitted when not given (a trained leaf log σ_pos, :data:`SIGMA_LEAF`): the estimate needs a
    flow that turns by less than about 0.1 rad between fixes (data.positionerror), which coarse fixes are not, and held
    fixed it biased the fit (stranger checks: a 1-mm tank error estimated as 80 mm gave a 40 % velocity error against
    2.5 % with the true error; daily fixes on a 20-km eddy gave K 44 m²/s against 100).  The transition density sees
    σ_pos at both ends of every pair, R in N(x_k, R) → N(m_k, P_k + R), so the fit can weigh it against K: exactly
    only where the flow deforms the start cloud or Δt varies (with even Δt in a uniform stream only 2σ² + 2KΔt is
    identified).  σ_pos is held at its start for the first :data:`SIGMA_HOLD_STEPS` steps while the field sharpens
    (trained from step 0, a fit from a smooth warm start let σ take up the misfit: 38 m → 875 m against a true 10 m,
    irregular fixes; held, 51 m), and the plateau is not declared before 50 steps after its release."""
    step = float(np.median(np.linalg.norm(trans.end_m - trans.start_m, axis=1)))
    cap = 0.01 * step if math.isfinite(step) and step > 0 else 1.0
    sigma = float(warm.position_error_m or 0.0)
    return min(sigma, cap) if math.isfinite(sigma) and sigma > 0 else cap


# ---------------------------------------------------------------------------- which likelihood
@dataclass(frozen=True)
class LikelihoodChoice:
    """The likelihood used (``likelihood``), the one asked for, and the coarseness c against its threshold."""

    likelihood: str
    requested: str
    coarseness: float
    threshold: float

    @property
    def reason(self) -> str:
        relation = "above" if self.coarseness > self.threshold else "at or below"
        how = "asked for" if self.requested != "auto" else "chosen automatically"
        return (f"{self.likelihood} ({how}): fixes are median Δt·|∇μ| = {self.coarseness:.3g} apart in flow time, "
                f"{relation} the threshold {self.threshold:g}")

    def to_dict(self) -> dict[str, Any]:
        return {"likelihood": self.likelihood, "likelihood_requested": self.requested,
                "coarseness": self.coarseness, "coarseness_threshold": self.threshold,
                "coarseness_measure": "median over transitions of dt_s * spectral norm of grad(mu) at the start fix",
                "likelihood_reason": self.reason}


def coarseness(field: fld.FlowField, trans: TransitionSet, *, max_rows: int = 4096) -> float:
    """c = median_k Δt_k ‖∇μ(x_k)‖₂ (dimensionless) over at most ``max_rows`` seeded transitions."""
    return float(np.median(_turns(PointPosterior.from_field(field), trans, max_rows)))


def choose_likelihood(requested: str, field: fld.FlowField, trans: TransitionSet,
                      threshold: float = COARSENESS_THRESHOLD) -> LikelihoodChoice:
    """"auto" → "transitions" when coarseness(field, trans) > threshold, else "velocities"."""
    if requested not in LIKELIHOODS:
        raise InputError(f"likelihood: use one of {', '.join(LIKELIHOODS)}, got {requested!r}")
    c = coarseness(field, trans)
    used = requested if requested != "auto" else ("transitions" if c > threshold else "velocities")
    return LikelihoodChoice(used, requested, c, float(threshold))


def transition_checkpoint_path(path: Path) -> Path:
    """Where the transition stage keeps its checkpoint, beside the velocity fit's ``path``."""
    path = Path(path)
    return path.with_name(path.name.removesuffix(".npz") + ".transitions.npz")


def fit_by_likelihood(tracks, kernel: str, likelihood: str = "auto", *, inducing: int | None = None, seed: int = 0,
                      position_error_m: float | None = None, checkpoint: Checkpoint | None = None, quiet: bool = False,
                      schedule: Schedule = Schedule(), transition_schedule: Schedule = TRANSITION_SCHEDULE,
                      method: str = "cubature", background: str = "linear",
                      timing_s: dict[str, float] | None = None) -> tuple[fld.FlowField, LikelihoodChoice]:
    """The velocity fit, then (when ``likelihood`` is "transitions", or "auto" finds the fixes coarse) the
    transition fit warm-started from it.  Returns (field, :class:`LikelihoodChoice`).  ``checkpoint`` is the
    velocity fit's; the transition stage keeps its own beside it (:func:`transition_checkpoint_path`) and
    removes it once it has finished.  ``position_error_m`` None: the velocity fit's estimate, which the transition fit
    then fits further (:func:`fit_transitions`); ``background`` as
    in :func:`driftwise.fit`; ``timing_s`` receives the stages' wall seconds (:class:`driftwise.progress.Stopwatch`)."""
    progress, clock = not quiet, Stopwatch(timing_s)
    if likelihood not in LIKELIHOODS:
        raise InputError(f"likelihood: use one of {', '.join(LIKELIHOODS)}, got {likelihood!r}")
    warm_schedule = dataclasses.replace(schedule, optimiser="adam")
    field = fit(tracks, kernel, inducing=inducing, seed=seed, position_error_m=position_error_m,
                schedule=warm_schedule if likelihood == "transitions" else schedule, checkpoint=checkpoint,
                progress=progress, background=background, timing_s=clock.laps)
    # the coarseness check needs a number; the warm-start refit and the transition fit get the caller's (None:
    # estimated again and recorded as an estimate, then fitted: not refused or reported as a --position-error the
    # user never gave)
    sigma_m = field.position_error_m if position_error_m is None else position_error_m
    trans = transition_set(tracks, position_error_m=sigma_m)
    choice = choose_likelihood(likelihood, field, trans)
    if choice.likelihood == "transitions" and (likelihood != "transitions" or position_error_m is None):
        # the transition fit was validated from Adam's warm start; from the L-BFGS-B optimum of the velocity bound
        # it did worse (30-min fixes in the vortex: RMSE 0.0087 against 0.0077 m/s; DEVELOPERS.md, "Benchmark
        # record").  Without a given σ the warm start takes the fitted σ's start (_sigma_start), not the estimate:
        # at coarse fixes the estimate is biased high and a velocity fit with it is too smooth to refit from
        # (stranger check, irregular 1–12-h fixes: 43 % velocity error from a warm start at 1.03 km, 9.9 % at 10 m)
        warm_sigma = position_error_m if position_error_m is not None else _sigma_start(field, trans)
        with clock("warm_start"):
            field = fit(tracks, kernel, inducing=inducing, seed=seed, position_error_m=warm_sigma,
                        schedule=warm_schedule, progress=progress, background=background)
    if choice.likelihood == "transitions":
        stage = None if checkpoint is None else Checkpoint(transition_checkpoint_path(checkpoint.path),
                                                           resume=checkpoint.resume,
                                                           every_steps=checkpoint.every_steps)
        with clock("transition_fit"):
            field = fit_transitions(tracks, field, position_error_m=position_error_m, schedule=transition_schedule,
                                    method=method, seed=seed, checkpoint=stage, progress=progress)
        if stage is not None:
            stage.path.unlink(missing_ok=True)
    return field, choice


def fit_report(field: fld.FlowField, choice: LikelihoodChoice) -> dict[str, Any]:
    """The ``driftwise fit --json`` object: :func:`driftwise.gp.training.fit_report` plus the likelihood used, the
    coarseness and its threshold (:meth:`LikelihoodChoice.to_dict`) and, after a transition fit, its objective and
    (when calibrated) ``calibration_check``: K and τ of the separate calibration beside the fit's own K."""
    info = field.fit_info
    extra = {key: info[key] for key in ("transition_objective", "transition_steps", "transition_converged",
                                        "coarseness_fitted", "turn_p10_fitted", "position_error_start_m",
                                        "n_transitions", "transitions_left_out_too_long", "transition_longest_dt_s", "transition_method",
                                        "transition_step_s", "transition_substeps", "calibration_check")
             if key in info}
    return {**velocity_fit_report(field), **choice.to_dict(), **extra}
