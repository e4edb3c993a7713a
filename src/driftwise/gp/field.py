"""The sparse variational Gaussian process over vector fields.

Model (Titsias 2009, "Variational learning of inducing variables in sparse Gaussian
processes"; Hensman, Fusi & Lawrence 2013, "Gaussian processes for big data"):

* prior  v ~ GP(0, K) with a matrix kernel K from :mod:`driftwise.gp.kernels`;
* inducing values u = v(Z) at Z (M, d), whitened: u = L_Z w with K_ZZ + δI = L_Z L_Zᵀ
  (flattened point-major, component-minor, size M·d), prior w ~ N(0, I);
* variational q(w) = N(m, S Sᵀ), S lower triangular with positive diagonal
  (stored as ``q_sqrt_raw``: strict lower part as is, diagonal = log of S's diagonal);
* predictive at x: A = K(x, Z) L_Z^{−T} (d, M·d), mean A m, covariance
  K(x, x) − A Aᵀ + A S Sᵀ Aᵀ;
* likelihood from finite-difference velocities y_n (b, d): y_n ~ N(v(x_n), r_n I) with
  r_n = K_diff · 2/Δt_n + 2σ_pos²/Δt_n² + σ₀² (random walk, position error, floor; m²/s²);
* ELBO = (N/b) Σ_n E_q log N(y_n | v(x_n), r_n I) − KL(q(w) ‖ N(0, I)), with
  E_q log N = −(d/2) log(2π r_n) − (|y_n − μ_n|² + tr Σ_n) / (2 r_n).

Time-varying fields (:mod:`driftwise.gp.temporal`) use the same machinery with inter-domain inducing
features: the kernel is a ``TemporalKernel``, inputs are (x, t), K_ZZ is block-diagonal (one Cholesky factor
per block, ``inducing_chol`` a tuple) and every formula above holds with A the block-whitened projection.

Jitter δ = ``jitter_multiple`` × eps(float64) × (per-component prior variance); the
default multiple 1e6 gives δ ≈ 2.2e-10 σ².  Everything is float64 and jit-able.
"""

from __future__ import annotations

import dataclasses
import functools
import json
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.linalg import solve_triangular

from ..data.observations import Observations
from ..data.support import distance_to_data_m
from ..data.tracks import Frame
from ..errors import InputError
from .background import coefficient_names, features
from .batch import ObservationBatch, batch_from_observations, noise_variance_m2_s2
from .kernels import Helmholtz, MatrixKernel, jitter_m2_s2
from .params import FieldParams, init_params, q_sqrt_raw_from
from .temporal import TemporalKernel, part_names, part_needs_time

__all__ = [
    "JITTER_MULTIPLE",
    "PARTS",
    "FieldParams",
    "FlowField",
    "ObservationBatch",
    "batch_from_observations",
    "elbo",
    "expected_log_likelihood",
    "inducing_cholesky",
    "init_params",
    "jitter_m2_s2",
    "kl_divergence",
    "noise_variance_m2_s2",
    "optimal_q",
    "prior_trace",
    "q_sqrt_raw_from",
]

JITTER_MULTIPLE = 1.0e6
PARTS = (None, "divergence_free", "curl_free")
PREDICT_CHUNK = 4096
_STATIC = {"static": True}

# The data layer does not import jax (``driftwise inspect`` stays light); its observations become a pytree here.
jax.tree_util.register_dataclass(
    Observations, data_fields=["position_m", "velocity_m_s", "dt_s", "time_s", "track_index"],
    meta_fields=["position_error_m"])


# --------------------------------------------------------------------------------------
# Shared linear algebra
# --------------------------------------------------------------------------------------
@functools.partial(jax.jit, static_argnames=("jitter_multiple",))
def inducing_cholesky(params: FieldParams, *, jitter_multiple: float = JITTER_MULTIPLE) -> jax.Array:
    """L_Z with L_Z L_Zᵀ = K_ZZ + δI, shape (M·d, M·d), flattened point-major (a time-varying kernel: the
    tuple of its block-diagonal factors, :meth:`TemporalKernel.cholesky_blocks`)."""
    z = params.inducing_m
    if params.is_time_varying:
        return params.kernel.cholesky_blocks(z, params.slow_inducing_m, params.slow_inducing_time_s, jitter_multiple)
    kzz = params.kernel.gram_matrix(z, z)
    delta = jitter_m2_s2(params.kernel, z[0], jitter_multiple)
    return jnp.linalg.cholesky(kzz + delta * jnp.eye(kzz.shape[0], dtype=kzz.dtype))


def _projection(kernel: MatrixKernel, inducing: jax.Array, chol: jax.Array, x: jax.Array) -> jax.Array:
    """A = K(x, Z) L_Z^{−T} for one point x (d,): shape (d, M·d)."""
    kxz = kernel.gram_matrix(x[None, :], inducing)
    return solve_triangular(chol, kxz.T, lower=True).T


def relative_time_s(kernel: TemporalKernel, time_s, what: str = "this time-varying model") -> jax.Array:
    """t − t₀ (s) for times on the track file's axis; InputError when they are missing."""
    if time_s is None:
        raise InputError(f"{what} changes in time: give the times (seconds on the track file's time axis; "
                         "ISO-8601 times as seconds since 1970-01-01T00:00Z)")
    return jnp.asarray(time_s, dtype=jnp.float64) - kernel.time_origin_s


def batch_projection(params: FieldParams, chol, batch: ObservationBatch) -> jax.Array:
    """A_n = Cov[v(x_n, t_n), u] whitened, for every observation: (b, d, F)."""
    if params.is_time_varying:
        t = relative_time_s(params.kernel, batch.time_s, "a time-varying model's observations")
        return params.kernel.projection(chol, params.inducing_m, params.slow_inducing_m, params.slow_inducing_time_s,
                                        batch.position_m, t)
    return jax.vmap(lambda x: _projection(params.kernel, params.inducing_m, chol, x))(batch.position_m)


def prior_trace(params: FieldParams, batch: ObservationBatch) -> jax.Array:
    """tr K at each observation's own input, (b,) m²/s²."""
    if params.is_time_varying:
        return params.kernel.prior_trace(batch.position_m, relative_time_s(params.kernel, batch.time_s))
    return jnp.trace(params.kernel.diag_blocks(batch.position_m), axis1=1, axis2=2)


# --------------------------------------------------------------------------------------
# Objective
# --------------------------------------------------------------------------------------
def expected_log_likelihood(params: FieldParams, batch: ObservationBatch, chol: jax.Array) -> jax.Array:
    """E_q log N(y_n | v(x_n), r_n I) per observation, shape (b,) (Hensman et al. 2013, eq. 7 in closed form)."""
    a = batch_projection(params, chol, batch)
    mean = a @ params.q_mean                                       # (b, d)
    a_s = a @ params.q_sqrt                                        # (b, d, M·d)
    var_trace = prior_trace(params, batch) - jnp.sum(a * a, axis=(1, 2)) + jnp.sum(a_s * a_s, axis=(1, 2))
    r = noise_variance_m2_s2(params, batch)
    resid = jnp.sum((batch.velocity_m_s - mean) ** 2, axis=1)
    d = batch.position_m.shape[1]
    return -0.5 * (d * jnp.log(2.0 * jnp.pi * r) + (resid + var_trace) / r)


def kl_divergence(params: FieldParams) -> jax.Array:
    """KL(N(m, SSᵀ) ‖ N(0, I)) = ½ (‖S‖_F² + ‖m‖² − M·d − 2 Σ log S_ii)."""
    s = params.q_sqrt
    log_diag = jnp.diag(params.q_sqrt_raw)
    return 0.5 * (jnp.sum(s * s) + jnp.sum(params.q_mean**2) - s.shape[0] - 2.0 * jnp.sum(log_diag))


@functools.partial(jax.jit, static_argnames=("jitter_multiple",))
def elbo(params: FieldParams, batch: ObservationBatch, n_total: int | jax.Array, *,
         jitter_multiple: float = JITTER_MULTIPLE) -> jax.Array:
    """Minibatch ELBO: (N/b) Σ_n E_q log N(y_n | v(x_n), r_n I) − KL(q ‖ p), scalar in nats.

    ``n_total`` = N, the number of observations in the whole data set (b = batch size).
    """
    chol = inducing_cholesky(params, jitter_multiple=jitter_multiple)
    scale = n_total / batch.position_m.shape[0]
    return scale * jnp.sum(expected_log_likelihood(params, batch, chol)) - kl_divergence(params)


@functools.partial(jax.jit, static_argnames=("jitter_multiple",))
def optimal_q(params: FieldParams, batch: ObservationBatch, *, n_total: int | None = None,
              jitter_multiple: float = JITTER_MULTIPLE) -> FieldParams:
    """``params`` with the ELBO-optimal Gaussian q(w) for fixed kernel, Z, K_diff, σ₀ (Titsias 2009).

    With Φ = K(X, Z) L_Z^{−T} (b·d, M·d) and Λ = diag(1/r_n) (scaled by N/b when
    ``n_total`` is given, a natural-gradient step of size 1 on a minibatch):
    P = I + Φᵀ Λ Φ, Sq Sqᵀ = P^{−1}, m = P^{−1} Φᵀ Λ y.  P is factored from the reversed
    ordering (J P J = U Uᵀ, so P = (JUJ)(JUJ)ᵀ with JUJ upper triangular) so that
    S = (JUJ)^{−T} is lower triangular without ever inverting P densely.
    """
    chol = inducing_cholesky(params, jitter_multiple=jitter_multiple)
    phi = batch_projection(params, chol, batch)
    b, d, size = phi.shape
    phi = phi.reshape(b * d, size)
    scale = 1.0 if n_total is None else n_total / b
    precision = jnp.repeat(scale / noise_variance_m2_s2(params, batch), d)
    p = jnp.eye(size) + phi.T @ (precision[:, None] * phi)
    upper = jnp.linalg.cholesky(p[::-1, ::-1])[::-1, ::-1]
    s = solve_triangular(upper.T, jnp.eye(size), lower=True)
    mean = s @ (s.T @ (phi.T @ (precision * batch.velocity_m_s.reshape(-1))))
    return dataclasses.replace(params, q_mean=mean, q_sqrt_raw=q_sqrt_raw_from(s))


# --------------------------------------------------------------------------------------
# The fitted field
# --------------------------------------------------------------------------------------
UNITS = {"position": "m", "velocity": "m/s", "covariance": "m2/s2", "diffusivity": "m2/s", "time": "s"}


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class FlowField:
    """A fitted vector field: posterior mean and covariance anywhere, with metadata.

    Build with :meth:`FlowField.from_params`; ``inducing_chol`` (L_Z) is derived from
    ``params`` there once so single-point functions need no Cholesky.  Static metadata
    (``metadata_json``: frame dict and data summary, as canonical JSON so the pytree
    stays hashable under ``jit``) travels with the field.
    """

    params: FieldParams
    inducing_chol: jax.Array | tuple
    jitter_multiple: float = dataclasses.field(default=JITTER_MULTIPLE, metadata=_STATIC)
    decorrelation_time_s: float | None = dataclasses.field(default=None, metadata=_STATIC)
    position_error_m: float | None = dataclasses.field(default=None, metadata=_STATIC)
    metadata_json: str = dataclasses.field(default="{}", metadata=_STATIC)

    @classmethod
    def from_params(cls, params: FieldParams, *, frame=None, data_summary: dict | None = None,
                    decorrelation_time_s: float | None = None, position_error_m: float | None = None,
                    fit_info: dict | None = None, jitter_multiple: float = JITTER_MULTIPLE) -> "FlowField":
        """Wrap fitted ``params``; ``frame`` is a dict or an object with ``to_dict()`` (tracks.Frame).

        ``data_summary`` and ``fit_info`` (the fit's own record) must be JSON-serialisable dicts.
        """
        frame_dict = frame.to_dict() if hasattr(frame, "to_dict") else (frame or {})
        metadata = {"frame": frame_dict, "data_summary": data_summary or {}}
        if fit_info is not None:
            metadata["fit"] = fit_info
        metadata = json.dumps(metadata, sort_keys=True)
        return cls(
            params=params,
            inducing_chol=inducing_cholesky(params, jitter_multiple=jitter_multiple),
            jitter_multiple=float(jitter_multiple),
            decorrelation_time_s=None if decorrelation_time_s is None else float(decorrelation_time_s),
            position_error_m=None if position_error_m is None else float(position_error_m),
            metadata_json=metadata,
        )

    def steady_part(self) -> FlowField:
        """The steady part v̄(x) of a time-varying field as a steady field (a steady field returns itself).

        The whitened inducing values of v̄ come first in q (block by block), and S is lower triangular, so their
        marginal is N(m₁, S₁₁S₁₁ᵀ) with m₁, S₁₁ the first M·d entries: the steady kernel (with its background), Z
        and that marginal give the same posterior as ``part="steady"`` (the time average of the harmonics is 0).
        """
        if not self.is_time_varying:
            return self
        p, size = self.params, self.params.n_inducing * self.dim
        params = FieldParams(p.kernel.steady, p.inducing_m, p.q_mean[:size], p.q_sqrt_raw[:size, :size],
                             p.log_diffusivity_m2_s, p.log_noise_floor_m_s)
        meta = json.loads(self.metadata_json)
        return FlowField.from_params(params, frame=meta["frame"], data_summary=meta["data_summary"],
                                     decorrelation_time_s=self.decorrelation_time_s,
                                     position_error_m=self.position_error_m, fit_info=meta.get("fit"),
                                     jitter_multiple=self.jitter_multiple)

    # ----- metadata -------------------------------------------------------------------
    @property
    def dim(self) -> int:
        """d."""
        return self.params.dim

    @property
    def kernel_family(self) -> str:
        """One of ``kernels.KERNEL_FAMILIES``."""
        return self.params.kernel.family

    @property
    def kernel_base(self) -> str:
        """Name of the scalar base ("squared-exponential" or "matern52")."""
        kernel = self.params.kernel
        kernel = kernel.steady if isinstance(kernel, TemporalKernel) else kernel
        return (kernel.divergence_free.base if isinstance(kernel, Helmholtz) else kernel.base).name

    @property
    def is_time_varying(self) -> bool:
        """True for a time-varying field (tides, inertial or slow parts): then times are needed."""
        return self.params.is_time_varying

    @property
    def time_origin_s(self) -> float | None:
        """t₀ (s on the track file's axis) of a time-varying field; None for a steady one."""
        return self.params.kernel.time_origin_s if self.is_time_varying else None

    @property
    def constituents(self) -> dict[str, float]:
        """{constituent name: angular frequency ω (rad/s)} of a time-varying field ({} when steady)."""
        kernel = self.params.kernel
        return dict(zip(kernel.constituents, kernel.omegas_rad_s)) if self.is_time_varying else {}

    @property
    def part_names(self) -> tuple[str, ...]:
        """The parts :meth:`mean_at` and :meth:`cov_between` accept besides None (:mod:`driftwise.gp.temporal`)."""
        return part_names(self.params.kernel)

    @property
    def frame_dict(self) -> dict[str, Any]:
        """The coordinate frame as saved (``tracks.Frame.to_dict()``)."""
        return json.loads(self.metadata_json)["frame"]

    @property
    def frame(self):
        """The coordinate frame as a ``tracks.Frame``."""

        return Frame.from_dict(self.frame_dict)

    @property
    def data_summary(self) -> dict[str, Any]:
        """Summary of the data the field was fitted to."""
        return json.loads(self.metadata_json)["data_summary"]

    @property
    def fit_info(self) -> dict[str, Any]:
        """The fit's record (``fit_info`` given to :meth:`from_params`; empty if none)."""
        return json.loads(self.metadata_json).get("fit", {})

    @property
    def units(self) -> dict[str, str]:
        """Units of inputs and outputs (SI)."""
        return dict(UNITS)

    @property
    def diffusivity_m2_s(self) -> float:
        """Eddy diffusivity K_diff (m²/s)."""
        return float(self.params.diffusivity_m2_s)

    @property
    def noise_floor_m_s(self) -> float:
        """Velocity-noise floor σ₀ (m/s)."""
        return float(self.params.noise_floor_m_s)

    @property
    def hyperparameters(self) -> dict[str, float]:
        """Kernel hyperparameters, K_diff and σ₀ (units in the key names)."""
        return {**self.params.kernel.hyperparameters(), "diffusivity_m2_s": self.diffusivity_m2_s,
                "noise_floor_m_s": self.noise_floor_m_s}

    # ----- single-point jax functions ----------------------------------------------------
    def _check_part(self, part: str | None) -> None:
        if part is not None and part not in self.part_names:
            raise InputError(f"unknown part {part!r} for this {self.kernel_family} model; choose one of "
                             f"{', '.join(self.part_names) or 'none (it has no parts)'}")

    def _part_kernel(self, part: str | None) -> MatrixKernel:
        kernel = self.params.kernel
        if part is None:
            return kernel
        if not isinstance(kernel, Helmholtz):
            raise InputError(f"part {part!r} needs a helmholtz model; this model's kernel is {kernel.family!r}")
        if part not in kernel.parts:
            raise InputError(f"unknown part {part!r}; choose 'divergence_free' or 'curl_free'")
        return kernel.parts[part]

    def _prior_cross(self, x, y, part_x, part_y) -> jax.Array:
        """Prior Cov[v_a(x), v_b(y)]: K_a δ_ab, with the full field None correlated with each part."""
        if part_x is not None and part_y is not None and part_x != part_y:
            return jnp.zeros((x.shape[-1], y.shape[-1]), dtype=x.dtype)
        return self._part_kernel(part_x if part_x is not None else part_y).block(x, y)

    def _a(self, x: jax.Array, part: str | None) -> jax.Array:
        return _projection(self._part_kernel(part), self.params.inducing_m, self.inducing_chol, x)

    def _time(self, t_s, part: str | None) -> jax.Array:
        """t − t₀ for a part of a time-varying field (0 for the parts that do not depend on t)."""
        self._check_part(part)
        if t_s is None and not part_needs_time(part):
            return jnp.zeros(())
        return relative_time_s(self.params.kernel, t_s, f"this time-varying model (part {part!r})")

    def mean_at(self, x: jax.Array, part: str | None = None, *, t_s=None) -> jax.Array:
        """Posterior mean velocity at one point x (d,) in m (and time ``t_s``, s on the track file's axis, for a
        time-varying field; a steady one ignores it) → (d,) m/s: A_part(x, t) m (jitted)."""
        if self.is_time_varying:
            return _temporal_mean_jit(self, x, self._time(t_s, part), part)
        self._part_kernel(part)  # validate before tracing
        return _mean_at_jit(self, x, part)

    def cov_between(self, x: jax.Array, y: jax.Array, part_x: str | None = None,
                    part_y: str | None = None, *, t_x_s=None, t_y_s=None) -> jax.Array:
        """Posterior Cov[v_a(x, t_x), v_b(y, t_y)] (d, d) in m²/s²: K_ab − A_a A_bᵀ + A_a S Sᵀ A_bᵀ (jitted);
        times in s on the track file's axis, needed by a time-varying field and ignored by a steady one."""
        if self.is_time_varying:
            return _temporal_cov_jit(self, x, self._time(t_x_s, part_x), y, self._time(t_y_s, part_y),
                                     part_x, part_y)
        self._part_kernel(part_x), self._part_kernel(part_y)
        return _cov_between_jit(self, x, y, part_x, part_y)

    def _temporal_a(self, x: jax.Array, t_rel: jax.Array, part: str | None) -> jax.Array:
        """A_part(x, t) (d, F) of a time-varying field at one point."""
        params = self.params
        return params.kernel.projection(self.inducing_chol, params.inducing_m, params.slow_inducing_m,
                                        params.slow_inducing_time_s, x[None, :], t_rel[None], part)[0]

    def _temporal_mean(self, x, t_rel, part) -> jax.Array:
        return self._temporal_a(x, t_rel, part) @ self.params.q_mean

    def _temporal_cov(self, x, t_x, y, t_y, part_x, part_y) -> jax.Array:
        a_x, a_y = self._temporal_a(x, t_x, part_x), self._temporal_a(y, t_y, part_y)
        s = self.params.q_sqrt
        prior = self.params.kernel.prior_cross(part_x, x, t_x, part_y, y, t_y)
        return prior - a_x @ a_y.T + (a_x @ s) @ (a_y @ s).T

    def harmonic_posterior(self, x: jax.Array, constituent: str) -> tuple[jax.Array, jax.Array]:
        """Joint posterior of the amplitude fields (a_c(x), b_c(x)) of ``constituent`` at one point x (d,) m:
        mean (2d,) m/s = [a_c; b_c] and covariance (2d, 2d) m²/s² (a_c and b_c are correlated a posteriori).
        v_c(x, t) = a_c cos ω_c t + b_c sin ω_c t, t on the track file's axis (jax-transformable)."""
        if constituent not in self.constituents:
            raise InputError(f"this model has no constituent {constituent!r}; it has "
                             f"{', '.join(self.constituents) or 'none (it is steady)'}")
        return _parts_jit(self, x, (f"{constituent}_cos", f"{constituent}_sin"))

    def parts_posterior(self, x: jax.Array, parts: tuple[str, ...]) -> tuple[jax.Array, jax.Array]:
        """Joint posterior of the stacked time-free parts P = [p_1(x); …; p_k(x)] ("steady", "<c>_cos",
        "<c>_sin") at one point x (d,) m: mean (k·d,) m/s and covariance (k·d, k·d) m²/s²,
        K_P − A_P A_Pᵀ + A_P S Sᵀ A_Pᵀ with K_P block-diagonal (the parts are independent a priori, correlated
        a posteriori through the data).  jax-transformable; the parts are static."""
        return _parts_jit(self, x, tuple(parts))

    def _parts(self, x, parts):
        zero = jnp.zeros(())
        a = jnp.concatenate([self._temporal_a(x, zero, part) for part in parts])
        prior = jax.scipy.linalg.block_diag(*[self.params.kernel.prior_cross(p, x, zero, p, x, zero) for p in parts])
        a_s = a @ self.params.q_sqrt
        return a @ self.params.q_mean, prior - a @ a.T + a_s @ a_s.T

    def _mean_at(self, x: jax.Array, part: str | None) -> jax.Array:
        kxz = self._part_kernel(part).gram_matrix(x[None, :], self.params.inducing_m)
        alpha = solve_triangular(self.inducing_chol.T, self.params.q_mean, lower=False)
        return kxz @ alpha

    def _cov_between(self, x, y, part_x, part_y) -> jax.Array:
        a_x, a_y = self._a(x, part_x), self._a(y, part_y)
        s = self.params.q_sqrt
        return self._prior_cross(x, y, part_x, part_y) - a_x @ a_y.T + (a_x @ s) @ (a_y @ s).T

    def background_posterior(self) -> tuple[list[str], np.ndarray, np.ndarray]:
        """Posterior of the background coefficients c (:mod:`driftwise.gp.background`): (names, mean (p,),
        cov (p, p)) in m/s and 1/s; p = 0 without a background.

        Cov[c, u] = diag(s²) F(Z)ᵀ with u = v(Z), so with A_c = diag(s²) F(Z)ᵀ L_Z^{−T}:
        mean A_c m and covariance diag(s²) − A_c A_cᵀ + A_c S Sᵀ A_cᵀ (as for the velocity).
        """
        names = [name for background in self.params.kernel.backgrounds()
                 for name in coefficient_names(background.terms, self.dim)]
        if not names:
            return [], np.zeros(0), np.zeros((0, 0))
        chol = self.inducing_chol[0] if self.is_time_varying else self.inducing_chol   # the steady block comes first
        mean, cov = _background_moments(self.params, chol)
        return names, np.asarray(mean), np.asarray(cov)

    def _local_ratio_one(self, x: jax.Array) -> jax.Array:
        """tr Σ_loc(x) / tr K_loc(x, x) for the stationary (non-background) part of the prior."""
        kernel, z = self.params.kernel, self.params.inducing_m
        blocks = kernel.blocks(x[None, None, :] - z[None, :, :])                       # (1, M, d, d)
        kxz = blocks.transpose(0, 2, 1, 3).reshape(x.shape[0], -1)
        a = solve_triangular(self.inducing_chol, kxz.T, lower=True).T
        a_s = a @ self.params.q_sqrt
        prior = kernel.blocks(jnp.zeros_like(x))
        post = prior - a @ a.T + a_s @ a_s.T
        return jnp.trace(post) / jnp.trace(prior)

    def _temporal_local_ratio_one(self, x: jax.Array, t_rel: jax.Array) -> jax.Array:
        """As :meth:`_local_ratio_one` at (x, t) for a time-varying field (every part but the background)."""
        params, local = self.params, self.params.kernel.without_background()
        a = local.projection(self.inducing_chol, params.inducing_m, params.slow_inducing_m,
                             params.slow_inducing_time_s, x[None, :], t_rel[None])[0]
        a_s = a @ params.q_sqrt
        prior = local.prior_cross(None, x, t_rel, None, x, t_rel)
        return jnp.trace(prior - a @ a.T + a_s @ a_s.T) / jnp.trace(prior)

    def local_variance_ratio(self, points, times_s=None) -> np.ndarray:
        """How little the data constrain the field at ``points`` (n, d) m → (n,): tr Σ_loc / tr K_loc, the
        posterior over the prior velocity variance of the stationary part (1: the data taught nothing there).

        Cov[v_loc(x), v(Z)] = K_loc(x − Z) since the background flow is independent of it, so
        Σ_loc(x) = K_loc(0) − A Aᵀ + A S Sᵀ Aᵀ with A = K_loc(x, Z) L_Z^{−T}.  The background's linear terms
        grow without bound away from the data and are well determined by them, so a ratio over the whole
        prior would call a point far outside the data "supported"; without a background both agree.
        A time-varying field needs ``times_s`` (scalar or (n,), s on the track file's axis).
        """
        x = _check_points(points, self.dim)
        if self.is_time_varying:
            t = _check_times(self, times_s, x.shape[0])
            parts = [np.asarray(_temporal_local_ratio_jit(self, jnp.asarray(x[i:i + PREDICT_CHUNK]),
                                                          jnp.asarray(t[i:i + PREDICT_CHUNK])))
                     for i in range(0, x.shape[0], PREDICT_CHUNK)]
        else:
            parts = [np.asarray(_local_ratio_jit(self, jnp.asarray(x[i:i + PREDICT_CHUNK])))
                     for i in range(0, x.shape[0], PREDICT_CHUNK)]
        return np.concatenate(parts) if parts else np.zeros(0)

    def distance_to_data_m(self, points) -> np.ndarray:
        """Distance (n,) m from ``points`` (n, d) m to the nearest observation the field was fitted to, exact
        within the thinned record's ``tolerance_m`` (:mod:`driftwise.data.support`); for a model saved
        before that record was kept, to the nearest inducing point."""
        support = self.data_summary.get("support") or {"points_m": np.asarray(self.params.inducing_m).tolist()}
        return distance_to_data_m(support, _check_points(points, self.dim))

    def prior_variance_at(self, x: jax.Array) -> jax.Array:
        """Prior covariance K(x, x) at one point, (d, d) in m²/s² (the same at every time)."""
        if self.is_time_varying:
            zero = jnp.zeros(())
            return self.params.kernel.prior_cross(None, x, zero, None, x, zero)
        return self.params.kernel.block(x, x)

    def _moments_one(self, x: jax.Array) -> tuple[jax.Array, jax.Array]:
        a = self._a(x, None)
        a_s = a @ self.params.q_sqrt
        return a @ self.params.q_mean, self.params.kernel.block(x, x) - a @ a.T + a_s @ a_s.T

    def _temporal_moments_one(self, x: jax.Array, t_rel: jax.Array) -> tuple[jax.Array, jax.Array]:
        return self._temporal_mean(x, t_rel, None), self._temporal_cov(x, t_rel, x, t_rel, None, None)

    # ----- batch prediction ------------------------------------------------------------
    def predict(self, points, times_s=None) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean (n, d) m/s and covariance (n, d, d) m²/s² at ``points`` (n, d) in m, as numpy.

        ``times_s`` (scalar or (n,), s on the track file's axis; ISO times as seconds since
        1970-01-01T00:00Z): needed by a time-varying field, ignored by a steady one.  Runs a jitted ``vmap``
        over chunks of at most 4096 points (padded to a power of two, so few compilations and bounded memory).
        """
        x = _check_points(points, self.dim)
        if self.is_time_varying:
            t = _check_times(self, times_s, x.shape[0])
            return _chunked(lambda xs, ts: predict_chunk_t(self, xs, ts), x, t, self.dim)
        return _chunked(lambda xs, _: predict_chunk(self, xs), x, np.zeros(x.shape[0]), self.dim)


def _chunked(run, x: np.ndarray, t: np.ndarray, dim: int) -> tuple[np.ndarray, np.ndarray]:
    """``run(points, times)`` over chunks of ≤ 4096 rows padded to a power of two, concatenated as numpy."""
    n = x.shape[0]
    chunk = min(PREDICT_CHUNK, 1 << max(n - 1, 0).bit_length())
    means, covs = [], []
    for start in range(0, n, chunk):
        rows = min(chunk, n - start)
        padded, padded_t = np.zeros((chunk, dim)), np.zeros(chunk)
        padded[:rows], padded_t[:rows] = x[start:start + rows], t[start:start + rows]
        mean, cov = run(jnp.asarray(padded), jnp.asarray(padded_t))
        means.append(np.asarray(mean[:rows]))
        covs.append(np.asarray(cov[:rows]))
    if not means:
        return np.zeros((0, dim)), np.zeros((0, dim, dim))
    return np.concatenate(means), np.concatenate(covs)


@jax.jit
def predict_chunk(field: FlowField, x: jax.Array):
    """Posterior mean (n, d) and covariance (n, d, d) of one chunk of points, compiled once per chunk shape."""
    return jax.vmap(field._moments_one)(x)


@jax.jit
def predict_chunk_t(field: FlowField, x: jax.Array, t_rel: jax.Array):
    """As :func:`predict_chunk` for a time-varying field at times t − t₀ (n,) s."""
    return jax.vmap(field._temporal_moments_one)(x, t_rel)


_mean_at_jit = jax.jit(FlowField._mean_at, static_argnames=("part",))
_local_ratio_jit = jax.jit(lambda field, x: jax.vmap(field._local_ratio_one)(x))
_cov_between_jit = jax.jit(FlowField._cov_between, static_argnames=("part_x", "part_y"))
_temporal_mean_jit = jax.jit(FlowField._temporal_mean, static_argnames=("part",))
_temporal_cov_jit = jax.jit(FlowField._temporal_cov, static_argnames=("part_x", "part_y"))
_temporal_local_ratio_jit = jax.jit(lambda field, x, t: jax.vmap(field._temporal_local_ratio_one)(x, t))
_parts_jit = jax.jit(FlowField._parts, static_argnames=("parts",))


def _check_times(field: FlowField, times_s, n: int) -> np.ndarray:
    """t − t₀ (n,) s from ``times_s`` (scalar or (n,), s on the track file's axis); InputError naming the problem."""
    if times_s is None:
        relative_time_s(field.params.kernel, None)
    t = np.asarray(times_s, dtype=np.float64)
    if t.ndim == 0:
        t = np.full(n, float(t))
    if t.shape != (n,):
        raise InputError(f"times_s must be one time or one per point ({n}), got shape {t.shape}")
    if not np.all(np.isfinite(t)):
        raise InputError(f"times_s row {int(np.argmax(~np.isfinite(t)))} is NaN or infinite")
    return t - field.time_origin_s


def _check_points(points, dim: int) -> np.ndarray:
    x = np.asarray(points, dtype=np.float64)
    if x.ndim == 1 and x.shape[0] == dim:
        raise InputError(f"points must have shape (n, {dim}); got one point of shape ({dim},) — wrap it as [[...]]")
    if x.ndim != 2 or x.shape[1] != dim:
        raise InputError(f"points must have shape (n, {dim}) in metres, got {x.shape}")
    if not np.all(np.isfinite(x)):
        row = int(np.argmax(~np.all(np.isfinite(x), axis=1)))
        raise InputError(f"points row {row} has NaN or infinite coordinates")
    return x


@jax.jit
def _background_moments(params: FieldParams, chol: jax.Array) -> tuple[jax.Array, jax.Array]:
    """Mean A_c m and covariance diag(s²) − A_c A_cᵀ + A_c S Sᵀ A_cᵀ of the background coefficients
    (:meth:`FlowField.background_posterior`), in one compiled program."""
    columns, variances = [], []
    for background in params.kernel.backgrounds():
        f, var = features(background, params.inducing_m)                     # (M, d, p), (p,)
        columns.append(f.reshape(-1, f.shape[-1]))
        variances.append(var)
    var = jnp.concatenate(variances)
    cross = jnp.concatenate(columns, axis=1) * var                             # Cov[u, c], (M·d, p)
    a = solve_triangular(chol, cross, lower=True).T                             # (p, M·d)
    a = jnp.pad(a, ((0, 0), (0, params.q_mean.shape[0] - a.shape[1])))
    a_s = a @ params.q_sqrt
    cov = jnp.diag(var) - a @ a.T + a_s @ a_s.T
    return a @ params.q_mean, 0.5 * (cov + cov.T)
