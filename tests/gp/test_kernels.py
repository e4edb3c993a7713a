"""Tests for driftwise.kernels: closed forms against autodiff and outside references, registry properties."""

from __future__ import annotations

import itertools

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern
from sweeps import KERNEL_CASES

import driftwise  # noqa: F401  (switches on float64)
from driftwise.errors import InputError
from driftwise.gp.kernels import BASES, CurlFree, DivergenceFree, Helmholtz, make_base, make_kernel

SIGMA = 0.3      # m/s
ELL = 800.0      # m
REGISTRY = KERNEL_CASES   # every family × base × dimension (tests/sweeps.py)


def _kernel(family, base, dim, sigma=SIGMA, ell=ELL):
    return make_kernel(family, dim, base=base, velocity_scale_m_s=sigma, length_scale_m=ell,
                       curl_free_velocity_scale_m_s=0.7 * sigma, curl_free_length_scale_m=1.3 * ell)


def _separations(dim, n=6, seed=0):
    return np.random.default_rng(seed).normal(scale=ELL, size=(n, dim))


# ---------------------------------------------------------------------------------------------
# Scalar bases against scikit-learn (outside reference library)
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("dim", [2, 3])
def test_base_values_match_scikit_learn(dim):
    # Reference: scikit-learn RBF and Matern(nu=2.5) (Rasmussen & Williams 2006, Gaussian Processes for
    # Machine Learning, eqs. 4.9 and 4.17; equation numbers from memory).
    x = np.random.default_rng(1).uniform(0, 3 * ELL, (12, dim))
    references = {
        "squared-exponential": ConstantKernel(SIGMA**2, "fixed") * RBF(ELL, "fixed"),
        "matern52": ConstantKernel(SIGMA**2, "fixed") * Matern(ELL, "fixed", nu=2.5),
    }
    for name, ref in references.items():
        base = make_base(name, velocity_scale_m_s=SIGMA, length_scale_m=ELL)
        ours = jax.vmap(jax.vmap(base.value, (0,)), (0,))(x[:, None, :] - x[None, :, :])
        np.testing.assert_allclose(ours, ref(x), rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("name", list(BASES))
@pytest.mark.parametrize("dim", [2, 3])
def test_closed_form_hessian_matches_autodiff_and_finite_differences(name, dim):
    base = make_base(name, velocity_scale_m_s=SIGMA, length_scale_m=ELL)
    unit = SIGMA**2 / ELL**2
    for r in _separations(dim):
        closed = base.hessian(jnp.asarray(r))
        auto = jax.hessian(base.value)(jnp.asarray(r))
        np.testing.assert_allclose(closed, auto, rtol=0, atol=1e-10 * unit)
        # Outside reference: central second differences of scikit-learn's kernel value, step h = 1e-3 ℓ
        # (truncation error O(h²/ℓ²) ≈ 1e-6 relative; the four-point mixed difference, common practice).
        ref = (ConstantKernel(SIGMA**2, "fixed") * (RBF(ELL, "fixed") if name == "squared-exponential"
                                                     else Matern(ELL, "fixed", nu=2.5)))
        h = 1e-3 * ELL
        value = lambda p: ref(np.zeros((1, dim)), p[None, :])[0, 0]
        fd = np.empty((dim, dim))
        for i, j in itertools.product(range(dim), repeat=2):
            ei, ej = np.eye(dim)[i] * h, np.eye(dim)[j] * h
            fd[i, j] = (value(r + ei + ej) - value(r + ei - ej) - value(r - ei + ej) + value(r - ei - ej)) / (4 * h * h)
        np.testing.assert_allclose(closed, fd, rtol=0, atol=1e-5 * unit)


@pytest.mark.parametrize("name", list(BASES))
def test_hessian_at_zero_is_finite_and_exact(name):
    # −H_k(0) = λσ²/ℓ² I with λ = 1 (SE) and 5/3 (Matérn-5/2), from the Taylor series
    # k = σ²(1 − ρ²/2 + …) and σ²(1 − 5ρ²/6 + …) (Rasmussen & Williams 2006, eq. 4.17 expanded by hand).
    base = make_base(name, velocity_scale_m_s=SIGMA, length_scale_m=ELL)
    lam = {"squared-exponential": 1.0, "matern52": 5.0 / 3.0}[name]
    for dim in (2, 3):
        zero = jnp.zeros(dim)
        expected = -lam * SIGMA**2 / ELL**2 * np.eye(dim)
        np.testing.assert_allclose(base.hessian(zero), expected, rtol=1e-14, atol=0)
        np.testing.assert_allclose(jax.hessian(base.value)(zero), expected, rtol=1e-14, atol=0)


# ---------------------------------------------------------------------------------------------
# Matrix kernels: closed forms against the autodiff construction from the scalar Hessian
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", list(BASES))
@pytest.mark.parametrize("dim", [2, 3])
def test_df_cf_blocks_equal_autodiff_construction(name, dim):
    # K_cf = −c H_k, K_df = c/(d−1) (H_k − tr H_k I) with c = ℓ²/λ (Narcowich & Ward 1994), H_k by jax.hessian.
    base = make_base(name, velocity_scale_m_s=SIGMA, length_scale_m=ELL)
    c = ELL**2 / base.curvature
    cf, df = CurlFree(base=base), DivergenceFree(base=base)
    y = jnp.asarray(np.random.default_rng(3).normal(size=dim))
    for r in list(_separations(dim, seed=4)) + [np.zeros(dim)]:
        x = y + jnp.asarray(r)
        h = jax.hessian(base.value)(x - y)
        np.testing.assert_allclose(cf.block(x, y), -c * h, rtol=0, atol=1e-10 * SIGMA**2)
        np.testing.assert_allclose(df.block(x, y), c / (dim - 1) * (h - jnp.trace(h) * jnp.eye(dim)),
                                   rtol=0, atol=1e-10 * SIGMA**2)


@pytest.mark.parametrize("dim", [2, 3])
def test_squared_exponential_blocks_match_design_formula(dim):
    # Closed forms (Narcowich & Ward 1994; design sheet), s = |r|²/ℓ²:
    #   K_cf = σ² e^{−s/2} (I − rrᵀ/ℓ²),  K_df = σ²/(d−1) e^{−s/2} (rrᵀ/ℓ² + (d − 1 − s) I).
    base = make_base("squared-exponential", velocity_scale_m_s=SIGMA, length_scale_m=ELL)
    for r in _separations(dim, seed=5):
        s = r @ r / ELL**2
        rr = np.outer(r, r) / ELL**2
        cf = SIGMA**2 * np.exp(-s / 2) * (np.eye(dim) - rr)
        df = SIGMA**2 / (dim - 1) * np.exp(-s / 2) * (rr + (dim - 1 - s) * np.eye(dim))
        np.testing.assert_allclose(CurlFree(base=base).block(jnp.asarray(r), jnp.zeros(dim)), cf,
                                   rtol=1e-12, atol=1e-16)
        np.testing.assert_allclose(DivergenceFree(base=base).block(jnp.asarray(r), jnp.zeros(dim)), df,
                                   rtol=1e-12, atol=1e-16)


@pytest.mark.parametrize("family,base,dim", REGISTRY)
def test_velocity_scale_is_the_prior_standard_deviation(family, base, dim):
    k = make_kernel(family, dim, base=base, velocity_scale_m_s=SIGMA, length_scale_m=ELL)
    total = 2.0 if family == "helmholtz" else 1.0   # Helmholtz: two parts with σ each
    np.testing.assert_allclose(k.block(jnp.ones(dim), jnp.ones(dim)), total * SIGMA**2 * np.eye(dim),
                               rtol=1e-13, atol=1e-18)


def test_helmholtz_is_the_sum_of_its_parts():
    k = _kernel("helmholtz", "matern52", 2)
    assert isinstance(k, Helmholtz)
    x, y = jnp.array([10.0, -300.0]), jnp.array([400.0, 50.0])
    parts = k.parts
    np.testing.assert_allclose(k.block(x, y), parts["divergence_free"].block(x, y) + parts["curl_free"].block(x, y),
                               rtol=1e-14, atol=1e-18)
    hp = k.hyperparameters()
    np.testing.assert_allclose([hp["curl_free_velocity_scale_m_s"], hp["curl_free_length_scale_m"]],
                               [0.7 * SIGMA, 1.3 * ELL], rtol=1e-12)
    np.testing.assert_allclose([hp["divergence_free_velocity_scale_m_s"], hp["divergence_free_length_scale_m"]],
                               [SIGMA, ELL], rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# Registry sweep: symmetry, positive semi-definiteness, finiteness at coincident points
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("family,base,dim", REGISTRY)
def test_gram_symmetric_and_positive_semidefinite(family, base, dim):
    k = _kernel(family, base, dim)
    x = jnp.asarray(np.random.default_rng(7).uniform(0, 4 * ELL, (30, dim)))

    @jax.jit
    def evaluate(x):
        return (k.gram_matrix(x, x), k.gram(x[:4], x[4:9]), k.gram(x[4:9], x[:4]), k.diag_blocks(x),
                jax.vmap(k.block)(x, x), k.block(x[1], x[3]))

    gram, blocks, blocks_swapped, diag, diag_ref, one = map(np.asarray, evaluate(x))
    assert gram.shape == (30 * dim, 30 * dim)
    scale = np.abs(gram).max()
    np.testing.assert_allclose(gram, gram.T, rtol=0, atol=1e-14 * scale)
    assert np.linalg.eigvalsh(gram).min() >= -1e-12 * scale
    # K(x, y) = K(y, x)ᵀ blockwise, and the flattening is point-major, component-minor.
    np.testing.assert_allclose(blocks, blocks_swapped.transpose(1, 0, 3, 2), rtol=0, atol=1e-14 * scale)
    np.testing.assert_allclose(gram[1 * dim + 1, 3 * dim + 0], one[1, 0], rtol=1e-14)
    np.testing.assert_allclose(diag, diag_ref, rtol=1e-14)


@pytest.mark.parametrize("family,base,dim", REGISTRY)
def test_derivatives_at_coincident_points_are_finite(family, base, dim):
    k = _kernel(family, base, dim)
    x = jnp.asarray(np.random.default_rng(8).normal(size=dim))

    @jax.jit
    def derivatives(kern, x):
        pair = jnp.stack([x, x])
        return (jax.hessian(lambda p: kern.block(p, x))(x),                        # (d, d, d, d)
                jax.jacfwd(jax.jacrev(kern.block, argnums=0), argnums=1)(x, x),    # ∂x ∂y K
                jax.grad(lambda kk: jnp.sum(kk.gram_matrix(pair, pair)))(kern))    # hyperparameter gradient

    wrt_x, mixed, grads = derivatives(k, x)
    assert np.all(np.isfinite(wrt_x)) and np.all(np.isfinite(mixed))
    assert all(np.all(np.isfinite(g)) for g in jax.tree_util.tree_leaves(grads))


@pytest.mark.parametrize("family,base", [(f, b) for f in ("curl-free", "divergence-free") for b in BASES])
def test_derivative_variance_at_zero_matches_taylor_series(family, base):
    # Var[∇·v] (curl-free) and Var[ω] (2-D divergence-free) equal c Δ²k(0) with c = ℓ²/λ; from the Taylor
    # series k = σ²(1 − q/2ℓ² + q²/8ℓ⁴ …) (SE) and σ²(1 − 5q/6ℓ² + 25q²/24ℓ⁴ …) (Matérn-5/2, series of
    # (1 + t + t²/3)e^{−t}), q = |r|², Δ²q² = 8d(d + 2): d(d+2)σ²/ℓ² and 5d(d+2)σ²/ℓ² respectively (d = 2).
    # Derived here by hand; checks the closed-form derivatives at r = 0 and their continuity.
    k = _kernel(family, base, 2)
    expected = (8.0 if base == "squared-exponential" else 40.0) * SIGMA**2 / ELL**2

    def derivative_variance(x, y):
        mixed = jax.jacfwd(jax.jacrev(k.block, argnums=0), argnums=1)(x, y)  # [i, j, a, b] = ∂x_a ∂y_b K_ij
        if family == "curl-free":
            return jnp.einsum("ijij->", mixed)                               # Cov[div v(x), div v(y)]
        eps = jnp.array([[0.0, 1.0], [-1.0, 0.0]])                           # ω = ∂x v_y − ∂y v_x
        return jnp.einsum("ia,jb,ijab->", eps, eps, mixed)

    x = jnp.array([120.0, -40.0])
    at_zero, nearby = jax.jit(jax.vmap(derivative_variance, (None, 0)))(x, jnp.stack([x, x + 1e-7 * ELL]))
    np.testing.assert_allclose(at_zero, expected, rtol=1e-12)
    np.testing.assert_allclose(nearby, expected, rtol=1e-5)


# ---------------------------------------------------------------------------------------------
# Constraint checks on samples (autodiff divergence and vorticity)
# ---------------------------------------------------------------------------------------------
def _sample_function(kernel, dim, seed):
    """A prior sample as a differentiable function: u ~ N(0, K_ZZ) at 25 points, v(x) = K(x, Z) K_ZZ^{-1} u."""
    rng = np.random.default_rng(seed)
    z = jnp.asarray(rng.uniform(0, 5 * ELL, (25, dim)))
    kzz = kernel.gram_matrix(z, z) + 1e-9 * SIGMA**2 * jnp.eye(25 * dim)
    u = jnp.linalg.cholesky(kzz) @ jnp.asarray(rng.normal(size=25 * dim))
    coef = jnp.linalg.solve(kzz, u)
    return lambda x: kernel.gram_matrix(x[None, :], z) @ coef


def _divergence(v, x):
    return jnp.trace(jax.jacfwd(v)(x))


def _vorticity_norm(v, x):
    j = jax.jacfwd(v)(x)                     # j[i, a] = ∂v_i/∂x_a
    w = j - j.T
    return jnp.sqrt(jnp.sum(w * w) / 2.0)    # |curl v| in 3-D, |ω| in 2-D


@pytest.mark.parametrize("base", list(BASES))
@pytest.mark.parametrize("dim", [2, 3])
def test_prior_samples_obey_constraints(base, dim):
    checks = np.random.default_rng(11).uniform(0, 5 * ELL, (40, dim))
    scale = SIGMA / ELL                       # a velocity-gradient scale, 1/s
    for family, constraint in (("divergence-free", _divergence), ("curl-free", _vorticity_norm)):
        v = _sample_function(make_kernel(family, dim, base=base, velocity_scale_m_s=SIGMA, length_scale_m=ELL),
                             dim, seed=12)
        other = _vorticity_norm if constraint is _divergence else _divergence
        values, others = jax.jit(jax.vmap(lambda x: (constraint(v, x), other(v, x))))(jnp.asarray(checks))
        assert np.max(np.abs(values)) <= 1e-8 * scale
        # The sample is not trivially zero: the unconstrained derivative is of order σ/ℓ.
        assert np.max(np.abs(others)) >= 0.1 * scale


# ---------------------------------------------------------------------------------------------
# jit, vmap, recompilation, bad input
# ---------------------------------------------------------------------------------------------
def test_gram_jit_equals_eager_and_compiles_once():
    k = _kernel("helmholtz", "matern52", 2)
    rng = np.random.default_rng(13)
    gram = jax.jit(lambda kern, x, y: kern.gram_matrix(x, y))
    for _ in range(2):
        x, y = jnp.asarray(rng.normal(size=(7, 2)) * ELL), jnp.asarray(rng.normal(size=(5, 2)) * ELL)
        k = jax.tree_util.tree_map(lambda a: a + 0.01, k)   # new hyperparameter values, same structure
        np.testing.assert_allclose(gram(k, x, y), k.gram_matrix(x, y), rtol=1e-13, atol=1e-16)
    assert gram._cache_size() == 1
    assert k.gram(x, y).shape == (7, 5, 2, 2) and k.diag_blocks(x).shape == (7, 2, 2)
    assert jax.vmap(k.block)(x[:5], y).shape == (5, 2, 2)


def test_every_kernel_has_its_own_treedef_and_compiled_code():
    # Regression guard: in jax 0.10.2 register_dataclass treedefs of different classes with the same layout
    # compare equal, and a jit cache then handed CurlFree the compiled code of DivergenceFree (observed as a
    # flaky constraint test).  The static name fields make every registry entry's treedef distinct.
    kernels = [_kernel(f, b, 2) for f, b, _ in REGISTRY[::2]]
    treedefs = [jax.tree_util.tree_structure(k) for k in kernels]
    assert not any(a == b for a, b in itertools.combinations(treedefs, 2))
    block = jax.jit(lambda kern, x, y: kern.block(x, y))
    x, y = jnp.array([100.0, -200.0]), jnp.array([-300.0, 400.0])
    for k in kernels:
        np.testing.assert_allclose(block(k, x, y), k.block(x, y), rtol=1e-12, atol=1e-18)
    assert block._cache_size() == len(kernels)


def test_bad_input_is_an_input_error():
    with pytest.raises(InputError, match="family"):
        make_kernel("spline", 2, velocity_scale_m_s=1.0, length_scale_m=1.0)
    with pytest.raises(InputError, match="2 or 3"):
        make_kernel("independent", 4, velocity_scale_m_s=1.0, length_scale_m=1.0)
    with pytest.raises(InputError, match="length_scale_m"):
        make_kernel("independent", 2, velocity_scale_m_s=1.0, length_scale_m=-5.0)
    with pytest.raises(InputError, match="base"):
        make_kernel("independent", 2, velocity_scale_m_s=1.0, length_scale_m=1.0, base="cubic")


@pytest.mark.parametrize("family,base,dim", REGISTRY)
@pytest.mark.parametrize("background", ["none", "linear"])
def test_weighted_sum_equals_the_gram_row_product(family, base, dim, background):
    # Σ_j K(x, z_j) w_j without the row against K(x, Z) w from the Gram matrix (same algebra, other route);
    # at x on an inducing point too (r = 0).
    rng = np.random.default_rng(11)
    z = rng.normal(scale=ELL, size=(9, dim))
    w = rng.normal(size=(9, dim))
    kern = make_kernel(family, dim, base=base, velocity_scale_m_s=SIGMA, length_scale_m=ELL,
                       curl_free_velocity_scale_m_s=0.7 * SIGMA, curl_free_length_scale_m=1.3 * ELL,
                       background=background, centre_m=np.zeros(dim))
    for x in (rng.normal(scale=ELL, size=dim), z[3]):
        want = np.asarray(kern.gram_matrix(jnp.asarray(x)[None], jnp.asarray(z)) @ jnp.asarray(w.ravel()))
        got = np.asarray(kern.weighted_sum(jnp.asarray(x), jnp.asarray(z), jnp.asarray(w)))
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-14 * np.abs(want).max())
