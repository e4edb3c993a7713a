"""Scalar stationary bases and matrix-valued kernels for vector fields.

A vector field v: R^d → R^d (d = 2 or 3) gets a Gaussian-process prior through a
matrix-valued kernel K(x, y) = Cov[v(x), v(y)] of shape (d, d).  Every kernel here
is stationary and isotropic in the sense K(x, y) = A(|r|²) I + B(|r|²) r rᵀ with r = x − y, and writes
only :meth:`terms`, which maps squared separations |r|² (...) and the dimension d to the two profiles (A, B) with plain
broadcasting; :class:`MatrixKernel` builds the blocks (..., d, d), one pair's block, the Gram matrices and
the weighted sum Σ_j K(x, z_j) w_j (:meth:`MatrixKernel.weighted_sum`) from them.  (Broadcasting,
not a nested ``vmap`` of a one-pair function: XLA then fuses the whole Gram matrix into
one elementwise loop; DEVELOPERS.md keeps the measured speed-up.)

Scalar bases, with velocity scale σ (m/s), length scale ℓ (m) and s = |r|²/ℓ²:

* squared exponential   k(r) = σ² exp(−s/2)
* Matérn-5/2            k(r) = σ² (1 + √(5s) + 5s/3) exp(−√(5s))

Their Hessians in r are written in closed form,
H_k(r) = (σ²/ℓ²) [a(s) I + b(s) r rᵀ/ℓ²], with (a, b) = (−e^{−s/2}, e^{−s/2}) for the
squared exponential and (−(5/3)(1 + √(5s)) e^{−√(5s)}, (25/3) e^{−√(5s)}) for Matérn-5/2.
The Matérn profiles are functions of s with hand-written derivatives
(``jax.custom_jvp``) so that autodiff never differentiates √ at s = 0 (double
``where``); derivatives of every order stay finite and take their limits at r = 0.

Matrix kernels (Narcowich & Ward 1994, "Generalized Hermite interpolation via
matrix-valued conditionally positive definite functions"; Fuselier 2008, "Sobolev-type
approximation rates for divergence-free and curl-free RBF interpolants"):

* curl-free       K_cf(r) = −c H_k(r)                      (v = ∇φ)
* divergence-free K_df(r) = c′ (H_k(r) − tr H_k(r) I)      (2-D: v = (∂ψ/∂y, −∂ψ/∂x))
* Helmholtz       K_df(θ₁) + K_cf(θ₂), two independent parts with their own σ, ℓ
* independent     k(r) I, the unconstrained baseline

Parametrisation: −H_k(0) = λσ²/ℓ² I with λ = 1 (squared exponential) or 5/3
(Matérn-5/2), so the constants c = ℓ²/λ and c′ = ℓ²/(λ(d − 1)) make the prior
velocity variance of *each component* exactly σ² at every point, for every family:
``velocity_scale_m_s`` is the velocity standard deviation.  Equivalently the
potential φ (curl-free) has scalar kernel k with variance σ²ℓ²/λ, and the stream
function (2-D) has variance σ²ℓ²/λ, (3-D: each vector-potential component
σ²ℓ²/(2λ)).  For the squared exponential this gives the design-sheet forms
K_cf = σ² e^{−s/2}(I − rrᵀ/ℓ²) and K_df = σ²/(d−1) e^{−s/2}(rrᵀ/ℓ² + (d − 1 − s) I).

Hyperparameters are stored unconstrained as natural logs (``log_velocity_scale_m_s``,
``log_length_scale_m``); properties give the physical values.  Every kernel is a
frozen dataclass registered as a pytree, so it passes through ``jit``/``grad``.

Each class carries its name as a static field (``name`` for bases, ``family`` for
matrix kernels).  This is load-bearing: in jax 0.10.2 two ``register_dataclass``
treedefs with the same layout compare equal even when their classes differ (e.g.
``DivergenceFree`` and ``CurlFree``), and jit caches then occasionally hand one
kernel the other's compiled code.  A differing static field makes the treedefs
unequal.
"""

from __future__ import annotations

import dataclasses
from typing import Callable, ClassVar, Union

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError
from .background import BACKGROUND_HELP, BACKGROUNDS, Background, family_terms, features

_STATIC = {"static": True}


def _tag(value: str):
    """A static string field naming the class (see the module docstring for why)."""
    return dataclasses.field(default=value, metadata=_STATIC, repr=False)


def _check_tag(obj, attribute: str) -> None:
    expected = type(obj).__dataclass_fields__[attribute].default
    if getattr(obj, attribute) != expected:
        raise ValueError(f"{type(obj).__name__}.{attribute} is fixed to {expected!r}")


__all__ = [
    "BACKGROUNDS",
    "BACKGROUND_HELP",
    "BASES",
    "KERNEL_FAMILIES",
    "KernelFamily",
    "DEFAULT_FAMILY",
    "CurlFree",
    "DivergenceFree",
    "Helmholtz",
    "Independent",
    "Matern52",
    "MatrixKernel",
    "SquaredExponential",
    "jitter_m2_s2",
    "make_base",
    "make_kernel",
]


# --------------------------------------------------------------------------------------
# Matérn-5/2 radial profiles as functions of s = |r|²/ℓ², safe at s = 0.
# --------------------------------------------------------------------------------------
@jax.custom_jvp
def _exp_root5(s: jax.Array) -> jax.Array:
    """g₂(s) = exp(−√(5s)); dg₂/ds = −√5/(2√s) g₂, set to its r-space limit 0 at s = 0."""
    return jnp.exp(-jnp.sqrt(5.0 * s))


@_exp_root5.defjvp
def _exp_root5_jvp(primals, tangents):
    (s,), (ds,) = primals, tangents
    positive = s > 0.0
    safe_s = jnp.where(positive, s, 1.0)  # double where: no 1/√0 in either branch
    slope = jnp.where(positive, -jnp.sqrt(5.0) / (2.0 * jnp.sqrt(safe_s)), 0.0)
    g = _exp_root5(s)
    return g, slope * g * ds


@jax.custom_jvp
def _one_plus_root5_exp(s: jax.Array) -> jax.Array:
    """g₁(s) = (1 + √(5s)) exp(−√(5s)); dg₁/ds = −(5/2) g₂(s), finite at s = 0."""
    root = jnp.sqrt(5.0 * s)
    return (1.0 + root) * jnp.exp(-root)


@_one_plus_root5_exp.defjvp
def _one_plus_root5_exp_jvp(primals, tangents):
    (s,), (ds,) = primals, tangents
    return _one_plus_root5_exp(s), -2.5 * _exp_root5(s) * ds


# --------------------------------------------------------------------------------------
# Scalar bases
# --------------------------------------------------------------------------------------
class _ScalarBase:
    """Shared properties of the scalar bases (σ from ``log_velocity_scale_m_s``, ℓ from ``log_length_scale_m``)."""

    log_velocity_scale_m_s: jax.Array
    log_length_scale_m: jax.Array
    name: str
    curvature: ClassVar[float]  # λ in −H_k(0) = λ σ²/ℓ² I

    def __post_init__(self):
        _check_tag(self, "name")

    @classmethod
    def create(cls, *, velocity_scale_m_s: float, length_scale_m: float):
        """Build from physical values: σ in m/s, ℓ in m (both > 0)."""
        return cls(
            log_velocity_scale_m_s=jnp.log(jnp.asarray(velocity_scale_m_s, dtype=jnp.float64)),
            log_length_scale_m=jnp.log(jnp.asarray(length_scale_m, dtype=jnp.float64)),
        )

    @property
    def velocity_scale_m_s(self) -> jax.Array:
        """σ (m/s)."""
        return jnp.exp(self.log_velocity_scale_m_s)

    @property
    def length_scale_m(self) -> jax.Array:
        """ℓ (m)."""
        return jnp.exp(self.log_length_scale_m)

    @property
    def variance_m2_s2(self) -> jax.Array:
        """σ² (m²/s²), the value k(0)."""
        return jnp.exp(2.0 * self.log_velocity_scale_m_s)

    def _scaled_sq_distance(self, r: jax.Array) -> jax.Array:
        """s = |r|²/ℓ² over the last axis of r (..., d) → (...)."""
        return _squared_norm(r) / self.length_scale_m**2

    def hessian_terms(self, r: jax.Array) -> tuple[jax.Array, jax.Array]:
        """(α, β), each (...), with H_k(r) = α I + β r rᵀ for r (..., d) m: α = σ² a(s)/ℓ², β = σ² b(s)/ℓ⁴."""
        a, b = self._hessian_profiles(self._scaled_sq_distance(r))
        scale = self.variance_m2_s2 / self.length_scale_m**2
        return scale * a, scale * b / self.length_scale_m**2

    def value(self, r: jax.Array) -> jax.Array:
        """k(r) for separations r (..., d) in m → (...) in m²/s²."""
        return self.value_from_sq(_squared_norm(r))

    def value_from_sq(self, sq: jax.Array) -> jax.Array:
        """k as a function of |r|² (m²) → (...) m²/s²."""
        return self.variance_m2_s2 * self._value_profile(sq / self.length_scale_m**2)

    def hessian(self, r: jax.Array) -> jax.Array:
        """H_k(r) = (σ²/ℓ²) [a(s) I + b(s) r rᵀ/ℓ²] for r (..., d) m → (..., d, d), units m²/s² per m²."""
        alpha, beta = self.hessian_terms(r)
        return _identity_plus_outer(alpha, beta, r)


def _squared_norm(r: jax.Array) -> jax.Array:
    """|r|² over the last (short) axis, unrolled so that XLA fuses it with what follows."""
    return _dot(r, r)


def _dot(r: jax.Array, w: jax.Array) -> jax.Array:
    """r · w over the last (short) axis, unrolled."""
    return sum(r[..., i] * w[..., i] for i in range(r.shape[-1]))


def _identity_plus_outer(alpha: jax.Array, beta: jax.Array, r: jax.Array) -> jax.Array:
    """α I + β r rᵀ: α, β (...), r (..., d) → (..., d, d)."""
    eye = jnp.eye(r.shape[-1], dtype=r.dtype)
    return alpha[..., None, None] * eye + beta[..., None, None] * (r[..., :, None] * r[..., None, :])


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class SquaredExponential(_ScalarBase):
    """k(r) = σ² exp(−|r|²/(2ℓ²)); σ = ``velocity_scale_m_s``, ℓ = ``length_scale_m``.

    Hessian profiles a(s) = −e^{−s/2}, b(s) = e^{−s/2} (smooth; no square root anywhere).
    """

    log_velocity_scale_m_s: jax.Array
    log_length_scale_m: jax.Array
    name: str = _tag("squared-exponential")
    curvature: ClassVar[float] = 1.0

    @staticmethod
    def _value_profile(s):
        return jnp.exp(-0.5 * s)

    @staticmethod
    def _hessian_profiles(s):
        e = jnp.exp(-0.5 * s)
        return -e, e


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class Matern52(_ScalarBase):
    """k(r) = σ² (1 + √5 ρ + 5ρ²/3) exp(−√5 ρ), ρ = |r|/ℓ (Matérn 1960; Stein 1999, Interpolation of Spatial Data).

    Hessian profiles a(s) = −(5/3)(1 + √(5s)) e^{−√(5s)}, b(s) = (25/3) e^{−√(5s)}, s = ρ².
    """

    log_velocity_scale_m_s: jax.Array
    log_length_scale_m: jax.Array
    name: str = _tag("matern52")
    curvature: ClassVar[float] = 5.0 / 3.0

    @staticmethod
    def _value_profile(s):
        return _one_plus_root5_exp(s) + (5.0 / 3.0) * s * _exp_root5(s)

    @staticmethod
    def _hessian_profiles(s):
        return -(5.0 / 3.0) * _one_plus_root5_exp(s), (25.0 / 3.0) * _exp_root5(s)


Base = Union[SquaredExponential, Matern52]
BASES: dict[str, type] = {"squared-exponential": SquaredExponential, "matern52": Matern52}


# --------------------------------------------------------------------------------------
# Matrix-valued kernels
# --------------------------------------------------------------------------------------
class MatrixKernel:
    """Blocks, one pair's block, Gram matrices and weighted sums, built from a kernel's
    ``terms(sq, dim) -> (A, B)``: K(r) = A(|r|²) I + B(|r|²) r rᵀ.

    Ordering of the flattened Gram matrix: point-major, component-minor, i.e. row
    ``i·d + a`` is component a of point i (``gram(X, Y).transpose(0, 2, 1, 3)``
    reshaped to (n·d, m·d)).
    """

    terms: Callable[[jax.Array, int], tuple[jax.Array, jax.Array]]
    family: str

    def __post_init__(self):
        _check_tag(self, "family")

    def backgrounds(self) -> tuple[Background, ...]:
        """The background terms of the prior (:mod:`driftwise.gp.background`): () when there are none."""
        background = getattr(self, "background", None)
        return () if background is None else (background,)

    def _plus_background(self, k: jax.Array, x: jax.Array, y: jax.Array) -> jax.Array:
        """k + K_b(x, y): the background depends on x and y, not only on r = x − y (broadcasting)."""
        for background in self.backgrounds():
            k = k + background.blocks(x, y)
        return k

    def blocks(self, r: jax.Array) -> jax.Array:
        """K(r) = A I + B r rᵀ for separations r (..., d) in m → (..., d, d) in m²/s² (no background)."""
        return _identity_plus_outer(*self.terms(_squared_norm(r), r.shape[-1]), r)

    def weighted_sum(self, x: jax.Array, z: jax.Array, w: jax.Array) -> jax.Array:
        """Σ_j K(x, z_j) w_j for one point x (d,) m, points z (M, d) m, weights w (M, d) → (d,).

        = Σ_j [A_j w_j + B_j (r_j · w_j) r_j] with r_j = x − z_j, plus the backgrounds' F(x) diag(s²) F(Z)ᵀ w:
        the same value as K(x, Z) w from :meth:`gram_matrix`, without forming the (d, M·d) row (the posterior
        mean at the cubature points of the transition fit: its step 130 → 70 ms, DEVELOPERS.md "Benchmark
        record").  The sum over j is elementwise products and one reduction, not ``a @ w`` and ``c @ z``: under
        ``vmap`` those are matrix products with d columns, and their reverse mode is products with an inner
        dimension of d, which XLA's CPU backend runs as separate thin GEMMs instead of fusing them with the
        elementwise work around them (the transition step 32.7 → 30.3 ms, DEVELOPERS.md "Benchmark record").  The
        pairs are held as d component arrays of length M (r_i = x_i − z_{·i}), not as (M, d) arrays: under ``vmap``
        an (…, M, d) array has a minor axis of d = 2 or 3, whose slices are strided and whose reverse mode pads each
        component back into a full (…, M, d) array; per component every elementwise step and the sum over M run along
        contiguous memory (the transition step 30.6 → 24.9 ms, DEVELOPERS.md "Benchmark record")."""
        d = x.shape[-1]
        r = [x[i] - z[:, i] for i in range(d)]
        wc = [w[:, i] for i in range(d)]
        a, b = self.terms(sum(ri * ri for ri in r), d)
        c = b * sum(ri * wi for ri, wi in zip(r, wc))
        out = jnp.stack([jnp.sum(a * wi + c * ri) for ri, wi in zip(r, wc)])
        for background in self.backgrounds():
            fx, variances = features(background, x)
            fz, _ = features(background, z)
            out = out + fx @ (variances * jnp.einsum("mdp,md->p", fz, w))
        return out

    def block(self, x: jax.Array, y: jax.Array) -> jax.Array:
        """Cov[v(x), v(y)] for x, y (d,) in m → (d, d) in m²/s²."""
        return self._plus_background(self.blocks(x - y), x, y)

    def gram(self, x: jax.Array, y: jax.Array) -> jax.Array:
        """K(X, Y) blocks: X (n, d), Y (m, d) in m → (n, m, d, d) in m²/s²."""
        return self._plus_background(self.blocks(x[:, None, :] - y[None, :, :]), x[:, None, :], y[None, :, :])

    def gram_matrix(self, x: jax.Array, y: jax.Array) -> jax.Array:
        """K(X, Y) flattened point-major, component-minor: (n·d, m·d) in m²/s².

        The background terms enter in their low-rank form F(X) diag(s²) F(Y)ᵀ (:func:`features`, rank ≤ 12),
        not as broadcast blocks: the same matrix, whose gradient in the scales is then a small product instead
        of reductions over the whole (n, m, d, d) array (the fit's step 0.235 → 0.189 s on 4,950 observations,
        M = 154; DEVELOPERS.md, "Benchmark record")."""
        blocks = self.blocks(x[:, None, :] - y[None, :, :])
        n, m, d, _ = blocks.shape
        k = blocks.transpose(0, 2, 1, 3).reshape(n * d, m * d)
        for background in self.backgrounds():
            fx, variances = features(background, x)
            fy, _ = features(background, y)
            k = k + (fx.reshape(n * d, -1) * variances) @ fy.reshape(m * d, -1).T
        return k

    def diag_blocks(self, x: jax.Array) -> jax.Array:
        """K(x_i, x_i) for each point: X (n, d) → (n, d, d), O(n d²) work."""
        return self._plus_background(self.blocks(jnp.zeros_like(x)), x, x)


def jitter_m2_s2(kernel: MatrixKernel, point: jax.Array, jitter_multiple: float) -> jax.Array:
    """δ = multiple × eps × per-component prior variance tr K(z, z)/d (m²/s²), added to K_ZZ before factoring."""
    variance = jnp.trace(kernel.block(point, point)) / point.shape[-1]
    return jitter_multiple * jnp.finfo(point.dtype).eps * variance


def _base_hyperparameters(base: Base, prefix: str = "", background: Background | None = None) -> dict[str, float]:
    return {
        f"{prefix}velocity_scale_m_s": float(base.velocity_scale_m_s),
        f"{prefix}length_scale_m": float(base.length_scale_m),
        **({} if background is None else background.hyperparameters(prefix)),
    }


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class CurlFree(MatrixKernel):
    """K_cf(r) = −(ℓ²/λ) H_k(r): fields v = ∇φ, zero vorticity; K_cf(0) = σ² I."""

    base: Base
    family: str = _tag("curl-free")
    background: Background | None = None

    def terms(self, sq: jax.Array, dim: int) -> tuple[jax.Array, jax.Array]:
        """(A, B) of K_cf = −c H_k from |r|² (m²): A = −(σ²/λ) a(s), B = −(σ²/(λℓ²)) b(s)."""
        base = self.base
        a, b = base._hessian_profiles(sq / base.length_scale_m**2)
        scale = base.variance_m2_s2 / base.curvature
        return -scale * a, -(scale / base.length_scale_m**2) * b

    def hyperparameters(self) -> dict[str, float]:
        """Physical hyperparameters, units in the key names."""
        return _base_hyperparameters(self.base, background=self.background)


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class DivergenceFree(MatrixKernel):
    """K_df(r) = ℓ²/(λ(d−1)) (H_k(r) − tr H_k(r) I): zero divergence; K_df(0) = σ² I."""

    base: Base
    family: str = _tag("divergence-free")
    background: Background | None = None

    def terms(self, sq: jax.Array, dim: int) -> tuple[jax.Array, jax.Array]:
        """(A, B) of K_df = c′ (H_k − tr H_k I) from |r|² (m²), tr H_k = d α + β |r|² in closed form:
        A = −(σ²/λ) (a(s) + s b(s)/(d − 1)), B = σ² b(s)/(λ ℓ² (d − 1))."""
        base = self.base
        s = sq / base.length_scale_m**2
        a, b = base._hessian_profiles(s)
        scale = base.variance_m2_s2 / base.curvature
        return -scale * (a + s * b / (dim - 1)), (scale / (base.length_scale_m**2 * (dim - 1))) * b

    def hyperparameters(self) -> dict[str, float]:
        """Physical hyperparameters, units in the key names."""
        return _base_hyperparameters(self.base, background=self.background)


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class Independent(MatrixKernel):
    """K(r) = k(r) I: each component an independent scalar GP with the same k; K(0) = σ² I."""

    base: Base
    family: str = _tag("independent")
    background: Background | None = None

    def terms(self, sq: jax.Array, dim: int) -> tuple[jax.Array, jax.Array]:
        """(A, B) = (k, 0) of K = k I from |r|² (m²)."""
        value = self.base.value_from_sq(sq)
        return value, jnp.zeros_like(value)

    def hyperparameters(self) -> dict[str, float]:
        """Physical hyperparameters, units in the key names."""
        return _base_hyperparameters(self.base, background=self.background)


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class Helmholtz(MatrixKernel):
    """K = K_df(σ₁, ℓ₁) + K_cf(σ₂, ℓ₂): v = v_df + v_cf, two independent prior parts.

    K(0) = (σ₁² + σ₂²) I.  ``parts`` names the components for part posteriors.
    """

    divergence_free: DivergenceFree
    curl_free: CurlFree
    family: str = _tag("helmholtz")

    def terms(self, sq: jax.Array, dim: int) -> tuple[jax.Array, jax.Array]:
        """(A, B) of K_df + K_cf from |r|² (m²): the sums of the parts' profiles."""
        (a1, b1), (a2, b2) = self.divergence_free.terms(sq, dim), self.curl_free.terms(sq, dim)
        return a1 + a2, b1 + b2

    def backgrounds(self) -> tuple[Background, ...]:
        """Both parts' background terms."""
        return self.divergence_free.backgrounds() + self.curl_free.backgrounds()

    @property
    def parts(self) -> dict[str, MatrixKernel]:
        """{"divergence_free": K_df, "curl_free": K_cf}."""
        return {"divergence_free": self.divergence_free, "curl_free": self.curl_free}

    def hyperparameters(self) -> dict[str, float]:
        """Physical hyperparameters of both parts, units in the key names."""
        return {
            **_base_hyperparameters(self.divergence_free.base, "divergence_free_", self.divergence_free.background),
            **_base_hyperparameters(self.curl_free.base, "curl_free_", self.curl_free.background),
        }


@dataclasses.dataclass(frozen=True)
class KernelFamily:
    """One matrix-kernel family: its name, class, what it can represent, and a one-line description."""

    name: str
    kind: type
    can_diverge: bool
    can_rotate: bool
    help: str


KERNEL_FAMILIES: dict[str, KernelFamily] = {spec.name: spec for spec in (
    KernelFamily("helmholtz", Helmholtz, True, True,
                 "divergence-free + curl-free parts with their own scales (Helmholtz decomposition)"),
    KernelFamily("divergence-free", DivergenceFree, False, True, "v = curl of a stream function: no divergence"),
    KernelFamily("curl-free", CurlFree, True, False, "v = gradient of a potential: no vorticity"),
    KernelFamily("independent", Independent, True, True, "independent components k(r) I: the unconstrained baseline"),
)}
DEFAULT_FAMILY = "helmholtz"


def _check_positive(name: str, value) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a positive number in SI units, got {value!r}") from None
    if not np.isfinite(number) or number <= 0.0:
        raise InputError(f"{name} must be a positive finite number in SI units, got {value!r}")
    return number


def make_base(base: str, *, velocity_scale_m_s: float, length_scale_m: float) -> Base:
    """A scalar base by name ("squared-exponential" or "matern52") from σ (m/s) and ℓ (m)."""
    if base not in BASES:
        raise InputError(f"unknown base kernel {base!r}; choose one of {', '.join(sorted(BASES))}")
    return BASES[base].create(
        velocity_scale_m_s=_check_positive("velocity_scale_m_s", velocity_scale_m_s),
        length_scale_m=_check_positive("length_scale_m", length_scale_m),
    )


def make_kernel(
    family: str,
    dim: int,
    *,
    velocity_scale_m_s: float,
    length_scale_m: float,
    base: str = "squared-exponential",
    curl_free_velocity_scale_m_s: float | None = None,
    curl_free_length_scale_m: float | None = None,
    background: str = "none",
    centre_m=None,
    background_scales: dict[str, float] | None = None,
) -> MatrixKernel:
    """A matrix kernel of ``family`` (a key of :data:`KERNEL_FAMILIES`) for d = ``dim`` ∈ {2, 3}.

    σ = ``velocity_scale_m_s`` (m/s) is the prior standard deviation of each velocity
    component, ℓ = ``length_scale_m`` (m).  For "helmholtz" these are the
    divergence-free part's; the curl-free part takes ``curl_free_velocity_scale_m_s``
    and ``curl_free_length_scale_m`` (default: the same values).  ``background`` ∈
    {"none", "uniform", "linear"} adds the background flow of :mod:`driftwise.gp.background`
    about ``centre_m`` (d,) m, with the terms the family can represent, each term's prior
    scale from ``background_scales`` ({term: m/s or 1/s}; default 1).
    """
    if family not in KERNEL_FAMILIES:
        raise InputError(f"unknown kernel family {family!r}; choose one of {', '.join(KERNEL_FAMILIES)}")
    if dim not in (2, 3):
        raise InputError(f"vector-field kernels need 2 or 3 dimensions, got {dim!r}")
    main = make_base(base, velocity_scale_m_s=velocity_scale_m_s, length_scale_m=length_scale_m)
    if family != "helmholtz":
        return KERNEL_FAMILIES[family].kind(base=main, background=_background(
            family, background, dim, centre_m, background_scales))
    second = make_base(
        base,
        velocity_scale_m_s=velocity_scale_m_s if curl_free_velocity_scale_m_s is None else curl_free_velocity_scale_m_s,
        length_scale_m=length_scale_m if curl_free_length_scale_m is None else curl_free_length_scale_m,
    )
    parts = {part: _background(f"helmholtz:{part}", background, dim, centre_m, background_scales)
             for part in ("divergence_free", "curl_free")}
    return Helmholtz(divergence_free=DivergenceFree(base=main, background=parts["divergence_free"]),
                     curl_free=CurlFree(base=second, background=parts["curl_free"]))


def _background(family: str, background: str, dim: int, centre_m, scales: dict | None) -> Background | None:
    """The background terms ``family`` gets, or None (no terms)."""
    if background not in BACKGROUNDS:
        raise InputError(f"unknown background {background!r}; choose one of {', '.join(BACKGROUNDS)}")
    terms = family_terms(family, background)
    if not terms:
        return None
    centre = np.zeros(dim) if centre_m is None else np.asarray(centre_m, dtype=np.float64).reshape(-1)
    if centre.shape != (dim,) or not np.all(np.isfinite(centre)):
        raise InputError(f"the background centre must be {dim} finite coordinates in metres, got {centre_m!r}")
    scales = scales or {}
    values = [_check_positive(f"background {term} scale", scales.get(term, 1.0)) for term in terms]
    return Background.create(terms, centre, values)
