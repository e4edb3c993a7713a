"""Is a single Gaussian a fair summary of a spread?  The measure against cases with a known answer.

Outside references:
- A linear Itô SDE dx = A x dt + B dβ has a Gaussian law whose moments solve the linear moment ODE
  (Särkkä & Solin 2019, "Applied Stochastic Differential Equations", ch. 6), so the cubature
  forecast is exact and its χ²₂ ellipses hold 50 % and 95 % of the particles (up to binomial error
  √(p(1 − p)/N)).
- A differential rotation u = ω(r) ẑ × x conserves the radius r of every particle, so without
  diffusion the exact position at time t is the start rotated by the angle ω(r) t: the true shares
  inside the ellipses are computed from exactly rotated samples, independent of Euler–Maruyama.
- The Hellinger distance between two Gaussians in closed form, checked against direct numerical
  integration of (√p − √q)² on a grid (scipy.stats.multivariate_normal densities).
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.stats import multivariate_normal

import driftwise  # noqa: F401  (float64)
from driftwise.dynamics import adequacy
from driftwise.dynamics.moments import RK4, SphericalCubature, propagate
from driftwise.dynamics.sde import SDE
from driftwise.errors import InputError

Partial = jax.tree_util.Partial
A = jnp.array([[-2e-5, 4e-5], [-3e-5, -1e-5]])  # 1/s: a decaying, rotating linear flow
TIMES_S = np.arange(0.0, 24 * 3600.0 + 1, 3600.0)
OMEGA0 = 2 * math.pi / (6 * 3600.0)   # 1/s: the core turns once in 6 h
R0_M = 2000.0


def _linear(x):
    return A @ x


def _diffusion(x):
    return 2.0 * 5.0 * jnp.eye(2)  # D = 2 K I with K = 5 m²/s


def _omega(r):
    return OMEGA0 * jnp.exp(-(r**2) / (2 * R0_M**2))


def _swirl(x):
    r = jnp.sqrt(x[0] ** 2 + x[1] ** 2)
    return _omega(r) * jnp.array([-x[1], x[0]])


def _tiny(x):
    return 2e-4 * jnp.eye(2)  # K = 1e-4 m²/s: a few metres in a day, nothing next to a 1 km cloud


def _forecast(sde, mean0, cov0):
    means, covs = propagate(sde, mean0, cov0, TIMES_S, method=SphericalCubature(), integrator=RK4(step_s=300.0))
    return np.asarray(means)[-1], np.asarray(covs)[-1]


def test_linear_drift_gaussian_is_exact_so_the_measure_is_small():
    sde = SDE(_linear, _diffusion)
    mean0, cov0 = np.array([3000.0, -1000.0]), np.diag([300.0**2, 150.0**2])
    mean, cov = _forecast(sde, mean0, cov0)
    result = adequacy.gaussian_adequacy(sde, mean0, cov0, TIMES_S, mean, cov, key=jax.random.key(1),
                                        particles=4000, step_s=120.0)
    # binomial errors at N = 4000: 0.0079 (50 %), 0.0034 (95 %); 4 s.e. plus 0.005 for the Euler-Maruyama bias
    assert abs(result.inside_50 - 0.5) < 4 * result.se_50 + 0.005
    assert abs(result.inside_95 - 0.95) < 4 * result.se_95 + 0.005
    # the Gaussian of the sample moments of 4000 exact draws is within H ~ 0.02 of the truth
    assert result.hellinger < 0.04
    assert not result.poor
    assert "checked" in result.sentence() and "ensemble" not in result.sentence()


def test_curved_flow_over_a_wide_cloud_is_poorly_summarised():
    sde = SDE(_swirl, _tiny)
    mean0, cov0 = np.array([R0_M, 0.0]), np.diag([900.0**2, 900.0**2])
    mean, cov = _forecast(sde, mean0, cov0)
    result = adequacy.gaussian_adequacy(sde, mean0, cov0, TIMES_S, mean, cov, key=jax.random.key(2),
                                        particles=3000, step_s=60.0)
    # exact positions: rotate each start by omega(r) t (r conserved); same Gaussian ellipses
    rng = np.random.default_rng(5)
    x0 = rng.multivariate_normal(mean0, cov0, size=200_000)
    r = np.hypot(x0[:, 0], x0[:, 1])
    angle = np.asarray(_omega(r)) * TIMES_S[-1]
    exact = np.column_stack([np.cos(angle) * x0[:, 0] - np.sin(angle) * x0[:, 1],
                             np.sin(angle) * x0[:, 0] + np.cos(angle) * x0[:, 1]])
    true_50 = adequacy.inside_fraction(exact, mean, cov, 0.5)
    true_95 = adequacy.inside_fraction(exact, mean, cov, 0.95)
    # the ensemble's shares agree with the exact ones within 4 binomial s.e. (+0.01 time-stepping bias)
    assert abs(result.inside_50 - true_50) < 4 * result.se_50 + 0.01
    assert abs(result.inside_95 - true_95) < 4 * result.se_95 + 0.01
    # and the answer is the known one: the sheared ring is not an ellipse
    assert abs(true_50 - 0.5) > 0.15
    assert result.poor
    assert "poor summary" in result.sentence() and "ensemble" in result.sentence()


def test_hellinger_closed_form_against_numerical_integration():
    m1, p1 = np.array([0.0, 0.0]), np.array([[1.0, 0.3], [0.3, 0.5]])
    m2, p2 = np.array([0.7, -0.2]), np.array([[1.5, -0.2], [-0.2, 0.8]])
    g = np.linspace(-7, 7, 701)
    gx, gy = np.meshgrid(g, g)
    pts = np.stack([gx, gy], -1)
    sq = (np.sqrt(multivariate_normal(m1, p1).pdf(pts)) - np.sqrt(multivariate_normal(m2, p2).pdf(pts))) ** 2
    h_numeric = math.sqrt(0.5 * sq.sum() * (g[1] - g[0]) ** 2)
    np.testing.assert_allclose(adequacy.hellinger_gaussian(m1, p1, m2, p2), h_numeric, rtol=1e-6, atol=0)
    assert adequacy.hellinger_gaussian(m1, p1, m1, p1) == pytest.approx(0.0, abs=1e-7)


def test_bad_summary_shape_is_a_clear_error():
    with pytest.raises(InputError, match="mean_m"):
        adequacy.gaussian_adequacy(SDE(_linear, _diffusion), [0.0, 0.0], np.zeros((2, 2)), TIMES_S, [1.0],
                                   np.eye(2), key=jax.random.key(0))
