"""Fitting a :class:`~driftwise.gp.field.FlowField` to drifter data: :func:`fit`.

The objective is the sparse variational ELBO of :mod:`driftwise.gp.field` (Titsias 2009;
Hensman, Fusi & Lawrence 2013, "Gaussian processes for big data"), maximised over the
kernel hyperparameters, the eddy diffusivity K and the noise floor σ₀ (optionally also
the inducing inputs Z) on log parameters.

Schedule (``q_update="auto"``):

* N ≤ 16 × batch_size (16 384 observations at the default batch): every step uses all
  observations with q(w) at its exact optimum for the current hyperparameters
  (:mod:`driftwise.gp.variational`), so the objective is Titsias' collapsed bound, a smooth
  deterministic function of the hyperparameters, maximised by L-BFGS-B
  (:mod:`driftwise.gp.quasinewton`; one iteration is one step).  On all rows this reaches
  the collapsed bound, where minibatches with Adam on q stop below it (DEVELOPERS.md,
  "Benchmark record", keeps the measured figures).
* larger N: the same on a seeded random subsample of 16 × batch_size observations, whose
  own (unscaled) collapsed bound sets the hyperparameters; q is then made optimal on all N
  (below); the subsample's bound sets hyperparameters as good as all-data steps
  (DEVELOPERS.md, "Benchmark record").
* ``q_update="adam"`` or ``"natural"`` with N > 16 × batch_size: minibatches instead
  (Hensman et al.) with Adam (:mod:`driftwise.gp.adamstep`, Kingma & Ba 2015) on q(w) and
  the hyperparameters together, or natural-gradient steps of length ``natural_step``
  towards each minibatch's optimum.  Both stop below the collapsed bound (see above), so
  neither is the default.  Learned inducing points (``learn_inducing``) also take Adam steps.

q starts at the exact optimum (from ≤ 16 384 random observations) and ends there (from
all data, chunk by chunk); the reported ELBO is then evaluated on all observations.
Every ``patience`` steps the ELBO (the bound itself, or on fixed evaluation rows for
Adam) is checked; the fit stops when it gained less than 1e-4 × max(|ELBO|, N nats)
since the previous check.

Minibatches are epochs of a permutation from ``numpy.random.default_rng([seed, epoch])``,
so the random state is (seed, step); with the parameters, the optimiser state (learning
rate included), the jitter, the ELBO history and the checks it is what a checkpoint
holds, and a resumed Adam fit retraces the uninterrupted one (a resumed L-BFGS-B fit
starts a new curvature memory at the checkpoint and reaches the same plateau).  A non-finite ELBO or gradient
is retried with 100× the jitter, then also half the learning rate, and raises after six
attempts.  The fit record (ELBO history, steps, τ and its source) travels as
``FlowField.fit_info``; τ defaults to length scale / RMS posterior-mean speed.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import warnings
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..data.datascales import check_position_error, data_scales
from ..data.frame import Frame
from ..data.observations import MIN_FIT_OBSERVATIONS, velocity_observations
from ..data.positionerror import estimate_position_error
from ..data.support import support_record
from ..data.utctime import UNIX_EPOCH_UTC
from ..errors import InputError
from ..progress import Progress, Stopwatch
from . import field as fld
from .adamstep import GROUP_STEPS, optimiser_step, optimiser_steps, optimizer, trainable_names, with_learning_rate
from .background import BACKGROUNDS
from .kernels import BASES, DEFAULT_FAMILY, KERNEL_FAMILIES
from .initial import extent_m as _extent_m
from .initial import initial_hyperparameters, initial_inducing
from .quasinewton import maximise_bound, split_trainable
from .schedule import Checkpoint, Schedule, TrainConfig, TrainState, load_checkpoint, save_checkpoint
from .temporalfit import MAX_TEMPORAL_INDUCING, temporal_choice, temporal_report, temporal_start
from .variational import (CHUNK, chunks, exact_q, full_elbo, mean_speed_squared, natural_step_jit, take,
                          traced_elbo)

__all__ = ["Schedule", "Checkpoint", "fit", "fit_report", "fit_summary"]

FULL_BATCH_FACTOR = 16    # all observations in every step when N ≤ 16 × batch_size, else a subsample that size
MAX_DEFAULT_INDUCING = 256
REL_TOL = 1e-4            # plateau: ELBO gain between checks below this fraction of max(|ELBO|, N nats)
INIT_SUBSAMPLE = 16384    # observations used for the initial q
RETRIES = 6               # non-finite step: attempts with more jitter / a smaller step
MAX_JITTER_MULTIPLE = 1e12  # δ ≤ 1e12 · eps · σ² ≈ 2e-4 σ²


# ----------------------------------------------------------------------------------- data
@dataclasses.dataclass(frozen=True)
class _Data:
    """Observations in the form the loop needs, plus what the model file records."""

    obs: Any
    batch: fld.ObservationBatch      # all observations, device arrays
    n_tracks: int
    frame: Any
    fingerprint: str
    time_is_absolute: bool = False   # Tracks read from ISO-8601 times: seconds since the Unix epoch

    @property
    def n(self) -> int:
        return int(self.batch.position_m.shape[0])


def prepare_data(data, position_error_m: float, *, with_time: bool = False) -> _Data:
    """Tracks → velocity observations (or Observations as given), validated; the midpoint times kept in the
    batch for a time-varying fit (``with_time``), dropped for a steady one."""
    if hasattr(data, "velocity_m_s") and hasattr(data, "dt_s"):
        obs = data
        n_tracks = int(np.unique(np.asarray(obs.track_index)).size) if hasattr(obs, "track_index") else 0
    elif hasattr(data, "track_id") and hasattr(data, "position_m"):

        obs = velocity_observations(data, position_error_m=position_error_m)
        n_tracks = int(np.unique(np.asarray(data.track_id)).size)
    else:
        raise InputError(f"fit needs driftwise Tracks or Observations, got {type(data).__name__}")
    batch = fld.batch_from_observations(obs)
    if with_time and batch.time_s is None:
        raise InputError("a time-varying fit needs the observations' times (time_s)")
    batch = batch if with_time else batch.without_time()
    _check_finite(batch)
    if batch.position_m.shape[0] < MIN_FIT_OBSERVATIONS:
        raise InputError(f"fit needs at least {MIN_FIT_OBSERVATIONS} velocity observations (consecutive fixes "
                         f"of a track), got {batch.position_m.shape[0]}")

    frame = getattr(data, "frame", None) or getattr(obs, "frame", None) or Frame()
    return _Data(obs, batch, n_tracks, frame, _fingerprint(batch), bool(getattr(data, "time_is_absolute", False)))


def _position_error(data, position_error_m: float | None, seed: int) -> tuple[float | None, dict[str, Any]]:
    """σ_pos (m) for the fit and its record.  Tracks: the given value, refused when larger than the
    data's median step (:func:`driftwise.data.datascales.check_position_error`), or, when None, the
    estimate of :func:`driftwise.data.positionerror.estimate_position_error`.  Observations carry theirs."""
    if not hasattr(data, "track_id"):
        return position_error_m, {"position_error_source": "given"}
    if position_error_m is not None:
        check_position_error(position_error_m, data_scales(data), option="position error (--position-error)")
        return position_error_m, {"position_error_source": "given"}
    estimate = estimate_position_error(data, seed=seed)
    return estimate.value_m, {"position_error_source": "estimated", "position_error_estimate": estimate.to_dict()}


def _check_finite(batch: fld.ObservationBatch) -> None:
    for name in ("position_m", "velocity_m_s", "random_walk_coefficient_s_inv", "position_noise_var_m2_s2", "time_s"):
        if getattr(batch, name) is None:
            continue
        values = np.asarray(getattr(batch, name))
        bad = ~np.isfinite(values.reshape(values.shape[0], -1)).all(axis=1)
        if bad.any():
            raise InputError(f"velocity observation {int(np.argmax(bad))}: {name} is NaN or infinite")


def _fingerprint(batch: fld.ObservationBatch) -> str:
    digest = hashlib.sha256()
    for leaf in jax.tree_util.tree_leaves(batch):
        digest.update(np.ascontiguousarray(np.asarray(leaf)).tobytes())
    return digest.hexdigest()


# ----------------------------------------------------------------------------- initial state
def _initial_params(data: _Data, config: TrainConfig) -> fld.FieldParams:
    z = initial_inducing(np.asarray(data.batch.position_m), config.n_inducing, seed=config.seed)
    h = initial_hyperparameters(data.batch, z)
    sigma = h["velocity_scale_m_s"] / (math.sqrt(2.0) if config.kernel == "helmholtz" else 1.0)
    temporal = None if not config.temporal else temporal_start(
        config.temporal, data.batch, data.frame, n_inducing=z.shape[0], length_scale_m=h["length_scale_m"],
        velocity_scale_m_s=sigma, seed=config.seed)
    params = fld.init_params(config.kernel, z.shape[1], z, velocity_scale_m_s=sigma,
                             length_scale_m=h["length_scale_m"], diffusivity_m2_s=h["diffusivity_m2_s"],
                             noise_floor_m_s=h["noise_floor_m_s"], base=config.base, background=config.background,
                             centre_m=h["centre_m"], background_scales=h["background_scales"], temporal=temporal)
    return _strong(params)


def _strong(tree):
    """Every leaf a strongly typed float64 array (weak types would make jit compile twice)."""
    return jax.tree_util.tree_map(lambda leaf: jnp.asarray(np.asarray(leaf, dtype=np.float64)), tree)


def _batch_indices(n: int, batch_size: int, seed: int, step: int) -> np.ndarray | None:
    """Rows of step ``step``: slice ``step mod E`` of the permutation of epoch ``step // E`` (None = all rows)."""
    if batch_size >= n:
        return None
    per_epoch = n // batch_size
    epoch, slot = divmod(step, per_epoch)
    order = _epoch_permutation(n, seed, epoch)
    return np.sort(order[slot * batch_size:(slot + 1) * batch_size])


_PERMUTATION_CACHE: dict[tuple[int, int, int], np.ndarray] = {}


def _epoch_permutation(n: int, seed: int, epoch: int) -> np.ndarray:
    key = (n, seed, epoch)
    if key not in _PERMUTATION_CACHE:
        _PERMUTATION_CACHE.clear()
        _PERMUTATION_CACHE[key] = np.random.default_rng([seed, epoch]).permutation(n)
    return _PERMUTATION_CACHE[key]


def plateau_reached(checks: tuple[float, ...], n_total: int) -> bool:
    """The last check gained < REL_TOL · max(|previous check|, N nats) on the one before."""
    if len(checks) < 2:
        return False
    return bool(checks[-1] - checks[-2] < REL_TOL * max(abs(checks[-2]), float(n_total)))


def _evaluation_rows(n: int, seed: int) -> np.ndarray | None:
    """Fixed rows on which the plateau is judged: all (None) when N ≤ 8192, else a seeded sample of 8192."""
    if n <= CHUNK:
        return None
    return np.sort(np.random.default_rng([seed, 2**31 - 2]).choice(n, CHUNK, replace=False))


def _check(state: TrainState, data: _Data, config: TrainConfig) -> TrainState:
    """Append the ELBO (N/b-scaled, current q) on the evaluation rows and flag a plateau."""
    idx = _evaluation_rows(data.n, config.seed)
    batch = data.batch if idx is None else take(data.batch, idx)
    value = float(traced_elbo(state.params, batch, float(data.n), jitter_multiple=state.jitter_multiple))
    checks = state.checks + (value,)
    return dataclasses.replace(state, checks=checks, converged=plateau_reached(checks, data.n))


def advance(state: TrainState, data: _Data, config: TrainConfig, z_scale: float) -> TrainState:
    """One accepted step; on a non-finite ELBO/gradient retry with 100× jitter, then also half the step size."""
    idx = _batch_indices(data.n, config.batch_size, config.seed, state.step)
    batch = data.batch if idx is None else take(data.batch, idx)
    gamma = 1.0 if idx is None else config.natural_step
    names = trainable_names(config.q_update, config.learn_inducing)
    jitter, opt_state = state.jitter_multiple, state.opt_state
    for attempt in range(RETRIES + 1):
        params, new_opt, value, ok = optimiser_step(state.params, opt_state, batch, float(data.n), gamma, z_scale,
                                           names=names, q_update=config.q_update, jitter_multiple=jitter)
        if bool(ok):
            return dataclasses.replace(state, params=params, opt_state=new_opt, step=state.step + 1,
                                       history=state.history + (float(value),), jitter_multiple=jitter)
        jitter = min(jitter * 100.0, MAX_JITTER_MULTIPLE)
        if attempt % 2 == 1:
            opt_state = with_learning_rate(opt_state, float(opt_state.hyperparams["learning_rate"]) / 2.0)
    lr = float(opt_state.hyperparams["learning_rate"])
    raise RuntimeError(f"fit: the ELBO or its gradient stayed non-finite at step {state.step} after {RETRIES} retries "
                       f"(jitter multiple {jitter:.0e}, learning rate {lr:.2e}); the data may hold extreme "
                       "velocities (check units and --max-speed) or too many inducing points for the data")


def advance_group(state: TrainState, data: _Data, config: TrainConfig, z_scale: float, count: int) -> TrainState:
    """``count`` accepted steps on all rows (a full-batch fit) in one compiled loop (:func:`optimiser_steps`); a
    non-finite step is redone by :func:`advance` with its retries."""
    if count <= 1:
        return state if count < 1 else advance(state, data, config, z_scale)
    names = trainable_names(config.q_update, config.learn_inducing)
    params, opt_state, values, accepted = optimiser_steps(
        state.params, state.opt_state, data.batch, float(data.n), 1.0, z_scale, count, names=names,
        q_update=config.q_update, jitter_multiple=state.jitter_multiple)
    accepted = int(accepted)
    state = dataclasses.replace(state, params=params, opt_state=opt_state, step=state.step + accepted,
                                history=state.history + tuple(float(v) for v in np.asarray(values)[:accepted]))
    if accepted < count:   # the failed step again, with retries, then the rest of the group
        state = advance_group(advance(state, data, config, z_scale), data, config, z_scale, count - accepted - 1)
    return state


def _group_size(step: int, steps: int, patience: int, checkpoint: Checkpoint | None, full_batch: bool) -> int:
    """Steps until the next plateau check, checkpoint or the end, at most GROUP_STEPS (≥ 1); 1 on minibatches,
    whose rows change every step."""
    every = checkpoint.every_steps if checkpoint is not None else patience
    return max(1, min(GROUP_STEPS if full_batch else 1, steps - step, patience - step % patience, every - step % every))


# ------------------------------------------------------------------------------ the loop
def _train(state: TrainState, data: _Data, config: TrainConfig, schedule: Schedule, *, z_scale: float,
           checkpoint: Checkpoint | None, progress: bool) -> TrainState:
    """Adam steps (:func:`advance_group`), or L-BFGS-B iterations (:mod:`driftwise.gp.quasinewton`) when every step
    sees all rows with q at its optimum; either way a plateau check every ``patience`` steps and a checkpoint
    every ``every_steps``."""
    steps, patience = schedule.steps, schedule.patience
    bar = Progress(steps, initial=min(state.step, steps), enabled=progress, desc="driftwise fit")
    latest = [state]

    def after_step(now: TrainState, before: int, check) -> TrainState:
        if now.step % patience == 0:
            now = check(now)
        if checkpoint is not None and now.step % checkpoint.every_steps == 0:
            save_checkpoint(checkpoint.path, now, config)
        bar.update(now.step - before)
        bar.set_postfix(elbo=f"{now.history[-1]:.6g}")
        latest[0] = now
        return now

    try:
        if uses_quasi_newton(config, data.n, schedule.optimiser):
            names = trainable_names(config.q_update, config.learn_inducing)
            maximise_bound(state, data.batch, float(data.n), names=names, z_scale=z_scale, steps=steps,
                           after_step=lambda now: after_step(now, now.step - 1, lambda s: _check_bound(s, data.n)))
        while latest[0].step < steps and not latest[0].converged:
            state = latest[0]
            count = _group_size(state.step, steps, patience, checkpoint, config.batch_size >= data.n)
            after_step(advance_group(state, data, config, z_scale, count), state.step,
                       lambda now: _check(now, data, config))
    except KeyboardInterrupt:
        if checkpoint is not None:
            save_checkpoint(checkpoint.path, latest[0], config)
        raise
    finally:
        bar.close()
    if checkpoint is not None:
        save_checkpoint(checkpoint.path, latest[0], config)
    return latest[0]


def uses_quasi_newton(config: TrainConfig, n: int, optimiser: str = "auto") -> bool:
    """True when every step sees all n rows with q exact (natural steps of length 1: a deterministic objective) and
    the schedule leaves the choice to the fit (``optimiser`` "auto")."""
    return optimiser == "auto" and config.q_update == "natural" and config.batch_size >= n and not config.learn_inducing


def _check_bound(state: TrainState, n: int) -> TrainState:
    """The plateau check of a quasi-Newton fit: on the bound of the last iterate (all rows, exact q)."""
    checks = state.checks + (state.history[-1],)
    return dataclasses.replace(state, checks=checks, converged=plateau_reached(checks, n))


def start_state(data: _Data, config: TrainConfig, *, learning_rate: float,
           checkpoint: Checkpoint | None) -> tuple[TrainState, float]:
    """The initial state (or the checkpointed one) and the scale of Z's trainable coordinates (m)."""
    params = _initial_params(data, config)
    names = trainable_names(config.q_update, config.learn_inducing)
    z_scale = _z_scale(params)
    opt_state = with_learning_rate(optimizer().init(split_trainable(params, names, z_scale)), learning_rate)
    state = TrainState(params, opt_state, 0, (), fld.JITTER_MULTIPLE)
    if checkpoint is not None and checkpoint.resume and checkpoint.path.exists():
        return load_checkpoint(checkpoint.path, state, config), z_scale
    if checkpoint is not None and checkpoint.resume:
        warnings.warn(f"{checkpoint.path}: no checkpoint to resume from; starting a new fit", stacklevel=3)
    return dataclasses.replace(state, params=_initial_q(params, data, config.seed)), z_scale


def _initial_q(params: fld.FieldParams, data: _Data, seed: int) -> fld.FieldParams:
    """Optimal q for the starting hyperparameters from ≤ 16 384 random observations, scaled by N/n."""
    if data.n <= INIT_SUBSAMPLE:
        return exact_q(params, data.batch, jitter_multiple=fld.JITTER_MULTIPLE)
    idx = np.sort(np.random.default_rng([seed, 2**31 - 1]).choice(data.n, INIT_SUBSAMPLE, replace=False))
    return natural_step_jit(params, take(data.batch, idx), float(data.n), 1.0, jitter_multiple=fld.JITTER_MULTIPLE)


def _z_scale(params: fld.FieldParams) -> float:
    z = np.asarray(params.inducing_m)
    return _extent_m(z) / max(z.shape[0], 1) ** (1.0 / z.shape[1])


# ------------------------------------------------------------------------------ the result
def _finish(state: TrainState, data: _Data, config: TrainConfig, schedule: Schedule,
            record: dict[str, Any] | None = None) -> fld.FlowField:
    steps, patience = schedule.steps, schedule.patience
    jitter = state.jitter_multiple
    params = exact_q(state.params, data.batch, jitter_multiple=jitter)
    elbo = full_elbo(params, data.batch, jitter_multiple=jitter)
    if not math.isfinite(elbo):
        raise RuntimeError("fit: the final ELBO is not finite; refit with fewer inducing points or check the data")
    common = dict(frame=data.frame, data_summary=data_summary(data), jitter_multiple=jitter,
                  position_error_m=float(np.asarray(data.obs.position_error_m).mean()))
    tau, rms_speed, length = _decorrelation_time_s(params, data, jitter)
    info = {"elbo": elbo, "elbo_per_observation": elbo / data.n, "elbo_history": list(state.history),
            "elbo_history_kind": _history_kind(config, data.n), "hyperparameter_rows": config.subsample or data.n,
            "steps": state.step, "max_steps": steps, "converged": state.converged, "patience_steps": patience,
            "plateau_checks": list(state.checks),
            "q_update": config.q_update, "seed": config.seed, "batch_size": min(config.batch_size, data.n),
            "optimiser": ("L-BFGS-B on the collapsed bound"
                          if uses_quasi_newton(config, config.subsample or data.n, schedule.optimiser) else "Adam"),
            "learning_rate_final": float(state.opt_state.hyperparams["learning_rate"]),
            "decorrelation_time_source": "length_scale/rms_speed", "rms_speed_m_s": rms_speed,
            "length_scale_m": length,
            "rms_speed_source": "posterior mean speed at the observation midpoints (RMS)"} | (record or {})
    return fld.FlowField.from_params(params, decorrelation_time_s=tau, fit_info=info, **common)


def _history_kind(config: TrainConfig, n: int) -> str:
    if config.subsample:
        return f"per-step ELBO of the {config.subsample} subsampled observations (unscaled), nats"
    if config.batch_size < n:
        return "per-step minibatch estimate (N/b scaled), nats"
    return "per-step ELBO on all observations, nats"


def data_summary(data: _Data) -> dict[str, Any]:
    """What the model file records about its data: counts, extent (m), σ_pos, time span and origin, digest,
    and a thinned copy of the observation positions (:mod:`driftwise.data.support`)."""
    position = np.asarray(data.batch.position_m)
    obs = data.obs
    summary = {"n_tracks": data.n_tracks, "n_observations": data.n,
               "extent_m": {"min": position.min(axis=0).tolist(), "max": position.max(axis=0).tolist()},
               "position_error_m": float(np.asarray(obs.position_error_m).mean()),
               "observations_sha256": data.fingerprint, "support": support_record(position)}
    if hasattr(obs, "time_s"):
        time = np.asarray(obs.time_s, dtype=np.float64)
        summary["time_span_s"] = [float(time.min()), float(time.max())]
    if data.time_is_absolute:
        summary["time_origin_utc"] = UNIX_EPOCH_UTC
    if hasattr(obs, "dt_s"):
        summary["median_dt_s"] = float(np.median(np.asarray(obs.dt_s)))
    return summary


def length_scale_m(kernel) -> float:
    """ℓ of the kernel; for Helmholtz the variance-weighted mean (σ₁²ℓ₁ + σ₂²ℓ₂)/(σ₁² + σ₂²) of the parts."""
    h = kernel.hyperparameters()
    if "length_scale_m" in h:
        return float(h["length_scale_m"])
    w1, w2 = h["divergence_free_velocity_scale_m_s"] ** 2, h["curl_free_velocity_scale_m_s"] ** 2
    return float((w1 * h["divergence_free_length_scale_m"] + w2 * h["curl_free_length_scale_m"]) / (w1 + w2))


def _decorrelation_time_s(params: fld.FieldParams, data: _Data, jitter: float) -> tuple[float, float, float]:
    """τ = ℓ / U_rms (s), U_rms the RMS posterior-mean speed at the observation midpoints (Taylor 1921)."""
    parts = chunks(data.n)
    total = sum(float(mean_speed_squared(params, data.batch if len(parts) == 1 else take(data.batch, idx),
                                         jitter_multiple=jitter)) for idx in parts)
    rms = math.sqrt(total / data.n)
    length = length_scale_m(params.kernel)
    return length / max(rms, 1e-9), rms, length


def fit_summary(field: fld.FlowField) -> dict[str, Any]:
    """The fit record of a fitted field (ELBO history, steps, τ source), or {} if it has none."""
    return field.fit_info


def fit_report(field: fld.FlowField) -> dict[str, Any]:
    """The ``driftwise fit --json`` object: kernel, n_tracks, n_observations, elbo, hyperparameters,
    diffusivity_m2_s, decorrelation_time_s (and its source), steps and convergence, and the background
    flow's coefficients (posterior mean and s.d.)."""
    info, summary = fit_summary(field), field.data_summary
    return {"kernel": field.kernel_family, "base": field.kernel_base, "dimension": field.dim,
            "n_inducing": int(field.params.n_inducing), "n_tracks": summary.get("n_tracks"),
            "n_observations": summary.get("n_observations"), "elbo": info.get("elbo"),
            "elbo_per_observation": info.get("elbo_per_observation"), "hyperparameters": field.hyperparameters,
            "diffusivity_m2_s": field.diffusivity_m2_s, "decorrelation_time_s": field.decorrelation_time_s,
            "decorrelation_time_source": info.get("decorrelation_time_source"), "steps": info.get("steps"),
            "converged": info.get("converged"), "frame": field.frame_dict,
            "position_error_m": field.position_error_m,
            "position_error_source": info.get("position_error_source", "given"),
            "position_error_estimate": info.get("position_error_estimate"), "background": _background_report(field),
            "temporal": temporal_report(field.params.kernel)}


def _background_report(field: fld.FlowField) -> dict[str, dict[str, float]]:
    """Posterior mean and s.d. of each background coefficient (m/s or 1/s, unit in the name); {} without one."""
    names, mean, cov = field.background_posterior()
    std = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    return {name: {"mean": float(m), "std": float(s)} for name, m, s in zip(names, mean, std)}


# ------------------------------------------------------------------------------ the door
def fit(tracks_or_observations, kernel: str = DEFAULT_FAMILY, *, inducing: int | None = None, seed: int = 0,
        position_error_m: float | None = None, base: str = "squared-exponential", schedule: Schedule = Schedule(),
        checkpoint: Checkpoint | None = None, progress: bool = True, background: str = "linear",
        tides=(), slow_time_scale_s=None, timing_s: dict[str, float] | None = None) -> fld.FlowField:
    """Fit a vector-field GP to drifter tracks (or velocity observations) and return the FlowField.

    Time-varying flows (:mod:`driftwise.gp.temporal`): ``tides`` names constituents of
    :data:`driftwise.gp.constituents.CONSTITUENTS` ("M2", "S2", "N2", "K1", "O1", "inertial"; a tuple or a comma
    list; () or "none": no harmonics), each adding amplitude fields a_c, b_c; ``slow_time_scale_s`` None (no
    slow part), "auto" (a slow part whose Matérn-3/2 time scale is learned from max(span/4, twice the longest
    period, 1 day)) or a number of seconds (the slow part with that time scale, fixed).  Then M (``inducing``)
    spatial points serve the steady and every harmonic part (default min(48, the steady default)) and the slow
    part gets M space–time points; the observations' midpoint times are used; the field needs times to predict.

    ``kernel`` a name in :data:`driftwise.gp.kernels.KERNEL_FAMILIES`, ``base`` ∈
    {"squared-exponential", "matern52"}; ``background`` ∈ {"none", "uniform", "linear"} the background flow
    of the prior (:mod:`driftwise.gp.background`: a uniform velocity, plus a linear field about the data's
    centre for "linear", each with a Gaussian prior whose scale is learned); ``inducing`` M points by
    k-means (default None: min(256, max(16, N/32)) for N velocity observations); ``position_error_m``
    σ_pos of one fix (m, used when tracks are given; None: estimated from the tracks' second
    differences, :mod:`driftwise.data.positionerror`; a value above the median step between fixes is
    refused; ``fit_info`` records ``position_error_source``, "given" or "estimated", and the
    estimate with its standard error).  ``schedule`` (:class:`Schedule`): at most
    ``steps`` optimiser steps, each on all N observations when N ≤ 16 × ``batch_size``; for larger N
    on a fixed seeded subsample of 16 × ``batch_size`` of them (``q_update="auto"``) or on
    minibatches of ``batch_size`` ("adam", "natural").  Every ``patience`` steps the ELBO on fixed
    evaluation rows (all, or 8192 when there are more) is checked, and the fit stops once it gained
    less than 1e-4 × max(|ELBO|, N nats) since the previous check; q is then made optimal on all N.
    ``checkpoint`` (:class:`Checkpoint`) keeps the resumable state; with ``resume=True`` the fit
    continues from it and ends where the uninterrupted fit would.  ``timing_s``: a dict that receives the wall
    seconds of the stages (estimate_position_error, prepare, optimise, finish), for ``--profile``.
    """
    clock = Stopwatch(timing_s)
    config = check_options(kernel, base, inducing, seed, schedule, position_error_m, background)
    config = dataclasses.replace(config, temporal=temporal_choice(tides, slow_time_scale_s).to_json())
    with clock("estimate_position_error"):
        position_error_m, record = _position_error(tracks_or_observations, position_error_m, int(seed))
    with clock("prepare"):
        data = prepare_data(tracks_or_observations, position_error_m, with_time=bool(config.temporal))
        config = resolve_rows(config, data.n, fingerprint=data.fingerprint,
                              position_error_m=float(data.obs.position_error_m))
        train = _subsample(data, config.subsample, config.seed)
        state, z_scale = start_state(train, config, learning_rate=schedule.learning_rate, checkpoint=checkpoint)
    with clock("optimise"):
        state = _train(state, train, config, schedule, z_scale=z_scale, checkpoint=checkpoint, progress=progress)
    with clock("finish"):
        return _finish(state, data, config, schedule, record)


def resolve_rows(config: TrainConfig, n: int, **fields) -> TrainConfig:
    """Settle the rows each step sees.  N ≤ 16 × batch_size: all of them.  Larger N: with
    ``q_update="auto"`` a fixed subsample of 16 × batch_size rows, all of them every step (exact q);
    with "adam" or "natural", minibatches of batch_size."""
    limit = FULL_BATCH_FACTOR * config.batch_size
    full = n <= limit
    inducing = config.n_inducing or default_inducing(n, time_varying=bool(config.temporal))
    if config.q_update == "auto":
        return dataclasses.replace(config, batch_size=min(n, limit), q_update="natural", n_inducing=inducing,
                                   subsample=0 if full else limit, **fields)
    return dataclasses.replace(config, batch_size=n if full else config.batch_size, n_inducing=inducing, **fields)


def subsample_rows(n: int, rows: int, seed: int) -> np.ndarray:
    """The ``rows`` of N observations (sorted, seeded) on which a large fit sets its hyperparameters."""
    return np.sort(np.random.default_rng([seed, 2**31 - 3]).choice(n, rows, replace=False))


def _subsample(data: _Data, rows: int, seed: int) -> _Data:
    """The observations the hyperparameters are fitted on: all (rows = 0), or :func:`subsample_rows`."""
    if not rows:
        return data
    return dataclasses.replace(data, batch=take(data.batch, subsample_rows(data.n, rows, seed)))


def default_inducing(n_observations: int, *, time_varying: bool = False) -> int:
    """M = min(256, max(16, N/32)): beyond about one inducing point per 32 velocity observations
    the bound barely rises on the demo bay (DEVELOPERS.md, "Benchmark record") while a step costs ∝ M².
    A time-varying fit has (1 + 2C) M + M_s features, so its spatial M is capped at 48."""
    cap = MAX_TEMPORAL_INDUCING if time_varying else MAX_DEFAULT_INDUCING
    return int(min(cap, max(16, n_observations // 32)))


def check_options(kernel, base, inducing, seed, schedule: Schedule, position_error_m,
                   background: str = "linear") -> TrainConfig:
    """Validate fit()'s options (InputError naming the bad one) → the TrainConfig that fixes the path."""
    if background not in BACKGROUNDS:
        raise InputError(f"unknown background {background!r}; choose one of {', '.join(BACKGROUNDS)}")
    if kernel not in KERNEL_FAMILIES:
        raise InputError(f"unknown kernel {kernel!r}; choose one of {', '.join(KERNEL_FAMILIES)}")
    if base not in BASES:
        raise InputError(f"unknown base kernel {base!r}; choose one of {', '.join(BASES)}")
    if not isinstance(schedule, Schedule):
        raise InputError(f"schedule must be a driftwise Schedule, got {type(schedule).__name__}")
    if inducing is not None and (not isinstance(inducing, (int, np.integer)) or isinstance(inducing, bool)
                                 or inducing < 1):
        raise InputError(f"inducing must be an integer ≥ 1, got {inducing!r}")
    if not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed must be a non-negative integer, got {seed!r}")
    if position_error_m is not None and not (math.isfinite(position_error_m) and position_error_m >= 0):
        raise InputError(f"position error must be a finite number of metres ≥ 0, got {position_error_m!r}")
    return TrainConfig(kernel, base, 0 if inducing is None else int(inducing), int(seed), int(schedule.batch_size),
                       bool(schedule.learn_inducing), schedule.q_update, float(schedule.natural_step), 0.0, "",
                       background=background)
