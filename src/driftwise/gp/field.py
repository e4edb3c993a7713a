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
from .kernels import Helmholtz, MatrixKernel, make_kernel

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
    "kl_divergence",
    "noise_variance_m2_s2",
    "optimal_q",
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
# Parameters
# --------------------------------------------------------------------------------------
@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class FieldParams:
    """Everything the fit optimises (all leaves float64 arrays).

    kernel                 matrix-kernel pytree (log hyperparameters inside)
    inducing_m             Z, (M, d) in m
    q_mean                 m, (M·d,) whitened mean
    q_sqrt_raw             (M·d, M·d); S = tril(raw, −1) + diag(exp(diag raw))
    log_diffusivity_m2_s   log K_diff (m²/s), eddy diffusivity of the random-walk term
    log_noise_floor_m_s    log σ₀ (m/s), velocity-noise floor
    """

    kernel: MatrixKernel
    inducing_m: jax.Array
    q_mean: jax.Array
    q_sqrt_raw: jax.Array
    log_diffusivity_m2_s: jax.Array
    log_noise_floor_m_s: jax.Array

    @property
    def dim(self) -> int:
        """d, the number of space dimensions."""
        return self.inducing_m.shape[-1]

    @property
    def n_inducing(self) -> int:
        """M, the number of inducing points."""
        return self.inducing_m.shape[0]

    @property
    def q_sqrt(self) -> jax.Array:
        """S (M·d, M·d), lower triangular with positive diagonal."""
        raw = self.q_sqrt_raw
        return jnp.tril(raw, -1) + jnp.diag(jnp.exp(jnp.diag(raw)))

    @property
    def diffusivity_m2_s(self) -> jax.Array:
        """K_diff (m²/s)."""
        return jnp.exp(self.log_diffusivity_m2_s)

    @property
    def noise_floor_m_s(self) -> jax.Array:
        """σ₀ (m/s)."""
        return jnp.exp(self.log_noise_floor_m_s)


def q_sqrt_raw_from(q_sqrt: jax.Array) -> jax.Array:
    """Inverse of :attr:`FieldParams.q_sqrt`: raw storage for a lower-triangular S with positive diagonal."""
    return jnp.tril(q_sqrt, -1) + jnp.diag(jnp.log(jnp.diag(q_sqrt)))


def _positive(name: str, value: float) -> float:
    number = float(value)
    if not np.isfinite(number) or number <= 0.0:
        raise InputError(f"{name} must be a positive finite number in SI units, got {value!r}")
    return number


def init_params(
    family: str,
    dim: int,
    inducing_m,
    *,
    velocity_scale_m_s: float,
    length_scale_m: float,
    diffusivity_m2_s: float = 1.0,
    noise_floor_m_s: float = 0.01,
    base: str = "squared-exponential",
    curl_free_velocity_scale_m_s: float | None = None,
    curl_free_length_scale_m: float | None = None,
    background: str = "none",
    centre_m=None,
    background_scales: dict[str, float] | None = None,
) -> FieldParams:
    """Initial parameters: the kernel from :func:`kernels.make_kernel` (with the ``background`` flow
    about ``centre_m``), Z = ``inducing_m`` (M, d) in m, q(w) = the prior N(0, I), K_diff in m²/s and σ₀ in m/s."""
    z = np.asarray(inducing_m, dtype=np.float64)
    if z.ndim != 2 or z.shape[1] != dim or z.shape[0] < 1:
        raise InputError(f"inducing points must have shape (M, {dim}) with M ≥ 1, got {z.shape}")
    if not np.all(np.isfinite(z)):
        raise InputError("inducing points contain NaN or infinite coordinates")
    kernel = make_kernel(
        family, dim, velocity_scale_m_s=velocity_scale_m_s, length_scale_m=length_scale_m, base=base,
        curl_free_velocity_scale_m_s=curl_free_velocity_scale_m_s, curl_free_length_scale_m=curl_free_length_scale_m,
        background=background, centre_m=centre_m, background_scales=background_scales,
    )
    size = z.shape[0] * dim
    return FieldParams(
        kernel=kernel,
        inducing_m=jnp.asarray(z),
        q_mean=jnp.zeros(size),
        q_sqrt_raw=jnp.zeros((size, size)),
        log_diffusivity_m2_s=jnp.log(_positive("diffusivity_m2_s", diffusivity_m2_s)),
        log_noise_floor_m_s=jnp.log(_positive("noise_floor_m_s", noise_floor_m_s)),
    )


# --------------------------------------------------------------------------------------
# Observations
# --------------------------------------------------------------------------------------
@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class ObservationBatch:
    """A minibatch of b velocity observations.

    position_m                      (b, d) segment midpoints, m
    velocity_m_s                    (b, d) finite-difference velocities, m/s
    random_walk_coefficient_s_inv   (b,)   2/Δt, 1/s  (multiplies K_diff)
    position_noise_var_m2_s2        (b,)   2σ_pos²/Δt², m²/s²
    """

    position_m: jax.Array
    velocity_m_s: jax.Array
    random_walk_coefficient_s_inv: jax.Array
    position_noise_var_m2_s2: jax.Array

    @property
    def size(self) -> int:
        """b."""
        return self.position_m.shape[0]


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


def batch_from_observations(obs, idx=None) -> ObservationBatch:
    """An :class:`ObservationBatch` from a ``tracks.Observations`` (all rows, or rows ``idx``)."""
    position = np.asarray(obs.position_m, dtype=np.float64)
    velocity = np.asarray(obs.velocity_m_s, dtype=np.float64)
    if position.ndim != 2 or velocity.shape != position.shape:
        raise InputError(f"observations need position_m and velocity_m_s of equal shape (n, d), got "
                         f"{position.shape} and {velocity.shape}")
    walk, pos_noise = _noise_coefficients(obs)
    if walk.shape != (position.shape[0],) or pos_noise.shape != walk.shape:
        raise InputError(f"observations: dt_s must have shape ({position.shape[0]},), got {walk.shape}")
    if idx is not None:
        idx = np.asarray(idx)
        position, velocity, walk, pos_noise = position[idx], velocity[idx], walk[idx], pos_noise[idx]
    return ObservationBatch(jnp.asarray(position), jnp.asarray(velocity), jnp.asarray(walk), jnp.asarray(pos_noise))


# --------------------------------------------------------------------------------------
# Shared linear algebra
# --------------------------------------------------------------------------------------
def jitter_m2_s2(kernel: MatrixKernel, point: jax.Array, jitter_multiple: float) -> jax.Array:
    """δ = multiple × eps × per-component prior variance tr K(z, z)/d (m²/s²)."""
    variance = jnp.trace(kernel.block(point, point)) / point.shape[-1]
    return jitter_multiple * jnp.finfo(point.dtype).eps * variance


@functools.partial(jax.jit, static_argnames=("jitter_multiple",))
def inducing_cholesky(params: FieldParams, *, jitter_multiple: float = JITTER_MULTIPLE) -> jax.Array:
    """L_Z with L_Z L_Zᵀ = K_ZZ + δI, shape (M·d, M·d), flattened point-major."""
    z = params.inducing_m
    kzz = params.kernel.gram_matrix(z, z)
    delta = jitter_m2_s2(params.kernel, z[0], jitter_multiple)
    return jnp.linalg.cholesky(kzz + delta * jnp.eye(kzz.shape[0], dtype=kzz.dtype))


def _projection(kernel: MatrixKernel, inducing: jax.Array, chol: jax.Array, x: jax.Array) -> jax.Array:
    """A = K(x, Z) L_Z^{−T} for one point x (d,): shape (d, M·d)."""
    kxz = kernel.gram_matrix(x[None, :], inducing)
    return solve_triangular(chol, kxz.T, lower=True).T


def noise_variance_m2_s2(params: FieldParams, batch: ObservationBatch) -> jax.Array:
    """r_n = K_diff · 2/Δt_n + 2σ_pos²/Δt_n² + σ₀², shape (b,), m²/s²."""
    return (params.diffusivity_m2_s * batch.random_walk_coefficient_s_inv
            + batch.position_noise_var_m2_s2 + params.noise_floor_m_s**2)


# --------------------------------------------------------------------------------------
# Objective
# --------------------------------------------------------------------------------------
def expected_log_likelihood(params: FieldParams, batch: ObservationBatch, chol: jax.Array) -> jax.Array:
    """E_q log N(y_n | v(x_n), r_n I) per observation, shape (b,) (Hensman et al. 2013, eq. 7 in closed form)."""
    a = jax.vmap(lambda x: _projection(params.kernel, params.inducing_m, chol, x))(batch.position_m)
    mean = a @ params.q_mean                                       # (b, d)
    a_s = a @ params.q_sqrt                                        # (b, d, M·d)
    prior_trace = jnp.trace(params.kernel.diag_blocks(batch.position_m), axis1=1, axis2=2)
    var_trace = prior_trace - jnp.sum(a * a, axis=(1, 2)) + jnp.sum(a_s * a_s, axis=(1, 2))
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
    phi = jax.vmap(lambda x: _projection(params.kernel, params.inducing_m, chol, x))(batch.position_m)
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
    inducing_chol: jax.Array
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
        return (kernel.divergence_free.base if isinstance(kernel, Helmholtz) else kernel.base).name

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

    def mean_at(self, x: jax.Array, part: str | None = None) -> jax.Array:
        """Posterior mean velocity at one point x (d,) in m → (d,) m/s: K_a(x, Z) L_Z^{−T} m (jitted)."""
        self._part_kernel(part)  # validate before tracing
        return _mean_at_jit(self, x, part)

    def cov_between(self, x: jax.Array, y: jax.Array, part_x: str | None = None,
                    part_y: str | None = None) -> jax.Array:
        """Posterior Cov[v_a(x), v_b(y)] (d, d) in m²/s²: K_a δ_ab − A_a A_bᵀ + A_a S Sᵀ A_bᵀ (jitted)."""
        self._part_kernel(part_x), self._part_kernel(part_y)
        return _cov_between_jit(self, x, y, part_x, part_y)

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
        names, columns, variances = [], [], []
        z = self.params.inducing_m
        for background in self.params.kernel.backgrounds():
            f, var = features(background, z)                                  # (M, d, p), (p,)
            names += coefficient_names(background.terms, self.dim)
            columns.append(f.reshape(-1, f.shape[-1]))
            variances.append(var)
        if not names:
            return [], np.zeros(0), np.zeros((0, 0))
        var = jnp.concatenate(variances)
        cross = jnp.concatenate(columns, axis=1) * var                         # Cov[u, c], (M·d, p)
        a = solve_triangular(self.inducing_chol, cross, lower=True).T           # (p, M·d)
        a_s = a @ self.params.q_sqrt
        cov = jnp.diag(var) - a @ a.T + a_s @ a_s.T
        return names, np.asarray(a @ self.params.q_mean), np.asarray(0.5 * (cov + cov.T))

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

    def local_variance_ratio(self, points) -> np.ndarray:
        """How little the data constrain the field at ``points`` (n, d) m → (n,): tr Σ_loc / tr K_loc, the
        posterior over the prior velocity variance of the stationary part (1: the data taught nothing there).

        Cov[v_loc(x), v(Z)] = K_loc(x − Z) since the background flow is independent of it, so
        Σ_loc(x) = K_loc(0) − A Aᵀ + A S Sᵀ Aᵀ with A = K_loc(x, Z) L_Z^{−T}.  The background's linear terms
        grow without bound away from the data and are well determined by them, so a ratio over the whole
        prior would call a point far outside the data "supported"; without a background both agree.
        """
        x = _check_points(points, self.dim)
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
        """Prior covariance K(x, x) at one point, (d, d) in m²/s²."""
        return self.params.kernel.block(x, x)

    def _moments_one(self, x: jax.Array) -> tuple[jax.Array, jax.Array]:
        a = self._a(x, None)
        a_s = a @ self.params.q_sqrt
        return a @ self.params.q_mean, self.params.kernel.block(x, x) - a @ a.T + a_s @ a_s.T

    # ----- batch prediction ------------------------------------------------------------
    def predict(self, points) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean (n, d) m/s and covariance (n, d, d) m²/s² at ``points`` (n, d) in m, as numpy.

        Runs a jitted ``vmap`` over chunks of at most 4096 points (padded to a power of
        two, so few compilations and bounded memory).
        """
        x = _check_points(points, self.dim)
        n = x.shape[0]
        chunk = min(PREDICT_CHUNK, 1 << max(n - 1, 0).bit_length())
        means, covs = [], []
        for start in range(0, n, chunk):
            block = x[start:start + chunk]
            padded = np.zeros((chunk, self.dim))
            padded[: block.shape[0]] = block
            mean, cov = predict_chunk(self, jnp.asarray(padded))
            means.append(np.asarray(mean[: block.shape[0]]))
            covs.append(np.asarray(cov[: block.shape[0]]))
        if not means:
            return np.zeros((0, self.dim)), np.zeros((0, self.dim, self.dim))
        return np.concatenate(means), np.concatenate(covs)


@jax.jit
def predict_chunk(field: FlowField, x: jax.Array):
    """Posterior mean (n, d) and covariance (n, d, d) of one chunk of points, compiled once per chunk shape."""
    return jax.vmap(field._moments_one)(x)


_mean_at_jit = jax.jit(FlowField._mean_at, static_argnames=("part",))
_local_ratio_jit = jax.jit(lambda field, x: jax.vmap(field._local_ratio_one)(x))
_cov_between_jit = jax.jit(FlowField._cov_between, static_argnames=("part_x", "part_y"))


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
