"""Gaussian moment propagation for an Itô SDE dx = μ(x) dt + L(x) dβ, D = L Lᵀ.

Assumed-density (Gaussian) moment equations (Jazwinski 1970, "Stochastic
Processes and Filtering Theory"; Maybeck 1982, "Stochastic Models,
Estimation and Control", vol. 2):

    dm/dt = E[μ(x)]
    dP/dt = E[μ(x)(x − m)ᵀ] + E[(x − m)μ(x)ᵀ] + E[D(x)],     x ~ N(m, P).

The expectations are taken by a strategy object:

    Linearize()          μ(m), J P with J = ∂μ/∂x(m) (jax.jacfwd), D(m)
    Unscented(...)       Julier & Uhlmann 1997, 2d + 1 points
    SphericalCubature()  Arasaratnam & Haykin 2009, 2d points (the default)
    GaussHermite(order)  product Gauss–Hermite rule, order^d points

Cubature rules evaluate x = m + √P ξ at points ξ given in standard-normal
coordinates by `points_and_weights(d)`; √P is the pivot-clamped Cholesky
factor of `psd_cholesky`.  Keeping P symmetric positive semi-definite: dP/dt
is assembled as C + Cᵀ + sym(E[D]), which is exactly symmetric in floating
point, so P stays exactly symmetric under any Runge–Kutta update; the square
root clamps negative round-off pivots to zero, so a point release (P0 = 0) and
rank-deficient P are handled without jitter.

The ODE is integrated by `RK4(step_s)` (fixed step, classical order 4) or
`Dopri5(rtol, atol)` (Dormand & Prince 1980 embedded 5(4) pair, adaptive),
both landing exactly on the requested output times.  `propagate` handles one
release; `propagate_batch` maps it over thousands of releases in one compiled
call.  Output times are seconds since the release (starting at 0).  A steady SDE
ignores the release's start time (it only labels the outputs); for a time-dependent
SDE (``SDE.with_time``) the absolute time t = start + age rides along in the ODE state
as the age a with da/dt = 1, so every Runge–Kutta stage sees its own time (t, t + h/2,
t + h for RK4): the moment equations above with μ(x, t) and D(x, t) are then
integrated exactly as a non-autonomous ODE.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from functools import partial
from typing import Any, Callable

import jax
import jax.numpy as jnp
import numpy as np
from jax.sharding import PartitionSpec

from .. import devices
from ..devices import AXIS
from ..errors import InputError
from .sde import SDE, join_from_jit, split_for_jit

__all__ = [
    "Linearize",
    "Unscented",
    "SphericalCubature",
    "GaussHermite",
    "RK4",
    "Dopri5",
    "psd_cholesky",
    "diverged",
    "moment_rates",
    "propagate",
    "propagate_batch",
    "propagate_one",
    "substep_counts",
    "rk4_step",
]

_PIVOT_RTOL = 1e-13  # pivots below this fraction of max diag(P) count as zero


def diverged(means: Any, covs: Any) -> bool:
    """True when a propagated mean or covariance is not finite, or a covariance (..., d, d) is not positive
    semi-definite to rounding (smallest eigenvalue below −1e-9 × the largest; d = 2 in closed form): an RK4 step
    too long for the flow leaves the moment equations' stability region with finite but impossible covariances."""
    means, covs = np.asarray(means), np.asarray(covs)
    if not (np.all(np.isfinite(means)) and np.all(np.isfinite(covs))):
        return True
    if covs.shape[-1] == 2:
        a, b, d = covs[..., 0, 0], 0.5 * (covs[..., 0, 1] + covs[..., 1, 0]), covs[..., 1, 1]
        return not (np.all(a >= 0) and np.all(d >= 0) and np.all(a * d - b * b >= -1e-9 * np.maximum(a * d, 0.0)))
    eig = np.linalg.eigvalsh(0.5 * (covs + np.swapaxes(covs, -1, -2)))
    return bool(np.any(eig[..., 0] < -1e-9 * np.maximum(eig[..., -1], 0.0)))


def psd_cholesky(cov: jax.Array) -> jax.Array:
    """Lower-triangular L with L Lᵀ = sym(cov) for a positive semi-definite cov (d, d).

    Column-by-column Cholesky, unrolled for the small d of positions (d ≤ ~6),
    with pivots below 1e-13 · max diag(cov) set to zero together with their
    column, so singular and zero covariances give a valid (rank-deficient)
    factor instead of NaN.  Elementwise jnp only: cheap under vmap.
    """
    d = cov.shape[-1]
    cov = 0.5 * (cov + cov.T)
    tol = _PIVOT_RTOL * jnp.max(jnp.abs(jnp.diagonal(cov)))
    chol = jnp.zeros_like(cov)
    for j in range(d):
        pivot_sq = cov[j, j] - jnp.sum(chol[j, :j] ** 2)
        ok = pivot_sq > tol
        pivot = jnp.sqrt(jnp.where(ok, pivot_sq, 1.0))
        column = (cov[j + 1 :, j] - chol[j + 1 :, :j] @ chol[j, :j]) / pivot
        chol = chol.at[j, j].set(jnp.where(ok, pivot, 0.0))
        chol = chol.at[j + 1 :, j].set(jnp.where(ok, column, 0.0))
    return chol


# ----------------------------------------------------------------- strategies


def _cubature_expectations(sde: SDE, mean, cov, age_s, t_s, points, weights):
    """(E[μ], E[μ(x)(x − m)ᵀ], E[D]) by the rule Σ_i w_i f(m + √P ξ_i); age_s: time since release (s),
    t_s: absolute time (s; used only by a time-dependent SDE)."""
    dx = jnp.asarray(points) @ psd_cholesky(cov).T  # (n, d)
    w = jnp.asarray(weights)
    drift, diffusion = jax.vmap(lambda x: sde.drift_and_rate(x, age_s, t_s))(mean + dx)  # (n, d), (n, d, d)
    return w @ drift, (drift * w[:, None]).T @ dx, jnp.tensordot(w, diffusion, axes=1)


@dataclass(frozen=True)
class Linearize:
    """First-order expansion of μ about the mean (extended-Kalman-type moments).

    E[μ] ≈ μ(m), E[μ(x)(x − m)ᵀ] ≈ J P with J = ∂μ/∂x at m (jax.jacfwd),
    E[D] ≈ D(m) (Maybeck 1982, vol. 2).  Exact for linear drift and
    constant diffusion; one drift Jacobian per evaluation.
    """

    def expectations(self, sde: SDE, mean: jax.Array, cov: jax.Array, age_s=0.0, t_s=0.0):
        jac = jax.jacfwd(lambda x: sde.drift_at(x, t_s))(mean)
        return sde.drift_at(mean, t_s), jac @ cov, sde.rate(mean, age_s, t_s)


@dataclass(frozen=True)
class Unscented:
    """Unscented transform (Julier & Uhlmann 1997), 2d + 1 sigma points.

    λ = α² (d + κ) − d; points 0 and ±√(d + λ) e_i; weights λ/(d + λ) and
    1/(2 (d + λ)).  Defaults α = 1, β = 0, κ = 3 − d (None): Julier & Uhlmann's
    choice, which also matches the Gaussian's fourth moment E[ξ_i⁴] = 3 along
    each axis; for d > 3 the centre weight is negative, yet every polynomial of
    degree ≤ 3 (hence the linear-SDE moments) stays exact.  β only changes the
    centre point's covariance weight; in the moment ODE the centre multiplies
    x − m = 0, so β has no effect here and is kept for the transform's
    completeness.  Requires d + λ > 0.
    """

    alpha: float = 1.0
    beta: float = 0.0
    kappa: float | None = None

    def points_and_weights(self, d: int) -> tuple[np.ndarray, np.ndarray]:
        """Points (2d + 1, d) and mean weights (2d + 1,) for N(0, I_d)."""
        kappa = 3.0 - d if self.kappa is None else self.kappa
        lam = self.alpha**2 * (d + kappa) - d
        if not d + lam > 0:
            raise InputError(
                f"Unscented(alpha={self.alpha}, kappa={kappa}) needs alpha²(d + kappa) > 0 for d = {d}."
            )
        axes = np.sqrt(d + lam) * np.eye(d)
        points = np.concatenate([np.zeros((1, d)), axes, -axes])
        weights = np.full(2 * d + 1, 0.5 / (d + lam))
        weights[0] = lam / (d + lam)
        return points, weights

    def expectations(self, sde: SDE, mean: jax.Array, cov: jax.Array, age_s=0.0, t_s=0.0):
        return _cubature_expectations(sde, mean, cov, age_s, t_s, *self.points_and_weights(mean.shape[-1]))


@dataclass(frozen=True)
class SphericalCubature:
    """Third-degree spherical-radial cubature (Arasaratnam & Haykin 2009).

    2d points ±√d e_i, equal weights 1/(2d): exact for every polynomial of
    degree ≤ 3 under N(0, I_d), positive weights in any dimension.
    """

    def points_and_weights(self, d: int) -> tuple[np.ndarray, np.ndarray]:
        """Points (2d, d) and weights (2d,) for N(0, I_d)."""
        axes = np.sqrt(d) * np.eye(d)
        return np.concatenate([axes, -axes]), np.full(2 * d, 0.5 / d)

    def expectations(self, sde: SDE, mean: jax.Array, cov: jax.Array, age_s=0.0, t_s=0.0):
        return _cubature_expectations(sde, mean, cov, age_s, t_s, *self.points_and_weights(mean.shape[-1]))


def hermite_nodes_weights(order: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss–Hermite nodes and weights for N(0, 1), by Golub & Welsch (1969).

    The probabilists' Hermite polynomials satisfy He_{k+1} = x He_k − k He_{k−1},
    so the Jacobi matrix has zero diagonal and off-diagonal √k; its eigenvalues
    are the nodes and the squared first components of its eigenvectors the
    weights (they sum to 1).  Exact for polynomials of degree ≤ 2·order − 1.
    """
    offdiag = np.sqrt(np.arange(1, order, dtype=float))
    nodes, vectors = np.linalg.eigh(np.diag(offdiag, 1) + np.diag(offdiag, -1))
    return nodes, vectors[0] ** 2


@dataclass(frozen=True)
class GaussHermite:
    """Product Gauss–Hermite rule with `order` nodes per axis (order^d points).

    Exact for every monomial whose degree in each coordinate is ≤ 2·order − 1
    (in particular all polynomials of total degree ≤ 2·order − 1).
    """

    order: int = 3

    def points_and_weights(self, d: int) -> tuple[np.ndarray, np.ndarray]:
        """Points (order^d, d) and weights (order^d,) for N(0, I_d)."""
        if not (isinstance(self.order, int) and self.order >= 1):
            raise InputError(f"GaussHermite order must be an integer >= 1, got {self.order!r}.")
        nodes, weights = hermite_nodes_weights(self.order)
        points = np.array(list(itertools.product(nodes, repeat=d)))
        return points, np.prod(np.array(list(itertools.product(weights, repeat=d))), axis=1)

    def expectations(self, sde: SDE, mean: jax.Array, cov: jax.Array, age_s=0.0, t_s=0.0):
        return _cubature_expectations(sde, mean, cov, age_s, t_s, *self.points_and_weights(mean.shape[-1]))


Method = Linearize | Unscented | SphericalCubature | GaussHermite


def moment_rates(method: Method, sde: SDE, mean: jax.Array, cov: jax.Array, age_s=0.0, t_s=0.0):
    """(dm/dt (d,), dP/dt (d, d)) of the Gaussian moment ODE at (m, P), ``age_s`` s after the release
    and at absolute time ``t_s`` (s; seen only by a time-dependent SDE).

    dm/dt = E[μ], dP/dt = C + Cᵀ + sym(E[D]) with C = E[μ(x)(x − m)ᵀ]; the
    result is exactly symmetric.  Units: m/s and m²/s.
    """
    # a steady SDE calls expectations(sde, m, P, age) exactly as before time existed (custom strategies keep working)
    e_drift, cross, e_diff = method.expectations(sde, mean, cov, age_s, *((t_s,) if sde.with_time else ()))
    return e_drift, (cross + cross.T) + 0.5 * (e_diff + e_diff.T)


# ---------------------------------------------------------------- integrators


def substep_counts(span_s: jax.Array, step_s: float) -> jax.Array:
    """Number of equal substeps ≤ step_s covering span_s (at least one)."""
    return jnp.maximum(1, jnp.ceil(span_s / step_s * (1.0 - 1e-12))).astype(jnp.int32)


def rk4_step(f: Callable, y: Any, h: jax.Array) -> Any:
    """One classical Runge–Kutta step of the autonomous ODE y' = f(y) (Kutta 1901); h = 0 returns y exactly.
    y is an array or a pytree of arrays (f returns the same structure)."""
    def ahead(fraction, slope):
        return jax.tree.map(lambda a, b: a + (fraction * h) * b, y, slope)

    k1 = f(y)
    k2 = f(ahead(0.5, k1))
    k3 = f(ahead(0.5, k2))
    k4 = f(ahead(1.0, k3))
    return jax.tree.map(lambda a, b1, b2, b3, b4: a + (h / 6.0) * (b1 + 2.0 * b2 + 2.0 * b3 + b4), y, k1, k2, k3, k4)


@partial(jax.tree_util.register_dataclass, data_fields=["step_s"], meta_fields=[])
@dataclass(frozen=True)
class RK4:
    """Classical fourth-order Runge–Kutta, fixed step ≤ step_s (s).

    Each output interval [t_k, t_k+1] is cut into ceil(Δt/step_s) equal
    substeps, so outputs land exactly on the requested times.  Global error
    O(step⁴).  step_s is traced data: changing it does not recompile.
    """

    step_s: float = 600.0

    def integrate(self, f: Callable, y0: jax.Array, times_s: jax.Array) -> jax.Array:
        """States (T, n) at times_s (T,) for y' = f(y), y(times_s[0]) = y0 (n,)."""

        def interval(y, span):
            n = substep_counts(span, self.step_s)
            y = jax.lax.fori_loop(0, n, lambda _, y: rk4_step(f, y, span / n), y)
            return y, y

        _, ys = jax.lax.scan(interval, y0, jnp.diff(times_s))
        return jnp.concatenate([y0[None], ys])


# Dormand & Prince (1980), "A family of embedded Runge-Kutta formulae", RK5(4)7M.
_DP_A = (
    (),
    (1 / 5,),
    (3 / 40, 9 / 40),
    (44 / 45, -56 / 15, 32 / 9),
    (19372 / 6561, -25360 / 2187, 64448 / 6561, -212 / 729),
    (9017 / 3168, -355 / 33, 46732 / 5247, 49 / 176, -5103 / 18656),
    (35 / 384, 0.0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84),
)
_DP_B5 = (35 / 384, 0.0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84, 0.0)
_DP_B4 = (5179 / 57600, 0.0, 7571 / 16695, 393 / 640, -92097 / 339200, 187 / 2100, 1 / 40)


def dopri5_step(f: Callable, y: jax.Array, h: jax.Array) -> tuple[jax.Array, jax.Array]:
    """One Dormand–Prince step: (5th-order solution, its 4th-order error estimate)."""
    ks = []
    for row in _DP_A:
        ks.append(f(y + h * sum((a * k for a, k in zip(row, ks)), jnp.zeros_like(y))))
    y5 = y + h * sum(b * k for b, k in zip(_DP_B5, ks))
    err = h * sum((b5 - b4) * k for b5, b4, k in zip(_DP_B5, _DP_B4, ks))
    return y5, err


@partial(
    jax.tree_util.register_dataclass,
    data_fields=["rtol", "atol", "first_step_s"],
    meta_fields=["max_steps"],
)
@dataclass(frozen=True)
class Dopri5:
    """Adaptive Dormand–Prince 5(4) with error control (Hairer, Nørsett & Wanner 1993,
    "Solving Ordinary Differential Equations I", step-size selection).

    A step is accepted when the RMS of err_i / (atol + rtol·max(|y_i|, |y_new,i|))
    is ≤ 1; the next step is h · clip(0.9 err^(−1/5), 0.2, 5).  `atol` is in the
    state's units (m for the mean, m² for the covariance).  Steps are shortened
    to land on every output time.  If an interval needs more than `max_steps`
    steps the outputs from there on are NaN (never a silently wrong value).
    rtol, atol and first_step_s are traced data (changing them does not
    recompile); max_steps is static.  Defaults: rtol = 1e-6 (a millionth of
    the spread is far below the Gaussian closure's own error) and atol = 1e-6
    (a micrometre / square micrometre: only matters for a point release's
    zero covariance at the start).
    """

    rtol: float = 1e-6
    atol: float = 1e-6
    max_steps: int = 10_000
    first_step_s: float = 60.0

    def integrate(self, f: Callable, y0: jax.Array, times_s: jax.Array) -> jax.Array:
        """States (T, n) at times_s (T,) for y' = f(y), y(times_s[0]) = y0 (n,)."""

        def interval(carry, span):
            y, h = carry
            y, h = self._advance(f, y, h, span)
            return (y, h), y

        h0 = jnp.asarray(self.first_step_s, dtype=y0.dtype)
        _, ys = jax.lax.scan(interval, (y0, h0), jnp.diff(times_s))
        return jnp.concatenate([y0[None], ys])

    def _advance(self, f: Callable, y: jax.Array, h: jax.Array, span: jax.Array):
        """Integrate over a time span (s) with adaptive steps; returns (y, next h)."""

        def cond(state):
            t, y, _, n = state
            return (t < span) & (n < self.max_steps) & jnp.all(jnp.isfinite(y))

        def body(state):
            t, y, h, n = state
            last = h >= span - t
            h_try = jnp.where(last, span - t, h)
            y_new, err = dopri5_step(f, y, h_try)
            scale = self.atol + self.rtol * jnp.maximum(jnp.abs(y), jnp.abs(y_new))
            err_norm = jnp.sqrt(jnp.mean((err / scale) ** 2))
            accept = err_norm <= 1.0
            factor = jnp.clip(0.9 * jnp.where(err_norm > 0, err_norm, 1e-10) ** -0.2, 0.2, 5.0)
            factor = jnp.where(jnp.isfinite(err_norm), factor, 0.2)
            t = jnp.where(accept, jnp.where(last, span, t + h_try), t)
            return t, jnp.where(accept, y_new, y), h_try * factor, n + 1

        t0 = jnp.zeros((), dtype=y.dtype)
        t, y, h, _ = jax.lax.while_loop(cond, body, (t0, y, h, 0))
        return jnp.where(t >= span, y, jnp.nan), h


Integrator = RK4 | Dopri5


# ------------------------------------------------------------------ propagate


def propagate_one(sde: SDE, method: Method, integrator: Integrator, mean0, cov0, times_s, start_time_s=0.0):
    """Means (T, d) and covariances (T, d, d) of one release (traceable); ``start_time_s`` is the release's
    absolute start time (s), seen only by a time-dependent SDE (t = start + age)."""
    d = mean0.shape[-1]
    n = d + d * d
    clock = sde.with_age or sde.with_time
    age = [jnp.zeros(1, dtype=mean0.dtype)] if clock else []  # time since release rides along: d(age)/dt = 1

    def f(y):
        a = y[n] if clock else 0.0
        dm, dp = moment_rates(method, sde, y[:d], y[d:n].reshape(d, d), a, start_time_s + a)
        return jnp.concatenate([dm, dp.ravel()] + [jnp.ones_like(a) for a in age])

    y0 = jnp.concatenate([mean0, (0.5 * (cov0 + cov0.T)).ravel()] + age)
    ys = integrator.integrate(f, y0, times_s)[:, :n]
    return ys[:, :d], ys[:, d:].reshape(-1, d, d)


@partial(jax.jit, static_argnames=("static", "method"))
def _propagate_jit(dynamic, static, method, integrator, mean0, cov0, times_s, start_time_s=None):
    return propagate_one(join_from_jit(dynamic, static), method, integrator, mean0, cov0, times_s,
                         0.0 if start_time_s is None else start_time_s)


def _propagate_rows(dynamic, static, method, integrator, chunk, means0, covs0, times_s, start_times_s=None):
    """Releases (R, d), (R, d, d) in vmapped chunks of ≤ ``chunk``, run one after another (jax.lax.map);
    ``start_times_s`` (R,) absolute start times (s) for a time-dependent SDE, else None."""
    sde = join_from_jit(dynamic, static)

    def one(release):
        start = 0.0 if release[2] is None else release[2]
        return propagate_one(sde, method, integrator, release[0], release[1], times_s, start)

    return jax.lax.map(one, (means0, covs0, start_times_s), batch_size=min(chunk, means0.shape[0]))


# Rows vmapped at once on each of several CPU devices.  With 2 forced host devices (jaxlib 0.10.2), cubature through
# the exact posterior of a time-varying field (M = 64 or more) gave wrong moments, different from run to run, in some
# rows of every vmapped batch of 192 rows or more (24 of 512 releases, negative variances among them; one device, or
# the same rows in batches of 128, 64 or 32, agree with one device to 4e-15: tests/dynamics/test_sharding.py).
SHARDED_CPU_CHUNK = 128


@partial(jax.jit, static_argnames=("static", "method", "chunk", "mesh"))
def propagate_batch_jit(dynamic, static, method, integrator, chunk, means0, covs0, times_s, mesh=None,
                        start_times_s=None):
    """The compiled batch propagator behind :func:`propagate_batch` (exposed so tests can count compilations).

    With a ``mesh`` (devices.mesh) the releases (and their start times), row-sharded over its devices
    (devices.shard_rows), are propagated by each device on its own rows (jax.shard_map); everything else is
    replicated.
    """
    if mesh is None:
        return _propagate_rows(dynamic, static, method, integrator, chunk, means0, covs0, times_s, start_times_s)
    spec = PartitionSpec(AXIS)
    rows = (means0, covs0) + (() if start_times_s is None else (start_times_s,))
    local = jax.shard_map(lambda d, i, t, *r: _propagate_rows(d, static, method, i, chunk, r[0], r[1], t, *r[2:]),
                          mesh=mesh, in_specs=(PartitionSpec(), PartitionSpec(), PartitionSpec()) + (spec,) * len(rows),
                          out_specs=(spec, spec))
    return local(dynamic, integrator, times_s, *rows)


def validate_times(times_s: Any) -> np.ndarray:
    """Output times (T,) s since the release: finite, starting at 0, strictly increasing."""
    times = np.asarray(times_s, dtype=float)
    if times.ndim != 1 or times.size == 0 or not np.all(np.isfinite(times)):
        raise InputError("times_s must be a non-empty 1-D array of finite seconds.")
    if times[0] != 0.0 or np.any(np.diff(times) <= 0):
        raise InputError("times_s must start at 0 (the release) and increase strictly.")
    return times


def validate_start_times(sde: SDE, start_times_s: Any, shape: tuple[int, ...]) -> np.ndarray | None:
    """Absolute release start times (s) of ``shape`` for a time-dependent SDE (finite), None for a steady one
    (which ignores them).  A time-dependent SDE without start times is an InputError."""
    if not sde.with_time:
        return None
    if start_times_s is None:
        raise InputError("this SDE depends on absolute time (a time-varying flow): give the releases' start times "
                         "(start_time_s, seconds on the model's time axis)")
    starts = np.broadcast_to(np.asarray(start_times_s, dtype=float), shape)
    if not np.all(np.isfinite(starts)):
        raise InputError("start_time_s: release start times must be finite seconds")
    return np.array(starts)


def validate_release(mean0: Any, cov0: Any, what: str) -> tuple[np.ndarray, np.ndarray]:
    """Validate means (..., d) and covariances (..., d, d) (symmetric PSD, finite)."""
    mean = np.asarray(mean0, dtype=float)
    cov = np.asarray(cov0, dtype=float)
    d = mean.shape[-1] if mean.ndim else 0
    if mean.ndim == 0 or cov.shape != mean.shape + (d,):
        raise InputError(f"{what}: covariance shape {cov.shape} does not match mean shape {mean.shape}.")
    if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(cov))):
        raise InputError(f"{what}: initial mean and covariance must be finite.")
    scale = np.max(np.abs(cov)) if cov.size else 0.0
    if np.max(np.abs(cov - np.swapaxes(cov, -1, -2)), initial=0.0) > 1e-9 * scale:
        raise InputError(f"{what}: initial covariance must be symmetric.")
    if cov.size and np.min(np.linalg.eigvalsh(cov)) < -1e-9 * scale:
        raise InputError(f"{what}: initial covariance must be positive semi-definite.")
    return mean, cov


def propagate(
    sde: SDE,
    mean0: Any,
    cov0: Any,
    times_s: Any,
    *,
    method: Method = SphericalCubature(),
    integrator: Integrator = RK4(step_s=600.0),
    start_time_s: float | None = None,
) -> tuple[jax.Array, jax.Array]:
    """Gaussian moments of one release: means (T, d) m and covariances (T, d, d) m².

    mean0 (d,) m and cov0 (d, d) m² describe the release (cov0 = 0 for a point
    release); times_s (T,) are seconds since the release, starting at 0 and
    strictly increasing; ``start_time_s`` the release's absolute start (s on the
    model's time axis; required by a time-dependent SDE, ignored by a steady one).
    Solves the moment ODE of the module docstring with
    `method` for the expectations and `integrator` in time; compiled once per
    (SDE structure, method, integrator, shapes).  Raises InputError on bad input.
    """
    mean, cov = validate_release(mean0, cov0, "release")
    times = validate_times(times_s)
    start = validate_start_times(sde, start_time_s, ())
    dynamic, static = split_for_jit(sde)
    return _propagate_jit(dynamic, static, method, integrator, mean, cov, times, start)


def propagate_batch(
    sde: SDE,
    means0: Any,
    covs0: Any,
    times_s: Any,
    *,
    method: Method = SphericalCubature(),
    integrator: Integrator = RK4(step_s=600.0),
    chunk: int = 256,
    mesh: Any = None,
    start_times_s: Any = None,
) -> tuple[jax.Array, jax.Array]:
    """`propagate` for R releases in one compiled call: (R, T, d) and (R, T, d, d).

    means0 (R, d) m, covs0 (R, d, d) m², times_s (T,) seconds since each
    release (shared); ``start_times_s`` (R,) (or one number) the releases' absolute
    starts (s), required by a time-dependent SDE; a steady SDE ignores them (they
    only label its outputs).  Releases are vmapped in chunks of `chunk`
    and the chunks run sequentially (jax.lax.map), bounding memory to one
    chunk's working set.  The releases are split over the devices of ``mesh``
    (default devices.mesh(): every device of every process; each device runs
    its rows, the result is gathered to every process), with results equal to
    a one-device run to rounding.  A second call with the same shapes, method,
    integrator and mesh reuses the compiled code.
    """
    means, covs = validate_release(means0, covs0, "releases")
    if means.ndim != 2 or means.shape[0] == 0:
        raise InputError(f"releases: means0 must have shape (R, d) with R >= 1, got {means.shape}.")
    if not (isinstance(chunk, int) and chunk >= 1):
        raise InputError(f"chunk must be an integer >= 1, got {chunk!r}.")
    times = validate_times(times_s)
    starts = validate_start_times(sde, start_times_s, means.shape[:1])
    dynamic, static = split_for_jit(sde)
    over = devices.mesh() if mesh is None else mesh
    (means, n), (covs, _) = devices.shard_rows(means, over), devices.shard_rows(covs, over)
    starts = None if starts is None else devices.shard_rows(starts, over)[0]
    dynamic, integrator, times = devices.replicate((dynamic, integrator, times), over)
    if over.devices.size > 1 and over.devices.flat[0].platform == "cpu":
        chunk = min(chunk, SHARDED_CPU_CHUNK)
    out = propagate_batch_jit(dynamic, static, method, integrator, min(chunk, n), means, covs, times, mesh=over,
                              start_times_s=starts)
    return tuple(jnp.asarray(devices.gather_rows(a, n)) for a in out)
