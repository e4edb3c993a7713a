"""Fitting a :class:`~driftwise.field.FlowField` to drifter data.

One entry point, :func:`fit`.  The objective is the sparse variational ELBO of
:mod:`driftwise.field` (Titsias 2009; Hensman, Fusi & Lawrence 2013, "Gaussian
processes for big data"), maximised over the kernel hyperparameters, the eddy
diffusivity K and the noise floor σ₀ (and optionally the inducing inputs Z).

The variational distribution q(w) = N(m, SSᵀ) is updated in closed form
(``q_update="natural"``, the default): with natural parameters θ = (Λ, Λm),
Λ = (SSᵀ)^{−1}, each step moves θ ← (1 − γ) θ + γ θ̂_B, where θ̂_B is the
ELBO-optimal q for the current minibatch B scaled by N/|B| (Hensman et al. 2013,
§3: a natural-gradient step of length γ).  When all data fit in one batch
γ = 1 and this is the exact optimal q (Titsias 2009), so the hyperparameter
gradient taken at that q is the gradient of the collapsed bound.  The
hyperparameters take one Adam step (Kingma & Ba 2015, via optax) per step.
``q_update="adam"`` instead optimises m and S with Adam too (the plain
Hensman et al. scheme); the benchmark compares the two.

Before and after the loop q is set to the exact optimum for the current
hyperparameters — at the start from a large random subsample, at the end from
all data, accumulated chunk by chunk: Λ = I + Σ_c Φ_cᵀR_c⁻¹Φ_c, Λm = Σ_c Φ_cᵀR_c⁻¹y_c
with Φ = K(X, Z) L_Z^{−T}.  The reported ELBO is then evaluated exactly over all
observations.

Minibatches are epochs of a permutation drawn from ``numpy.random.default_rng
([seed, epoch])``; the random state is therefore fully given by (seed, step),
which with the parameters, the optimiser state, the jitter and the ELBO history
is what a checkpoint holds, so a resumed fit retraces the uninterrupted one.

The fit record (ELBO history, steps, τ and its source) travels as
``FlowField.fit_info``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import sys
import warnings
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import optax
from jax.scipy.linalg import solve_triangular

from . import field as fld
from .errors import InputError

__all__ = ["FIT_DEFAULTS", "fit", "fit_report", "fit_summary"]

FIT_DEFAULTS = {"steps": 1000, "learning_rate": 0.1, "patience": 15, "natural_step": 0.5}
FULL_BATCH_FACTOR = 4     # all observations in every step when N ≤ 4 × batch_size
MAX_DEFAULT_INDUCING = 256
REL_TOL = 1e-4            # plateau: window-mean ELBO gain below this fraction of max(|ELBO|, N nats)
CHECKPOINT_EVERY = 20     # steps between checkpoints
CHUNK = 8192              # observations per chunk in the exact q and ELBO passes
INIT_SUBSAMPLE = 16384    # observations used for the initial q
KMEANS_SUBSAMPLE = 20000  # observations used for k-means
RETRIES = 6               # non-finite step: attempts with more jitter / a smaller step
MAX_JITTER_MULTIPLE = 1e12  # δ ≤ 1e12 · eps · σ² ≈ 2e-4 σ²
CHECKPOINT_SCHEMA = 1
_HYPER_NAMES = ("kernel", "log_diffusivity_m2_s", "log_noise_floor_m_s")


# ----------------------------------------------------------------------------------- data
@dataclasses.dataclass(frozen=True)
class _Data:
    """Observations in the form the loop needs, plus what the model file records."""

    obs: Any
    batch: fld.ObservationBatch      # all observations, device arrays
    n_tracks: int
    frame: Any
    fingerprint: str

    @property
    def n(self) -> int:
        return int(self.batch.position_m.shape[0])


def _prepare(data, position_error_m: float) -> _Data:
    """Tracks → velocity observations (or Observations as given), validated."""
    if hasattr(data, "velocity_m_s") and hasattr(data, "dt_s"):
        obs = data
        n_tracks = int(np.unique(np.asarray(obs.track_index)).size) if hasattr(obs, "track_index") else 0
    elif hasattr(data, "track_id") and hasattr(data, "position_m"):
        from .observations import velocity_observations

        obs = velocity_observations(data, position_error_m=position_error_m)
        n_tracks = int(np.unique(np.asarray(data.track_id)).size)
    else:
        raise InputError(f"fit needs driftwise Tracks or Observations, got {type(data).__name__}")
    batch = fld.batch_from_observations(obs)
    _check_finite(batch)
    if batch.position_m.shape[0] < 3:
        raise InputError(f"fit needs at least 3 velocity observations (consecutive fixes of a track), "
                         f"got {batch.position_m.shape[0]}")
    from .frame import Frame

    frame = getattr(data, "frame", None) or getattr(obs, "frame", None) or Frame()
    return _Data(obs, batch, n_tracks, frame, _fingerprint(batch))


def _check_finite(batch: fld.ObservationBatch) -> None:
    for name in ("position_m", "velocity_m_s", "random_walk_coefficient_s_inv", "position_noise_var_m2_s2"):
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
def _extent_m(position: np.ndarray) -> float:
    """L = (Π ptp_i)^{1/d}, a typical size of the sampled region (m), floored at 1 m."""
    span = np.maximum(np.ptp(position, axis=0), 1e-3 * max(float(np.ptp(position)), 1.0))
    return max(float(np.exp(np.mean(np.log(span)))), 1.0)


def initial_inducing(position_m: np.ndarray, n_inducing: int, *, seed: int) -> np.ndarray:
    """Z (M, d) m: k-means centres (k-means++ start, scipy ``kmeans2``) of the observation midpoints.

    Uses a seeded subsample of at most 20 000 points; coincident centres are merged,
    so M can come out smaller when the data hold fewer distinct places.
    """
    from scipy.cluster.vq import kmeans2

    rng = np.random.default_rng(seed)
    points = np.unique(np.asarray(position_m, dtype=np.float64), axis=0)
    if points.shape[0] > KMEANS_SUBSAMPLE:
        points = points[np.sort(rng.choice(points.shape[0], KMEANS_SUBSAMPLE, replace=False))]
    if n_inducing >= points.shape[0]:
        return points
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        centres, _ = kmeans2(points, n_inducing, iter=20, minit="++", rng=rng)
    tol = 1e-6 * _extent_m(points)
    return np.unique(np.round(centres / tol) * tol, axis=0)


def initial_hyperparameters(batch: fld.ObservationBatch, inducing_m: np.ndarray) -> dict[str, float]:
    """Data-driven starting values (m, m/s, m²/s).

    σ = RMS velocity component (for Helmholtz split equally between the parts);
    ℓ = max(L/8, 2 h) with L the data extent and h = L/M^{1/d} the inducing spacing;
    K such that 2K/Δt̃ is an eighth of the velocity variance at the median Δt̃;
    σ₀ = σ/10.
    """
    position = np.asarray(batch.position_m)
    velocity = np.asarray(batch.velocity_m_s)
    extent = _extent_m(position)
    spacing = extent / inducing_m.shape[0] ** (1.0 / position.shape[1])
    var = max(float(np.mean(velocity**2)), 1e-12)
    dt_median = float(np.median(2.0 / np.asarray(batch.random_walk_coefficient_s_inv)))
    return {"velocity_scale_m_s": math.sqrt(var), "length_scale_m": max(extent / 8.0, 2.0 * spacing),
            "diffusivity_m2_s": var * dt_median / 16.0, "noise_floor_m_s": 0.1 * math.sqrt(var),
            "spacing_m": spacing}


def _initial_params(data: _Data, family: str, base: str, n_inducing: int, seed: int) -> fld.FieldParams:
    z = initial_inducing(np.asarray(data.batch.position_m), n_inducing, seed=seed)
    h = initial_hyperparameters(data.batch, z)
    sigma = h["velocity_scale_m_s"] / (math.sqrt(2.0) if family == "helmholtz" else 1.0)
    params = fld.init_params(family, z.shape[1], z, velocity_scale_m_s=sigma, length_scale_m=h["length_scale_m"],
                             diffusivity_m2_s=h["diffusivity_m2_s"], noise_floor_m_s=h["noise_floor_m_s"], base=base)
    return _strong(params)


def _strong(tree):
    """Every leaf a strongly typed float64 array (weak types would make jit compile twice)."""
    return jax.tree_util.tree_map(lambda leaf: jnp.asarray(np.asarray(leaf, dtype=np.float64)), tree)


# ------------------------------------------------------------------------ q in closed form
def natural_from_q(q_mean: jax.Array, q_sqrt: jax.Array) -> tuple[jax.Array, jax.Array]:
    """(Λ, η) = ((SSᵀ)^{−1}, Λm) of q(w) = N(m, SSᵀ); shapes (M·d, M·d), (M·d,)."""
    s_inv = solve_triangular(q_sqrt, jnp.eye(q_sqrt.shape[0], dtype=q_sqrt.dtype), lower=True)
    precision = s_inv.T @ s_inv
    return precision, precision @ q_mean


def q_from_natural(precision: jax.Array, eta: jax.Array) -> tuple[jax.Array, jax.Array]:
    """Inverse of :func:`natural_from_q`: m = Λ^{−1}η and lower-triangular S with SSᵀ = Λ^{−1}.

    Λ is factored in reversed order (JΛJ = UUᵀ, so Λ = (JUJ)(JUJ)ᵀ with JUJ upper
    triangular) and S = (JUJ)^{−T}, as in :func:`driftwise.field.optimal_q`.
    """
    upper = jnp.linalg.cholesky(precision[::-1, ::-1])[::-1, ::-1]
    s = solve_triangular(upper.T, jnp.eye(precision.shape[0], dtype=precision.dtype), lower=True)
    return s @ (s.T @ eta), s


def _with_q(params: fld.FieldParams, mean: jax.Array, sqrt: jax.Array) -> fld.FieldParams:
    return dataclasses.replace(params, q_mean=mean, q_sqrt_raw=fld.q_sqrt_raw_from(sqrt))


def data_precision(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple) -> tuple[jax.Array, jax.Array]:
    """(Σ_n Φ_nᵀ R_n⁻¹ Φ_n, Σ_n Φ_nᵀ R_n⁻¹ y_n) over ``batch``, Φ = K(X, Z) L_Z^{−T} (b·d, M·d).

    The likelihood's contribution to the natural parameters of q(w) (Titsias 2009, eq. 10 in
    whitened form): the optimal q on these observations alone has Λ = I + the first term
    and Λm = the second.
    """
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    kzx = params.kernel.gram_matrix(params.inducing_m, batch.position_m)        # (M·d, b·d)
    phi_t = solve_triangular(chol, kzx, lower=True)                              # Φᵀ
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
    return _with_q(params, *q_from_natural(lam, eta))


_natural_step_jit = jax.jit(natural_step, static_argnames=("jitter_multiple",))
_chunk_natural = jax.jit(data_precision, static_argnames=("jitter_multiple",))


@jax.jit(static_argnames=("jitter_multiple",))
def _chunk_log_likelihood(params, batch, *, jitter_multiple):
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    return jnp.sum(fld.expected_log_likelihood(params, batch, chol))


def _take(batch: fld.ObservationBatch, idx) -> fld.ObservationBatch:
    return jax.tree_util.tree_map(lambda a: a[idx], batch)


def _chunks(n: int) -> list[np.ndarray]:
    return np.array_split(np.arange(n), max(1, math.ceil(n / CHUNK)))


def exact_q(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float) -> fld.FieldParams:
    """The ELBO-optimal q(w) on all of ``batch`` (any size), accumulated over chunks of ≤ 8192 rows."""
    size = params.q_mean.shape[0]
    lam, eta = jnp.eye(size), jnp.zeros(size)
    for idx in _chunks(batch.position_m.shape[0]):
        d_lam, d_eta = _chunk_natural(params, _take(batch, idx), jitter_multiple=jitter_multiple)
        lam, eta = lam + d_lam, eta + d_eta
    return _with_q(params, *q_from_natural(lam, eta))


def full_elbo(params: fld.FieldParams, batch: fld.ObservationBatch, *, jitter_multiple: float) -> float:
    """ELBO over all observations: Σ_n E_q log N(y_n | v(x_n), R_n) − KL(q ‖ p) (nats), chunked."""
    total = sum(float(_chunk_log_likelihood(params, _take(batch, idx), jitter_multiple=jitter_multiple))
                for idx in _chunks(batch.position_m.shape[0]))
    return total - float(fld.kl_divergence(params))


# ------------------------------------------------------------------------------ one step
def _optimizer() -> optax.GradientTransformation:
    """Adam whose learning rate lives in the state (so it is checkpointed and can be halved)."""
    return optax.inject_hyperparams(optax.adam, hyperparam_dtype=jnp.float64)(learning_rate=FIT_DEFAULTS["learning_rate"])


def _trainable_names(q_update: str, learn_inducing: bool) -> tuple[str, ...]:
    names = _HYPER_NAMES + (("q_mean", "q_sqrt_raw") if q_update == "adam" else ())
    return names + (("inducing_m",) if learn_inducing else ())


def _split(params: fld.FieldParams, names: tuple[str, ...], z_scale) -> dict[str, Any]:
    """The trainable leaves; Z enters divided by the inducing spacing so one Adam step size suits all."""
    return {name: getattr(params, name) / z_scale if name == "inducing_m" else getattr(params, name)
            for name in names}


def _merge(params: fld.FieldParams, trainable: dict[str, Any], z_scale) -> fld.FieldParams:
    values = {name: value * z_scale if name == "inducing_m" else value for name, value in trainable.items()}
    return dataclasses.replace(params, **values)


def _all_finite(tree) -> jax.Array:
    return jnp.all(jnp.array([jnp.all(jnp.isfinite(leaf)) for leaf in jax.tree_util.tree_leaves(tree)]))


@jax.jit(static_argnames=("names", "q_update", "jitter_multiple"))
def _step(params, opt_state, batch, n_total, gamma, z_scale, *, names, q_update, jitter_multiple):
    """One optimiser step → (params, opt_state, ELBO estimate at the step's start, all finite?)."""
    if q_update == "natural":
        params = natural_step(params, batch, n_total, gamma, jitter_multiple=jitter_multiple)

    def objective(trainable):
        return fld.elbo(_merge(params, trainable, z_scale), batch, n_total, jitter_multiple=jitter_multiple)

    trainable = _split(params, names, z_scale)
    value, grads = jax.value_and_grad(objective)(trainable)
    updates, new_state = _optimizer().update(jax.tree_util.tree_map(jnp.negative, grads), opt_state, trainable)
    new_params = _merge(params, optax.apply_updates(trainable, updates), z_scale)
    ok = jnp.isfinite(value) & _all_finite(grads) & _all_finite((new_params.q_mean, new_params.q_sqrt_raw))
    return new_params, new_state, value, ok


# --------------------------------------------------------------------------- training state
@dataclasses.dataclass(frozen=True)
class _State:
    params: fld.FieldParams
    opt_state: Any
    step: int
    history: tuple[float, ...]
    jitter_multiple: float
    converged: bool = False


@dataclasses.dataclass(frozen=True)
class _Config:
    """Everything that fixes the optimisation path (a checkpoint must match it to be resumed)."""

    kernel: str
    base: str
    n_inducing: int
    seed: int
    batch_size: int
    learn_inducing: bool
    q_update: str
    natural_step: float
    position_error_m: float
    fingerprint: str

    def to_json(self) -> str:
        return json.dumps(dataclasses.asdict(self), sort_keys=True)


def _with_learning_rate(opt_state, learning_rate: float):
    hyper = dict(opt_state.hyperparams, learning_rate=jnp.asarray(learning_rate, dtype=jnp.float64))
    return opt_state._replace(hyperparams=hyper)


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


def _plateau(history: tuple[float, ...], window: int, n_total: int) -> bool:
    """Mean ELBO of the last ``window`` steps gained < REL_TOL · max(|previous window mean|, N)."""
    if len(history) < 2 * window or len(history) % window:
        return False
    new, old = np.mean(history[-window:]), np.mean(history[-2 * window:-window])
    return bool((new - old) < REL_TOL * max(abs(old), float(n_total)))


def _advance(state: _State, data: _Data, config: _Config, z_scale: float) -> _State:
    """One accepted step; on a non-finite ELBO/gradient retry with 100× jitter, then also half the step size."""
    idx = _batch_indices(data.n, config.batch_size, config.seed, state.step)
    batch = data.batch if idx is None else _take(data.batch, idx)
    gamma = 1.0 if idx is None else config.natural_step
    names = _trainable_names(config.q_update, config.learn_inducing)
    jitter, opt_state = state.jitter_multiple, state.opt_state
    for attempt in range(RETRIES + 1):
        params, new_opt, value, ok = _step(state.params, opt_state, batch, float(data.n), gamma, z_scale,
                                           names=names, q_update=config.q_update, jitter_multiple=jitter)
        if bool(ok):
            return dataclasses.replace(state, params=params, opt_state=new_opt, step=state.step + 1,
                                       history=state.history + (float(value),), jitter_multiple=jitter)
        jitter = min(jitter * 100.0, MAX_JITTER_MULTIPLE)
        if attempt % 2 == 1:
            opt_state = _with_learning_rate(opt_state, float(opt_state.hyperparams["learning_rate"]) / 2.0)
    lr = float(opt_state.hyperparams["learning_rate"])
    raise RuntimeError(f"fit: the ELBO or its gradient stayed non-finite at step {state.step} after {RETRIES} retries "
                       f"(jitter multiple {jitter:.0e}, learning rate {lr:.2e}); the data may hold extreme "
                       "velocities (check units and --max-speed) or too many inducing points for the data")


# ------------------------------------------------------------------------------ checkpoints
def _flat(prefix: str, tree) -> dict[str, np.ndarray]:
    leaves = jax.tree_util.tree_leaves(tree)
    return {f"{prefix}{i:04d}": np.asarray(leaf) for i, leaf in enumerate(leaves)}


def _unflat(prefix: str, template, arrays, path: Path):
    leaves, treedef = jax.tree_util.tree_flatten(template)
    names = sorted(k for k in arrays.files if k.startswith(prefix))
    if len(names) != len(leaves):
        raise InputError(f"{path}: checkpoint holds {len(names)} {prefix.rstrip('/')} arrays, this fit needs "
                         f"{len(leaves)}; remove it or drop --resume")
    loaded = []
    for name, leaf in zip(names, leaves):
        value = arrays[name]
        if value.shape != np.shape(leaf):
            raise InputError(f"{path}: checkpoint array {name} has shape {value.shape}, expected {np.shape(leaf)}; "
                             "remove it or drop --resume")
        loaded.append(jnp.asarray(value, dtype=jnp.asarray(leaf).dtype))
    return jax.tree_util.tree_unflatten(treedef, loaded)


def save_checkpoint(path, state: _State, config: _Config) -> Path:
    """Write params, optimiser state, step, RNG seed, jitter and ELBO history to ``path`` (npz, atomic)."""
    from .io import atomic_write

    meta = {"schema": CHECKPOINT_SCHEMA, "config": json.loads(config.to_json()), "step": state.step,
            "rng": {"seed": config.seed, "step": state.step, "scheme": "numpy default_rng([seed, epoch]) permutations"},
            "jitter_multiple": state.jitter_multiple, "converged": state.converged}
    arrays = {**_flat("params/", state.params), **_flat("opt/", state.opt_state),
              "history": np.asarray(state.history, dtype=np.float64), "meta": np.array(json.dumps(meta))}

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as handle:
            np.savez(handle, **arrays)

    return atomic_write(path, write)


def load_checkpoint(path, template: _State, config: _Config) -> _State:
    """Read a checkpoint written by :func:`save_checkpoint` for the same data and settings."""
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as arrays:
            meta = json.loads(str(arrays["meta"]))
            if meta.get("schema") != CHECKPOINT_SCHEMA or meta.get("config") != json.loads(config.to_json()):
                raise InputError(f"{path}: this checkpoint was written by a different fit (other data, kernel, "
                                 "seed or settings); remove it or drop --resume")
            params = _unflat("params/", template.params, arrays, path)
            opt_state = _unflat("opt/", template.opt_state, arrays, path)
            history = tuple(float(v) for v in arrays["history"])
    except InputError:
        raise
    except Exception as err:  # zip, npy-header, JSON or key errors: an unreadable checkpoint
        raise InputError(f"{path}: cannot read the checkpoint ({type(err).__name__}: {err}); "
                         "remove it or drop --resume") from None
    if len(history) != int(meta["step"]):
        raise InputError(f"{path}: checkpoint is inconsistent (step {meta['step']}, {len(history)} ELBO values)")
    return _State(params, opt_state, int(meta["step"]), history, float(meta["jitter_multiple"]),
                  bool(meta.get("converged", False)))


# ------------------------------------------------------------------------------ the loop
def _progress(total: int, initial: int, enabled: bool):
    from tqdm.auto import tqdm

    disable = not (enabled and hasattr(sys.stderr, "isatty") and sys.stderr.isatty())
    return tqdm(total=total, initial=initial, disable=disable, desc="driftwise fit", unit="step",
                file=sys.stderr, leave=False, dynamic_ncols=True)


def _train(state: _State, data: _Data, config: _Config, *, steps: int, patience: int, z_scale: float,
           checkpoint: Path | None, progress: bool) -> _State:
    bar = _progress(steps, min(state.step, steps), progress)
    try:
        while state.step < steps and not state.converged:
            state = _advance(state, data, config, z_scale)
            if _plateau(state.history, patience, data.n):
                state = dataclasses.replace(state, converged=True)
            if checkpoint is not None and state.step % CHECKPOINT_EVERY == 0:
                save_checkpoint(checkpoint, state, config)
            bar.update(1)
            if state.step % 5 == 0:
                bar.set_postfix(elbo=f"{state.history[-1]:.6g}")
    except KeyboardInterrupt:
        if checkpoint is not None:
            save_checkpoint(checkpoint, state, config)
        raise
    finally:
        bar.close()
    if checkpoint is not None:
        save_checkpoint(checkpoint, state, config)
    return state


def _start(data: _Data, config: _Config, *, learning_rate: float, checkpoint, resume: bool) -> tuple[_State, float]:
    """The initial state (or the checkpointed one) and the scale of Z's trainable coordinates (m)."""
    params = _initial_params(data, config.kernel, config.base, config.n_inducing, config.seed)
    names = _trainable_names(config.q_update, config.learn_inducing)
    z_scale = _z_scale(params)
    opt_state = _with_learning_rate(_optimizer().init(_split(params, names, z_scale)), learning_rate)
    state = _State(params, opt_state, 0, (), fld.JITTER_MULTIPLE)
    if resume and checkpoint is not None and Path(checkpoint).exists():
        return load_checkpoint(checkpoint, state, config), z_scale
    if resume and checkpoint is not None:
        warnings.warn(f"{checkpoint}: no checkpoint to resume from; starting a new fit", stacklevel=3)
    return dataclasses.replace(state, params=_initial_q(params, data, config.seed)), z_scale


def _initial_q(params: fld.FieldParams, data: _Data, seed: int) -> fld.FieldParams:
    """Optimal q for the starting hyperparameters from ≤ 16 384 random observations, scaled by N/n."""
    if data.n <= INIT_SUBSAMPLE:
        return exact_q(params, data.batch, jitter_multiple=fld.JITTER_MULTIPLE)
    idx = np.sort(np.random.default_rng([seed, 2**31 - 1]).choice(data.n, INIT_SUBSAMPLE, replace=False))
    return _natural_step_jit(params, _take(data.batch, idx), float(data.n), 1.0, jitter_multiple=fld.JITTER_MULTIPLE)


def _z_scale(params: fld.FieldParams) -> float:
    z = np.asarray(params.inducing_m)
    return _extent_m(z) / max(z.shape[0], 1) ** (1.0 / z.shape[1])


# ------------------------------------------------------------------------------ the result
def _finish(state: _State, data: _Data, config: _Config, *, steps: int, patience: int) -> fld.FlowField:
    jitter = state.jitter_multiple
    params = exact_q(state.params, data.batch, jitter_multiple=jitter)
    elbo = full_elbo(params, data.batch, jitter_multiple=jitter)
    if not math.isfinite(elbo):
        raise RuntimeError("fit: the final ELBO is not finite; refit with fewer inducing points or check the data")
    common = dict(frame=data.frame, data_summary=_data_summary(data), jitter_multiple=jitter,
                  position_error_m=float(np.asarray(data.obs.position_error_m).mean()))
    tau, rms_speed, length = _decorrelation_time_s(params, data, jitter)
    info = {"elbo": elbo, "elbo_per_observation": elbo / data.n, "elbo_history": list(state.history),
            "elbo_history_kind": "per-step minibatch estimate (N/b scaled), nats" if config.batch_size < data.n
            else "per-step ELBO on all observations, nats",
            "steps": state.step, "max_steps": steps, "converged": state.converged, "patience_steps": patience,
            "q_update": config.q_update, "seed": config.seed, "batch_size": min(config.batch_size, data.n),
            "learning_rate_final": float(state.opt_state.hyperparams["learning_rate"]),
            "decorrelation_time_source": "length_scale/rms_speed", "rms_speed_m_s": rms_speed,
            "length_scale_m": length,
            "rms_speed_source": "posterior mean speed at the observation midpoints (RMS)"}
    return fld.FlowField.from_params(params, decorrelation_time_s=tau, fit_info=info, **common)


def _data_summary(data: _Data) -> dict[str, Any]:
    position = np.asarray(data.batch.position_m)
    obs = data.obs
    summary = {"n_tracks": data.n_tracks, "n_observations": data.n,
               "extent_m": {"min": position.min(axis=0).tolist(), "max": position.max(axis=0).tolist()},
               "position_error_m": float(np.asarray(obs.position_error_m).mean()),
               "observations_sha256": data.fingerprint}
    if hasattr(obs, "time_s"):
        time = np.asarray(obs.time_s, dtype=np.float64)
        summary["time_span_s"] = [float(time.min()), float(time.max())]
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


@jax.jit(static_argnames=("jitter_multiple",))
def _mean_speed_squared(params: fld.FieldParams, x: jax.Array, *, jitter_multiple: float) -> jax.Array:
    """Σ_n |μ(x_n)|² with μ(x) = K(x, Z) L_Z^{−T} m, the posterior mean (m²/s²)."""
    chol = fld.inducing_cholesky(params, jitter_multiple=jitter_multiple)
    alpha = solve_triangular(chol.T, params.q_mean, lower=False)
    return jnp.sum((params.kernel.gram_matrix(x, params.inducing_m) @ alpha) ** 2)


def _decorrelation_time_s(params: fld.FieldParams, data: _Data, jitter: float) -> tuple[float, float, float]:
    """τ = ℓ / U_rms (s), U_rms the RMS posterior-mean speed at the observation midpoints (Taylor 1921)."""
    total = sum(float(_mean_speed_squared(params, _take(data.batch, idx).position_m, jitter_multiple=jitter))
                for idx in _chunks(data.n))
    rms = math.sqrt(total / data.n)
    length = length_scale_m(params.kernel)
    return length / max(rms, 1e-9), rms, length


def fit_summary(field: fld.FlowField) -> dict[str, Any]:
    """The fit record of a fitted field (ELBO history, steps, τ source), or {} if it has none."""
    return field.fit_info


def fit_report(field: fld.FlowField) -> dict[str, Any]:
    """The ``driftwise fit --json`` object: kernel, n_tracks, n_observations, elbo, hyperparameters,
    diffusivity_m2_s, decorrelation_time_s (and its source), plus steps and convergence."""
    info, summary = fit_summary(field), field.data_summary
    return {"kernel": field.kernel_family, "base": field.kernel_base, "dimension": field.dim,
            "n_inducing": int(field.params.n_inducing), "n_tracks": summary.get("n_tracks"),
            "n_observations": summary.get("n_observations"), "elbo": info.get("elbo"),
            "elbo_per_observation": info.get("elbo_per_observation"), "hyperparameters": field.hyperparameters,
            "diffusivity_m2_s": field.diffusivity_m2_s, "decorrelation_time_s": field.decorrelation_time_s,
            "decorrelation_time_source": info.get("decorrelation_time_source"), "steps": info.get("steps"),
            "converged": info.get("converged"), "frame": field.frame_dict}


# ------------------------------------------------------------------------------ the door
def fit(tracks_or_observations, kernel: str = "helmholtz", *, inducing: int | None = None, seed: int = 0,
        position_error_m: float = 10.0, learn_inducing: bool = False, steps: int = FIT_DEFAULTS["steps"],
        batch_size: int = 1024, learning_rate: float = FIT_DEFAULTS["learning_rate"],
        patience: int = FIT_DEFAULTS["patience"], checkpoint=None, resume: bool = False, progress: bool = True,
        base: str = "squared-exponential", q_update: str = "auto",
        natural_step: float = FIT_DEFAULTS["natural_step"]) -> fld.FlowField:
    """Fit a vector-field GP to drifter tracks (or velocity observations) and return the FlowField.

    ``kernel`` ∈ {"helmholtz", "divergence-free", "curl-free", "independent"}, ``base`` ∈
    {"squared-exponential", "matern52"}; ``inducing`` M points by k-means (default None:
    min(256, max(16, N/32)) for N velocity observations); ``position_error_m``
    σ_pos of one fix (m, used when tracks are given).  At most ``steps`` optimiser steps on
    minibatches of ``batch_size`` (all data when it fits); stops early when the mean ELBO
    over ``patience`` steps gains less than 1e-4 of |ELBO| (floored at 1 nat per observation).
    ``checkpoint`` (path) is written every 20 steps, on Ctrl-C and at the end;
    ``resume=True`` continues from it and ends where the uninterrupted fit would.
    ``q_update``: "natural" (closed-form natural-gradient steps on q, default) or "adam".
    """
    config = _check_options(kernel, base, inducing, seed, steps, batch_size, learning_rate, patience,
                            q_update, natural_step, position_error_m)
    data = _prepare(tracks_or_observations, position_error_m)
    config = _resolve(config, data.n, learn_inducing=bool(learn_inducing), fingerprint=data.fingerprint)
    checkpoint = None if checkpoint is None else Path(checkpoint)
    state, z_scale = _start(data, config, learning_rate=learning_rate, checkpoint=checkpoint, resume=resume)
    state = _train(state, data, config, steps=int(steps), patience=int(patience), z_scale=z_scale,
                   checkpoint=checkpoint, progress=progress)
    return _finish(state, data, config, steps=int(steps), patience=int(patience))


def _resolve(config: _Config, n: int, **fields) -> _Config:
    """Settle the batch (all N observations when N ≤ 4 × batch_size) and ``q_update="auto"``: exact
    closed-form q on all data each step when the batch is everything, Adam on q for minibatches."""
    full = n <= FULL_BATCH_FACTOR * config.batch_size
    batch = n if full else config.batch_size
    q_update = ("natural" if full else "adam") if config.q_update == "auto" else config.q_update
    inducing = config.n_inducing or default_inducing(n)
    return dataclasses.replace(config, batch_size=batch, q_update=q_update, n_inducing=inducing, **fields)


def default_inducing(n_observations: int) -> int:
    """M = min(256, max(16, N/32)): beyond about one inducing point per 32 velocity observations
    the bound barely rises on the demo bay (M = 64: 8660.9 nats, M = 256: 8661.7) while a step
    costs ∝ M²."""
    return int(min(MAX_DEFAULT_INDUCING, max(16, n_observations // 32)))


def _check_options(kernel, base, inducing, seed, steps, batch_size, learning_rate, patience, q_update,
                   natural_step, position_error_m) -> _Config:
    from .kernels import BASES, KERNEL_FAMILIES

    if kernel not in KERNEL_FAMILIES:
        raise InputError(f"unknown kernel {kernel!r}; choose one of {', '.join(KERNEL_FAMILIES)}")
    if base not in BASES:
        raise InputError(f"unknown base kernel {base!r}; choose one of {', '.join(BASES)}")
    for name, value, low in (("inducing", 1 if inducing is None else inducing, 1), ("steps", steps, 0),
                             ("batch_size", batch_size, 1),
                             ("patience", patience, 1)):
        if not isinstance(value, (int, np.integer)) or isinstance(value, bool) or value < low:
            raise InputError(f"{name} must be an integer ≥ {low}, got {value!r}")
    if not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed must be a non-negative integer, got {seed!r}")
    if not (math.isfinite(learning_rate) and learning_rate > 0):
        raise InputError(f"learning_rate must be a positive number, got {learning_rate!r}")
    if q_update not in ("auto", "natural", "adam"):
        raise InputError(f"q_update must be 'auto', 'natural' or 'adam', got {q_update!r}")
    if not (0.0 < natural_step <= 1.0):
        raise InputError(f"natural_step must lie in (0, 1], got {natural_step!r}")
    if not (math.isfinite(position_error_m) and position_error_m >= 0):
        raise InputError(f"position error must be a finite number of metres ≥ 0, got {position_error_m!r}")
    return _Config(kernel, base, 0 if inducing is None else int(inducing), int(seed), int(batch_size), False,
                   q_update, float(natural_step),
                   float(position_error_m), "")
