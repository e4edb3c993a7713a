"""The fit's options and its resumable state: :class:`Schedule`, :class:`Checkpoint`, checkpoint files.

A checkpoint holds the parameters, the optimiser state (learning rate included), the step, the jitter,
the ELBO history and the plateau checks; with the seed, which fixes every minibatch permutation, that
is the whole random state, so a resumed fit retraces the uninterrupted one.  Checkpoints are npz files
without pickles, written atomically.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError
from ..files import atomic_write
from . import field as fld

__all__ = ["Schedule", "Checkpoint", "TrainState", "TrainConfig", "save_checkpoint", "load_checkpoint"]

CHECKPOINT_SCHEMA = 2
Q_UPDATES = ("auto", "natural", "adam")


@dataclasses.dataclass(frozen=True)
class Schedule:
    """How :func:`driftwise.fit` optimises (validated on construction; InputError names the bad field).

    steps           at most this many optimiser steps (≥ 0): L-BFGS-B iterations when every step sees all
                    rows with q exact (the default up to 16 × batch_size rows), Adam steps otherwise
    batch_size      rows per step; N ≤ 16 × batch_size uses all N observations in every step
    learning_rate   Adam step size on the log hyperparameters (Kingma & Ba 2015); unused by L-BFGS-B
    patience        steps between plateau checks of the ELBO
    q_update        "auto" (exact optimal q every step), "natural" (natural-gradient steps of length
                    ``natural_step`` towards each minibatch's optimum) or "adam" (Adam on q too)
    natural_step    in (0, 1]
    learn_inducing  also move the inducing points Z
    optimiser       "auto" (L-BFGS-B when every step sees all rows with q exact, else Adam) or "adam" (Adam
                    always: the warm start the transition fit was validated from, dynamics.transitionfit)
    """

    steps: int = 1000
    batch_size: int = 1024
    learning_rate: float = 0.1
    patience: int = 10
    q_update: str = "auto"
    natural_step: float = 0.5
    learn_inducing: bool = False
    optimiser: str = "auto"

    def __post_init__(self) -> None:
        for name, low in (("steps", 0), ("batch_size", 1), ("patience", 1)):
            value = getattr(self, name)
            if not isinstance(value, (int, np.integer)) or isinstance(value, bool) or value < low:
                raise InputError(f"{name} must be an integer ≥ {low}, got {value!r}")
        if not (math.isfinite(self.learning_rate) and self.learning_rate > 0):
            raise InputError(f"learning_rate must be a positive number, got {self.learning_rate!r}")
        if self.q_update not in Q_UPDATES:
            raise InputError(f"q_update must be 'auto', 'natural' or 'adam', got {self.q_update!r}")
        if self.optimiser not in ("auto", "adam"):
            raise InputError(f"optimiser must be 'auto' or 'adam', got {self.optimiser!r}")
        if not (0.0 < self.natural_step <= 1.0):
            raise InputError(f"natural_step must lie in (0, 1], got {self.natural_step!r}")


@dataclasses.dataclass(frozen=True)
class Checkpoint:
    """Where the fit keeps its resumable state: ``path`` (npz), written every ``every_steps`` steps, on
    Ctrl-C and at the end; ``resume=True`` continues from it when it exists."""

    path: Path
    resume: bool = False
    every_steps: int = 20

    def __post_init__(self) -> None:
        object.__setattr__(self, "path", Path(self.path))
        if not (isinstance(self.every_steps, int) and self.every_steps >= 1):
            raise InputError(f"every_steps must be an integer ≥ 1, got {self.every_steps!r}")

    @classmethod
    def beside(cls, model_path, *, resume: bool = False) -> Checkpoint:
        """The checkpoint of a fit writing ``MODEL.npz``: ``MODEL.ckpt.npz`` in the same folder."""
        path = Path(model_path)
        stem = path.name[: -len(path.suffix)] if path.suffix else path.name
        return cls(path.with_name(stem + ".ckpt.npz"), resume=resume)


# --------------------------------------------------------------------------- training state
@dataclasses.dataclass(frozen=True)
class TrainState:
    """Where an optimisation is: parameters, optimiser state, step, ELBO history, jitter, plateau checks."""

    params: fld.FieldParams
    opt_state: Any
    step: int
    history: tuple[float, ...]
    jitter_multiple: float
    converged: bool = False
    checks: tuple[float, ...] = ()   # ELBO on the evaluation rows every `patience` steps
    extra: Any = dataclasses.field(default_factory=dict)   # trained leaves outside FieldParams, by name


@dataclasses.dataclass(frozen=True)
class TrainConfig:
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
    subsample: int = 0          # > 0: hyperparameters from this many seeded random rows (q_update="auto", large N)
    background: str = "linear"  # the background flow of the prior (gp/background.BACKGROUNDS)
    temporal: str = ""          # the time-varying parts (gp/temporalfit.TemporalChoice JSON); "" for a steady fit

    def to_json(self) -> str:
        """Canonical JSON; a steady fit's omits ``temporal`` so its checkpoints read as before."""
        fields = dataclasses.asdict(self)
        if not fields["temporal"]:
            del fields["temporal"]
        return json.dumps(fields, sort_keys=True)


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


def save_checkpoint(path, state: TrainState, config: TrainConfig) -> Path:
    """Write params, optimiser state, step, RNG seed, jitter and ELBO history to ``path`` (npz, atomic)."""

    meta = {"schema": CHECKPOINT_SCHEMA, "config": json.loads(config.to_json()), "step": state.step,
            "rng": {"seed": config.seed, "step": state.step, "scheme": "numpy default_rng([seed, epoch]) permutations"},
            "jitter_multiple": state.jitter_multiple, "converged": state.converged, "checks": list(state.checks)}
    arrays = {**_flat("params/", state.params), **_flat("opt/", state.opt_state), **_flat("extra/", state.extra),
              "history": np.asarray(state.history, dtype=np.float64), "meta": np.array(json.dumps(meta))}

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as handle:
            np.savez(handle, **arrays)

    return atomic_write(path, write)


def load_checkpoint(path, template: TrainState, config: TrainConfig) -> TrainState:
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
            extra = _unflat("extra/", template.extra, arrays, path)
            history = tuple(float(v) for v in arrays["history"])
    except InputError:
        raise
    except Exception as err:  # zip, npy-header, JSON or key errors: an unreadable checkpoint
        raise InputError(f"{path}: cannot read the checkpoint ({type(err).__name__}: {err}); "
                         "remove it or drop --resume") from None
    if len(history) != int(meta["step"]):
        raise InputError(f"{path}: checkpoint is inconsistent (step {meta['step']}, {len(history)} ELBO values)")
    return TrainState(params, opt_state, int(meta["step"]), history, float(meta["jitter_multiple"]),
                  bool(meta["converged"]), tuple(float(v) for v in meta["checks"]), extra)


