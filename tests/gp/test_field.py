"""Tests for driftwise.field: exact-GP reference, Titsias bound, part posteriors, constraints, jit/vmap."""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern

import driftwise  # noqa: F401  (switches on float64)
from driftwise.data.observations import Observations
from driftwise.errors import InputError
from driftwise.gp import field as fld
from driftwise.gp.kernels import BASES

SIGMA = 0.3        # m/s
ELL = 900.0        # m
K_DIFF = 0.05      # m²/s
SIGMA0 = 0.01      # m/s
POS_ERR = 10.0     # m


def _observations(n, dim, seed):
    """Noisy samples of a smooth invented flow, with uneven time steps (heteroscedastic noise)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 4 * ELL, (n, dim))
    phase = x @ rng.normal(size=(dim, dim)) / ELL
    v = 0.25 * np.sin(phase) + 0.1 * np.cos(1.3 * phase[:, ::-1])
    dt = rng.uniform(600.0, 3600.0, n)
    r = K_DIFF * 2 / dt + 2 * POS_ERR**2 / dt**2 + SIGMA0**2    # noise variance per component, m²/s²
    v = v + np.sqrt(r)[:, None] * rng.normal(size=(n, dim))
    obs = Observations(position_m=x, velocity_m_s=v, dt_s=dt, time_s=np.cumsum(dt),
                       track_index=np.zeros(n, dtype=int), position_error_m=POS_ERR)
    return obs, r


def _params(family, dim, inducing, base="squared-exponential"):
    return fld.init_params(family, dim, inducing, velocity_scale_m_s=SIGMA, length_scale_m=ELL,
                           diffusivity_m2_s=K_DIFF, noise_floor_m_s=SIGMA0, base=base,
                           curl_free_velocity_scale_m_s=0.6 * SIGMA, curl_free_length_scale_m=1.4 * ELL)


N_OBS, N_INDUCING = 40, 12   # shared shapes so that compiled functions are reused across tests


@jax.jit
def _dense(kernel, x, y):
    """K(X, Y) flattened (n·d, m·d), compiled once per kernel structure and shape."""
    return kernel.gram_matrix(x, y)


def _fitted(family, dim, *, n=N_OBS, m=N_INDUCING, seed=0, base="squared-exponential"):
    obs, _ = _observations(n, dim, seed)
    z = np.random.default_rng(seed + 100).uniform(0, 4 * ELL, (m, dim))
    batch = fld.batch_from_observations(obs)
    return fld.FlowField.from_params(fld.optimal_q(_params(family, dim, z, base), batch)), batch


# ---------------------------------------------------------------------------------------------
# Exact-GP reference (scikit-learn), Z = X
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("base", list(BASES))
def test_optimal_q_with_inducing_at_data_reproduces_exact_gp(base):
    # Titsias 2009 (Variational learning of inducing variables in sparse GPs, sec. 3): with Z = X the bound is
    # tight, so the optimal q gives the exact posterior and the ELBO equals the exact log marginal likelihood.
    # Reference: scikit-learn GaussianProcessRegressor with fixed hyperparameters (optimizer=None), the
    # heteroscedastic noise variances r_n as alpha, and y of two independent outputs.
    obs, r = _observations(40, 2, seed=1)
    batch = fld.batch_from_observations(obs)
    params = fld.optimal_q(_params("independent", 2, obs.position_m, base), batch)
    field = fld.FlowField.from_params(params)
    test_points = np.random.default_rng(2).uniform(-ELL, 5 * ELL, (30, 2))
    mean, cov = field.predict(test_points)

    scalar = RBF(ELL, "fixed") if base == "squared-exponential" else Matern(ELL, "fixed", nu=2.5)
    gpr = GaussianProcessRegressor(ConstantKernel(SIGMA**2, "fixed") * scalar, alpha=r, optimizer=None,
                                   normalize_y=False).fit(obs.position_m, obs.velocity_m_s)
    ref_mean, ref_std = gpr.predict(test_points, return_std=True)
    np.testing.assert_allclose(mean, ref_mean, rtol=1e-6, atol=1e-6 * np.abs(ref_mean).max())
    np.testing.assert_allclose(np.sqrt(np.diagonal(cov, axis1=1, axis2=2)), ref_std, rtol=1e-6, atol=0)
    np.testing.assert_allclose(cov[:, 0, 1], 0.0, rtol=0, atol=1e-12 * SIGMA**2)
    # rtol 1e-6: the jitter δ ≈ 2e-10 σ² on K_ZZ shifts the bound by about ½ Σ δ/r_n (≈ 1e-6 nats here).
    np.testing.assert_allclose(float(fld.elbo(params, batch, 40)), gpr.log_marginal_likelihood_value_, rtol=1e-6)


def test_helmholtz_part_posteriors_match_dense_conditioning():
    # Z = X, so the part posteriors are exact Gaussian conditioning (Rasmussen & Williams 2006, eqs. 2.23-2.24,
    # with y = v_df + v_cf + noise and independent parts): E[v_a(x)|y] = K_a(x,X)(K_XX + R)^{-1} y,
    # Cov[v_a(x), v_b(x')|y] = K_a(x,x')δ_ab − K_a(x,X)(K_XX + R)^{-1} K_b(X,x'), computed densely with scipy.
    obs, r = _observations(N_OBS, 2, seed=3)
    # A small jitter (multiple 100, δ ≈ 2e-14 σ²): with Z = X the part posteriors deviate from exact
    # conditioning by O(δ/λ_min(K_XX)), measured as 6e-7 m/s at the default multiple 1e6 and 6e-11 at 100.
    batch = fld.batch_from_observations(obs)
    params = fld.optimal_q(_params("helmholtz", 2, obs.position_m), batch, jitter_multiple=100.0)
    field = fld.FlowField.from_params(params, jitter_multiple=100.0)
    parts = field.params.kernel.parts
    x = jnp.asarray(obs.position_m)
    c = np.asarray(_dense(field.params.kernel, x, x)) + np.diag(np.repeat(r, 2))
    factor = scipy.linalg.cho_factor(c)
    alpha = scipy.linalg.cho_solve(factor, obs.velocity_m_s.reshape(-1))
    p, q = jnp.array([1000.0, 1500.0]), jnp.array([2200.0, 800.0])
    ours = jax.jit(_part_moments)(field, p, q)
    for a in parts:
        ka_p = np.asarray(_dense(parts[a], p[None], x))
        np.testing.assert_allclose(ours[_key("mean", a)], ka_p @ alpha, rtol=1e-6, atol=1e-9 * SIGMA)
        for b in parts:
            kb_q = np.asarray(_dense(parts[b], q[None], x))
            prior = np.asarray(parts[a].block(p, q)) if a == b else np.zeros((2, 2))
            expected = prior - ka_p @ scipy.linalg.cho_solve(factor, kb_q.T)
            np.testing.assert_allclose(ours[_key("cov", a, b)], expected, rtol=1e-6, atol=1e-9 * SIGMA**2)
    # The posterior cross-covariance between the parts is not zero although the prior one is.
    assert np.abs(np.asarray(ours[_key("cov", "divergence_free", "curl_free")])).max() > 1e-4 * SIGMA**2


def _key(*parts):
    return "/".join(part or "full" for part in parts)


def _part_moments(field, p, q):
    """All part means at p and part cross-covariances between p and q, in one compiled function."""
    names = (None, "divergence_free", "curl_free")
    out = {_key("mean", a): field.mean_at(p, a) for a in names}
    out.update({_key("cov", a, b): field.cov_between(p, q, a, b) for a in names for b in names})
    out[_key("cov_swapped", "curl_free", None)] = field.cov_between(q, p, None, "curl_free").T
    return out  # string keys: jit sorts pytree dict keys


def test_parts_add_up_to_the_whole():
    field, _ = _fitted("helmholtz", 2, seed=4)
    p, q = jnp.array([300.0, 2000.0]), jnp.array([900.0, 1700.0])
    out = jax.jit(_part_moments)(field, p, q)
    names = ("divergence_free", "curl_free")
    np.testing.assert_allclose(sum(out[_key("mean", a)] for a in names), out[_key("mean", None)],
                               rtol=1e-10, atol=1e-14)
    total = sum(out[_key("cov", a, b)] for a in names for b in names)
    np.testing.assert_allclose(total, out[_key("cov", None, None)], rtol=1e-9, atol=1e-14)
    np.testing.assert_allclose(out[_key("cov", "curl_free", None)], out[_key("cov_swapped", "curl_free", None)],
                               rtol=1e-10, atol=1e-14)


# ---------------------------------------------------------------------------------------------
# The ELBO for Z ≠ X against outside formulas
# ---------------------------------------------------------------------------------------------
def test_elbo_at_optimal_q_equals_titsias_collapsed_bound():
    # Titsias 2009, eq. 9 (diagonal noise R): F = log N(y | 0, Q + R) − ½ Σ_n tr(K_nn − Q_nn)/r_n with
    # Q = K_XZ K_ZZ^{-1} K_ZX; evaluated densely with scipy.stats.multivariate_normal.
    obs, r = _observations(N_OBS, 2, seed=5)
    z = np.random.default_rng(6).uniform(0, 4 * ELL, (N_INDUCING, 2))
    batch = fld.batch_from_observations(obs)
    params = fld.optimal_q(_params("helmholtz", 2, z, "matern52"), batch)
    kern, x = params.kernel, jnp.asarray(obs.position_m)
    zz = jnp.asarray(z)
    kzz = np.asarray(_dense(kern, zz, zz))
    kzz += fld.jitter_m2_s2(kern, zz[0], fld.JITTER_MULTIPLE) * np.eye(2 * N_INDUCING)
    kxz = np.asarray(_dense(kern, x, zz))
    q_ff = kxz @ np.linalg.solve(kzz, kxz.T)
    noise = np.repeat(r, 2)
    k_diag = np.diag(np.asarray(_dense(kern, x, x)))
    bound = (scipy.stats.multivariate_normal(np.zeros(2 * N_OBS), q_ff + np.diag(noise)).logpdf(
        obs.velocity_m_s.ravel()) - 0.5 * np.sum((k_diag - np.diag(q_ff)) / noise))
    best = float(fld.elbo(params, batch, N_OBS))
    np.testing.assert_allclose(best, bound, rtol=1e-9)
    # ... and it is the maximum over q: moving m or S away lowers the ELBO.
    rng = np.random.default_rng(7)
    for scale in (1e-3, 1e-1):
        moved = dataclasses.replace(params, q_mean=params.q_mean + scale * rng.normal(size=2 * N_INDUCING),
                                    q_sqrt_raw=params.q_sqrt_raw + scale * np.tril(rng.normal(size=(24, 24))))
        assert float(fld.elbo(moved, batch, N_OBS)) < best


def test_minibatch_elbo_matches_dense_reference():
    # Dense reference of Hensman et al. 2013 (eq. 7 with the Gaussian expectation in closed form):
    # (N/b) Σ [log N(y_n | μ_n, r_n I) − tr Σ_n / (2 r_n)] − KL(N(m, SSᵀ) ‖ N(0, I)), KL by the textbook
    # formula ½(tr Σ + mᵀm − k − log det Σ) with numpy's slogdet.
    obs, r = _observations(N_OBS, 2, seed=7)
    rng = np.random.default_rng(8)
    z = rng.uniform(0, 4 * ELL, (10, 2))
    params = _params("divergence-free", 2, z, "matern52")
    s = np.tril(rng.normal(scale=0.3, size=(20, 20)), -1) + np.diag(rng.uniform(0.2, 1.0, 20))
    params = dataclasses.replace(params, q_mean=jnp.asarray(rng.normal(size=20)), q_sqrt_raw=fld.q_sqrt_raw_from(s))
    idx = rng.choice(40, 16, replace=False)
    batch = fld.batch_from_observations(obs, idx)

    kern = params.kernel
    kzz = np.asarray(_dense(kern, jnp.asarray(z), jnp.asarray(z)))
    chol = np.linalg.cholesky(kzz + fld.jitter_m2_s2(kern, jnp.asarray(z[0]), fld.JITTER_MULTIPLE) * np.eye(20))
    m = np.asarray(params.q_mean)
    total = 0.0
    for n in idx:
        xn = jnp.asarray(obs.position_m[n])
        a = scipy.linalg.solve_triangular(chol, np.asarray(_dense(kern, xn[None], jnp.asarray(z))).T, lower=True).T
        cov = np.asarray(kern.block(xn, xn)) - a @ a.T + a @ s @ s.T @ a.T
        total += (scipy.stats.multivariate_normal(a @ m, r[n] * np.eye(2)).logpdf(obs.velocity_m_s[n])
                  - np.trace(cov) / (2 * r[n]))
    sq = s @ s.T
    kl = 0.5 * (np.trace(sq) + m @ m - 20 - np.linalg.slogdet(sq)[1])
    np.testing.assert_allclose(float(fld.kl_divergence(params)), kl, rtol=1e-10)
    np.testing.assert_allclose(float(fld.elbo(params, batch, 40)), 40 / 16 * total - kl, rtol=1e-10)


def test_prior_q_gives_the_prior():
    obs, _ = _observations(5, 3, seed=9)
    field = fld.FlowField.from_params(_params("curl-free", 3, obs.position_m))
    pts = np.random.default_rng(10).uniform(0, 4 * ELL, (6, 3))
    mean, cov = field.predict(pts)
    np.testing.assert_allclose(mean, 0.0, rtol=0, atol=1e-15)
    np.testing.assert_allclose(cov, np.broadcast_to(SIGMA**2 * np.eye(3), (6, 3, 3)), rtol=1e-9, atol=1e-12 * SIGMA**2)
    np.testing.assert_allclose(jax.vmap(field.prior_variance_at)(jnp.asarray(pts)), cov, rtol=1e-9,
                               atol=1e-12 * SIGMA**2)


# ---------------------------------------------------------------------------------------------
# Constraints on posterior means and covariances (autodiff)
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("dim,base", [(2, "squared-exponential"), (3, "squared-exponential"), (2, "matern52")])
def test_posterior_obeys_the_kernel_constraint(dim, base):
    # (Matérn-5/2 in 3-D is covered by the prior-sample check in test_kernels.py.)
    rate = SIGMA / ELL   # velocity-gradient scale, 1/s
    pts = jnp.asarray(np.random.default_rng(11).uniform(0, 4 * ELL, (25, dim)))
    fields = {f: _fitted(f, dim, seed=12, base=base)[0] for f in ("divergence-free", "curl-free", "helmholtz")}
    cases = (("divergence-free", None), ("curl-free", None), ("helmholtz", "divergence_free"),
             ("helmholtz", "curl_free"))

    @jax.jit
    def jacobians(fields, pts):                                   # [n, i, a] = ∂v_i/∂x_a per case
        return [jax.vmap(jax.jacfwd(lambda x: fields[f].mean_at(x, part)))(pts) for f, part in cases]

    for (family, part), jac in zip(cases, jacobians(fields, pts)):
        jac = np.asarray(jac)
        div = np.trace(jac, axis1=1, axis2=2)
        curl = np.sqrt(np.sum((jac - jac.transpose(0, 2, 1)) ** 2, axis=(1, 2)) / 2)
        constrained, free = (div, curl) if "divergence" in (part or family) else (curl, div)
        assert np.abs(constrained).max() <= 1e-8 * rate, (family, part, np.abs(constrained).max(), np.abs(free).max())
        assert np.abs(free).max() >= 1e-3 * rate          # the posterior is not trivially zero
    # Posterior variance of the divergence of a divergence-free field (mixed second derivative of cov_between).
    mixed = jax.jit(jax.jacfwd(jax.jacrev(fields["divergence-free"].cov_between, argnums=0), argnums=1))(pts[0], pts[0])
    assert abs(float(jnp.einsum("ijij->", mixed))) <= 1e-8 * rate**2       # Var[div v] = Σ_ij ∂x_i ∂y_j C_ij


# ---------------------------------------------------------------------------------------------
# jit, vmap, recompilation, chunking
# ---------------------------------------------------------------------------------------------
def test_jit_equals_eager_and_no_recompilation():
    obs, _ = _observations(N_OBS, 2, seed=13)
    z = np.random.default_rng(14).uniform(0, 4 * ELL, (N_INDUCING, 2))
    elbo_jit = jax.jit(fld.elbo, static_argnames=("jitter_multiple",))
    params = _params("independent", 2, z)         # eager (op-by-op) evaluation is slow; keep the graph small
    for start in (0, 10):
        batch = fld.batch_from_observations(obs, np.arange(start, start + 16))
        params = jax.tree_util.tree_map(lambda a: a * 1.01, params)
        with jax.disable_jit():
            eager = fld.elbo(params, batch, N_OBS)
        np.testing.assert_allclose(elbo_jit(params, batch, N_OBS), eager, rtol=1e-12)
    assert elbo_jit._cache_size() == 1

    field = fld.FlowField.from_params(fld.optimal_q(params, fld.batch_from_observations(obs)))
    x, y = jnp.array([100.0, 2000.0]), jnp.array([1500.0, 300.0])
    on_field = jax.jit(lambda f, p, q: (f.mean_at(p), f.cov_between(p, q)))   # the field as a jit argument
    jit_mean, jit_cov = on_field(field, x, y)
    with jax.disable_jit():
        np.testing.assert_allclose(jit_mean, field.mean_at(x), rtol=1e-12, atol=1e-16)
        np.testing.assert_allclose(jit_cov, field.cov_between(x, y), rtol=1e-10, atol=1e-16)
    pts = np.random.default_rng(15).uniform(0, 4 * ELL, (50, 2))
    field.predict(pts)
    compiled = fld.predict_chunk._cache_size()
    mean, cov = field.predict(pts + 7.0)
    assert fld.predict_chunk._cache_size() == compiled
    np.testing.assert_allclose(mean, jax.vmap(field.mean_at)(jnp.asarray(pts + 7.0)), rtol=1e-10, atol=1e-14)


def test_vmap_shapes_and_chunked_predict(monkeypatch):
    field, _ = _fitted("helmholtz", 3, seed=16)
    pts = jnp.asarray(np.random.default_rng(17).uniform(0, 4 * ELL, (21, 3)))
    assert jax.vmap(field.mean_at)(pts).shape == (21, 3)
    assert jax.vmap(field.cov_between)(pts, pts[::-1]).shape == (21, 3, 3)
    assert jax.vmap(jax.jacfwd(field.mean_at))(pts).shape == (21, 3, 3)
    whole_mean, whole_cov = field.predict(pts)
    monkeypatch.setattr(fld, "PREDICT_CHUNK", 8)   # 21 points → chunks 8, 8, 5 (padded)
    mean, cov = field.predict(pts)
    assert mean.shape == (21, 3) and cov.shape == (21, 3, 3) and isinstance(mean, np.ndarray)
    np.testing.assert_allclose(mean, whole_mean, rtol=1e-12, atol=1e-16)
    np.testing.assert_allclose(cov, whole_cov, rtol=1e-12, atol=1e-18)
    np.testing.assert_allclose(cov, jax.vmap(lambda p: field.cov_between(p, p))(pts), rtol=1e-9, atol=1e-16)
    assert np.linalg.eigvalsh(cov).min() > 0
    assert field.predict(np.zeros((0, 3)))[0].shape == (0, 3)


# ---------------------------------------------------------------------------------------------
# Observations, metadata, bad input
# ---------------------------------------------------------------------------------------------
def test_batch_coefficients_and_metadata():
    obs, r = _observations(12, 2, seed=18)
    batch = fld.batch_from_observations(obs, [3, 5])
    np.testing.assert_allclose(batch.random_walk_coefficient_s_inv, 2 / obs.dt_s[[3, 5]], rtol=1e-15)
    np.testing.assert_allclose(batch.position_noise_var_m2_s2, 2 * POS_ERR**2 / obs.dt_s[[3, 5]] ** 2, rtol=1e-15)
    params = _params("independent", 2, obs.position_m[:4])
    np.testing.assert_allclose(fld.noise_variance_m2_s2(params, batch), r[[3, 5]], rtol=1e-12)
    field = fld.FlowField.from_params(params, frame={"kind": "metric"}, data_summary={"n_observations": 12},
                                      decorrelation_time_s=3600.0, position_error_m=POS_ERR, fit_info={"steps": 3})
    assert field.frame_dict == {"kind": "metric"} and field.data_summary == {"n_observations": 12}
    assert field.fit_info == {"steps": 3} and field.kernel_family == "independent"
    hp = field.hyperparameters
    np.testing.assert_allclose([hp["velocity_scale_m_s"], hp["length_scale_m"], hp["diffusivity_m2_s"],
                                hp["noise_floor_m_s"]], [SIGMA, ELL, K_DIFF, SIGMA0], rtol=1e-12)


def test_bad_input_is_an_input_error():
    obs, _ = _observations(6, 2, seed=19)
    field = fld.FlowField.from_params(_params("independent", 2, obs.position_m))
    with pytest.raises(InputError, match="shape"):
        field.predict(np.zeros((4, 3)))
    with pytest.raises(InputError, match="NaN"):
        field.predict(np.array([[0.0, np.nan]]))
    with pytest.raises(InputError, match="helmholtz"):
        field.mean_at(jnp.zeros(2), "curl_free")
    with pytest.raises(InputError, match="inducing"):
        _params("independent", 2, np.zeros((4, 3)))
    with pytest.raises(InputError, match="dt_s"):
        bad = dataclasses.replace(obs, dt_s=np.where(np.arange(6) == 2, -1.0, obs.dt_s))
        fld.batch_from_observations(bad)
