"""The transition fit against maximum likelihood by scipy on an Ornstein–Uhlenbeck process.

Outside references:
- dx = A x dt + √(2K) dβ has the exact transition x(t + Δt) ~ N(Φ x(t), Q) with Φ = e^{AΔt} and Q from the
  block-matrix exponential of Van Loan (1978), "Computing integrals involving the matrix exponential", IEEE TAC
  23(3), Theorem 1 (scipy.linalg.expm).  The tracks are sampled from it exactly; each fix adds N(0, σ² I).
- The reference estimate maximises Σ_k log N(x_{k+1} | Φ x_k, Φ R Φᵀ + Q + R) (the same pairwise density
  driftwise scores) with scipy.optimize.minimize; standard errors from the inverse of the negative Hessian
  (central differences), the usual asymptotic covariance of a maximum-likelihood estimate (Fisher 1925).
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import scipy.optimize
from scipy.stats import multivariate_normal

import driftwise  # noqa: F401  (float64)
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics.sde import PointPosterior
from driftwise.dynamics.transitionfit import TRANSITION_SCHEDULE, fit_transitions
from driftwise.dynamics.transitions import transition_set
from driftwise.gp.schedule import Schedule
from driftwise.gp.training import fit

A_TRUE = np.array([[-3.0e-5, -1.2e-4], [1.0e-4, -1.0e-5]])    # 1/s: rotation with some strain and decay
K_TRUE = 1.0                                                   # m²/s
DT_S = 3 * 3600.0
SIGMA_M = 10.0
SCALE = 1e-4                                                   # A is optimised in units of 1e-4 1/s


def _transition(a: np.ndarray, k: float, dt: float) -> tuple[np.ndarray, np.ndarray]:
    """(Φ, Q) by Van Loan (1978): expm([[−A, D], [0, Aᵀ]] Δt) = [[., F12], [0, F22]], Q = F22ᵀ F12, D = 2K I."""
    d = a.shape[0]
    block = scipy.linalg.expm(np.block([[-a, 2.0 * k * np.eye(d)], [np.zeros((d, d)), a.T]]) * dt)
    return scipy.linalg.expm(a * dt), block[d:, d:].T @ block[:d, d:]


def ou_tracks(n_tracks: int = 30, n_fixes: int = 17, seed: int = 11):
    rng = np.random.default_rng(seed)
    phi, q = _transition(A_TRUE, K_TRUE, DT_S)
    lq = np.linalg.cholesky(q)
    rows = []
    for i in range(n_tracks):
        x = rng.uniform(-6000.0, 6000.0, 2)
        for j in range(n_fixes):
            fix = x + SIGMA_M * rng.standard_normal(2)
            rows.append((f"T{i:02d}", j * DT_S, fix[0], fix[1]))
            x = phi @ x + lq @ rng.standard_normal(2)
    return tracks_from_frame(pd.DataFrame(rows, columns=["track_id", "time_s", "x_m", "y_m"]))


def _negative_log_likelihood(theta: np.ndarray, start: np.ndarray, end: np.ndarray) -> float:
    phi, q = _transition(theta[:4].reshape(2, 2) * SCALE, float(np.exp(theta[4])), DT_S)
    r = SIGMA_M**2 * np.eye(2)
    cov = phi @ r @ phi.T + q + r
    return -float(np.sum(multivariate_normal(np.zeros(2), cov).logpdf(end - start @ phi.T)))


def _hessian(fun, theta: np.ndarray, eps: float = 1e-3) -> np.ndarray:
    n = theta.size
    hess = np.empty((n, n))
    basis = np.eye(n) * eps
    for i in range(n):
        for j in range(n):
            hess[i, j] = (fun(theta + basis[i] + basis[j]) - fun(theta + basis[i] - basis[j])
                          - fun(theta - basis[i] + basis[j]) + fun(theta - basis[i] - basis[j])) / (4 * eps**2)
    return hess


def scipy_estimate(trans) -> tuple[np.ndarray, np.ndarray]:
    """Maximum-likelihood θ = (A/1e-4 row-major, log K) and its standard errors."""
    def fun(theta):
        return _negative_log_likelihood(theta, trans.start_m, trans.end_m)

    found = scipy.optimize.minimize(fun, np.r_[np.zeros(4), 0.0], method="Nelder-Mead",
                                    options={"xatol": 1e-8, "fatol": 1e-8, "maxiter": 20_000, "maxfev": 20_000})
    found = scipy.optimize.minimize(fun, found.x, method="BFGS")
    return found.x, np.sqrt(np.diag(np.linalg.inv(_hessian(fun, found.x))))


def driftwise_estimate(tracks, trans) -> np.ndarray:
    """θ of the transition fit: A the posterior-mean velocity gradient averaged over the start fixes."""
    warm = fit(tracks, "independent", inducing=16, position_error_m=SIGMA_M, schedule=Schedule(steps=200),
               progress=False, background="linear")
    schedule = dataclasses.replace(TRANSITION_SCHEDULE, steps=300, batch_size=trans.n, learning_rate=0.03)
    field = fit_transitions(tracks, warm, position_error_m=SIGMA_M, schedule=schedule, progress=False)
    post = PointPosterior.from_field(field)
    jac = jax.vmap(jax.jacfwd(post.mean_at))(jnp.asarray(trans.start_m))
    return np.r_[np.asarray(jnp.mean(jac, axis=0)).ravel() / SCALE, np.log(field.diffusivity_m2_s)]


@pytest.mark.slow
def test_transition_fit_agrees_with_scipy_maximum_likelihood():
    tracks = ou_tracks()
    trans = transition_set(tracks, position_error_m=SIGMA_M)
    reference, std = scipy_estimate(trans)
    # sanity: the reference finds the truth it was simulated from (Van Loan 1978 sampling)
    truth = np.r_[A_TRUE.ravel() / SCALE, np.log(K_TRUE)]
    assert np.all(np.abs(reference - truth) < 4 * std), (reference, truth, std)
    ours = driftwise_estimate(tracks, trans)
    assert np.all(np.abs(ours - reference) < 2 * std), ((ours - reference) / std, std)
