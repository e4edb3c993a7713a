"""Time-varying vector fields: a steady part, tidal/inertial harmonics and a slow part, with inducing features.

Model, for x (d,) in m and t in s on the track file's own time axis:

    v(x, t) = v̄(x) + Σ_c [a_c(x) cos(ω_c t) + b_c(x) sin(ω_c t)] + s(x, t)

* v̄ ~ GP(0, K̄): the steady matrix kernel of :mod:`driftwise.gp.kernels` (any family, with its background flow);
* a_c, b_c ~ GP(0, K_c) independently, K_c a matrix kernel of the same family with its own velocity and length
  scales and no background; their contribution has the prior covariance K_c(x − x′) cos ω_c (t − t′)
  (cos A cos B + sin A sin B = cos(A − B): a harmonic of random amplitude and phase);
* s ~ GP(0, K_s(x − x′) k_T(t − t′)), K_s a matrix kernel of the same family and k_T the Matérn-3/2 correlation
  k_T(τ) = (1 + √3|τ|/T) exp(−√3|τ|/T) (Matérn 1960; Stein 1999, Interpolation of Spatial Data) with a time
  scale T (learned, or fixed).  A divergence-free (curl-free) K times any scalar time kernel is divergence-free
  (curl-free) at every instant, so each family keeps its meaning.

Phase reference: ω_c t uses the absolute time t of the track file's axis (seconds; ISO-8601 times are seconds
since 1970-01-01T00:00Z), so a_c is the amplitude in phase with cos ω_c t about t = 0 of that axis.  For
numerical health the kernel works with t − t₀, t₀ = ``time_origin_s`` (the data's first time, stored in the
model file), and adds the phase offset φ_c = ω_c t₀ mod 2π computed once in float64:
cos(ω_c t) = cos(ω_c (t − t₀) + φ_c).  The slow part uses t − t₀ (only differences matter).

Inducing features (Lázaro-Gredilla & Figueiras-Vidal 2009, "Inter-domain Gaussian processes for sparse
inference using inducing features"): u = [v̄(Z), a_1(Z), b_1(Z), …, a_C(Z), b_C(Z), s(Z_s, T_s)] with Z (M, d)
spatial points shared by the steady and harmonic parts and (Z_s, T_s) space–time points of the slow part.
Their covariances: Cov[v(x, t), v̄(Z)] = K̄(x, Z), Cov[v(x, t), a_c(Z)] = K_c(x, Z) cos ω_c t,
Cov[v(x, t), b_c(Z)] = K_c(x, Z) sin ω_c t, Cov[v(x, t), s(Z_s, T_s)] = K_s(x − Z_s) k_T(t − T_s), and K_uu is
block-diagonal with blocks K̄(Z, Z), K_c(Z, Z) (twice per constituent) and K_s ∘ k_T on (Z_s, T_s).  Whitening
then works block by block: the whitened projection of an observation at (x, t) is
A = [K̄(x, Z) L̄^{−T}, cos ω_c t · K_c(x, Z) L_c^{−T}, sin ω_c t · K_c(x, Z) L_c^{−T}, …, K_s k_T L_s^{−T}],
so a constituent costs one spatial projection however many (x, t) it serves.

Parts (per-part posteriors; :data:`TIME_FREE_PARTS` need no time):

* None — the whole v(x, t);  "divergence_free" / "curl_free" — the Helmholtz split of the whole v(x, t)
  (every component's divergence-free or curl-free piece; helmholtz family only; equals today's parts for a
  steady field);
* "steady" — v̄(x);  "<c>" (e.g. "M2") — a_c(x) cos ω_c t + b_c(x) sin ω_c t;  "<c>_cos" — a_c(x);
  "<c>_sin" — b_c(x) (the amplitude fields, m/s);  "slow" — s(x, t).
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.linalg import solve_triangular

from ..errors import InputError
from .kernels import Helmholtz, MatrixKernel, jitter_m2_s2, make_kernel

__all__ = ["HELMHOLTZ_PIECES", "SLOW", "STEADY", "TemporalKernel", "TemporalStart", "matern32_time",
           "part_names", "part_needs_time"]

STEADY, SLOW = "steady", "slow"
HELMHOLTZ_PIECES = ("divergence_free", "curl_free")
_STATIC = {"static": True}


def matern32_time(tau_s: jax.Array, time_scale_s: jax.Array) -> jax.Array:
    """k_T(τ) = (1 + a) e^{−a}, a = √3|τ|/T: unit variance, once differentiable in τ (derivative 0 at τ = 0)."""
    a = math.sqrt(3.0) * jnp.abs(tau_s) / time_scale_s
    return (1.0 + a) * jnp.exp(-a)


def _piece_kernel(kernel: MatrixKernel, piece: str | None) -> MatrixKernel:
    return kernel if piece is None else kernel.parts[piece]


def _common_piece(piece_x: str | None, piece_y: str | None) -> str | None | bool:
    """The Helmholtz piece two parts share (None: the whole kernel), or False when they are independent."""
    if piece_x is None or piece_x == piece_y:
        return piece_y
    return piece_x if piece_y is None else False


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class TemporalKernel:
    """The prior of v(x, t) (module docstring): the steady kernel, one matrix kernel per constituent, an optional
    slow kernel with its log time scale (s), and static structure (constituent names, ω_c in rad/s, time origin t₀
    in s on the track file's axis, whether T is learned)."""

    steady: MatrixKernel
    harmonics: tuple
    slow: MatrixKernel | None = None
    log_slow_time_scale_s: jax.Array | None = None
    constituents: tuple[str, ...] = dataclasses.field(default=(), metadata=_STATIC)
    omegas_rad_s: tuple[float, ...] = dataclasses.field(default=(), metadata=_STATIC)
    time_origin_s: float = dataclasses.field(default=0.0, metadata=_STATIC)
    learn_slow_time_scale: bool = dataclasses.field(default=True, metadata=_STATIC)
    kind: str = dataclasses.field(default="temporal", metadata=_STATIC, repr=False)

    # ----- structure -------------------------------------------------------------------
    @property
    def family(self) -> str:
        """The spatial kernel family shared by every part."""
        return self.steady.family

    @property
    def has_slow(self) -> bool:
        return self.slow is not None

    @property
    def spatial_kernels(self) -> tuple[MatrixKernel, ...]:
        """One kernel per Cholesky block: steady, each constituent, then the slow part (if any)."""
        return (self.steady, *self.harmonics) + ((self.slow,) if self.has_slow else ())

    @property
    def layout(self) -> tuple[tuple[int, str], ...]:
        """The feature blocks of u in order: (Cholesky block, kind ∈ steady/cos/sin/slow)."""
        blocks = [(0, STEADY)] + [(1 + i, kind) for i in range(len(self.harmonics)) for kind in ("cos", "sin")]
        return tuple(blocks + ([(len(self.harmonics) + 1, SLOW)] if self.has_slow else []))

    @property
    def phases_rad(self) -> tuple[float, ...]:
        """φ_c = ω_c t₀ mod 2π, so that ω_c t = ω_c (t − t₀) + φ_c (float64, computed once)."""
        return tuple(math.fmod(w * self.time_origin_s, 2.0 * math.pi) for w in self.omegas_rad_s)

    @property
    def slow_time_scale_s(self) -> jax.Array:
        """T (s); its gradient is stopped when the time scale is fixed."""
        log_t = self.log_slow_time_scale_s
        return jnp.exp(log_t if self.learn_slow_time_scale else jax.lax.stop_gradient(log_t))

    def hyperparameters(self) -> dict[str, float]:
        """Steady hyperparameters as a steady kernel names them, then ``<c>_…`` per constituent and ``slow_…``."""
        out = dict(self.steady.hyperparameters())
        for name, kernel in zip(self.constituents, self.harmonics):
            out |= {f"{name}_{key}": value for key, value in kernel.hyperparameters().items()}
        if self.has_slow:
            out |= {f"slow_{key}": value for key, value in self.slow.hyperparameters().items()}
            out["slow_time_scale_s"] = float(self.slow_time_scale_s)
        return out

    def backgrounds(self):
        """The steady part's background terms (the other parts have none)."""
        return self.steady.backgrounds()

    def without_background(self) -> TemporalKernel:
        """The same kernel with the steady part's background flow removed (the stationary parts only)."""
        steady = self.steady
        if isinstance(steady, Helmholtz):
            steady = dataclasses.replace(
                steady, divergence_free=dataclasses.replace(steady.divergence_free, background=None),
                curl_free=dataclasses.replace(steady.curl_free, background=None))
        else:
            steady = dataclasses.replace(steady, background=None)
        return dataclasses.replace(self, steady=steady)

    # ----- parts -----------------------------------------------------------------------
    def weights(self, part: str | None, t_rel: jax.Array) -> list:
        """Per feature block the factor multiplying that block's process in ``part`` at t − t₀ = ``t_rel`` (n,),
        or None when the part does not contain the block: 1, cos(ω_c t), sin(ω_c t) (slow: 1, time via k_T)."""
        whole = part is None or part in HELMHOLTZ_PIECES
        ones = jnp.ones_like(t_rel)
        out = [ones if whole or part == STEADY else None]
        for name, omega, phase in zip(self.constituents, self.omegas_rad_s, self.phases_rad):
            arg = omega * t_rel + phase
            timed = whole or part == name
            out.append(jnp.cos(arg) if timed else (ones if part == f"{name}_cos" else None))
            out.append(jnp.sin(arg) if timed else (ones if part == f"{name}_sin" else None))
        if self.has_slow:
            out.append(ones if whole or part == SLOW else None)
        return out

    # ----- linear algebra --------------------------------------------------------------
    def cholesky_blocks(self, z: jax.Array, slow_z, slow_t, jitter_multiple: float) -> tuple[jax.Array, ...]:
        """L_k with L_k L_kᵀ = K_k(Z_k, Z_k) + δ_k I per Cholesky block (the slow block on (Z_s, T_s) with k_T)."""
        chols = []
        for k, kernel in enumerate(self.spatial_kernels):
            if self.has_slow and k == len(self.spatial_kernels) - 1:
                kzz = self._slow_gram(kernel, slow_z, slow_t, slow_z, slow_t)
                delta = jitter_m2_s2(kernel, slow_z[0], jitter_multiple)
            else:
                kzz = kernel.gram_matrix(z, z)
                delta = jitter_m2_s2(kernel, z[0], jitter_multiple)
            chols.append(jnp.linalg.cholesky(kzz + delta * jnp.eye(kzz.shape[0], dtype=kzz.dtype)))
        return tuple(chols)

    def _slow_gram(self, kernel, x, t_x, y, t_y) -> jax.Array:
        """K_s(x_i − y_j) k_T(t_i − t_j) flattened point-major: (n·d, m·d)."""
        blocks = kernel.gram(x, y) * matern32_time(t_x[:, None] - t_y[None, :], self.slow_time_scale_s)[..., None, None]
        n, m, d, _ = blocks.shape
        return blocks.transpose(0, 2, 1, 3).reshape(n * d, m * d)

    def projection(self, chols, z, slow_z, slow_t, x: jax.Array, t_rel: jax.Array, part: str | None = None):
        """A = Cov[part(x_n, t_n), u] with u whitened block by block: x (n, d) m, t − t₀ (n,) s → (n, d, F)."""
        n, d = x.shape
        piece = part if part in HELMHOLTZ_PIECES else None
        whitened, columns = {}, []
        for (k, kind), weight in zip(self.layout, self.weights(part, t_rel)):
            size = chols[k].shape[0]
            if weight is None:
                columns.append(jnp.zeros((n, d, size), dtype=x.dtype))
                continue
            if k not in whitened:
                cross = self._block_cross(_piece_kernel(self.spatial_kernels[k], piece), kind, z, slow_z, slow_t,
                                          x, t_rel)
                whitened[k] = solve_triangular(chols[k], cross.T, lower=True).T.reshape(n, d, size)
            columns.append(weight[:, None, None] * whitened[k])
        return jnp.concatenate(columns, axis=-1)

    def _block_cross(self, kernel, kind: str, z, slow_z, slow_t, x, t_rel) -> jax.Array:
        """Cov[process of one Cholesky block at (x_n, t_n), its inducing values], unweighted: (n·d, M_k·d)."""
        return self._slow_gram(kernel, x, t_rel, slow_z, slow_t) if kind == SLOW else kernel.gram_matrix(x, z)

    def cross_covariance(self, z, slow_z, slow_t, x: jax.Array, t_rel: jax.Array) -> jax.Array:
        """Cov[v(x_n, t_n), u] of the whole field, not whitened: x (n, d) m, t − t₀ (n,) s → (n, d, F), every
        block's kernel evaluated once (a constituent's cos and sin columns share K_c(x, Z))."""
        n, d = x.shape
        grams, columns = {}, []
        for (k, kind), weight in zip(self.layout, self.weights(None, t_rel)):
            if k not in grams:
                cross = self._block_cross(self.spatial_kernels[k], kind, z, slow_z, slow_t, x, t_rel)
                grams[k] = cross.reshape(n, d, -1)
            columns.append(weight[:, None, None] * grams[k])
        return jnp.concatenate(columns, axis=-1)

    def prior_cross(self, part_x, x, t_x, part_y, y, t_y) -> jax.Array:
        """Prior Cov[part_x(x, t_x), part_y(y, t_y)] for single points x, y (d,) m and t − t₀ scalars: (d, d)."""
        common = _common_piece(part_x if part_x in HELMHOLTZ_PIECES else None,
                               part_y if part_y in HELMHOLTZ_PIECES else None)
        total = jnp.zeros((x.shape[-1], y.shape[-1]), dtype=x.dtype)
        if common is False:
            return total
        weights_x, weights_y = self.weights(part_x, t_x[None]), self.weights(part_y, t_y[None])
        for (k, kind), wx, wy in zip(self.layout, weights_x, weights_y):
            if wx is None or wy is None:
                continue
            block = _piece_kernel(self.spatial_kernels[k], common).block(x, y)
            if kind == SLOW:
                block = block * matern32_time(t_x - t_y, self.slow_time_scale_s)
            total = total + wx[0] * wy[0] * block
        return total

    def prior_trace(self, x: jax.Array, t_rel: jax.Array) -> jax.Array:
        """tr K((x_n, t_n), (x_n, t_n)) of the whole field, x (n, d), t − t₀ (n,) → (n,) m²/s²."""
        traces = [jnp.trace(kernel.diag_blocks(x), axis1=1, axis2=2) for kernel in self.spatial_kernels]
        return sum(w**2 * traces[k] for (k, _), w in zip(self.layout, self.weights(None, t_rel)))

    def describe(self) -> dict:
        """The model-file description of the structure (JSON-ready)."""
        return {"constituents": list(self.constituents), "omegas_rad_s": list(self.omegas_rad_s),
                "periods_s": [2.0 * math.pi / w for w in self.omegas_rad_s], "time_origin_s": self.time_origin_s,
                "phase_reference": "cos/sin(omega * t), t in s on the track file's time axis (ISO: since "
                                   "1970-01-01T00:00Z); computed as omega * (t - time_origin_s) + phase",
                "slow": self.has_slow, "learn_slow_time_scale": self.learn_slow_time_scale,
                "slow_time_kernel": "matern32" if self.has_slow else None}


def part_names(kernel) -> tuple[str, ...]:
    """The part names a field with ``kernel`` accepts besides None (see the module docstring)."""
    pieces = HELMHOLTZ_PIECES if isinstance(getattr(kernel, "steady", kernel), Helmholtz) else ()
    if not isinstance(kernel, TemporalKernel):
        return pieces
    names = [STEADY] + [f"{c}{suffix}" for c in kernel.constituents for suffix in ("", "_cos", "_sin")]
    return pieces + tuple(names) + ((SLOW,) if kernel.has_slow else ())


def part_needs_time(part: str | None) -> bool:
    """Whether a part of a time-varying field depends on t (the amplitude fields and v̄ do not)."""
    return not (part == STEADY or (part is not None and part.endswith(("_cos", "_sin"))))


@dataclasses.dataclass(frozen=True)
class TemporalStart:
    """What a time-varying kernel is built from: the structure (constituents, ω_c rad/s, t₀ s, slow part and whether
    its time scale is learned), the starting scales (m/s, m, s) and the slow part's space–time inducing points
    (Z_s (M_s, d) m, T_s (M_s,) s since t₀)."""

    constituents: tuple[str, ...] = ()
    omegas_rad_s: tuple[float, ...] = ()
    time_origin_s: float = 0.0
    slow: bool = False
    learn_slow_time_scale: bool = True
    harmonic_velocity_scale_m_s: float = 1.0
    slow_velocity_scale_m_s: float = 1.0
    slow_time_scale_s: float = 86400.0
    slow_inducing_m: np.ndarray | None = None
    slow_inducing_time_s: np.ndarray | None = None

    def __post_init__(self) -> None:
        if len(self.constituents) != len(self.omegas_rad_s):
            raise InputError("each constituent needs one angular frequency")
        if not (self.constituents or self.slow):
            raise InputError("a time-varying kernel needs at least one constituent or the slow part")
        if self.slow and (self.slow_inducing_m is None or self.slow_inducing_time_s is None):
            raise InputError("the slow part needs space-time inducing points")
        if not (math.isfinite(self.time_origin_s) and self.slow_time_scale_s > 0):
            raise InputError(f"time origin and slow time scale must be finite (and T > 0), got "
                             f"{self.time_origin_s!r}, {self.slow_time_scale_s!r}")

    @classmethod
    def from_description(cls, description: dict, slow_inducing_m=None, slow_inducing_time_s=None) -> TemporalStart:
        """Rebuild the structure from :meth:`TemporalKernel.describe` (scales are placeholders to be overwritten)."""
        return cls(tuple(description["constituents"]), tuple(float(w) for w in description["omegas_rad_s"]),
                   float(description["time_origin_s"]), bool(description["slow"]),
                   bool(description["learn_slow_time_scale"]), slow_inducing_m=slow_inducing_m,
                   slow_inducing_time_s=slow_inducing_time_s)

    def kernel(self, steady: MatrixKernel, *, dim: int, base: str, length_scale_m: float) -> TemporalKernel:
        """The TemporalKernel around ``steady``: each further part of the same family and ``base``, length ℓ (m)."""
        common = {"length_scale_m": length_scale_m, "base": base}
        harmonics = tuple(make_kernel(steady.family, dim, velocity_scale_m_s=self.harmonic_velocity_scale_m_s,
                                      **common) for _ in self.constituents)
        slow = (make_kernel(steady.family, dim, velocity_scale_m_s=self.slow_velocity_scale_m_s, **common)
                if self.slow else None)
        log_t = jnp.log(jnp.asarray(self.slow_time_scale_s, dtype=jnp.float64)) if self.slow else None
        return TemporalKernel(steady, harmonics, slow, log_t, tuple(self.constituents),
                              tuple(float(w) for w in self.omegas_rad_s), float(self.time_origin_s),
                              bool(self.learn_slow_time_scale))
