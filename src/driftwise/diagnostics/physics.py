"""Physical-constraint checks: divergence and vorticity posteriors, the Helmholtz split, a calibrated verdict.

Derivatives are linear functionals of the field, so under the Gaussian posterior of a
fitted :class:`~driftwise.gp.field.FlowField` they are Gaussian too.  With
J_ia(x) = ∂v_i/∂x_a and a weight tensor W (k, d, d) selecting the functional
L_k v = Σ_ia W_kia J_ia (divergence: W_0ii = 1; 2-D vorticity ∂v/∂x − ∂u/∂y;
3-D vorticity ε_kai ∂_a v_i):

    E[L v(x)]_k       = Σ_ia W_kia ∂_a m_i(x)                        (m = ``mean_at``)
    Cov[L v(x)]_kl    = Σ_iajb W_kia W_ljb ∂_{x_a} ∂_{y_b} C_ij(x, y) |_{y = x}

with C(x, y) = ``cov_between(x, y)`` the posterior cross-covariance (the covariance of
derivatives of a mean-square differentiable process is the mixed derivative of its
covariance; e.g. Adler 1981, The Geometry of Random Fields, §2.2).  Both are exact for
the GP and computed by forward-mode autodiff of the model's single-point functions.

The area test behind the verdict (:mod:`driftwise.diagnostics.verdict` holds the family evidence, the
verdict and ``check``) asks "is the divergence (vorticity) zero everywhere in the data hull?"
with the two-sided posterior z-scores on a grid inside the convex hull of the data, corrected
for multiple testing by the Benjamini & Hochberg (1995) step-up procedure ("Controlling the
false discovery rate", J. R. Stat. Soc. B 57:289–300) at level α; a cell is significant when
rejected.  Under the global null every rejection is false, so FDR = family-wise error ≤ α for
independent or positively regression-dependent p-values (Benjamini & Yekutieli 2001, Ann.
Stat. 29:1165); two-sided tests of correlated cells are not covered exactly, which is why the
rule is calibrated on synthetic flows (tests/diagnostics/test_verdict.py).

The Helmholtz split is here too; the gridded products (``driftwise map``) are in :mod:`driftwise.diagnostics.grid`.
"""

from __future__ import annotations

import dataclasses
import functools
import math

import jax
import jax.numpy as jnp
import numpy as np
from scipy import stats

from ..errors import InputError
from .timewindow import TimeWindow, padded_rows, window_cov, window_mean

__all__ = [
    "DerivativePosterior",
    "HelmholtzSplit",
    "HullGrid",
    "Significance",
    "background_summary",
    "benjamini_hochberg",
    "divergence_posterior",
    "helmholtz_split",
    "hull_grid",
    "significance",
    "vorticity_posterior",
    "zero_by_construction",
]

ALPHA = 0.05          # level of the area test (BH at q = α; under the global null FDR = FWER)
CHUNK = 256           # points per vmap chunk (bounds memory of the second-derivative Jacobians)
HULL_CELLS = 400      # default number of cells inside the data hull for hull_grid without a spacing
SUPPORT_RATIO = 0.5   # a point is "supported" when tr Σ_post < SUPPORT_RATIO · tr K_prior


# --------------------------------------------------------------------------------------
# Derivative functionals: weights W (k, d, d), L_k v = Σ_ia W_kia ∂v_i/∂x_a
# --------------------------------------------------------------------------------------
def _divergence_weights(d: int) -> np.ndarray:
    """∇·v = Σ_i ∂v_i/∂x_i: W (1, d, d) = I."""
    return np.eye(d)[None]


def _vorticity_weights(d: int) -> np.ndarray:
    """2-D: ω = ∂v_1/∂x_0 − ∂v_0/∂x_1, W (1, 2, 2); 3-D: (∇×v)_k = ε_kai ∂_a v_i, W (3, 3, 3)."""
    if d == 2:
        w = np.zeros((1, 2, 2))
        w[0, 1, 0], w[0, 0, 1] = 1.0, -1.0
        return w
    w = np.zeros((3, 3, 3))
    for k, a, i in ((0, 1, 2), (1, 2, 0), (2, 0, 1)):
        w[k, i, a], w[k, a, i] = 1.0, -1.0      # ε_kai = +1 and its odd permutation ε_kia = −1
    return w


def _functional_moments(field, x: jax.Array, weights: jax.Array, part: str | None, window: TimeWindow | None):
    """Posterior mean (k,) and covariance (k, k) of L v at one point x (d,), in s⁻¹ and s⁻² (of the time
    ``window``'s combination of a time-varying field, :mod:`driftwise.diagnostics.timewindow`)."""
    if window is None:
        mean_fn = lambda p: field.mean_at(p, part)                                # noqa: E731
        cov_fn = lambda p, q: field.cov_between(p, q, part, part)                 # noqa: E731
    else:
        mean_fn = lambda p: window_mean(field, p, window)                         # noqa: E731
        cov_fn = lambda p, q: window_cov(field, p, q, window)                     # noqa: E731
    jac = jax.jacfwd(mean_fn)(x)                                                  # (d, d): [i, a]
    mixed = jax.jacfwd(jax.jacfwd(cov_fn, argnums=0), argnums=1)(x, x)            # (d, d, d, d): [i, j, a, b]
    mean = jnp.einsum("kia,ia->k", weights, jac)
    cov = jnp.einsum("kia,ljb,ijab->kl", weights, weights, mixed)
    return mean, 0.5 * (cov + cov.T)


@functools.partial(jax.jit, static_argnames=("part",))
def _functional_batch(field, points: jax.Array, weights: jax.Array, part: str | None, window: TimeWindow | None):
    one = lambda x: _functional_moments(field, x, weights, part, window)           # noqa: E731
    return jax.lax.map(one, points, batch_size=CHUNK)


@dataclasses.dataclass(frozen=True)
class DerivativePosterior:
    """Gaussian posterior of a derivative field at n points.

    quantity  "divergence" (∇·v, s⁻¹) or "vorticity" (2-D ∂v/∂x − ∂u/∂y, 3-D ∇×v, s⁻¹)
    mean      (n,) in 2-D and for divergence; (n, 3) for 3-D vorticity; s⁻¹
    var       same shape, s⁻² (marginal posterior variance of each entry)
    reason    None, or why the quantity is identically zero under the model (then mean = var = 0
              and nothing was computed: a constraint built into the prior is not evidence)
    """

    quantity: str
    mean: np.ndarray
    var: np.ndarray
    reason: str | None = None

    @property
    def zero_by_construction(self) -> bool:
        """True when the model cannot represent this quantity (see ``reason``)."""
        return self.reason is not None

    @property
    def std(self) -> np.ndarray:
        """Posterior standard deviation, s⁻¹."""
        return np.sqrt(np.clip(self.var, 0.0, None))

    @property
    def z(self) -> np.ndarray:
        """z = mean / std (0 where the std is 0, e.g. for a quantity zero by construction)."""
        std = self.std
        return np.divide(self.mean, std, out=np.zeros_like(self.mean), where=std > 0.0)


def zero_by_construction(field, quantity: str, part: str | None = None) -> str | None:
    """Why ``quantity`` is identically zero for ``field`` (and ``part``), or None if it is not."""
    family = field.kernel_family
    if quantity == "divergence" and (family == "divergence-free" or part == "divergence_free"):
        what = "the model" if part is None else "the divergence-free part"
        return f"{what} is divergence-free by construction (kernel {family!r}); its divergence is exactly zero"
    if quantity == "vorticity" and (family == "curl-free" or part == "curl_free"):
        what = "the model" if part is None else "the curl-free part"
        return f"{what} is curl-free by construction (kernel {family!r}); its vorticity is exactly zero"
    return None


def _derivative_posterior(field, points, quantity: str, weights: np.ndarray, part: str | None,
                          window: TimeWindow | None) -> DerivativePosterior:
    x = _check_points(points, field.dim)
    window = _check_window(field, part, window)
    squeeze = weights.shape[0] == 1
    shape = (x.shape[0],) if squeeze else (x.shape[0], weights.shape[0])
    reason = zero_by_construction(field, quantity, part)
    if reason is not None or x.shape[0] == 0:
        return DerivativePosterior(quantity, np.zeros(shape), np.zeros(shape), reason)
    mean, cov = _functional_batch(field, jnp.asarray(padded_rows(x)), jnp.asarray(weights), part, window)
    n = x.shape[0]
    mean, var = np.asarray(mean)[:n], np.asarray(jnp.diagonal(cov, axis1=1, axis2=2))[:n]
    return DerivativePosterior(quantity, mean.reshape(shape), np.clip(var, 0.0, None).reshape(shape), None)


def _check_window(field, part: str | None, window: TimeWindow | None) -> TimeWindow | None:
    """The window a derivative posterior uses: None for a steady field (which has no time), required for a
    time-varying one, and not combined with a Helmholtz ``part``."""
    if not field.is_time_varying:
        return None
    if window is None:
        raise InputError("this model changes in time: its divergence and vorticity need a time or a time average "
                         "(diagnostics.timewindow.at_time or span_average)")
    if part is not None:
        raise InputError(f"part {part!r}: the Helmholtz parts of a time-varying model are not available averaged "
                         "over time; test the whole field")
    return window


def divergence_posterior(field, points, part: str | None = None, *,
                         window: TimeWindow | None = None) -> DerivativePosterior:
    """Posterior of ∇·v at ``points`` (n, d) in m: mean (n,) s⁻¹, var (n,) s⁻², z-scores.

    ``part`` ∈ {None, "divergence_free", "curl_free"} selects a part of a Helmholtz model.
    For a divergence-free model (or part) the result says so (``reason``) instead of
    reporting round-off.  A time-varying field needs a ``window`` (:mod:`driftwise.diagnostics.timewindow`:
    at one time, or averaged over its data's time span); a steady one ignores it.
    """
    return _derivative_posterior(field, points, "divergence", _divergence_weights(field.dim), part, window)


def vorticity_posterior(field, points, part: str | None = None, *,
                        window: TimeWindow | None = None) -> DerivativePosterior:
    """Posterior of the vorticity at ``points`` (n, d) in m, s⁻¹.

    2-D: the scalar ω = ∂v/∂x − ∂u/∂y, mean and var (n,); 3-D: the vector ∇×v, (n, 3)
    (marginal variance of each component).  Zero by construction for a curl-free model or part.
    ``window`` as for :func:`divergence_posterior`.
    """
    return _derivative_posterior(field, points, "vorticity", _vorticity_weights(field.dim), part, window)


def _check_points(points, dim: int) -> np.ndarray:
    x = np.asarray(points, dtype=np.float64)
    if x.ndim != 2 or x.shape[1] != dim:
        raise InputError(f"points must have shape (n, {dim}) in metres, got {x.shape}")
    if not np.all(np.isfinite(x)):
        raise InputError(f"points row {int(np.argmax(~np.all(np.isfinite(x), axis=1)))} has NaN or infinite coordinates")
    return x


# --------------------------------------------------------------------------------------
# A grid inside the convex hull of the data
# --------------------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class HullGrid:
    """A regular grid over the data's bounding box and the cells whose centres lie in the convex hull.

    axes_m     tuple of d 1-D coordinate arrays (x, y[, z]) in m, increasing
    inside     bool array of shape (n_y, n_x) (2-D) or (n_z, n_y, n_x) (3-D): centre inside the hull
    spacing_m  grid step (m), the same on every axis
    """

    axes_m: tuple[np.ndarray, ...]
    inside: np.ndarray
    spacing_m: float

    @property
    def all_points_m(self) -> np.ndarray:
        """Every grid node (N, d) in m, in C order of ``inside`` (x varies fastest)."""
        mesh = np.meshgrid(*self.axes_m[::-1], indexing="ij")
        return np.stack([m.ravel() for m in mesh[::-1]], axis=1)

    @property
    def points_m(self) -> np.ndarray:
        """The nodes inside the hull (G, d) in m."""
        return self.all_points_m[self.inside.ravel()]


def _hull(position_m: np.ndarray):
    from scipy.spatial import ConvexHull, Delaunay, QhullError

    try:
        hull = ConvexHull(position_m)
        return hull, Delaunay(position_m[hull.vertices])
    except (QhullError, ValueError):
        raise InputError(f"the {len(position_m)} observation positions do not span a {position_m.shape[1]}-D "
                         "region (too few, or all on a line/plane); cannot define the data hull") from None


def hull_grid(position_m, *, spacing_m: float | None = None, n_cells: int = HULL_CELLS,
              max_nodes: int = 2_000_000) -> HullGrid:
    """Grid over the bounding box of ``position_m`` (n, d) m; cells inside the convex hull are marked.

    The spacing defaults to (hull volume / ``n_cells``)^(1/d), so about ``n_cells`` cells lie
    inside; membership uses ``scipy.spatial.Delaunay.find_simplex`` ≥ 0 on the hull vertices.
    """
    pos = _check_points(position_m, np.shape(position_m)[-1] if np.ndim(position_m) == 2 else 2)
    hull, tri = _hull(pos)
    d = pos.shape[1]
    if spacing_m is None:
        spacing_m = (hull.volume / max(int(n_cells), 1)) ** (1.0 / d)
    spacing_m = float(spacing_m)
    if not (math.isfinite(spacing_m) and spacing_m > 0.0):
        raise InputError(f"grid spacing must be a positive distance in metres, got {spacing_m!r}")
    lo, hi = pos.min(axis=0), pos.max(axis=0)
    counts = np.floor((hi - lo) / spacing_m).astype(int) + 1
    if np.prod(counts.astype(float)) > max_nodes:
        raise InputError(f"a {spacing_m:g} m grid over the data extent needs {int(np.prod(counts.astype(float)))} "
                         f"nodes (limit {max_nodes}); choose a larger spacing")
    offsets = 0.5 * ((hi - lo) - (counts - 1) * spacing_m)
    axes = tuple(lo[a] + offsets[a] + spacing_m * np.arange(counts[a]) for a in range(d))
    grid = HullGrid(axes, np.zeros(tuple(counts[::-1]), dtype=bool), spacing_m)
    inside = tri.find_simplex(grid.all_points_m) >= 0
    return dataclasses.replace(grid, inside=inside.reshape(grid.inside.shape))


# --------------------------------------------------------------------------------------
# Multiple testing
# --------------------------------------------------------------------------------------
def benjamini_hochberg(p_values, alpha: float = ALPHA) -> np.ndarray:
    """Rejections of the Benjamini & Hochberg (1995) step-up procedure at FDR level ``alpha``.

    With p sorted, p_(1) ≤ … ≤ p_(m): k = max{i : p_(i) ≤ i α / m}; reject the k smallest
    (none if no such i).  Returns a bool array of the shape of ``p_values``.
    """
    p = np.asarray(p_values, dtype=np.float64)
    flat = p.ravel()
    m = flat.size
    if m == 0:
        return np.zeros(p.shape, dtype=bool)
    order = np.argsort(flat, kind="stable")
    passed = np.nonzero(flat[order] <= alpha * np.arange(1, m + 1) / m)[0]
    reject = np.zeros(m, dtype=bool)
    if passed.size:
        reject[order[: passed[-1] + 1]] = True
    return reject.reshape(p.shape)


@dataclasses.dataclass(frozen=True)
class Significance:
    """Where a derivative field differs from zero on the hull grid, after the BH correction.

    significant    bool (G,): the cell has at least one rejected test (a component, in 3-D)
    z_critical     the smallest |z| that was rejected (∞ when nothing was)
    max_abs_z      max |z| over the hull cells
    reason         set when the quantity is zero by construction (no test done)
    """

    significant: np.ndarray
    z_critical: float
    max_abs_z: float
    alpha: float
    reason: str | None = None

    @property
    def significant_area_fraction(self) -> float:
        """Share of the hull cells (hence of the hull area/volume) that is significant."""
        return float(np.mean(self.significant)) if self.significant.size else 0.0

    @property
    def any_significant(self) -> bool:
        """True when the global null (zero everywhere) is rejected."""
        return bool(np.any(self.significant))

    def to_dict(self) -> dict:
        """The design-sheet keys plus the test's details."""
        return {"significant_area_fraction": self.significant_area_fraction, "max_abs_z": self.max_abs_z,
                "z_critical": self.z_critical, "alpha": self.alpha, "n_cells": int(self.significant.size),
                "correction": "Benjamini-Hochberg 1995 step-up on two-sided p-values of the grid z-scores",
                "zero_by_construction": self.reason}


def significance(posterior: DerivativePosterior, *, alpha: float = ALPHA) -> Significance:
    """BH-corrected two-sided tests of "mean = 0" on each cell: p = 2 Φ(−|z|)."""
    z = np.abs(posterior.z).reshape(posterior.mean.shape[0], -1)
    if posterior.zero_by_construction:
        return Significance(np.zeros(z.shape[0], dtype=bool), math.inf, 0.0, alpha, posterior.reason)
    reject = benjamini_hochberg(2.0 * stats.norm.sf(z), alpha)
    z_crit = float(np.min(z[reject])) if np.any(reject) else math.inf
    return Significance(np.any(reject, axis=1), z_crit, float(np.max(z, initial=0.0)), alpha)


# --------------------------------------------------------------------------------------
# Helmholtz split
# --------------------------------------------------------------------------------------
PARTS = ("divergence_free", "curl_free")


@functools.partial(jax.jit, static_argnames=("part",))
def part_means(field, points: jax.Array, part: str) -> jax.Array:
    """Posterior means (n, d) m/s of one Helmholtz ``part`` at ``points`` (n, d) m."""
    return jax.vmap(lambda x: field.mean_at(x, part))(points)


@jax.jit
def joint_part_covariance(field, points: jax.Array) -> jax.Array:
    """Posterior covariance of (v_df(X), v_cf(X)) jointly, (2·G·d, 2·G·d), ordered part, point, component.

    The off-diagonal part blocks are the posterior cross-covariance Cov[v_df(x), v_cf(y)] —
    independent a priori, the parts are correlated a posteriori because the data see only their sum.
    """
    def row(x):
        pairs = lambda y: jnp.stack([jnp.stack([field.cov_between(x, y, p, q) for q in PARTS]) for p in PARTS])  # noqa: E731
        return jax.vmap(pairs)(points)                                     # (G, 2, 2, d, d)
    blocks = jax.lax.map(row, points, batch_size=8)                        # (G, G, 2, 2, d, d): [g, h, p, q, i, j]
    g, d = points.shape
    return blocks.transpose(2, 0, 4, 3, 1, 5).reshape(2 * g * d, 2 * g * d)


@dataclasses.dataclass(frozen=True)
class HelmholtzSplit:
    """Share of the velocity variance (mean square speed over the hull points) in the curl-free part.

    F = E_cf / (E_df + E_cf),  E_p = Σ_g |m_p(x_g)|²  with m_p the posterior mean of part p
    (the "divergent share"; a plug-in estimate from the posterior mean parts).

    std        delta-method standard deviation: Var F ≈ ∇Fᵀ C ∇F, with C the joint posterior
               covariance of both parts at the points (the cross-covariance between the parts
               included), ∂F/∂m_df = −2 m_df E_cf/E², ∂F/∂m_cf = 2 m_cf E_df/E² (E = E_df + E_cf)
    interval   F ± 1.645 std clipped to [0, 1] (≈ 90 % under the linearisation)
    reason     set when the split is fixed by the model (divergence-free: F = 0; curl-free: F = 1)
    """

    fraction: float
    std: float
    interval: tuple[float, float]
    n_points: int
    reason: str | None = None

    def to_dict(self) -> dict:
        """Plain-type summary with the definition and the uncertainty method spelled out."""
        return {"divergent_variance_fraction": self.fraction, "std": self.std, "interval_90": list(self.interval),
                "n_points": self.n_points,
                "definition": "curl-free part's share of the mean square speed of the posterior mean parts "
                              "over grid points inside the data hull",
                "uncertainty": "delta method with the joint posterior covariance of both parts "
                               "(cross-covariance between the parts included)",
                "fixed_by_model": self.reason}


def _split_from_moments(means: np.ndarray, cov: np.ndarray, n_points: int) -> HelmholtzSplit:
    """F and its delta-method std from stacked means (2·G·d,) and joint covariance (2·G·d, 2·G·d)."""
    df, cf = means.reshape(2, -1)
    e_df, e_cf = float(df @ df), float(cf @ cf)
    total = e_df + e_cf
    if total <= 0.0:
        return HelmholtzSplit(math.nan, math.nan, (math.nan, math.nan), n_points,
                              "the posterior mean velocity is zero on the hull; the split is undefined")
    grad = np.concatenate([-2.0 * df * e_cf, 2.0 * cf * e_df]) / total**2
    fraction, std = e_cf / total, math.sqrt(max(float(grad @ cov @ grad), 0.0))
    interval = (max(fraction - 1.645 * std, 0.0), min(fraction + 1.645 * std, 1.0))
    return HelmholtzSplit(fraction, std, interval, n_points)


def helmholtz_split(field, points, *, max_points: int = 160) -> HelmholtzSplit:
    """Divergent share F of a Helmholtz model's velocity over ``points`` (G, d) m, with a delta-method std.

    At most ``max_points`` of the points (an even subsample) enter the joint covariance.
    """
    family = field.kernel_family
    if family in ("divergence-free", "curl-free"):
        value = 0.0 if family == "divergence-free" else 1.0
        return HelmholtzSplit(value, 0.0, (value, value), 0,
                              f"the model is {family} by construction, so the divergent share is {value:g}")
    if family != "helmholtz":
        raise InputError(f"the Helmholtz split needs a helmholtz model; this model's kernel is {family!r}")
    x = _check_points(points, field.dim)
    if x.shape[0] == 0:
        raise InputError("the Helmholtz split needs at least one point inside the data hull")
    x = x[np.unique(np.linspace(0, x.shape[0] - 1, min(max_points, x.shape[0])).round().astype(int))]
    xj = jnp.asarray(x)
    means = np.concatenate([np.asarray(part_means(field, xj, p)).ravel() for p in PARTS])
    return _split_from_moments(means, np.asarray(joint_part_covariance(field, xj)), x.shape[0])


# --------------------------------------------------------------------------------------
# The background flow's rates
# --------------------------------------------------------------------------------------
def background_summary(field) -> dict:
    """Posterior of the background flow's coefficients (:mod:`driftwise.gp.background`): per coefficient the
    mean, standard deviation and z = mean/std, in m/s (uniform velocity) or 1/s (divergence, vorticity, strain).

    In a Helmholtz model the linear divergence belongs to the curl-free part and the uniform velocity, the
    linear rotation and strain to the divergence-free part, so the split above already counts them there.
    Empty ``coefficients`` when the model has no background.
    """
    names, mean, cov = field.background_posterior()
    std = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    coefficients = {name: {"mean": float(m), "std": float(s), "z": float(m / s) if s > 0 else 0.0}
                    for name, m, s in zip(names, mean, std)}
    return {"coefficients": coefficients,
            "definition": "v_b(x) = U + G (x - x0) about the data's centre x0, G = divergence/d I + rotation + "
                          "strain (Molinari & Kirwan 1975); Gaussian prior, posterior from the fitted model"}
