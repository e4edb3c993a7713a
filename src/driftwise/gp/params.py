"""The parameters of a sparse variational vector-field GP: :class:`FieldParams` and :func:`init_params`.

Everything a fit optimises lives in one immutable pytree (float64 leaves): the kernel (log hyperparameters
inside), the inducing inputs, the whitened variational q(w) = N(m, SSᵀ), the eddy diffusivity and the noise
floor; a time-varying kernel (:mod:`driftwise.gp.temporal`) adds the slow part's space–time inducing points.
:mod:`driftwise.gp.field` gives the posterior they define.
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError
from .kernels import MatrixKernel, make_kernel
from .temporal import TemporalKernel, TemporalStart

__all__ = ["FieldParams", "init_params", "q_sqrt_raw_from"]


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
    slow_inducing_m        Z_s, (M_s, d) in m, the slow part's inducing places (time-varying kernels; else None)
    slow_inducing_time_s   T_s, (M_s,) in s since the kernel's time origin (else None)

    With a TemporalKernel q has F = (M·(1 + 2C) + M_s)·d whitened values (C constituents); else M·d.
    """

    kernel: MatrixKernel | TemporalKernel
    inducing_m: jax.Array
    q_mean: jax.Array
    q_sqrt_raw: jax.Array
    log_diffusivity_m2_s: jax.Array
    log_noise_floor_m_s: jax.Array
    slow_inducing_m: jax.Array | None = None
    slow_inducing_time_s: jax.Array | None = None

    @property
    def is_time_varying(self) -> bool:
        """Whether the kernel is a TemporalKernel (inputs (x, t))."""
        return isinstance(self.kernel, TemporalKernel)

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
    temporal: TemporalStart | None = None,
) -> FieldParams:
    """Initial parameters: the kernel from :func:`kernels.make_kernel` (with the ``background`` flow
    about ``centre_m``), Z = ``inducing_m`` (M, d) in m, q(w) = the prior N(0, I), K_diff in m²/s and σ₀ in m/s.
    ``temporal`` (a :class:`~driftwise.gp.temporal.TemporalStart`) makes it a time-varying kernel around it."""
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
    size, slow = z.shape[0] * dim, {}
    if temporal is not None:
        kernel = temporal.kernel(kernel, dim=dim, base=base, length_scale_m=length_scale_m)
        size *= 1 + 2 * len(temporal.constituents)
        if temporal.slow:
            slow = {"slow_inducing_m": jnp.asarray(temporal.slow_inducing_m, dtype=jnp.float64),
                    "slow_inducing_time_s": jnp.asarray(temporal.slow_inducing_time_s, dtype=jnp.float64)}
            size += slow["slow_inducing_m"].shape[0] * dim
    return FieldParams(
        kernel=kernel,
        inducing_m=jnp.asarray(z),
        q_mean=jnp.zeros(size),
        q_sqrt_raw=jnp.zeros((size, size)),
        log_diffusivity_m2_s=jnp.log(_positive("diffusivity_m2_s", diffusivity_m2_s)),
        log_noise_floor_m_s=jnp.log(_positive("noise_floor_m_s", noise_floor_m_s)),
        **slow,
    )
