"""The Itô SDE a release follows: dx = μ(x) dt + L(x) dβ with D(x) = L(x) L(x)ᵀ.

A fitted `FlowField` gives the drift μ(x) = posterior mean velocity (m/s) and the
diffusion

    D(x, a) = 2 (K I + τ (1 − e^{−a/τ}) Σ(x))   (m²/s),

where K is the eddy diffusivity (m²/s), Σ(x) the posterior velocity covariance at x
(m²/s²), τ a velocity decorrelation time (s) and a the time since the release (s).
The second term is the error of the fitted mean velocity: an error with variance Σ
and autocorrelation e^{−|s|/τ} along the path displaces a particle with variance
2Στ [t − τ (1 − e^{−t/τ})] (Taylor 1921, "Diffusion by continuous movements"), i.e. at
the rate 2Στ(1 − e^{−t/τ}): ballistic (Σt²) for t ≪ τ, diffusive (2Στt) for t ≫ τ.
``velocity_memory=False`` drops the age factor (the Markov limit D = 2(K I + τΣ)),
which over-spreads forecasts shorter than τ.  The covariance ODE of the moment
propagators gains E[D(x)], so D is the full rate matrix (twice the diffusivity), not
its square root.

`SDE` also takes plain user callables, so the propagators (`moments`,
`ensemble`) can be used and tested on analytic SDEs.  `sde_from_field` takes K
and τ from the field or from the caller; `dynamics.calibrate` estimates them.

Time-varying flows.  With ``with_time`` the SDE is dx = μ(x, t) dt + L(x, t) dβ in ABSOLUTE time t
(seconds on the model's time axis: the track file's own seconds, or seconds since
1970-01-01T00:00Z for ISO times); the propagators carry t = release start time + age through
every integrator stage.  A field with ``is_time_varying`` gives μ(x, t) = field.mean_at(x, t_s=t)
and D(x, t, a) = 2 (K I + τ (1 − e^{−a/τ}) Σ(x, t)) with Σ(x, t) = field.cov_between(x, x,
t_x_s=t, t_y_s=t).  Past the end of the data nothing changes here: the field itself continues
its harmonic parts with their fitted amplitudes and lets its slow part relax to the prior, so Σ,
and with it the forecast's spread, grows there.  A steady SDE (``with_time`` False) never sees t:
its code path and compiled programs are those of a steady forecast.
"""

from __future__ import annotations

from dataclasses import dataclass
from dataclasses import field as _dataclass_field
from typing import Any, Callable, Hashable

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError

__all__ = ["SDE", "PointPosterior", "TimedPointPosterior", "sde_from_field", "split_for_jit", "join_from_jit", "field_drift",
           "field_sde", "velocity_memory_weight", "transport_sde", "timed_field_sde"]


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class SDE:
    """An Itô SDE dx = drift(x) dt + L(x) dβ with diffusion(x) = L(x) L(x)ᵀ.

    drift:     x (d,) m -> (d,) m/s, a pure jax function of one state.
    diffusion: x (d,) m -> (d, d) m²/s, symmetric positive semi-definite; the
               rate at which the covariance grows, D = L Lᵀ (a pure diffusion
               with diffusivity K has D = 2 K I, so Var grows as 2 K t).

    with_age:  when True, diffusion is called as diffusion(x, age_s) with the
               time since the release (s); the propagators carry that age.
    with_time: when True, the SDE depends on absolute time t (s, the model's time
               axis): drift(x, t_s) and diffusion(x, t_s) (diffusion(x, t_s, age_s)
               with with_age); the propagators pass t = release start + age.

    drift_and_diffusion: optional; called with the diffusion's arguments, it returns (drift, diffusion) from one
               evaluation of what they share (a field SDE: the posterior's mean and covariance from one
               kernel row or one table interpolation; :meth:`drift_and_rate`).  It must agree with the two
               (tests/dynamics/test_sde.py); code that replaces drift and diffusion replaces it too.

    All three are pytree fields: pass `jax.tree_util.Partial(fn, params...)` to keep
    parameters as traced data (changing them does not recompile the
    propagators); plain functions are treated as static (hashed by identity).
    """

    drift: Callable[[jax.Array], jax.Array]
    diffusion: Callable[..., jax.Array]
    with_age: bool = _dataclass_field(default=False, metadata=dict(static=True))
    with_time: bool = _dataclass_field(default=False, metadata=dict(static=True))
    drift_and_diffusion: Callable[..., tuple[jax.Array, jax.Array]] | None = None

    def drift_at(self, x: jax.Array, t_s: Any = 0.0) -> jax.Array:
        """μ at x (d,) and absolute time ``t_s`` (s): ``drift(x, t_s)`` when ``with_time``, else ``drift(x)``."""
        return self.drift(x, t_s) if self.with_time else self.drift(x)

    def rate(self, x: jax.Array, age_s: Any, t_s: Any = 0.0) -> jax.Array:
        """D at x (d,) for a particle released ``age_s`` seconds ago, at absolute time ``t_s`` (s): the
        diffusion called with (x[, t_s][, age_s]) as ``with_time`` and ``with_age`` say."""
        args = ((t_s,) if self.with_time else ()) + ((age_s,) if self.with_age else ())
        return self.diffusion(x, *args)

    def drift_and_rate(self, x: jax.Array, age_s: Any, t_s: Any = 0.0) -> tuple[jax.Array, jax.Array]:
        """(μ, D) at x as :meth:`drift_at` and :meth:`rate` give them, from one evaluation when the SDE has a
        ``drift_and_diffusion`` (a table is then interpolated once per point, not twice: 1.8× the
        release-steps per second of a tabulated forecast, DEVELOPERS.md "Benchmark record")."""
        if self.drift_and_diffusion is None:
            return self.drift_at(x, t_s), self.rate(x, age_s, t_s)
        args = ((t_s,) if self.with_time else ()) + ((age_s,) if self.with_age else ())
        return self.drift_and_diffusion(x, *args)


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class PointPosterior:
    """A field's posterior at single points, with everything independent of x precomputed.

    For the whitened sparse GP (Titsias 2009; Hensman et al. 2013) with
    A(x) = K(x, Z) L_Z^{−T} and q(w) = N(m, S Sᵀ), the predictive covariance
    K(x, x) − A (I − S Sᵀ) Aᵀ is rewritten with the eigendecomposition
    I − S Sᵀ = U diag(λ) Uᵀ (jnp.linalg.eigh, once per field):

        mean(x) = K(x, Z) α,                  α = L_Z^{−T} m             (M·d,)
        cov(x)  = K(x, x) − G diag(λ) Gᵀ,     G = K(x, Z) B,  B = L_Z^{−T} U

    so one point costs a single (d × M·d)·(M·d × M·d) product (2 d (M·d)²
    flop), and under `vmap` over sigma points and releases XLA folds the batch
    into one matrix product — the dominant work of a spread forecast.  B keeps
    the conditioning of L_Z^{−T} (U is orthogonal); values equal
    `FlowField.mean_at` / `cov_between(x, x)` to ~1e-12 relative
    (tests/dynamics/test_sde.py).

    kernel: the field's matrix kernel; inducing_m: Z (M, d) m; alpha: (M·d,)
    s/m; projection: B (M·d, M·d) s/m; weights: λ (M·d,).
    Outputs: mean m/s, cov m²/s².
    """

    kernel: Any
    inducing_m: jax.Array
    alpha: jax.Array
    projection: jax.Array
    weights: jax.Array

    @classmethod
    def from_field(cls, field: Any) -> "PointPosterior":
        """Precompute α, B and λ from a `FlowField` (one triangular inverse, one eigh)."""
        params = field.params
        return cls(params.kernel, params.inducing_m, *_point_arrays(params, field.inducing_chol))

    def mean_at(self, x: jax.Array) -> jax.Array:
        """Posterior mean velocity at x (d,) m → (d,) m/s."""
        return self.kernel.gram_matrix(x[None, :], self.inducing_m) @ self.alpha

    def cov_at(self, x: jax.Array) -> jax.Array:
        """Posterior velocity covariance at x (d,) m → (d, d) m²/s², symmetrised."""
        return self._cov_from_row(x, self.kernel.gram_matrix(x[None, :], self.inducing_m))

    def _cov_from_row(self, x: jax.Array, row: jax.Array) -> jax.Array:
        g = row @ self.projection  # (d, M·d)
        # Σ_k λ_k g_ak g_bk as a multiply-and-sum: under vmap it fuses instead of a batch of tiny products
        cov = self.kernel.block(x, x) - jnp.sum((g * self.weights)[:, None, :] * g[None, :, :], axis=-1)
        return 0.5 * (cov + cov.T)

    def moments_at(self, x: jax.Array) -> tuple[jax.Array, jax.Array]:
        """(:meth:`mean_at`, :meth:`cov_at`) at x from one kernel row K(x, Z)."""
        row = self.kernel.gram_matrix(x[None, :], self.inducing_m)
        return row @ self.alpha, self._cov_from_row(x, row)


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class TimedPointPosterior:
    """:class:`PointPosterior` for a time-varying field (:mod:`driftwise.gp.temporal`), with the time-varying
    field contract the time SDE uses (``mean_at(x, t_s=t)``, ``cov_between(x, y, t_x_s=, t_y_s=)``, whole field).

    With C(x, t) = Cov[v(x, t), u] (d, F), not whitened (all blocks' kernels in one pass,
    ``TemporalKernel.cross_covariance``), L the block-diagonal Cholesky factor of K_uu and the same
    eigendecomposition I − S Sᵀ = U diag(λ) Uᵀ:

        mean(x, t)              = C(x, t) α,                        α = L^{−T} m
        cov((x, t_x), (y, t_y)) = K((x, t_x), (y, t_y)) − G_x diag(λ) G_yᵀ,   G = C B,  B = L^{−T} U

    so a point costs the kernel rows and one (d × F)·(F × F) product instead of a triangular solve per block
    and per call; values equal ``FlowField.mean_at`` / ``cov_between`` to ~1e-12 relative
    (tests/dynamics/test_sde.py).  Times are absolute (s on the model's time axis).
    """

    kernel: Any
    inducing_m: jax.Array
    slow_inducing_m: jax.Array | None
    slow_inducing_time_s: jax.Array | None
    alpha: jax.Array
    projection: jax.Array
    weights: jax.Array
    is_time_varying = True

    @classmethod
    def from_field(cls, field: Any) -> TimedPointPosterior:
        """Precompute α, B and λ from a time-varying `FlowField` (one triangular inverse per block, one eigh)."""
        params = field.params
        blocks = [field.inducing_chol[k] for k, _ in params.kernel.layout]
        inv_t = jax.scipy.linalg.block_diag(*[
            jax.scipy.linalg.solve_triangular(chol, jnp.eye(chol.shape[0], dtype=chol.dtype), lower=True).T
            for chol in blocks])
        s = params.q_sqrt
        weights, vectors = jnp.linalg.eigh(jnp.eye(s.shape[0], dtype=s.dtype) - s @ s.T)
        return cls(params.kernel, params.inducing_m, params.slow_inducing_m, params.slow_inducing_time_s,
                   inv_t @ params.q_mean, inv_t @ vectors, weights)

    def _cross(self, x: jax.Array, t_s: Any) -> jax.Array:
        t_rel = jnp.asarray(t_s, dtype=jnp.float64) - self.kernel.time_origin_s
        return self.kernel.cross_covariance(self.inducing_m, self.slow_inducing_m, self.slow_inducing_time_s,
                                            x[None, :], t_rel[None])[0]

    def mean_at(self, x: jax.Array, part: None = None, *, t_s: Any) -> jax.Array:
        """Posterior mean velocity at x (d,) m and time t (s) → (d,) m/s (whole field only)."""
        _whole_field_only(part)
        return self._cross(x, t_s) @ self.alpha

    def cov_between(self, x: jax.Array, y: jax.Array, part_x: None = None, part_y: None = None, *, t_x_s: Any,
                    t_y_s: Any) -> jax.Array:
        """Posterior Cov[v(x, t_x), v(y, t_y)] (d, d) m²/s² (whole field only)."""
        _whole_field_only(part_x), _whole_field_only(part_y)
        g_x = self._cross(x, t_x_s) @ self.projection
        g_y = g_x if (y is x and t_y_s is t_x_s) else self._cross(y, t_y_s) @ self.projection
        return self._cov_from_rows(x, t_x_s, g_x, y, t_y_s, g_y)

    def _cov_from_rows(self, x, t_x_s, g_x, y, t_y_s, g_y) -> jax.Array:
        """k((x, t_x), (y, t_y)) − G_x diag(λ) G_yᵀ for the projected rows G = K((·, t), Z) B."""
        origin = self.kernel.time_origin_s
        prior = self.kernel.prior_cross(None, x, jnp.asarray(t_x_s, jnp.float64) - origin, None, y,
                                        jnp.asarray(t_y_s, jnp.float64) - origin)
        return prior - jnp.sum((g_x * self.weights)[:, None, :] * g_y[None, :, :], axis=-1)

    def moments_at(self, x: jax.Array, *, t_s: Any) -> tuple[jax.Array, jax.Array]:
        """(:meth:`mean_at`, :meth:`cov_between` at (x, t) twice) from one cross-covariance row."""
        cross = self._cross(x, t_s)
        g = cross @ self.projection
        return cross @ self.alpha, self._cov_from_rows(x, t_s, g, x, t_s, g)


def _whole_field_only(part: Any) -> None:
    if part is not None:
        raise InputError(f"a forecast's posterior gives the whole field only, not part {part!r}")


def field_drift(posterior: PointPosterior, x: jax.Array) -> jax.Array:
    """μ(x) = posterior mean velocity at x (d,) -> (d,) m/s."""
    return posterior.mean_at(x)


def _rate_from_cov(sigma: jax.Array, diffusivity_m2_s: jax.Array, weight_s: jax.Array) -> jax.Array:
    """2 (K I + w Σ) (m²/s) for a velocity covariance Σ (d, d) m²/s², K m²/s and weight w s."""
    eye = jnp.eye(sigma.shape[-1], dtype=sigma.dtype)
    return 2.0 * (diffusivity_m2_s * eye + weight_s * sigma)


def _field_diffusion(
    posterior: PointPosterior, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array, x: jax.Array
) -> jax.Array:
    """D(x) = 2 (K I + τ Σ(x)), Σ(x) the posterior velocity covariance; x (d,) -> (d, d) m²/s."""
    return _rate_from_cov(posterior.cov_at(x), diffusivity_m2_s, decorrelation_time_s)


def velocity_memory_weight(decorrelation_time_s: jax.Array, age_s: jax.Array) -> jax.Array:
    """τ (1 − e^{−a/τ}) (s), the weight of Σ at release age a (Taylor 1921); 0 when τ = 0."""
    positive = decorrelation_time_s > 0
    tau = jnp.where(positive, decorrelation_time_s, 1.0)
    return jnp.where(positive, -tau * jnp.expm1(-age_s / tau), 0.0)


def _field_diffusion_with_age(
    posterior: PointPosterior, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array, x: jax.Array,
    age_s: jax.Array,
) -> jax.Array:
    """D(x, a) = 2 (K I + τ (1 − e^{−a/τ}) Σ(x)); x (d,) m, a s since release -> (d, d) m²/s."""
    return _field_diffusion(posterior, diffusivity_m2_s, velocity_memory_weight(decorrelation_time_s, age_s), x)


def _field_moments(posterior: Any, diffusivity_m2_s: jax.Array, weight_s: jax.Array,
                   x: jax.Array) -> tuple[jax.Array, jax.Array]:
    """(μ(x), 2 (K I + w Σ(x))) from one ``posterior.moments_at(x)``; as field_drift and _field_diffusion."""
    mean, cov = posterior.moments_at(x)
    return mean, _rate_from_cov(cov, diffusivity_m2_s, weight_s)


def _field_moments_with_age(posterior: Any, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array,
                            x: jax.Array, age_s: jax.Array) -> tuple[jax.Array, jax.Array]:
    return _field_moments(posterior, diffusivity_m2_s, velocity_memory_weight(decorrelation_time_s, age_s), x)


def field_sde(posterior: Any, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array,
               velocity_memory: bool) -> SDE:
    diffusion = _field_diffusion_with_age if velocity_memory else _field_diffusion
    both = _field_moments_with_age if velocity_memory else _field_moments
    joint = (jax.tree_util.Partial(both, posterior, diffusivity_m2_s, decorrelation_time_s)
             if hasattr(posterior, "moments_at") else None)
    return SDE(drift=jax.tree_util.Partial(field_drift, posterior),
               diffusion=jax.tree_util.Partial(diffusion, posterior, diffusivity_m2_s, decorrelation_time_s),
               with_age=bool(velocity_memory), drift_and_diffusion=joint)


def _timed_drift(field: Any, x: jax.Array, t_s: jax.Array) -> jax.Array:
    """μ(x, t) = field.mean_at(x, t_s=t): x (d,) m at absolute time t (s) -> (d,) m/s."""
    return field.mean_at(x, t_s=t_s)


def _timed_diffusion(field: Any, diffusivity_m2_s: jax.Array, weight_s: jax.Array, x: jax.Array,
                     t_s: jax.Array) -> jax.Array:
    """D(x, t) = 2 (K I + w Σ(x, t)), Σ(x, t) = field.cov_between(x, x, t_x_s=t, t_y_s=t); -> (d, d) m²/s."""
    sigma = field.cov_between(x, x, t_x_s=t_s, t_y_s=t_s)
    return _rate_from_cov(0.5 * (sigma + sigma.T), diffusivity_m2_s, weight_s)


def _timed_diffusion_with_age(field: Any, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array,
                              x: jax.Array, t_s: jax.Array, age_s: jax.Array) -> jax.Array:
    """D(x, t, a) = 2 (K I + τ (1 − e^{−a/τ}) Σ(x, t)) at release age a (s) -> (d, d) m²/s."""
    return _timed_diffusion(field, diffusivity_m2_s, velocity_memory_weight(decorrelation_time_s, age_s), x, t_s)


def _timed_moments(field: Any, diffusivity_m2_s: jax.Array, weight_s: jax.Array, x: jax.Array,
                   t_s: jax.Array) -> tuple[jax.Array, jax.Array]:
    """(μ(x, t), 2 (K I + w Σ(x, t))) from one ``field.moments_at(x, t_s=t)``; as _timed_drift, _timed_diffusion."""
    mean, sigma = field.moments_at(x, t_s=t_s)
    return mean, _rate_from_cov(0.5 * (sigma + sigma.T), diffusivity_m2_s, weight_s)


def _timed_moments_with_age(field: Any, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array,
                            x: jax.Array, t_s: jax.Array, age_s: jax.Array) -> tuple[jax.Array, jax.Array]:
    return _timed_moments(field, diffusivity_m2_s, velocity_memory_weight(decorrelation_time_s, age_s), x, t_s)


def timed_field_sde(field: Any, diffusivity_m2_s: jax.Array, decorrelation_time_s: jax.Array,
                    velocity_memory: bool) -> SDE:
    """The SDE of a time-varying field (``with_time``): drift field.mean_at(x, t_s=t), diffusion as
    :func:`_timed_diffusion_with_age` (or its Markov limit), both from one ``field.moments_at`` when the field
    has one.  The field is held as pytree data."""
    diffusion = _timed_diffusion_with_age if velocity_memory else _timed_diffusion
    both = _timed_moments_with_age if velocity_memory else _timed_moments
    joint = (jax.tree_util.Partial(both, field, diffusivity_m2_s, decorrelation_time_s)
             if hasattr(field, "moments_at") else None)
    return SDE(drift=jax.tree_util.Partial(_timed_drift, field),
               diffusion=jax.tree_util.Partial(diffusion, field, diffusivity_m2_s, decorrelation_time_s),
               with_age=bool(velocity_memory), with_time=True, drift_and_diffusion=joint)


def _check_nonnegative(value: Any, name: str) -> jax.Array:
    """Return `value` as a float64 scalar, or raise InputError naming `name`."""
    arr = np.asarray(value, dtype=float)
    if arr.shape != () or not np.isfinite(arr) or arr < 0:
        raise InputError(f"{name} must be one finite number >= 0, got {value!r}.")
    return jnp.asarray(arr, dtype=jnp.float64)


def sde_from_field(
    field: Any,
    *,
    diffusivity_m2_s: float | None = None,
    decorrelation_time_s: float | None = None,
    velocity_memory: bool = True,
) -> SDE:
    """The SDE of a particle in a fitted flow field.

    μ(x) = field.mean_at(x) (m/s);  D(x, a) = 2 (K I + τ (1 − e^{−a/τ}) Σ(x)) (m²/s) at
    release age a, with Σ(x) = field.cov_between(x, x) the posterior velocity covariance
    (m²/s²) — see the module docstring; ``velocity_memory=False`` gives the Markov limit
    D(x) = 2 (K I + τ Σ(x)) (an SDE without age).
    K (`diffusivity_m2_s`, m²/s) and τ (`decorrelation_time_s`, s) default to
    the field's own `diffusivity_m2_s` and `decorrelation_time_s`.

    A field without a decorrelation time (None: not yet calibrated) gets τ = 0,
    i.e. dispersion by K alone; pass `decorrelation_time_s` to add the spread
    from velocity uncertainty.

    The posterior is evaluated through `PointPosterior` (precomputed
    projection, same values as field.mean_at / field.cov_between) and held as
    pytree data inside `jax.tree_util.Partial`, so two fields of the same
    shapes share one compiled propagator.
    A field with ``is_time_varying`` True gives the time SDE of the module docstring
    (:func:`timed_field_sde`, ``with_time``): μ(x, t) = field.mean_at(x, t_s=t) and
    Σ(x, t) = field.cov_between(x, x, t_x_s=t, t_y_s=t), evaluated for a FlowField through
    `TimedPointPosterior` (precomputed, same values) and by any other time-varying field itself.
    Raises InputError if K or τ is negative or not finite.
    """
    k = field.diffusivity_m2_s if diffusivity_m2_s is None else diffusivity_m2_s
    tau = field.decorrelation_time_s if decorrelation_time_s is None else decorrelation_time_s
    k = _check_nonnegative(k, "diffusivity_m2_s")
    tau = _check_nonnegative(0.0 if tau is None else tau, "decorrelation_time_s")
    if getattr(field, "is_time_varying", False):
        timed = TimedPointPosterior.from_field(field) if hasattr(field, "inducing_chol") else field
        return timed_field_sde(timed, k, tau, bool(velocity_memory))
    return field_sde(PointPosterior.from_field(field), k, tau, bool(velocity_memory))


@dataclass(frozen=True)
class _Static:
    """The non-array part of an SDE pytree: its structure and static leaves."""

    treedef: Any
    leaves: tuple[Hashable, ...]


def _is_data(leaf: Any) -> bool:
    return isinstance(leaf, (jax.Array, np.ndarray, np.generic, float, complex))


def split_for_jit(sde: SDE) -> tuple[list[Any], _Static]:
    """Split an SDE into (array leaves, hashable static part) for `jax.jit`.

    Array and float leaves (e.g. the field's parameters inside a Partial) are
    traced; everything else (plain functions, ints, flags) becomes part of the
    static argument, so a second call with equal shapes does not recompile.
    """
    leaves, treedef = jax.tree_util.tree_flatten(sde)
    dynamic = [leaf if _is_data(leaf) else None for leaf in leaves]
    static = tuple(None if _is_data(leaf) else leaf for leaf in leaves)
    return dynamic, _Static(treedef, static)


def join_from_jit(dynamic: list[Any], static: _Static) -> SDE:
    """Inverse of `split_for_jit`."""
    leaves = [d if s is None else s for d, s in zip(dynamic, static.leaves)]
    return jax.tree_util.tree_unflatten(static.treedef, leaves)

def transport_sde(posterior: Any, diffusivity_m2_s: Any, decorrelation_time_s: Any, *,
                  velocity_memory: bool = True) -> SDE:
    """The field SDE with K and τ as (possibly traced) jax scalars, no input checks (for jit/grad)."""
    return field_sde(posterior, jnp.asarray(diffusivity_m2_s, jnp.float64),
                      jnp.asarray(decorrelation_time_s, jnp.float64), velocity_memory)


@jax.jit
def _point_arrays(params: Any, chol: jax.Array) -> tuple[jax.Array, jax.Array, jax.Array]:
    """(α, B, λ) of :meth:`PointPosterior.from_field`: α = L_Z^{−T} m, and B = L_Z^{−T} V, λ with
    V diag(λ) Vᵀ = I − S Sᵀ (eigh), in one compiled program."""
    eye = jnp.eye(chol.shape[0], dtype=chol.dtype)
    inv_t = jax.scipy.linalg.solve_triangular(chol, eye, lower=True).T
    alpha = jax.scipy.linalg.solve_triangular(chol.T, params.q_mean, lower=False)
    s = params.q_sqrt
    weights, vectors = jnp.linalg.eigh(eye - s @ s.T)
    return alpha, inv_t @ vectors, weights
