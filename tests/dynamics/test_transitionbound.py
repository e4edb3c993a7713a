"""The expected transition log density under a field posterior (driftwise.dynamics.transitionbound), linear case.

Outside references:
- A linear posterior mean μ(x) = A x with constant velocity-error covariance Σ: given the field the particle is an
  Ornstein–Uhlenbeck process dx = A x dt + √(2K) dβ, whose transition is N(Φ x, Q) with Φ = e^{AΔt} and Q by the
  block-matrix exponential of Van Loan (1978), IEEE TAC 23(3), Theorem 1 (scipy.linalg.expm).
- The field-error covariance of the end point V = ∫₀^Δt e^{A(Δt−s)} 2 w(s) Σ e^{Aᵀ(Δt−s)} ds, w(s) = τ(1 − e^{−s/τ})
  (Taylor 1921 memory), by adaptive quadrature (scipy.integrate.quad_vec); the expected log density is
  log N(x₁ | Φ x₀, Φ R Φᵀ + Q + R) − ½ tr((Φ R Φᵀ + Q + R)⁻¹ V) (Gaussian expectation of a quadratic form).
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.integrate
import scipy.linalg
from scipy.stats import multivariate_normal
from sweeps import MOMENT_METHODS

import driftwise  # noqa: F401  (float64)
from driftwise.dynamics.transitionbound import expected_jacobian, expected_log_likelihoods
from driftwise.dynamics.transitions import FixedStepRK4

A = np.array([[-0.3, 1.1], [-0.7, -0.2]])      # 1/s
K = 0.4                                         # m²/s
SIGMA = np.array([[0.05, 0.01], [0.01, 0.02]])  # m²/s²
TAU = 0.8                                       # s
R_VAR = 0.3**2                                  # m²


GROWTH = np.array([[0.02, 0.005], [0.005, 0.01]])   # m²/s² per unit of g · x


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class AffinePosterior:
    """μ(x) = A x + u, Σ(x) = Σ₀ + (g · x) GROWTH (a stand-in for ParamPosterior)."""

    matrix: jax.Array
    velocity: jax.Array
    sigma: jax.Array
    slope: jax.Array

    def mean_at(self, x):
        return self.matrix @ x + self.velocity

    def cov_at(self, x):
        return self.sigma + (self.slope @ x) * jnp.asarray(GROWTH)


def _reference(x0, x1, dt, sigma):
    d = 2
    block = scipy.linalg.expm(np.block([[-A, 2 * K * np.eye(d)], [np.zeros((d, d)), A.T]]) * dt)
    q = block[d:, d:].T @ block[:d, d:]
    phi = scipy.linalg.expm(A * dt)
    cov = phi @ (R_VAR * np.eye(d)) @ phi.T + q + R_VAR * np.eye(d)

    def integrand(s):
        e = scipy.linalg.expm(A * (dt - s))
        return e @ (2.0 * TAU * (1.0 - np.exp(-s / TAU)) * sigma) @ e.T

    v = scipy.integrate.quad_vec(integrand, 0.0, dt, epsabs=1e-13, epsrel=1e-11)[0]
    return multivariate_normal(phi @ x0, cov).logpdf(x1) - 0.5 * np.trace(np.linalg.solve(cov, v))


@pytest.mark.parametrize("method", MOMENT_METHODS, ids=lambda m: type(m).__name__)
@pytest.mark.parametrize("sigma", [np.zeros((2, 2)), SIGMA], ids=["no-field-error", "field-error"])
def test_linear_field_matches_van_loan_and_quadrature(method, sigma):
    rng = np.random.default_rng(4)
    n = 6
    dt = rng.choice([0.3, 1.7, 4.0], n) * rng.uniform(0.8, 1.2, n)
    start = rng.normal(0.0, 1.5, (n, 2))
    end = start + rng.normal(0.0, 1.0, (n, 2))
    post = AffinePosterior(jnp.asarray(A), jnp.zeros(2), jnp.asarray(sigma), jnp.zeros(2))
    got = expected_log_likelihoods(post, K, TAU, method, FixedStepRK4(0.01, 500), jnp.asarray(start),
                                   jnp.asarray(end), jnp.asarray(dt), R_VAR, 3)
    exact = [_reference(start[k], end[k], dt[k], sigma) for k in range(n)]
    np.testing.assert_allclose(np.asarray(got), exact, rtol=0, atol=1e-8)   # Van Loan 1978 + scipy quad_vec


@pytest.mark.parametrize("method", MOMENT_METHODS, ids=lambda m: type(m).__name__)
def test_field_error_varying_along_a_straight_path(method):
    # The bound takes Σ along the mean path linear in time between the fixes (transitionbound's docstring).
    # In a uniform stream ending exactly at the next fix that path is straight and uniform in time, so a Σ linear
    # in x is linear in time and the rule is exact: V = ∫₀^Δt 2 w(s) Σ(x₀ + U s) ds (scipy quad_vec).
    u, slope = np.array([0.8, -0.3]), np.array([0.04, 0.02])
    post = AffinePosterior(jnp.zeros((2, 2)), jnp.asarray(u), jnp.asarray(SIGMA), jnp.asarray(slope))
    start = np.array([[0.5, 1.0], [-1.0, 2.0]])
    dt = np.array([1.7, 4.0])
    end = start + u * dt[:, None]
    got = expected_log_likelihoods(post, K, TAU, method, FixedStepRK4(0.01, 500), jnp.asarray(start),
                                   jnp.asarray(end), jnp.asarray(dt), R_VAR, 2)
    for k in range(2):
        cov = (2 * R_VAR + 2 * K * dt[k]) * np.eye(2)

        def integrand(s):
            return 2.0 * TAU * (1.0 - np.exp(-s / TAU)) * np.asarray(post.cov_at(jnp.asarray(start[k] + u * s)))

        v = scipy.integrate.quad_vec(integrand, 0.0, dt[k], epsabs=1e-13, epsrel=1e-11)[0]
        exact = multivariate_normal(end[k], cov).logpdf(end[k]) - 0.5 * np.trace(np.linalg.solve(cov, v))
        np.testing.assert_allclose(float(got[k]), exact, rtol=0, atol=1e-8)


def test_expected_jacobian_is_c_times_the_inverse_of_p_and_finite_where_p_is_not_definite():
    # Stein's lemma: E[μ(x)(x − m)ᵀ] = E[∂μ/∂x] P, so J̄ = C P⁻¹ (numpy.linalg.solve as the reference).
    rng = np.random.default_rng(4)
    cross = rng.normal(size=(2, 2)) * 3.0
    root = rng.normal(size=(2, 2))
    cov = root @ root.T + 0.5 * np.eye(2)
    got = jax.jit(expected_jacobian)(jnp.asarray(cross), jnp.asarray(cov))
    np.testing.assert_allclose(np.asarray(got), np.linalg.solve(cov, cross.T).T, rtol=1e-12)
    assert np.all(np.asarray(expected_jacobian(jnp.asarray(cross), jnp.zeros((2, 2)))) == 0.0)
    # An RK4 stage of an elongated cloud under shear (eigenvalues +7e5 and −2e4 m², measured at 3-h fixes in the
    # Lamb–Oseen vortex): the inverse is taken on the positive part, here numpy.linalg.pinv of diag(7e5, 0).
    stage = np.diag([7e5, -2e4])
    got = expected_jacobian(jnp.asarray(cross), jnp.asarray(stage))
    np.testing.assert_allclose(np.asarray(got), cross @ np.linalg.pinv(np.diag([7e5, 0.0])), rtol=1e-12, atol=0)
    grads = jax.grad(lambda c, p: jnp.sum(expected_jacobian(c, p) ** 2), argnums=(0, 1))(jnp.asarray(cross),
                                                                                          jnp.asarray(stage))
    assert all(np.all(np.isfinite(np.asarray(g))) for g in grads)
