"""Gaussian moment propagation (driftwise.moments) against closed forms.

Outside references:
- Ornstein–Uhlenbeck mean e^{At} m0 and covariance by the block-matrix
  exponential of Van Loan (1978), "Computing integrals involving the matrix
  exponential", IEEE TAC 23(3), Theorem 1, evaluated with scipy.linalg.expm.
- Pure diffusion: Var grows as 2 K t (Einstein 1905, "Über die von der
  molekularkinetischen Theorie der Wärme geforderte Bewegung ...").
- Gaussian moments of monomials: Isserlis (1918), "On a formula for the
  product-moment coefficient of any order of a normal frequency distribution":
  E[Π ξ_i^{a_i}] = Π (a_i − 1)!! (0 if any a_i is odd) for ξ ~ N(0, I).
- Gauss–Hermite nodes/weights: numpy.polynomial.hermite_e.hermegauss.
- Beneš (1981), "Exact finite-dimensional filters for certain diffusions with
  nonlinear drift", Stochastics 5: dx = tanh(x) dt + dβ has the law
  p(x, t) ∝ cosh(x)/cosh(x0) N(x; x0, t), a two-Gaussian mixture with mean
  x0 + t tanh(x0) and variance t + t² (1 − tanh²(x0)).
"""

from __future__ import annotations

import itertools

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg
from numpy.polynomial.hermite_e import hermegauss
from sweeps import MOMENT_METHODS

import driftwise  # noqa: F401  (enables float64)
from driftwise.dynamics import moments
from driftwise.dynamics.moments import RK4, Dopri5, GaussHermite, Linearize, SphericalCubature, Unscented
from driftwise.dynamics.sde import SDE
from driftwise.errors import InputError

Partial = jax.tree_util.Partial

METHODS = MOMENT_METHODS   # every moment method of the registry (tests/sweeps.py)
INTEGRATORS = [RK4(step_s=0.01), Dopri5(rtol=1e-11, atol=1e-13, first_step_s=0.01)]

A_OU = np.array([[-0.3, 1.1], [-0.7, -0.2]])  # non-symmetric, complex eigenvalues
L_OU = np.array([[0.5, 0.0], [0.2, 0.3]])
M0 = np.array([1.0, -0.5])
P0 = np.array([[0.2, 0.05], [0.05, 0.1]])


def _linear_drift(a, x):
    return a @ x


def _constant_diffusion(d, x):
    return d


def ou_sde(a=A_OU, lmat=L_OU) -> SDE:
    return SDE(Partial(_linear_drift, jnp.asarray(a)), Partial(_constant_diffusion, jnp.asarray(lmat @ lmat.T)))


def ou_exact(t, a=A_OU, lmat=L_OU, m0=M0, p0=P0):
    """Van Loan (1978): expm([[-A, D], [0, Aᵀ]] t) = [[., F12], [0, F22]], Q = F22ᵀ F12."""
    d = a.shape[0]
    diff = lmat @ lmat.T
    block = scipy.linalg.expm(np.block([[-a, diff], [np.zeros((d, d)), a.T]]) * t)
    q = block[d:, d:].T @ block[:d, d:]
    phi = scipy.linalg.expm(a * t)
    return phi @ m0, phi @ p0 @ phi.T + q


def assert_rel(actual, expected, rtol):
    """Relative error measured against the array's largest magnitude (explicit rtol)."""
    np.testing.assert_allclose(actual, expected, rtol=rtol, atol=rtol * np.max(np.abs(expected)))


@pytest.mark.parametrize("integrator", INTEGRATORS, ids=["rk4", "dopri5"])
@pytest.mark.parametrize("method", METHODS, ids=lambda m: type(m).__name__)
def test_ornstein_uhlenbeck_matches_van_loan(method, integrator):
    times = np.array([0.0, 0.5, 2.0, 5.0])
    means, covs = moments.propagate(ou_sde(), M0, P0, times, method=method, integrator=integrator)
    for k, t in enumerate(times):
        mean_exact, cov_exact = ou_exact(t)
        assert_rel(means[k], mean_exact, rtol=1e-6)  # Van Loan 1978
        assert_rel(covs[k], cov_exact, rtol=1e-6)


def _zero_drift(x):
    return jnp.zeros_like(x)


def _isotropic(k, x):
    return 2.0 * k * jnp.eye(x.shape[-1])


@pytest.mark.parametrize("method", METHODS, ids=lambda m: type(m).__name__)
def test_pure_diffusion_is_einstein(method):
    k = 3.5  # m²/s
    sde = SDE(_zero_drift, Partial(_isotropic, jnp.asarray(k)))
    mean0 = np.array([100.0, -20.0, 5.0])
    times = np.array([0.0, 600.0, 3600.0, 86400.0])
    for cov0 in (np.zeros((3, 3)), np.diag([4.0, 9.0, 1.0])):  # a point release and a cloud
        means, covs = moments.propagate(sde, mean0, cov0, times, method=method, integrator=RK4(step_s=900.0))
        expected = cov0 + 2.0 * k * times[:, None, None] * np.eye(3)  # Einstein 1905
        np.testing.assert_allclose(covs, expected, rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(means, np.broadcast_to(mean0, means.shape), rtol=1e-14, atol=0)


# --------------------------------------------------------- cubature exactness


def isserlis_moment(powers) -> float:
    """E[Π ξ_i^{a_i}] for ξ ~ N(0, I): Π (a_i − 1)!!, zero for any odd a_i (Isserlis 1918)."""
    out = 1.0
    for a in powers:
        if a % 2:
            return 0.0
        out *= float(np.prod(np.arange(a - 1, 0, -2))) if a else 1.0
    return out


def monomials(d, degree):
    return [p for p in itertools.product(range(degree + 1), repeat=d) if sum(p) <= degree]


def rule_value(method, d, powers):
    points, weights = method.points_and_weights(d)
    return float(weights @ np.prod(points ** np.array(powers), axis=1))


@pytest.mark.parametrize("d", [1, 2, 3, 4])
@pytest.mark.parametrize("method", [SphericalCubature(), Unscented()], ids=["spherical", "unscented"])
def test_third_degree_rules_exact_to_degree_3_and_fail_at_4(method, d):
    for powers in monomials(d, 3):
        assert rule_value(method, d, powers) == pytest.approx(isserlis_moment(powers), abs=1e-12)
    # degree 4: both rules put no mass off the axes, so E[ξ1² ξ2²] = 1 comes out 0
    if d >= 2:
        powers = (2, 2) + (0,) * (d - 2)
        assert abs(rule_value(method, d, powers) - 1.0) == pytest.approx(1.0, abs=1e-12)
    # E[ξ1⁴] = 3: the spherical rule gives d (exact only for d = 3); unscented with κ = 3 − d gives 3
    powers = (4,) + (0,) * (d - 1)
    expected_rule = 3.0 if isinstance(method, Unscented) else float(d)
    assert rule_value(method, d, powers) == pytest.approx(expected_rule, abs=1e-12)


def test_unscented_weights_can_be_negative_and_stay_exact():
    method = Unscented()  # κ = 3 − d = −2 for d = 5: negative centre weight
    points, weights = method.points_and_weights(5)
    assert weights[0] < 0
    assert weights.sum() == pytest.approx(1.0, abs=1e-12)
    for powers in monomials(5, 3):
        assert rule_value(method, 5, powers) == pytest.approx(isserlis_moment(powers), abs=1e-12)


@pytest.mark.parametrize("order", [1, 2, 3, 4, 5])
@pytest.mark.parametrize("d", [1, 2])
def test_gauss_hermite_exact_to_2n_minus_1_and_fails_at_2n(order, d):
    method = GaussHermite(order=order)
    for powers in monomials(d, 2 * order - 1):
        assert rule_value(method, d, powers) == pytest.approx(isserlis_moment(powers), abs=1e-10)
    powers = (2 * order,) + (0,) * (d - 1)
    # the n-node rule misses E[ξ^{2n}] by n! (the squared norm of the monic He_n)
    missing = isserlis_moment(powers) - rule_value(method, d, powers)
    assert missing == pytest.approx(float(np.prod(np.arange(1, order + 1))), rel=1e-9)


@pytest.mark.parametrize("order", [1, 2, 3, 5, 8, 12])
def test_gauss_hermite_nodes_match_numpy(order):
    nodes, weights = hermegauss(order)  # weight exp(−x²/2), total √(2π)
    ours_nodes, ours_weights = moments.hermite_nodes_weights(order)
    np.testing.assert_allclose(ours_nodes, nodes, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(ours_weights, weights / np.sqrt(2 * np.pi), rtol=1e-10, atol=1e-15)


# -------------------------------------------------------- Beneš regression


def _tanh(x):
    return jnp.tanh(x)


def _unit(x):
    return jnp.eye(1)


BENES_X0 = 0.5
BENES_TIMES = np.array([0.0, 1.0, 2.0, 5.0])
# Errors (method − exact) at t = 1, 2, 5 recorded with RK4(step 1e-3): (mean errors, variance errors).
# Regression bounds: same sign, magnitude within ±15 % of the recorded value.
BENES_ERRORS = {
    "Linearize": ((0.1854, 0.6335, 2.2308), (-0.0565, -1.5788, -17.821)),
    "Unscented": ((0.0211, 0.1329, 0.7051), (-0.0431, -0.4364, -5.5607)),
    "SphericalCubature": ((-0.0778, -0.4049, -1.7694), (0.1307, 1.1409, 9.7105)),
    "GaussHermite": ((0.0211, 0.1329, 0.7051), (-0.0431, -0.4364, -5.5607)),
}


def benes_exact(t, x0=BENES_X0):
    """Mean and variance of the Beneš mixture (weights e^{±x0}/2cosh x0, means x0 ± t, variance t)."""
    return x0 + t * np.tanh(x0), t + t**2 * (1.0 - np.tanh(x0) ** 2)


def test_benes_mixture_formula_by_quadrature():
    # our algebra for the closed form, checked by integrating p ∝ cosh(x) N(x; x0, t) on a grid
    x = np.linspace(-60, 60, 200_001)
    for t in BENES_TIMES[1:]:
        p = np.cosh(x) * np.exp(-((x - BENES_X0) ** 2) / (2 * t))
        p /= np.trapezoid(p, x)
        mean = np.trapezoid(x * p, x)
        var = np.trapezoid((x - mean) ** 2 * p, x)
        np.testing.assert_allclose((mean, var), benes_exact(t), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("method", METHODS, ids=lambda m: type(m).__name__)
def test_benes_moment_errors_regression(method):
    means, covs = moments.propagate(
        SDE(_tanh, _unit), [BENES_X0], [[0.0]], BENES_TIMES, method=method, integrator=RK4(step_s=1e-3)
    )
    mean_exact, var_exact = benes_exact(BENES_TIMES[1:])
    mean_err = np.asarray(means[1:, 0]) - mean_exact
    var_err = np.asarray(covs[1:, 0, 0]) - var_exact
    recorded_mean, recorded_var = BENES_ERRORS[type(method).__name__]
    for got, want in zip(np.concatenate([mean_err, var_err]), recorded_mean + recorded_var):
        assert np.sign(got) == np.sign(want)
        assert abs(got) == pytest.approx(abs(want), rel=0.15)


def test_benes_gauss_hermite_improves_with_order():
    # higher-order rules capture more of the non-Gaussian closure: the t = 1 mean error shrinks
    errs = []
    for order in (3, 10):
        means, _ = moments.propagate(
            SDE(_tanh, _unit), [BENES_X0], [[0.0]], BENES_TIMES[:2], method=GaussHermite(order), integrator=RK4(1e-2)
        )
        errs.append(abs(float(means[1, 0]) - benes_exact(1.0)[0]))
    assert errs[1] < 0.2 * errs[0]


# --------------------------------------------------- integrators and compiling


def _rk4_final_error(step):
    means, covs = moments.propagate(ou_sde(), M0, P0, [0.0, 4.0], method=Linearize(), integrator=RK4(step_s=step))
    mean_exact, cov_exact = ou_exact(4.0)
    return np.linalg.norm(means[-1] - mean_exact) + np.linalg.norm(covs[-1] - cov_exact)


def _dopri_fixed_step_error(n):
    a = jnp.asarray(A_OU)
    y = jnp.asarray(M0)
    for _ in range(n):
        y, _ = moments.dopri5_step(lambda v: a @ v, y, 4.0 / n)
    return float(np.linalg.norm(y - ou_exact(4.0)[0]))


def test_rk4_is_fourth_order():
    steps = np.array([0.5, 0.25, 0.125, 0.0625])
    errors = np.array([_rk4_final_error(h) for h in steps])
    slope = np.polyfit(np.log(steps), np.log(errors), 1)[0]
    assert slope == pytest.approx(4.0, abs=0.2)  # Kutta 1901: global error O(h⁴)


def test_dormand_prince_fifth_order_solution():
    ns = np.array([8, 16, 32, 64])
    errors = np.array([_dopri_fixed_step_error(n) for n in ns])
    slope = np.polyfit(np.log(4.0 / ns), np.log(errors), 1)[0]
    assert slope == pytest.approx(5.0, abs=0.3)  # Dormand & Prince 1980: order 5


def test_dopri5_error_follows_tolerance_and_flags_exhaustion():
    exact = ou_exact(5.0)
    errs = []
    for rtol in (1e-4, 1e-8):
        m, p = moments.propagate(ou_sde(), M0, P0, [0.0, 5.0], method=Linearize(), integrator=Dopri5(rtol=rtol, atol=rtol))
        errs.append(np.max(np.abs(np.asarray(p[-1]) - exact[1])))
    assert errs[0] < 1e-3 and errs[1] < 1e-7 and errs[1] < 1e-2 * errs[0]
    m, p = moments.propagate(
        ou_sde(), M0, P0, [0.0, 5.0], method=Linearize(), integrator=Dopri5(rtol=1e-12, atol=1e-14, max_steps=3)
    )
    assert np.all(np.isnan(m[-1])) and np.all(np.isfinite(m[0]))


def test_jit_equals_eager():
    times = np.array([0.0, 0.1, 0.2])
    for method in METHODS:
        jitted = moments.propagate(ou_sde(), M0, P0, times, method=method, integrator=RK4(step_s=0.1))
        with jax.disable_jit():
            eager = moments.propagate(ou_sde(), M0, P0, times, method=method, integrator=RK4(step_s=0.1))
        for a, b in zip(jitted, eager):
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-14)


def test_batch_shapes_and_agreement_with_single_release():
    rng = np.random.default_rng(3)
    means0 = rng.normal(size=(5, 2))
    root = rng.normal(size=(5, 2, 2)) * 0.3
    covs0 = root @ np.swapaxes(root, 1, 2)
    times = np.array([0.0, 1.0, 2.5])
    means, covs = moments.propagate_batch(ou_sde(), means0, covs0, times, integrator=RK4(step_s=0.05), chunk=2)
    assert means.shape == (5, 3, 2) and covs.shape == (5, 3, 2, 2)
    for r in range(5):
        m, p = moments.propagate(ou_sde(), means0[r], covs0[r], times, integrator=RK4(step_s=0.05))
        np.testing.assert_allclose(means[r], m, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(covs[r], p, rtol=1e-12, atol=1e-14)


def test_no_recompilation_on_second_batch_call():
    times = np.array([0.0, 1.0, 2.0])
    means0, covs0 = np.zeros((4, 2)), np.zeros((4, 2, 2))
    moments.propagate_batch(ou_sde(), means0, covs0, times, chunk=2, integrator=RK4(0.1))
    before = moments.propagate_batch_jit._cache_size()
    # new values everywhere (drift matrix, diffusion, releases, times, step), same shapes and method
    means, _ = moments.propagate_batch(
        ou_sde(a=A_OU.T, lmat=2 * L_OU), means0 + 1.0, covs0 + np.eye(2), times * 3, chunk=2, integrator=RK4(0.05)
    )
    assert moments.propagate_batch_jit._cache_size() == before
    exact = ou_exact(6.0, a=A_OU.T, lmat=2 * L_OU, m0=np.ones(2))[0]
    np.testing.assert_allclose(means[0, -1], exact, rtol=1e-6, atol=1e-6)  # RK4 at step 0.05: ~5e-8 error


def test_psd_cholesky_handles_singular_covariances():
    chol_fn = jax.jit(moments.psd_cholesky)
    spd = np.array([[4.0, 1.2], [1.2, 0.9]])
    np.testing.assert_allclose(chol_fn(jnp.asarray(spd)), np.linalg.cholesky(spd), rtol=1e-13, atol=0)
    assert np.all(np.asarray(chol_fn(jnp.zeros((3, 3)))) == 0.0)
    v = np.array([1.0, -2.0, 0.5])
    chol = np.asarray(chol_fn(jnp.asarray(np.outer(v, v))))
    np.testing.assert_allclose(chol @ chol.T, np.outer(v, v), rtol=1e-12, atol=1e-12)
    assert np.all(np.isfinite(chol))


@pytest.mark.parametrize(
    "mean0, cov0, times, match",
    [
        ([0.0, 0.0], np.eye(2), [1.0, 2.0], "start at 0"),
        ([0.0, 0.0], np.eye(2), [0.0, 2.0, 2.0], "increase strictly"),
        ([0.0, 0.0], np.eye(3), [0.0, 1.0], "does not match"),
        ([0.0, 0.0], np.array([[1.0, 0.0], [0.0, -1.0]]), [0.0, 1.0], "positive semi-definite"),
        ([0.0, np.nan], np.eye(2), [0.0, 1.0], "finite"),
    ],
)
def test_bad_input_raises_input_error(mean0, cov0, times, match):
    with pytest.raises(InputError, match=match):
        moments.propagate(ou_sde(), mean0, cov0, times)


def test_unscented_rejects_degenerate_scaling():
    with pytest.raises(InputError, match="alpha"):
        Unscented(alpha=1.0, kappa=-2.0).points_and_weights(2)


def test_empty_batch_raises_input_error():
    with pytest.raises(InputError, match="R >= 1"):
        moments.propagate_batch(ou_sde(), np.zeros((0, 2)), np.zeros((0, 2, 2)), [0.0, 1.0])
