"""Derivative posteriors, the data-hull grid, multiple testing and the Helmholtz split (driftwise.physics).

The fields here are small *exact* GPs: inducing points at the observation sites (Z = X) with
the closed-form optimal q (Titsias 2009), so the sparse posterior equals the exact one.
"""

from __future__ import annotations

import types

import jax.numpy as jnp
import numpy as np
import pytest
from matplotlib.path import Path as MplPath
from scipy import stats

import driftwise  # noqa: F401  (switches on float64)
from driftwise.diagnostics import physics as P
from driftwise.gp import field as F

LENGTH_M = 1000.0


def exact_field(family: str, *, dim: int = 2, n: int = 30, seed: int = 0, **kernel) -> F.FlowField:
    """A GP conditioned on n noisy velocities of a smooth flow, Z = X (exact posterior)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 3.0 * LENGTH_M, (n, dim))
    k = 2.0 * np.pi / (3.0 * LENGTH_M)
    v = 0.2 * np.stack([np.sin(k * x[:, (a + 1) % dim]) + 0.5 * np.cos(k * x[:, a]) for a in range(dim)], axis=1)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v + rng.normal(0.0, 0.01, v.shape),
                                dt_s=np.full(n, 3600.0), position_error_m=5.0)
    params = F.init_params(family, dim, x, velocity_scale_m_s=0.2, length_scale_m=LENGTH_M,
                           diffusivity_m2_s=0.05, noise_floor_m_s=0.01, **kernel)
    return F.FlowField.from_params(F.optimal_q(params, F.batch_from_observations(obs)))


def mean_jacobian_fd(field, x: np.ndarray, h: float) -> np.ndarray:
    """Central differences of the posterior mean, J[i, a] ≈ ∂m_i/∂x_a (error O(h²); common practice)."""
    d = x.shape[0]
    cols = []
    for a in range(d):
        e = np.zeros(d)
        e[a] = h
        cols.append((np.asarray(field.mean_at(jnp.asarray(x + e))) - np.asarray(field.mean_at(jnp.asarray(x - e))))
                    / (2.0 * h))
    return np.stack(cols, axis=1)


POINTS = np.array([[800.0, 1200.0], [1500.0, 1500.0], [2300.0, 700.0], [1100.0, 2600.0]])


@pytest.mark.parametrize("family", ["independent", "helmholtz"])
def test_means_match_central_differences_2d(family):
    field = exact_field(family)
    div, vort = P.divergence_posterior(field, POINTS), P.vorticity_posterior(field, POINTS)
    jac = np.stack([mean_jacobian_fd(field, p, 1e-4 * LENGTH_M) for p in POINTS])
    fd_div = jac[:, 0, 0] + jac[:, 1, 1]
    fd_vort = jac[:, 1, 0] - jac[:, 0, 1]
    # reference: central finite differences of the posterior mean, h = 1e-4 ℓ (truncation ~ h²/ℓ² ≈ 1e-8)
    np.testing.assert_allclose(div.mean, fd_div, rtol=1e-6, atol=1e-6 * np.max(np.abs(fd_div)))
    np.testing.assert_allclose(vort.mean, fd_vort, rtol=1e-6, atol=1e-6 * np.max(np.abs(fd_vort)))
    assert div.reason is None and vort.reason is None


def test_vorticity_vector_matches_central_differences_3d():
    field = exact_field("independent", dim=3, n=25)
    pts = np.array([[800.0, 1200.0, 1500.0], [2000.0, 1000.0, 900.0]])
    vort = P.vorticity_posterior(field, pts)
    assert vort.mean.shape == (2, 3) and vort.var.shape == (2, 3)
    jac = np.stack([mean_jacobian_fd(field, p, 1e-4 * LENGTH_M) for p in pts])
    curl = np.stack([jac[:, 2, 1] - jac[:, 1, 2], jac[:, 0, 2] - jac[:, 2, 0], jac[:, 1, 0] - jac[:, 0, 1]], axis=1)
    # reference: ∇×v = (∂w/∂y − ∂v/∂z, ∂u/∂z − ∂w/∂x, ∂v/∂x − ∂u/∂y) by central differences
    np.testing.assert_allclose(vort.mean, curl, rtol=1e-6, atol=1e-6 * np.max(np.abs(curl)))
    div = P.divergence_posterior(field, pts)
    np.testing.assert_allclose(div.mean, np.trace(jac, axis1=1, axis2=2), rtol=1e-6,
                               atol=1e-6 * np.max(np.abs(np.trace(jac, axis1=1, axis2=2))))


def _stencil_samples(field, x0: np.ndarray, h: float, n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Divergence and vorticity by central differences of joint posterior velocity samples at a 4-point stencil."""
    offsets = h * np.array([[1.0, 0.0], [-1.0, 0.0], [0.0, 1.0], [0.0, -1.0]])
    pts = jnp.asarray(x0 + offsets)
    cov = np.block([[np.asarray(field.cov_between(p, q)) for q in pts] for p in pts])        # (8, 8)
    mean = np.concatenate([np.asarray(field.mean_at(p)) for p in pts])
    vals, vecs = np.linalg.eigh(0.5 * (cov + cov.T))
    draws = mean + np.random.default_rng(seed).standard_normal((n, 8)) @ (vecs * np.sqrt(np.clip(vals, 0, None))).T
    v = draws.reshape(n, 4, 2)
    du_dx, dv_dx = (v[:, 0] - v[:, 1]).T / (2 * h)
    du_dy, dv_dy = (v[:, 2] - v[:, 3]).T / (2 * h)
    return du_dx + dv_dy, dv_dx - du_dy


@pytest.mark.parametrize("family", ["independent", "helmholtz"])
def test_variance_matches_posterior_function_samples(family):
    field = exact_field(family)
    n = 2000
    div, vort = P.divergence_posterior(field, POINTS), P.vorticity_posterior(field, POINTS)
    for i, x0 in enumerate(POINTS):
        s_div, s_vort = _stencil_samples(field, x0, 1e-2 * LENGTH_M, n, seed=i)
        for samples, analytic in ((s_div, div.var[i]), (s_vort, vort.var[i])):
            # (n−1)s²/σ² ~ χ²(n−1) for Gaussian samples, so SE(s²) = σ² √(2/(n−1))
            # (Cramér 1946, Mathematical Methods of Statistics, §29.3; from memory)
            se = analytic * np.sqrt(2.0 / (n - 1))
            assert abs(np.var(samples, ddof=1) - analytic) < 3.0 * se, (i, np.var(samples, ddof=1), analytic)


def test_zero_by_construction_is_reported_not_computed():
    df, cf = exact_field("divergence-free"), exact_field("curl-free")
    d = P.divergence_posterior(df, POINTS)
    assert d.zero_by_construction and "divergence-free by construction" in d.reason
    np.testing.assert_array_equal(d.mean, 0.0)
    np.testing.assert_array_equal(d.z, 0.0)
    assert P.vorticity_posterior(df, POINTS).reason is None
    assert P.vorticity_posterior(cf, POINTS).zero_by_construction
    helm = exact_field("helmholtz")
    assert P.divergence_posterior(helm, POINTS, part="divergence_free").zero_by_construction
    assert P.vorticity_posterior(helm, POINTS, part="curl_free").zero_by_construction
    # the divergence of the full Helmholtz field is that of its curl-free part (∇·v_df ≡ 0)
    full, part = P.divergence_posterior(helm, POINTS), P.divergence_posterior(helm, POINTS, part="curl_free")
    np.testing.assert_allclose(full.mean, part.mean, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(full.var, part.var, rtol=1e-7, atol=1e-22)


def test_points_are_validated():
    field = exact_field("independent", n=10)
    with pytest.raises(driftwise.InputError, match=r"shape \(n, 2\)"):
        P.divergence_posterior(field, np.zeros((3, 3)))
    with pytest.raises(driftwise.InputError, match="NaN"):
        P.vorticity_posterior(field, np.array([[0.0, np.nan]]))


def test_benjamini_hochberg_matches_scipy():
    rng = np.random.default_rng(3)
    for _ in range(100):
        p = rng.uniform(size=int(rng.integers(1, 80))) ** rng.uniform(0.3, 4.0)
        # reference: scipy.stats.false_discovery_control (BH-adjusted p-values) ≤ α ⇔ rejected
        expected = stats.false_discovery_control(p, method="bh") <= 0.05
        np.testing.assert_array_equal(P.benjamini_hochberg(p, 0.05), expected)


def test_hull_grid_membership_matches_polygon_test():
    rng = np.random.default_rng(4)
    tri = np.array([[0.0, 0.0], [4000.0, 0.0], [1000.0, 3000.0]])
    weights = rng.dirichlet(np.ones(3), 400)
    pts = np.vstack([tri, weights @ tri])
    grid = P.hull_grid(pts, spacing_m=100.0)
    # reference: matplotlib.path.Path.contains_points on the triangle (the hull of the points)
    inside = MplPath(tri).contains_points(grid.all_points_m)
    nodes = grid.all_points_m[inside != grid.inside.ravel()]
    edges = tri[[1, 2, 0]] - tri
    rel = nodes[:, None, :] - tri
    dist = np.abs(edges[:, 0] * rel[..., 1] - edges[:, 1] * rel[..., 0]) / np.linalg.norm(edges, axis=1)
    assert np.all(np.min(dist, axis=1) < 1e-6 * 4000.0)      # they may disagree only on the boundary
    perimeter = np.sum(np.linalg.norm(edges, axis=1))
    # nodes × h² approximates the area to within about perimeter × h (boundary nodes count)
    assert abs(grid.inside.sum() * 100.0**2 - 0.5 * 4000.0 * 3000.0) < perimeter * 100.0
    np.testing.assert_allclose(np.diff(grid.axes_m[0]), 100.0, rtol=1e-12)


def test_joint_part_covariance_matches_cov_between():
    field = exact_field("helmholtz", curl_free_velocity_scale_m_s=0.1, curl_free_length_scale_m=1500.0)
    pts = POINTS[:3]
    cov = np.asarray(P.joint_part_covariance(field, jnp.asarray(pts)))
    g, d = pts.shape
    for p, part_p in enumerate(P.PARTS):
        for q, part_q in enumerate(P.PARTS):
            for i in range(g):
                for j in range(g):
                    block = cov[(p * g + i) * d:(p * g + i + 1) * d, (q * g + j) * d:(q * g + j + 1) * d]
                    ref = np.asarray(field.cov_between(jnp.asarray(pts[i]), jnp.asarray(pts[j]), part_p, part_q))
                    np.testing.assert_allclose(block, ref, rtol=1e-12, atol=1e-18)
    # the parts are independent a priori but not a posteriori
    assert np.max(np.abs(cov[: g * d, g * d:])) > 1e-6 * np.max(np.abs(cov))


def test_split_delta_method_std_matches_monte_carlo():
    field = exact_field("helmholtz", n=40, curl_free_velocity_scale_m_s=0.1)
    grid = P.hull_grid(np.asarray(field.params.inducing_m), n_cells=60)
    split = P.helmholtz_split(field, grid.points_m)
    x = jnp.asarray(grid.points_m)
    means = np.concatenate([np.asarray(P.part_means(field, x, p)).ravel() for p in P.PARTS])
    cov = np.asarray(P.joint_part_covariance(field, x))
    vals, vecs = np.linalg.eigh(cov)
    draws = means + np.random.default_rng(5).standard_normal((4000, means.size)) @ (vecs * np.sqrt(np.clip(vals, 0, None))).T
    df, cf = draws.reshape(4000, 2, -1).transpose(1, 0, 2)
    frac = np.sum(cf**2, axis=1) / (np.sum(cf**2, axis=1) + np.sum(df**2, axis=1))
    # reference: Monte Carlo over joint posterior samples; the delta method is first order, so 25 %
    np.testing.assert_allclose(split.std, np.std(frac), rtol=0.25)
    assert 0.0 < split.fraction < 1.0 and split.interval[0] <= split.fraction <= split.interval[1]


def test_split_fixed_by_model_and_needs_helmholtz():
    assert P.helmholtz_split(exact_field("divergence-free"), POINTS).fraction == 0.0
    assert P.helmholtz_split(exact_field("curl-free"), POINTS).fraction == 1.0
    with pytest.raises(driftwise.InputError, match="helmholtz"):
        P.helmholtz_split(exact_field("independent"), POINTS)


def test_significance_in_3d_tests_each_vorticity_component():
    field = exact_field("independent", dim=3, n=25)
    grid = P.hull_grid(np.asarray(field.params.inducing_m), n_cells=40)
    post = P.vorticity_posterior(field, grid.points_m)
    sig = P.significance(post)
    assert sig.significant.shape == (grid.points_m.shape[0],)
    # a cell is significant when any of its three components is rejected by BH over all 3·G tests
    p = 2.0 * stats.norm.sf(np.abs(post.z))
    expected = np.any(stats.false_discovery_control(p.ravel(), method="bh").reshape(p.shape) <= 0.05, axis=1)
    np.testing.assert_array_equal(sig.significant, expected)
    np.testing.assert_allclose(sig.max_abs_z, np.max(np.abs(post.z)), rtol=1e-12)
