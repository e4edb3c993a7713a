"""Euler–Maruyama ensemble (driftwise.ensemble) against exact laws.

Outside references:
- Beneš (1981), "Exact finite-dimensional filters for certain diffusions with
  nonlinear drift", Stochastics 5: dx = tanh(x) dt + dβ has mean
  x0 + t tanh(x0) and variance t + t² (1 − tanh²(x0)).
- Ornstein–Uhlenbeck moments by Van Loan (1978) with scipy.linalg.expm.
- Pure diffusion, Var = 2 K t (Einstein 1905); zero drift makes every
  Euler–Maruyama step exact in law (Kloeden & Platen 1992).
- Sampling variance of a Gaussian sample covariance, Var(s_ij) ≈ (σ_ii σ_jj + σ_ij²)/N
  for large N, since E[x_i² x_j²] = σ_ii σ_jj + 2 σ_ij² by Isserlis (1918), "On a
  formula for the product-moment coefficient of any order of a normal frequency
  distribution".
- numpy.mean / numpy.cov as the two-pass reference for the streamed sums.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from test_moments import BENES_TIMES, BENES_X0, M0, P0, benes_exact, ou_exact, ou_sde

import driftwise  # noqa: F401  (enables float64)
from driftwise.dynamics import ensemble
from driftwise.dynamics.ensemble import EulerMaruyama
from driftwise.dynamics.sde import SDE
from driftwise.errors import InputError

Partial = jax.tree_util.Partial


def _tanh(x):
    return jnp.tanh(x)


def _unit(x):
    return jnp.eye(1)


def _zero_drift(x):
    return jnp.zeros_like(x)


def _constant(d, x):
    return d


def test_benes_ensemble_matches_exact_law():
    result = ensemble.simulate(
        SDE(_tanh, _unit),
        [BENES_X0],
        [[0.0]],
        BENES_TIMES,
        method=EulerMaruyama(particles=100_000, step_s=0.005, chunk=25_000),
        key=jax.random.key(11),
    )
    mean_exact, var_exact = benes_exact(BENES_TIMES[1:])
    z_mean = (np.asarray(result.mean[1:, 0]) - mean_exact) / np.asarray(result.mean_se[1:, 0])
    z_var = (np.asarray(result.cov[1:, 0, 0]) - var_exact) / np.asarray(result.cov_se[1:, 0, 0])
    assert np.all(np.abs(z_mean) < 3.0), z_mean  # Beneš 1981, within 3 Monte Carlo standard errors
    assert np.all(np.abs(z_var) < 3.0), z_var


def test_ornstein_uhlenbeck_ensemble_within_three_standard_errors():
    times = np.array([0.0, 1.0, 3.0])
    result = ensemble.simulate(
        ou_sde(), M0, P0, times, method=EulerMaruyama(particles=40_000, step_s=0.002, chunk=10_000), key=jax.random.key(5)
    )
    for k, t in enumerate(times):
        mean_exact, cov_exact = ou_exact(t)  # Van Loan 1978
        assert np.all(np.abs(result.mean[k] - mean_exact) < 3.0 * result.mean_se[k])
        assert np.all(np.abs(result.cov[k] - cov_exact) < 3.0 * result.cov_se[k])


def test_pure_diffusion_and_standard_errors_against_gaussian_theory():
    d_rate = np.array([[2.0, 0.6], [0.6, 1.0]])  # D = L Lᵀ, m²/s
    n = 200_000
    t = 50.0
    result = ensemble.simulate(
        SDE(_zero_drift, Partial(_constant, jnp.asarray(d_rate))),
        [10.0, -3.0],
        np.zeros((2, 2)),
        [0.0, t],
        method=EulerMaruyama(particles=n, step_s=10.0, chunk=50_000),
        key=jax.random.key(2),
    )
    sigma = d_rate * t  # Einstein 1905: P(t) = D t for a point release
    assert np.all(np.abs(result.cov[1] - sigma) < 3.0 * result.cov_se[1])
    assert np.all(np.abs(np.asarray(result.mean[1]) - [10.0, -3.0]) < 3.0 * result.mean_se[1])
    # the fourth-moment standard error agrees with the Gaussian formula (Isserlis 1918)
    se_theory = np.sqrt((np.outer(np.diag(sigma), np.diag(sigma)) + sigma**2) / n)
    np.testing.assert_allclose(result.cov_se[1], se_theory, rtol=0.03, atol=0)
    np.testing.assert_allclose(result.mean_se[1], np.sqrt(np.diag(sigma) / n), rtol=0.01, atol=0)
    # a point release has exactly zero spread at t = 0
    np.testing.assert_allclose(result.cov[0], 0.0, rtol=0, atol=1e-12)


def test_streamed_sums_equal_two_pass_numpy_on_the_samples():
    # 7 chunks, the last one partly empty: the streamed moments must equal numpy on the kept samples
    result = ensemble.simulate(
        ou_sde(),
        M0,
        P0,
        [0.0, 0.5, 1.0],
        method=EulerMaruyama(particles=3_001, step_s=0.05, chunk=500),
        key=jax.random.key(9),
        keep_samples=True,
    )
    samples = np.asarray(result.samples)
    assert samples.shape == (3_001, 2)
    np.testing.assert_allclose(result.mean[-1], samples.mean(axis=0), rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(result.cov[-1], np.cov(samples.T), rtol=1e-10, atol=1e-13)
    centred = samples - samples.mean(axis=0)
    m22 = np.einsum("ni,ni,nj,nj->ij", centred, centred, centred, centred) / len(samples)
    se = np.sqrt((m22 - (centred.T @ centred / len(samples)) ** 2) / len(samples))
    np.testing.assert_allclose(result.cov_se[-1], se, rtol=1e-9, atol=1e-13)


def test_same_key_same_result_and_different_key_differs():
    method = EulerMaruyama(particles=1_000, step_s=0.1, chunk=400)
    args = (ou_sde(), M0, P0, [0.0, 1.0])
    a = ensemble.simulate(*args, method=method, key=jax.random.key(1))
    b = ensemble.simulate(*args, method=method, key=jax.random.key(1))
    c = ensemble.simulate(*args, method=method, key=jax.random.key(2))
    np.testing.assert_array_equal(a.cov, b.cov)
    assert np.max(np.abs(np.asarray(a.mean - c.mean))) > 1e-6
    assert a.samples is None and a.particles == 1_000


@pytest.mark.parametrize(
    "method, match",
    [
        (EulerMaruyama(particles=1), "particles"),
        (EulerMaruyama(chunk=0), "chunk"),
        (EulerMaruyama(step_s=-1.0), "step_s"),
    ],
)
def test_bad_options_raise_input_error(method, match):
    with pytest.raises(InputError, match=match):
        ensemble.simulate(ou_sde(), M0, P0, [0.0, 1.0], method=method, key=jax.random.key(0))


def test_key_is_keyword_only_and_required():
    with pytest.raises(TypeError):
        ensemble.simulate(ou_sde(), M0, P0, [0.0, 1.0], EulerMaruyama(), jax.random.key(0))
    with pytest.raises(TypeError):
        ensemble.simulate(ou_sde(), M0, P0, [0.0, 1.0])
