"""The transition log-likelihood (driftwise.dynamics.transitions) against closed forms.

Outside references:
- Ornstein–Uhlenbeck dx = A x dt + L dβ: the transition density from x is Gaussian with mean
  e^{AΔt} x and covariance Q(Δt) from the block-matrix exponential of Van Loan (1978),
  "Computing integrals involving the matrix exponential", IEEE TAC 23(3), Theorem 1
  (scipy.linalg.expm); with fix error R the start is N(x_k, R), so the next fix has
  N(e^{AΔt} x_k, Φ R Φᵀ + Q + R); its log density by scipy.stats.multivariate_normal.
- Gradients: central finite differences (jax.test_util.check_grads, float64).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg
from jax.test_util import check_grads
from scipy.stats import multivariate_normal
from sweeps import MOMENT_METHODS

import driftwise  # noqa: F401  (float64)
from driftwise.data.synthetic import LambOseenVortex, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics.moments import SphericalCubature
from driftwise.dynamics.sde import SDE, PointPosterior, transport_sde
from driftwise.dynamics.transitions import (
    FixedStepRK4,
    ParamPosterior,
    TransitionSet,
    log_likelihoods,
    transition_log_likelihoods,
    transition_set,
)
from driftwise.errors import InputError
from driftwise.gp.field import JITTER_MULTIPLE, kl_divergence
from driftwise.gp.schedule import Schedule
from driftwise.gp.training import fit

Partial = jax.tree_util.Partial

A_OU = np.array([[-0.3, 1.1], [-0.7, -0.2]])   # non-symmetric, complex eigenvalues (1/s)
L_OU = np.array([[0.5, 0.0], [0.2, 0.3]])      # D = L Lᵀ (m²/s)
SIGMA_POS = 0.3                                 # m


def _linear_drift(a, x):
    return a @ x


def _constant_diffusion(lmat, x):
    return lmat @ lmat.T


def ou_sde(a=A_OU, lmat=L_OU) -> SDE:
    return SDE(Partial(_linear_drift, jnp.asarray(a)), Partial(_constant_diffusion, jnp.asarray(lmat)))


def ou_transition_exact(x0, x1, dt, a=A_OU, lmat=L_OU, sigma=SIGMA_POS):
    """Van Loan (1978): expm([[-A, D], [0, Aᵀ]] Δt) = [[., F12], [0, F22]], Q = F22ᵀ F12."""
    d = a.shape[0]
    block = scipy.linalg.expm(np.block([[-a, lmat @ lmat.T], [np.zeros((d, d)), a.T]]) * dt)
    q = block[d:, d:].T @ block[:d, d:]
    phi = scipy.linalg.expm(a * dt)
    r = sigma**2 * np.eye(d)
    return multivariate_normal(phi @ x0, phi @ r @ phi.T + q + r).logpdf(x1)


def _ou_transitions(n=12, seed=3) -> TransitionSet:
    rng = np.random.default_rng(seed)
    dt = rng.choice([0.3, 0.5, 1.7, 4.0], n) * rng.uniform(0.8, 1.2, n)      # irregular, with long gaps
    start = rng.normal(0.0, 1.5, (n, 2))
    end = start + rng.normal(0.0, 1.0, (n, 2))
    return TransitionSet(start, end, dt, np.zeros(n, dtype=int), SIGMA_POS)


@pytest.mark.parametrize("method", MOMENT_METHODS, ids=lambda m: type(m).__name__)
def test_ornstein_uhlenbeck_transition_density_matches_van_loan(method):
    trans = _ou_transitions()
    got = transition_log_likelihoods(ou_sde(), trans, method=method, integrator=FixedStepRK4(0.01, 500),
                                     chunk=5)
    exact = [ou_transition_exact(trans.start_m[k], trans.end_m[k], trans.dt_s[k]) for k in range(trans.n)]
    np.testing.assert_allclose(got, exact, rtol=0, atol=1e-8)   # Van Loan 1978 + scipy.stats


@pytest.mark.slow
def test_ou_gradient_matches_central_differences():
    trans = _ou_transitions(n=6)
    integrator = FixedStepRK4(0.05, 100)

    def total(theta):
        a, lmat = theta[:4].reshape(2, 2), jnp.array([[theta[4], 0.0], [theta[5], theta[6]]])
        sde = SDE(Partial(_linear_drift, a), Partial(_constant_diffusion, lmat))
        return jnp.sum(log_likelihoods(sde, SphericalCubature(), integrator, jnp.asarray(trans.start_m),
                                       jnp.asarray(trans.end_m), jnp.asarray(trans.dt_s), SIGMA_POS**2, 4))

    theta = jnp.concatenate([jnp.asarray(A_OU).ravel(), jnp.array([0.5, 0.2, 0.3])])
    check_grads(jax.jit(total), (theta,), order=1, modes=["rev"], eps=1e-5, atol=1e-6, rtol=1e-6)  # central differences
    # and the gradient is the exact one of the Van Loan density (finite differences of scipy, step 1e-6)
    grad = np.asarray(jax.jit(jax.grad(total))(theta))
    exact = _van_loan_gradient(trans, np.asarray(theta))
    np.testing.assert_allclose(grad, exact, rtol=1e-4, atol=1e-5)


def _van_loan_gradient(trans, theta, eps=1e-6):
    def value(th):
        a, lmat = th[:4].reshape(2, 2), np.array([[th[4], 0.0], [th[5], th[6]]])
        return sum(ou_transition_exact(trans.start_m[k], trans.end_m[k], trans.dt_s[k], a, lmat)
                   for k in range(trans.n))

    basis = np.eye(theta.size)
    return np.array([(value(theta + eps * e) - value(theta - eps * e)) / (2 * eps) for e in basis])


def test_fixed_step_rk4_zero_length_steps_change_nothing():
    # a transition shorter than substeps × step_s must give the same answer as one with exactly its own steps
    trans = _ou_transitions(n=4)
    assert trans.dt_s.max() < 100 * 0.05
    a = transition_log_likelihoods(ou_sde(), trans, integrator=FixedStepRK4(0.05, 100))
    b = transition_log_likelihoods(ou_sde(), trans, integrator=FixedStepRK4(0.05, 160))
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)


def _small_vortex_fit():
    starts = np.array([[1500.0, 0.0], [0.0, 2500.0], [-2000.0, -1000.0], [500.0, -3000.0]])
    table = simulate_drifters(LambOseenVortex(7876.0, 2000.0), starts, duration_s=6 * 3600.0,
                              fix_interval_s=3 * 3600.0, diffusivity_m2_s=1.0, position_error_m=10.0, seed=4,
                              substeps=200)
    tracks = tracks_from_frame(table)
    field = fit(tracks, inducing=8, position_error_m=10.0, schedule=Schedule(steps=5), progress=False)
    return field, transition_set(tracks, position_error_m=10.0)


@pytest.mark.slow
def test_field_objective_gradient_matches_central_differences():
    field, trans = _small_vortex_fit()
    params = field.params
    integrator = FixedStepRK4(1800.0, 6)
    rows = (jnp.asarray(trans.start_m), jnp.asarray(trans.end_m), jnp.asarray(trans.dt_s))

    def objective(q_mean, log_k, q_sqrt_raw):
        p = params.__class__(params.kernel, params.inducing_m, q_mean, q_sqrt_raw, log_k, params.log_noise_floor_m_s)
        post = ParamPosterior.from_params(p, jitter_multiple=JITTER_MULTIPLE)
        sde = transport_sde(post, jnp.exp(log_k), 3000.0)
        return jnp.sum(log_likelihoods(sde, SphericalCubature(), integrator, *rows, 100.0, 8)) - kl_divergence(p)

    args = (params.q_mean, params.log_diffusivity_m2_s, params.q_sqrt_raw)
    check_grads(jax.jit(objective), args, order=1, modes=["rev"], eps=1e-6, atol=1e-5, rtol=1e-5)  # central differences


def test_param_posterior_equals_point_posterior():
    field, _ = _small_vortex_fit()
    post = ParamPosterior.from_params(field.params, jitter_multiple=field.jitter_multiple)
    point = PointPosterior.from_field(field)
    for x in (jnp.array([100.0, 200.0]), jnp.array([-2500.0, 900.0])):
        np.testing.assert_allclose(post.mean_at(x), point.mean_at(x), rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(post.cov_at(x), point.cov_at(x), rtol=1e-7, atol=1e-12)


def test_bad_transitions_are_refused():
    with pytest.raises(InputError, match="transition 1"):
        transition_log_likelihoods(ou_sde(), TransitionSet(np.zeros((2, 2)), np.ones((2, 2)), np.array([1.0, 0.0]),
                                                           np.zeros(2, int), 1.0))
    with pytest.raises(InputError, match="Tracks or Observations"):
        transition_set([1, 2, 3])
