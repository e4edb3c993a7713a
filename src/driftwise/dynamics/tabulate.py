"""A fitted field's posterior tabulated once on a regular grid and interpolated (many releases).

The exact posterior costs O((M·d)²) per point (sde.PointPosterior); a spread of R releases evaluates it at
every sigma point of every RK4 stage.  Here the posterior mean μ(x) (d,) m/s and the Cholesky factor C(x)
of the posterior covariance Σ(x) = C Cᵀ (d, d) m²/s² are evaluated once at the nodes of a regular grid
and interpolated by **tensor-product cubic Hermite** interpolation (Birkhoff, Schultz & Varga 1968,
"Piecewise Hermite interpolation in one and two variables"):

    f(x) ≈ Σ_corners Σ_{S ⊆ axes} ∂_S f(node) · Π_{a ∈ S} h_a · Π_a H_{c_a, [a ∈ S]}(t_a),

with t ∈ [0, 1]^d the position inside the cell, h_a the spacing (m) and the 1-D Hermite basis
H_{0,0} = 2t³ − 3t² + 1, H_{1,0} = 3t² − 2t³ (values) and H_{0,1} = t³ − 2t² + t, H_{1,1} = t³ − t²
(slopes).  The derivatives ∂_S f at the nodes (all mixed partials, 2^d per channel) are exact, by nested
``jax.jvp`` through the posterior.  Why cubic Hermite and not bilinear: the moment equations use the drift's
gradient (Linearize's Jacobian; cubature's differences across √P), and bilinear interpolation has a
piecewise-constant, O(h) gradient, while this interpolant is C¹ with value error O(h⁴) and gradient
error O(h³), so a coarse grid (a few nodes per length scale) suffices.  Why the Cholesky factor: C is
interpolated and Σ = C Cᵀ formed after, so the tabulated covariance is positive semi-definite at every x
by construction (no eigenvalue clipping); C is smooth wherever Σ is positive definite.

Accuracy is measured, not assumed: :func:`tabulate_field` evaluates the exact posterior at random
off-grid points and refines the grid (n → 2n − 1 nodes per axis) until

    mean error  max ‖C⁻¹ (μ_table − μ)‖          (in posterior standard deviations)  ≤ tolerance,
    cov error   max ‖Σ_table − Σ‖_F / ‖Σ‖_F                                        ≤ tolerance,

and records both measured maxima in the table.  Outside the grid the table returns NaN (and ``inside``
says so): it never extrapolates; :func:`propagate_with_fallback` (every command's one path) reruns releases
that left the grid with the exact posterior, from their own start times.

Time-varying fields (gp.temporal) v(x, t) = v̄(x) + Σ_c [a_c(x) cos θ_c + b_c(x) sin θ_c] are linear in the
stacked time-free parts P(x) = [v̄; a_1; b_1; …]: v = W(t) P with W(t) = [1, cos θ_1, sin θ_1, …] ⊗ I_d.  So
:class:`TimedTable` tabulates P's joint posterior once (mean and Cholesky factor, the parts being correlated a
posteriori) and forms μ(x, t) = W μ_P, Σ(x, t) = (W L_P)(W L_P)ᵀ exactly in time (PSD by construction); only
the spatial interpolation errs, measured at random (x, t).  A slow part s(x, t) (Matérn-3/2 in time, not
periodic) is not tabulated: such a model is forecast with the exact posterior.  The cubic Hermite error bound
(value O(h⁴), slope O(h³)): Birkhoff, Schultz & Varga 1968; de Boor 1978, A Practical Guide to Splines (from
memory).
"""

from __future__ import annotations

import dataclasses
import itertools
import warnings
from dataclasses import dataclass
from dataclasses import field as _dataclass_field
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .. import smallmatrix
from ..errors import InputError
from .moments import propagate_batch, psd_cholesky
from .sde import SDE, PointPosterior

__all__ = ["FallbackTally", "PartsPosterior", "TabulatedPosterior", "TimedTable", "field_or_table_sde", "moment_errors",
           "on_table", "posterior_choice", "propagate_with_fallback", "refine", "release_steps", "table_region",
           "tabulate_field", "tabulate_timed_field", "tabulated_sde", "tabulation_errors", "timed_tabulation_errors"]

NODE_BLOCK = 256      # nodes per compiled evaluation block while building a table
CHECK_POINTS = 2000   # random off-grid points on which the error is measured
MAX_NODES = 400_000   # refinement stops here (a 2-D 632² or 3-D 73³ grid)
SMALL_CHANNELS = 3    # mean channels up to which the covariance factor is moments.psd_cholesky (a velocity)


def _kinds(d: int) -> list[tuple[int, ...]]:
    """The 2^d derivative kinds (k_0, …, k_{d−1}) ∈ {0, 1}^d in C order: k_a = 1 means ∂/∂x_a."""
    return list(itertools.product((0, 1), repeat=d))


def _hermite_basis(t: jax.Array) -> jax.Array:
    """(2, 2) cubic Hermite basis at t ∈ [0, 1]: [corner c, kind k] (k = 0 value, k = 1 unit-cell slope)."""
    t2, t3 = t * t, t * t * t
    return jnp.array([[2 * t3 - 3 * t2 + 1, t3 - 2 * t2 + t], [3 * t2 - 2 * t3, t3 - t2]])


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class TabulatedPosterior:
    """Posterior mean and covariance interpolated from a grid; same interface as sde.PointPosterior.

    origin_m (d,) m: the grid's lowest corner; spacing_m (d,) m; values (n_0, …, n_{d−1}, 2^d, C):
    per node the channels f = (μ (d,) m/s, lower triangle of C (d(d+1)/2,) m/s) and their mixed
    partials ∂_S f · Π_{a∈S} h_a (same units) for the kinds of :func:`_kinds`; mean_error (s.d.) and
    cov_error (relative) are the maxima measured on random off-grid points when the table was built.
    ``dim`` is static (and tells this class's treedef apart from PointPosterior's).
    """

    origin_m: jax.Array
    spacing_m: jax.Array
    values: jax.Array
    mean_error: jax.Array
    cov_error: jax.Array
    dim: int = _dataclass_field(metadata=dict(static=True))

    @property
    def shape(self) -> tuple[int, ...]:
        """Nodes per axis."""
        return tuple(self.values.shape[: self.dim])

    @property
    def region_max_m(self) -> jax.Array:
        """The grid's highest corner (d,) m."""
        return self.origin_m + self.spacing_m * (jnp.asarray(self.shape) - 1)

    def inside(self, x: jax.Array) -> jax.Array:
        """True where x (d,) m lies on the grid (boundary included)."""
        u = (x - self.origin_m) / self.spacing_m
        return jnp.all((u >= 0) & (u <= jnp.asarray(self.shape) - 1))

    def channels_at(self, x: jax.Array) -> jax.Array:
        """Interpolated channels (C,) at x (d,) m (module docstring's formula); NaN off the grid."""
        d, n = self.dim, jnp.asarray(self.shape)
        u = (x - self.origin_m) / self.spacing_m
        cell = jnp.clip(jnp.floor(u), 0, n - 2).astype(jnp.int32)
        basis = [_hermite_basis(u[a] - cell[a]) for a in range(d)]             # each (2 corners, 2 kinds)
        weight = basis[0]
        for b in basis[1:]:
            weight = weight[..., None, None] * b                                 # (c0, k0, c1, k1, …)
        order = list(range(0, 2 * d, 2)) + list(range(1, 2 * d, 2))
        weight = jnp.transpose(weight, order).reshape(-1)                         # (corners · kinds,)
        start = tuple(cell) + (jnp.int32(0), jnp.int32(0))
        block = jax.lax.dynamic_slice(self.values, start, (2,) * d + self.values.shape[d:])
        out = weight @ block.reshape(weight.shape[0], -1)
        return jnp.where(self.inside(x), out, jnp.nan)

    def mean_at(self, x: jax.Array) -> jax.Array:
        """Posterior mean velocity at x (d,) m → (d,) m/s (NaN off the grid)."""
        return self.channels_at(x)[: self.dim]

    def cov_at(self, x: jax.Array) -> jax.Array:
        """Posterior velocity covariance at x (d,) m → (d, d) m²/s², C Cᵀ (PSD; NaN off the grid)."""
        return self._cov_from_channels(self.channels_at(x))

    def _cov_from_channels(self, channels: jax.Array) -> jax.Array:
        d = self.dim
        rows, cols = np.tril_indices(d)
        chol = jnp.zeros((d, d), self.values.dtype).at[rows, cols].set(channels[d:])
        return chol @ chol.T

    def moments_at(self, x: jax.Array) -> tuple[jax.Array, jax.Array]:
        """(:meth:`mean_at`, :meth:`cov_at`) from one interpolation (XLA does not merge the two gathers)."""
        channels = self.channels_at(x)
        return channels[: self.dim], self._cov_from_channels(channels)


def _channels(posterior: PointPosterior, x: jax.Array) -> jax.Array:
    """f(x) = (μ(x), tril C(x)) with Σ = C Cᵀ (moments.psd_cholesky), shape (k + k(k+1)/2,) for a mean of k
    channels (k = d for a velocity; k·d for the stacked parts of a time-varying field, whose joint posterior
    covariance is positive definite: smallmatrix.cholesky, a loop over columns, as psd_cholesky is unrolled for
    small k and compiles slowly beyond, and a batched LAPACK Cholesky can hang jaxlib's CPU thread pool)."""
    mean = posterior.mean_at(x)
    k = mean.shape[-1]
    rows, cols = np.tril_indices(k)
    chol = psd_cholesky(posterior.cov_at(x)) if k <= SMALL_CHANNELS else smallmatrix.cholesky(posterior.cov_at(x))
    return jnp.concatenate([mean, chol[rows, cols]])


def _node_values(posterior: PointPosterior, spacing_m: jax.Array, x: jax.Array) -> jax.Array:
    """(2^d, C): ∂_S f(x) · Π_{a∈S} h_a for every kind S of :func:`_kinds`, by nested forward-mode derivatives.

    Differentiating the stack [f, ∂f, …] along one axis at a time (last axis first) doubles it per axis
    and leaves it in the C order of :func:`_kinds`; one pass shares all primal work (about 2^d × f's cost).
    """
    d = x.shape[-1]
    fn = lambda y: _channels(posterior, y)[None]  # noqa: E731
    for a in reversed(range(d)):
        step = jnp.zeros(d, x.dtype).at[a].set(spacing_m[a])
        fn = partial(lambda g, v, y: jnp.concatenate(jax.jvp(g, (y,), (v,))), fn, step)
    return fn(x)


@jax.jit
def _node_block(posterior: PointPosterior, spacing_m: jax.Array, nodes_m: jax.Array) -> jax.Array:
    return jax.vmap(partial(_node_values, posterior, spacing_m))(nodes_m)


@jax.jit
def _exact_moments(posterior: PointPosterior, points_m: jax.Array) -> tuple[jax.Array, jax.Array]:
    return jax.vmap(posterior.mean_at)(points_m), jax.vmap(posterior.cov_at)(points_m)


@jax.jit
def _table_moments(table: TabulatedPosterior, points_m: jax.Array) -> tuple[jax.Array, jax.Array]:
    return jax.vmap(table.mean_at)(points_m), jax.vmap(table.cov_at)(points_m)


def _build(posterior: PointPosterior, lo: np.ndarray, hi: np.ndarray, n: int) -> TabulatedPosterior:
    """The table on n nodes per axis over [lo, hi] (errors still unmeasured: NaN)."""
    d = lo.size
    axes = [np.linspace(lo[a], hi[a], n) for a in range(d)]
    nodes = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, d)
    pad = (-len(nodes)) % NODE_BLOCK
    padded = np.concatenate([nodes, np.repeat(nodes[-1:], pad, 0)])
    spacing = jnp.asarray((hi - lo) / (n - 1))
    blocks = [_node_block(posterior, spacing, jnp.asarray(padded[i:i + NODE_BLOCK]))
              for i in range(0, len(padded), NODE_BLOCK)]
    values = jnp.concatenate(blocks)[: len(nodes)]
    values = values.reshape((n,) * d + values.shape[1:])
    nan = jnp.asarray(np.nan)
    return TabulatedPosterior(jnp.asarray(lo), spacing, values, nan, nan, d)


def tabulation_errors(table: TabulatedPosterior, posterior: PointPosterior,
                      points_m: Any) -> tuple[np.ndarray, np.ndarray]:
    """Per point (n,): mean error ‖C⁻¹(μ_table − μ)‖ in posterior s.d. and cov error ‖Σ_table − Σ‖_F/‖Σ‖_F."""
    points = jnp.asarray(points_m, jnp.float64)
    return moment_errors(*_exact_moments(posterior, points), *_table_moments(table, points))


def moment_errors(mean: Any, cov: Any, mean_t: Any, cov_t: Any) -> tuple[np.ndarray, np.ndarray]:
    """Per point (n,): ‖C⁻¹(mean_t − mean)‖ with C Cᵀ = cov (posterior s.d.) and ‖cov_t − cov‖_F / ‖cov‖_F, for
    exact moments mean (n, d), cov (n, d, d) and their tabulated values mean_t, cov_t."""
    mean, cov, mean_t, cov_t = (np.asarray(a, np.float64) for a in (mean, cov, mean_t, cov_t))
    chol = np.linalg.cholesky(cov + 1e-300 * np.eye(mean.shape[-1]))
    white = np.linalg.solve(chol, (mean_t - mean)[..., None])[..., 0]
    cov_rel = np.linalg.norm(cov_t - cov, axis=(-2, -1)) / np.linalg.norm(cov, axis=(-2, -1))
    return np.linalg.norm(white, axis=-1), cov_rel


def _check_region(region_min_m: Any, region_max_m: Any, dim: int) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = np.asarray(region_min_m, np.float64).ravel(), np.asarray(region_max_m, np.float64).ravel()
    if lo.size != dim or hi.size != dim or not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        raise InputError(f"tabulate: region_min_m and region_max_m must be {dim} finite numbers (metres) each")
    if np.any(hi <= lo):
        raise InputError(f"tabulate: region_max_m {hi.tolist()} must exceed region_min_m {lo.tolist()} on every axis")
    return lo, hi


def tabulate_field(field: Any, region_min_m: Any, region_max_m: Any, *, tolerance: float = 0.05,
                   start_nodes: int = 9, max_nodes: int = MAX_NODES, seed: int = 0) -> TabulatedPosterior:
    """Tabulate ``field``'s posterior (a FlowField or a PointPosterior) on [region_min_m, region_max_m] (d,) m.

    Starts with ``start_nodes`` per axis and refines (n → 2n − 1) until the mean error (posterior s.d.)
    and the covariance error (relative, Frobenius) measured on ``CHECK_POINTS`` uniform random points
    (seeded by ``seed``) are both ≤ ``tolerance``.  Raises InputError when that needs more than
    ``max_nodes`` nodes.  The returned table carries the measured maxima (``mean_error``, ``cov_error``).
    """
    posterior = field if isinstance(field, PointPosterior) else PointPosterior.from_field(field)
    dim = int(posterior.inducing_m.shape[-1])
    lo, hi = _check_region(region_min_m, region_max_m, dim)
    points = lo + (hi - lo) * np.random.default_rng(seed).uniform(size=(CHECK_POINTS, dim))
    table, mean_err, cov_err = refine(lambda n: _build(posterior, lo, hi, n),
                                      lambda t: tabulation_errors(t, posterior, points), dim, tolerance,
                                      start_nodes, max_nodes)
    return dataclasses.replace(table, mean_error=jnp.asarray(mean_err), cov_error=jnp.asarray(cov_err))


def refine(build: Any, measure: Any, dim: int, tolerance: float, start_nodes: int,
           max_nodes: int) -> tuple[Any, float, float]:
    """(table, max mean error, max cov error): ``build(n)`` on n = start_nodes, 2n − 1, … nodes per axis until
    both maxima of ``measure(table)`` (per-point errors, :func:`moment_errors`) are ≤ ``tolerance``; InputError
    when refining further would need more than ``max_nodes`` nodes."""
    if not (0.0 < float(tolerance) < 1.0):
        raise InputError(f"tabulate: tolerance must be in (0, 1), got {tolerance!r}")
    n = max(2, int(start_nodes))
    while True:
        table = build(n)
        mean_err, cov_err = (float(np.max(e)) for e in measure(table))
        if mean_err <= tolerance and cov_err <= tolerance:
            return table, mean_err, cov_err
        if (2 * n - 1) ** dim > max_nodes:
            raise InputError(f"tabulate: {n}^{dim} nodes leave a mean error of {mean_err:.3g} s.d. and a covariance "
                             f"error of {cov_err:.3g} (tolerance {tolerance}); refining needs more than {max_nodes} "
                             "nodes: shrink the region or use the exact posterior")
        n = 2 * n - 1


# ------------------------------------------------------------------ time-varying fields
@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class PartsPosterior:
    """The joint posterior of a time-varying field's stacked time-free parts P(x) = [v̄; a_1; b_1; …; a_C; b_C]
    (FlowField.parts_posterior), as a posterior :func:`_build` can tabulate: mean (k·d,) m/s, cov (k·d, k·d)."""

    field: Any
    parts: tuple[str, ...] = _dataclass_field(metadata={"static": True})

    def mean_at(self, x: jax.Array) -> jax.Array:
        return self.field.parts_posterior(x, self.parts)[0]

    def cov_at(self, x: jax.Array) -> jax.Array:
        return self.field.parts_posterior(x, self.parts)[1]


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class TimedTable:
    """A harmonic time-varying field's posterior, tabulated once in space and combined analytically in time.

    v(x, t) = W(t) P(x), W(t) = [1, cos θ_1, sin θ_1, …, cos θ_C, sin θ_C] ⊗ I_d with θ_c = ω_c (t − t₀) + φ_c
    (gp.temporal), so exactly

        μ(x, t) = W(t) μ_P(x),    Σ(x, t) = W(t) Σ_P(x) W(t)ᵀ = (W(t) L_P(x)) (W(t) L_P(x))ᵀ,

    with μ_P, L_P (Σ_P = L_P L_Pᵀ, the parts' joint posterior: they are correlated a posteriori through the
    shared data) interpolated from ``grid`` (its channels: μ_P (k·d,), tril L_P); Σ(x, t) is PSD at every (x, t)
    by construction.  The only approximation is the spatial interpolation; the grid's mean_error/cov_error are
    the maxima measured against the exact posterior at random (x, t).  Same interface as the field for the SDE
    (sde.timed_field_sde): ``mean_at(x, t_s=t)`` and ``cov_between(x, x, t_x_s=t, t_y_s=t')``.
    """

    grid: TabulatedPosterior
    omegas_rad_s: tuple[float, ...] = _dataclass_field(metadata={"static": True})
    phases_rad: tuple[float, ...] = _dataclass_field(metadata={"static": True})
    time_origin_s: float = _dataclass_field(metadata={"static": True})

    @property
    def dim(self) -> int:
        return self.grid.dim

    def inside(self, x: jax.Array) -> jax.Array:
        return self.grid.inside(x)

    def _factors(self, x: jax.Array, t_s: Any) -> tuple[jax.Array, jax.Array]:
        """(μ(x, t) (d,), W(t) L_P(x) (d, k·d)); NaN off the grid."""
        d, rel = self.dim, jnp.asarray(t_s, jnp.float64) - self.time_origin_s
        theta = [w * rel + p for w, p in zip(self.omegas_rad_s, self.phases_rad)]
        weights = jnp.stack([jnp.ones_like(rel)] + [f(a) for a in theta for f in (jnp.cos, jnp.sin)])
        big = jnp.kron(weights[None, :], jnp.eye(d, dtype=jnp.float64))                  # W(t) (d, k·d)
        channels = self.grid.channels_at(x)
        size = big.shape[1]
        rows, cols = np.tril_indices(size)
        chol = jnp.zeros((size, size), channels.dtype).at[rows, cols].set(channels[size:])
        return big @ channels[:size], big @ chol

    def mean_at(self, x: jax.Array, *, t_s: Any) -> jax.Array:
        """μ(x, t) (d,) m/s at x (d,) m and absolute time t_s (s on the model's axis); NaN off the grid."""
        return self._factors(x, t_s)[0]

    def moments_at(self, x: jax.Array, *, t_s: Any) -> tuple[jax.Array, jax.Array]:
        """(μ(x, t), Σ(x, t) = (W L_P)(W L_P)ᵀ) from one interpolation."""
        mean, factor = self._factors(x, t_s)
        return mean, factor @ factor.T

    def cov_between(self, x: jax.Array, y: jax.Array, *, t_x_s: Any, t_y_s: Any) -> jax.Array:
        """Cov[v(x, t_x), v(x, t_y)] = W(t_x) Σ_P(x) W(t_y)ᵀ (d, d) m²/s²: one point only (NaN where y ≠ x or
        off the grid; the table holds each point's own joint covariance, not cross-covariances in space)."""
        fx, fy = self._factors(x, t_x_s)[1], self._factors(x, t_y_s)[1]
        return jnp.where(jnp.all(x == y), fx @ fy.T, jnp.nan)


@jax.jit
def _timed_table_moments(table: TimedTable, points_m: jax.Array, times_s: jax.Array) -> tuple[jax.Array, jax.Array]:
    def one(x: jax.Array, t: jax.Array) -> tuple[jax.Array, jax.Array]:
        return table.mean_at(x, t_s=t), table.cov_between(x, x, t_x_s=t, t_y_s=t)
    return jax.vmap(one)(points_m, times_s)


def timed_tabulation_errors(table: TimedTable, field: Any, points_m: Any,
                            times_s: Any) -> tuple[np.ndarray, np.ndarray]:
    """Per point (n,): :func:`moment_errors` of the table against the exact posterior field.predict at (x, t)."""
    points, times = np.asarray(points_m, np.float64), np.asarray(times_s, np.float64)
    return moment_errors(*field.predict(points, times), *_timed_table_moments(table, jnp.asarray(points),
                                                                               jnp.asarray(times)))


def tabulate_timed_field(field: Any, region_min_m: Any, region_max_m: Any, time_min_s: float, time_max_s: float, *,
                         tolerance: float = 0.05, start_nodes: int = 9, max_nodes: int = MAX_NODES,
                         seed: int = 0) -> TimedTable:
    """Tabulate a time-varying FlowField with a steady part and harmonics (no slow part) on [region_min_m,
    region_max_m] (d,) m, refined as :func:`tabulate_field` until the errors measured at ``CHECK_POINTS`` random
    (x, t), t uniform in [time_min_s, time_max_s] (s on the model's axis), are ≤ ``tolerance``.  A slow part
    s(x, t) is not periodic and is not tabulated: InputError (forecast such a model with the exact posterior)."""
    kernel = field.params.kernel
    if kernel.has_slow:
        raise InputError("tabulate: this model has a slow part s(x, t), which a table does not hold (it is not "
                         "periodic in time); use the exact posterior")
    dim = int(field.dim)
    lo, hi = _check_region(region_min_m, region_max_m, dim)
    if not (np.isfinite(time_min_s) and np.isfinite(time_max_s) and time_max_s >= time_min_s):
        raise InputError(f"tabulate: the time range [{time_min_s!r}, {time_max_s!r}] s must be finite and ordered")
    parts = PartsPosterior(field, ("steady",) + tuple(f"{c}_{k}" for c in kernel.constituents for k in ("cos", "sin")))
    rng = np.random.default_rng(seed)
    points = lo + (hi - lo) * rng.uniform(size=(CHECK_POINTS, dim))
    times = time_min_s + (time_max_s - time_min_s) * rng.uniform(size=CHECK_POINTS)
    build = lambda n: TimedTable(_build(parts, lo, hi, n), tuple(kernel.omegas_rad_s),
                                 tuple(kernel.phases_rad), float(kernel.time_origin_s))
    table, mean_err, cov_err = refine(build, lambda t: timed_tabulation_errors(t, field, points, times), dim,
                                      tolerance, start_nodes, max_nodes)
    grid = dataclasses.replace(table.grid, mean_error=jnp.asarray(mean_err), cov_error=jnp.asarray(cov_err))
    return dataclasses.replace(table, grid=grid)


# ------------------------------------------------------------------ when and where spread uses a table
TABLE_TOLERANCE = 0.05          # mean error (posterior s.d.) and relative covariance error of an automatic table
TABLE_RELEASE_STEPS = 20_000    # releases × RK4 steps from which a spread tabulates: ≈ 1.5 × the measured break-even
                                # (table build time × exact release-steps/s ≈ 1.3·10⁴, bench_tabulate.py)
WIDER_STAGES = ((2.0, 0), (6.0, 64))  # WiderTable (widen, after): boxes 3 and 9 times the first table's (margin
                                      # included), the second built once 64 releases left the first two
REGION_MARGIN = 0.25            # the grid extends the releases' and data's box by this fraction of its span


def release_steps(n_releases: int, times_s: Any, step_s: float) -> int:
    """R × the number of RK4 steps of a forecast to ``times_s[-1]`` s at ``step_s`` s (moments.substep_counts)."""
    spans = np.diff(np.asarray(times_s, np.float64))
    return int(n_releases) * int(np.sum(np.maximum(1, np.ceil(spans / float(step_s) * (1.0 - 1e-12)))))


def table_region(starts_m: Any, extent_m: dict | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Grid box (lo, hi) (d,) m: the box of the release starts and the data extent (a model's
    ``data_summary["extent_m"]``, if known), widened by REGION_MARGIN of its span on each side (at least 1 m)."""
    starts = np.atleast_2d(np.asarray(starts_m, np.float64))
    lo, hi = starts.min(axis=0), starts.max(axis=0)
    if extent_m:
        lo = np.minimum(lo, np.asarray(extent_m["min"], np.float64)[: lo.size])
        hi = np.maximum(hi, np.asarray(extent_m["max"], np.float64)[: hi.size])
    margin = np.maximum(REGION_MARGIN * np.max(hi - lo), 1.0)
    return lo - margin, hi + margin


def tabulated_sde(field: Any, sde: SDE, starts_m: Any, n_release_steps: int, posterior: str = "auto",
                  start_times_s: Any = None, span_s: float = 0.0) -> SDE | None:
    """The field SDE ``sde`` (sde.sde_from_field) on a table of ``field`` over table_region(starts_m, data
    extent) with error ≤ TABLE_TOLERANCE, or None for the exact posterior.  ``posterior``: "exact" → None;
    "table" → a table; "auto" → a table when ``n_release_steps`` ≥ TABLE_RELEASE_STEPS (0 means: a method
    that cannot use one, e.g. the ensemble, whose particles would leave any grid one by one).  A time-varying
    field (``sde.with_time``) gets a :class:`TimedTable` checked at times from the earliest of
    ``start_times_s`` (s on the model's axis; default its time origin) to the latest plus ``span_s`` (s); one
    with a slow part is always forecast exactly ("auto" → None, "table" → InputError)."""
    if posterior not in ("auto", "exact", "table"):
        raise InputError(f"posterior: use 'auto', 'exact' or 'table', got {posterior!r}")
    if posterior == "exact" or n_release_steps == 0 or (posterior == "auto" and n_release_steps < TABLE_RELEASE_STEPS):
        return None
    if sde.with_time and field.params.kernel.has_slow:
        if posterior == "table":
            raise InputError("posterior 'table': this model has a slow part s(x, t), which a table does not hold "
                             "(it is not periodic in time); use the exact posterior")
        return None
    lo, hi = table_region(starts_m, (getattr(field, "data_summary", None) or {}).get("extent_m"))
    if not sde.with_time:
        return on_table(sde, tabulate_field(field, lo, hi, tolerance=TABLE_TOLERANCE))
    starts = np.atleast_1d(np.asarray(field.time_origin_s if start_times_s is None else start_times_s, np.float64))
    return on_table(sde, tabulate_timed_field(field, lo, hi, float(starts.min()), float(starts.max()) + float(span_s),
                                              tolerance=TABLE_TOLERANCE))


def on_table(sde: SDE, table: TabulatedPosterior | TimedTable) -> SDE:
    """A field SDE (sde.field_sde, or sde.timed_field_sde with a TimedTable: drift and diffusion are
    ``Partial(f, posterior or field, *rest)``) with its posterior replaced by ``table``; K, τ and the velocity
    memory stay."""
    def swap(fn: Any) -> Any:
        return None if fn is None else jax.tree_util.Partial(fn.func, table, *fn.args[1:])

    return dataclasses.replace(sde, drift=swap(sde.drift), diffusion=swap(sde.diffusion),
                               drift_and_diffusion=swap(sde.drift_and_diffusion))


def posterior_choice(exact: bool) -> str:
    """The ``posterior`` argument of a command with an ``--exact`` flag: "exact", else "auto"."""
    return "exact" if exact else "auto"


def field_or_table_sde(field: Any, sde: SDE, starts_m: Any, n_releases: int, times_s: Any, integrator: Any,
                       posterior: str = "auto", start_times_s: Any = None) -> SDE | None:
    """:func:`tabulated_sde` for ``n_releases`` moment releases to ``times_s`` (s since each release) with
    ``integrator`` (RK4; None for the ensemble, which never tabulates), starting at ``start_times_s`` (s on the
    model's axis; used by a time-varying field): the table SDE, or None for the exact posterior."""
    steps = 0 if integrator is None else release_steps(n_releases, times_s, integrator.step_s)
    return tabulated_sde(field, sde, starts_m, steps, posterior, start_times_s, float(np.max(times_s)))


class FallbackTally:
    """Releases rerun through the exact posterior, counted over several :func:`propagate_with_fallback` calls
    (batches, candidate release times) so that a command warns once for the whole run (:meth:`warn`)."""

    def __init__(self) -> None:
        self.left, self.total = 0, 0

    def __call__(self, left: int, total: int) -> None:
        self.left, self.total = self.left + int(left), self.total + int(total)

    def warn(self, what: str = "releases", stacklevel: int = 3) -> None:
        """One warning naming how many of the counted ``what`` left the table (none: silent)."""
        if self.left:
            warnings.warn(f"{self.left} of {self.total} {what} left the tabulated region; they were forecast again on "
                          "a wider table or, beyond it, with the exact posterior", stacklevel=stacklevel)


def bucket_rows(n: int, chunk: int) -> int:
    """Rows a batch of ``n`` releases is padded to, so that batches of many sizes share a few compiled programs: the
    next power of two up to ``chunk``, beyond it the next multiple of ``chunk`` (at most chunk − 1 padded rows)."""
    return 1 << max(0, int(n) - 1).bit_length() if n <= chunk else -(-int(n) // chunk) * chunk


def _propagate_bucketed(sde: SDE, means0: np.ndarray, covs0: np.ndarray, starts: np.ndarray | None, *, times_s: Any,
                        method: Any, integrator: Any, chunk: int) -> tuple[np.ndarray, np.ndarray]:
    """propagate_batch of the releases padded (repeating the last) to :func:`bucket_rows` rows, the padding dropped:
    a partial last batch or the few releases that left a table do not each compile a program of their own."""
    n = len(means0)
    extra = bucket_rows(n, chunk) - n
    pad = (lambda a: a if a is None or not extra else np.concatenate([a, np.repeat(a[-1:], extra, 0)]))  # noqa: E731
    out = propagate_batch(sde, pad(means0), pad(covs0), times_s, method=method, integrator=integrator, chunk=chunk,
                          start_times_s=pad(starts))
    return tuple(np.array(a[:n]) for a in out)


@dataclass(eq=False)
class WiderTable:
    """A fallback stage for releases that left a table: a table over ``widen`` times the first one's box (same
    centre, same tolerance; table_region's margin then makes it 1.5 × ``widen`` times), built on first use once
    ``after`` releases have needed it (before that they go on to the next stage); None (→ the next stage) when
    the grid would exceed MAX_NODES.  Material that leaves the data's box in a long forecast (a bay flushing out
    over days) is mostly still within 3 or 9 times it, and a table costs about 1/200 of the exact posterior per
    release-step, against rerunning every such release exactly from its start."""

    field: Any
    sde: SDE
    lo: np.ndarray
    hi: np.ndarray
    start_times_s: Any = None
    span_s: float = 0.0
    widen: float = 2.0
    after: int = 0
    needed: int = 0
    built: list = _dataclass_field(default_factory=list)

    def __call__(self, count: int = 1) -> SDE | None:
        self.needed += int(count)
        if not self.built and self.needed > self.after:
            centre, half = 0.5 * (self.lo + self.hi), 0.5 * self.widen * (self.hi - self.lo)
            try:
                table = tabulated_sde(self.field, self.sde, np.stack([centre - half, centre + half]), 1, "table",
                                      self.start_times_s, self.span_s)
            except InputError:
                table = None
            self.built.append(table)
        return self.built[0] if self.built else None


def table_fallbacks(field: Any, sde: SDE, table_sde: SDE | None, starts_m: Any, times_s: Any,
                    start_times_s: Any = None) -> tuple | None:
    """The ``fallback`` of :func:`propagate_with_fallback` for a command that tabulated ``field`` with
    :func:`field_or_table_sde` (same ``starts_m``, ``times_s``, ``start_times_s``): :class:`WiderTable` stages of
    WIDER_STAGES (widening, releases needed before it is built), then the exact ``sde``; None when there is no
    table."""
    if table_sde is None:
        return None
    lo, hi = table_region(starts_m, (getattr(field, "data_summary", None) or {}).get("extent_m"))
    span = float(np.max(times_s))
    return tuple(WiderTable(field, sde, lo, hi, start_times_s, span, widen, after)
                 for widen, after in WIDER_STAGES) + (sde,)


def propagate_with_fallback(sde: SDE, fallback: SDE | tuple | None, means0: Any, covs0: Any, times_s: Any, *, method: Any,
                            integrator: Any, chunk: int = 256, start_times_s: Any = None,
                            tally: FallbackTally | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``moments.propagate_batch`` through ``sde`` from ``start_times_s`` (R,) (or one number; s on the model's
    axis, for a time-dependent SDE); releases whose moments come out non-finite (they left a table's grid) are
    recomputed from their own start times through ``fallback``: an SDE, or a tuple of stages tried in turn for the
    releases still non-finite (an SDE, or a zero-argument callable giving one or None, e.g. :class:`WiderTable`;
    :func:`table_fallbacks`).  A warning says how many left the first table, or they are counted in ``tally`` (the
    caller warns once) when one is given."""
    means0, covs0 = np.asarray(means0, np.float64), np.asarray(covs0, np.float64)
    starts = None if start_times_s is None else np.broadcast_to(np.asarray(start_times_s, np.float64), means0.shape[:1])
    run = partial(_propagate_bucketed, times_s=times_s, method=method, integrator=integrator, chunk=chunk)
    means, covs = run(sde, means0, covs0, starts)
    if fallback is None:
        return means, covs
    left = ~_finite_rows(means, covs)
    count = FallbackTally() if tally is None else tally
    count(int(left.sum()), len(means0))
    if tally is None:
        count.warn(stacklevel=4)
    for stage in fallback if isinstance(fallback, tuple) else (fallback,):
        if not left.any():
            break
        stage_sde = stage if isinstance(stage, SDE) else stage(int(left.sum()))
        if stage_sde is not None:
            means[left], covs[left] = run(stage_sde, means0[left], covs0[left],
                                          None if starts is None else starts[left])
            left = ~_finite_rows(means, covs)
    return means, covs


def _finite_rows(means: np.ndarray, covs: np.ndarray) -> np.ndarray:
    return np.isfinite(means).reshape(len(means), -1).all(1) & np.isfinite(covs).reshape(len(covs), -1).all(1)
