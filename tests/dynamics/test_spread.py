"""Spread products: ellipses, probability inside a polygon, first arrival (driftwise.spread).

Outside references: closed forms (erf products for axis-aligned rectangles of an independent
Gaussian; chi-square law of the Mahalanobis distance), scipy.stats.multivariate_normal.cdf
(Genz's algorithm), scipy.integrate.dblquad, numpy.linalg.eigh, and Monte Carlo with
matplotlib.path for point-in-polygon.
"""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.path import Path
from scipy import integrate
from scipy.special import erf, ndtr
from scipy.stats import chi2, multivariate_normal, norm
from sweeps import METHOD_NAMES, decaying_rotation

from driftwise.dynamics.spread import (
    Release,
    as_releases,
    check_times,
    ellipse,
    first_arrival_time,
    make_spread,
    orientation_deg,
    probability_inside,
    semi_axes,
)
from driftwise.errors import InputError

N_MC = 1_000_000
COV = np.array([[900.0, 420.0], [420.0, 400.0]])   # m², correlated, anisotropic
MEAN = np.array([120.0, -40.0])                     # m


def _mc_fraction(mean, cov, polygon, seed):
    """Monte Carlo estimate of P(inside) and its standard error sqrt(p(1-p)/N) (binomial)."""
    x = np.random.default_rng(seed).multivariate_normal(mean, cov, size=N_MC)
    p = Path(np.asarray(polygon)).contains_points(x).mean()
    return p, np.sqrt(max(p * (1 - p), 1.0 / N_MC) / N_MC)


def _rect(x0, x1, y0, y1):
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], float)


# ---------------------------------------------------------------- closed forms
@pytest.mark.parametrize("half_side_sigma", [0.3, 1.0, 2.5, 6.0])
def test_centred_square_equals_erf_squared(half_side_sigma):
    # Closed form: for N(m, σ²I) and the square m ± a, P = erf(a / (√2 σ))² (independent components).
    sigma, m = 35.0, np.array([3.0, -7.0])
    a = half_side_sigma * sigma
    p = probability_inside(m, sigma**2 * np.eye(2), _rect(m[0] - a, m[0] + a, m[1] - a, m[1] + a))
    np.testing.assert_allclose(p, erf(a / (np.sqrt(2) * sigma)) ** 2, rtol=1e-12, atol=1e-15)


def test_offset_rectangle_matches_erf_product_and_scipy_cdf():
    # Closed form: independent components give a product of normal-CDF differences.
    sx, sy = 20.0, 50.0
    rect = _rect(10.0, 45.0, -80.0, 30.0)
    expected = (norm.cdf(45.0, 0, sx) - norm.cdf(10.0, 0, sx)) * (norm.cdf(30.0, 0, sy) - norm.cdf(-80.0, 0, sy))
    p = probability_inside([0.0, 0.0], np.diag([sx**2, sy**2]), rect)
    np.testing.assert_allclose(p, expected, rtol=1e-12, atol=1e-15)
    # Reference library: scipy.stats.multivariate_normal.cdf (Genz 1992 algorithm) by inclusion-exclusion,
    # for the correlated covariance where no erf product exists.
    x0, x1, y0, y1 = 60.0, 200.0, -70.0, 10.0
    cdf = lambda x, y: multivariate_normal.cdf([x, y], MEAN, COV, abseps=1e-12, releps=1e-12)  # noqa: E731
    ref = cdf(x1, y1) - cdf(x0, y1) - cdf(x1, y0) + cdf(x0, y0)
    np.testing.assert_allclose(probability_inside(MEAN, COV, _rect(x0, x1, y0, y1)), ref, rtol=1e-7, atol=1e-9)


# ---------------------------------------------------------------- Monte Carlo (issue 4: 10⁶ samples, 3 s.e.)
L_SHAPE = np.array([[60, -90], [200, -90], [200, -50], [100, -50], [100, 40], [60, 40]], float)
STAR = np.array([[MEAN[0] + r * np.cos(t), MEAN[1] + r * np.sin(t)]
                 for t, r in zip(np.linspace(0, 2 * np.pi, 10, endpoint=False), [60, 20] * 5)])


@pytest.mark.parametrize("name, polygon", [
    ("rotated square", MEAN + np.array([[0, -45], [45, 0], [0, 45], [-45, 0]], float) + [15.0, 5.0]),
    ("concave L", L_SHAPE),
    ("concave star", STAR),
])
def test_polygon_probability_matches_monte_carlo(name, polygon):
    # Monte Carlo reference: 10⁶ samples of numpy's multivariate_normal, point-in-polygon by matplotlib.path;
    # agreement within 3 binomial standard errors.
    p_mc, se = _mc_fraction(MEAN, COV, polygon, seed=7)
    p = probability_inside(MEAN, COV, polygon)
    assert 0.05 < p < 0.95, name
    np.testing.assert_allclose(p, p_mc, rtol=0, atol=3 * se)


def test_concave_polygon_matches_dblquad():
    # Reference: scipy.integrate.dblquad of the scipy normal density over the L shape, split in two rectangles.
    pdf = multivariate_normal(MEAN, COV).pdf
    f = lambda y, x: pdf([x, y])  # noqa: E731
    ref = (integrate.dblquad(f, 60, 200, -90, -50, epsabs=1e-12)[0]
           + integrate.dblquad(f, 60, 100, -50, 40, epsabs=1e-12)[0])
    np.testing.assert_allclose(probability_inside(MEAN, COV, L_SHAPE), ref, rtol=1e-8, atol=1e-11)


def test_far_ellipse_probability_is_tiny_and_matches_quadrature():
    # A 10 m-radius disc 6 Mahalanobis units from the mean: probability ≈ 1.3e-10.
    mean, cov = np.zeros(2), np.diag([100.0**2, 60.0**2])
    centre = np.array([600.0, 0.0])
    poly = ellipse(centre, np.eye(2) * 10.0**2 / chi2.ppf(0.95, 2), level=0.95, n=400)
    p = probability_inside(mean, cov, poly)
    # Tail bound: the polygon lies in the half-plane x >= 590 m, so P <= Φ(−590/100) (one-sided normal tail).
    assert 0.0 < p <= norm.sf(590.0 / 100.0)
    # Monte Carlo sees (almost) nothing: within 3 standard errors of zero hits.
    p_mc, se = _mc_fraction(mean, cov, poly, seed=11)
    np.testing.assert_allclose(p, p_mc, rtol=0, atol=3 * se)
    # Reference: scipy.integrate.quad over x of the normal density times the closed-form y-mass
    # Φ(up(x)/σy) − Φ(lo(x)/σy) between the polygon's upper and lower chains (convex, diagonal cov).
    upper, lower = poly[poly[:, 1] >= 0], poly[poly[:, 1] <= 0]
    upper, lower = upper[np.argsort(upper[:, 0])], lower[np.argsort(lower[:, 0])]
    x0, x1 = poly[:, 0].min(), poly[:, 0].max()

    def column(x):   # scipy.special.ndtr is the standard normal CDF Φ
        return (np.exp(-0.5 * (x / 100.0) ** 2) / (np.sqrt(2 * np.pi) * 100.0)
                * (ndtr(np.interp(x, *upper.T) / 60.0) - ndtr(np.interp(x, *lower.T) / 60.0)))

    knots = np.unique(np.clip(poly[:, 0], x0, x1))        # the chains are linear between vertices
    ref = sum(integrate.quad(column, lo_x, hi_x, epsabs=0, epsrel=1e-12)[0] for lo_x, hi_x in zip(knots[:-1], knots[1:]))
    np.testing.assert_allclose(p, ref, rtol=1e-6, atol=1e-15)  # documented absolute accuracy ~1e-15


def test_probability_is_vectorised_orientation_free_and_handles_points():
    covs = np.stack([COV * s for s in (0.1, 1.0, 10.0)])
    means = np.stack([MEAN + [10.0 * i, -5.0 * i] for i in range(4)])
    batch = probability_inside(means[:, None, :], covs[None], L_SHAPE)               # (4, 3)
    loop = np.array([[probability_inside(m, c, L_SHAPE) for c in covs] for m in means])
    np.testing.assert_allclose(batch, loop, rtol=1e-13, atol=1e-15)
    np.testing.assert_allclose(probability_inside(MEAN, COV, L_SHAPE[::-1]), probability_inside(MEAN, COV, L_SHAPE),
                               rtol=1e-13, atol=1e-15)   # clockwise input gives the same mass
    closed = np.vstack([L_SHAPE, L_SHAPE[:1]])
    np.testing.assert_allclose(probability_inside(MEAN, COV, closed), probability_inside(MEAN, COV, L_SHAPE),
                               rtol=1e-13, atol=1e-15)
    # A point release (zero covariance) is the indicator of the mean being inside (common practice limit).
    np.testing.assert_allclose(probability_inside([80.0, 0.0], np.zeros((2, 2)), L_SHAPE), 1.0, atol=1e-12)
    np.testing.assert_allclose(probability_inside([150.0, 0.0], np.zeros((2, 2)), L_SHAPE), 0.0, atol=1e-12)
    # 3-D: the horizontal marginal decides; the vertical component is ignored.
    cov3 = np.zeros((3, 3))
    cov3[:2, :2], cov3[2, 2], cov3[0, 2] = COV, 25.0, 10.0
    np.testing.assert_allclose(probability_inside([*MEAN, -3.0], cov3, L_SHAPE),
                               probability_inside(MEAN, COV, L_SHAPE), rtol=1e-13, atol=1e-15)


# ---------------------------------------------------------------- ellipses
@pytest.mark.parametrize("level", [0.5, 0.9, 0.95])
def test_ellipse_holds_chi_square_mass(level):
    # Chi-square law: (x−m)ᵀP⁻¹(x−m) ~ χ²₂, so the χ²₂⁻¹(level) ellipse holds `level` (Mahalanobis 1936).
    fine = ellipse(MEAN, COV, level=level, n=4000)
    np.testing.assert_allclose(probability_inside(MEAN, COV, fine), level, rtol=0, atol=2e-6)
    # Monte Carlo: the 72-gon's mass agrees with the exact polygon probability within 3 s.e.
    # (Seeds are fixed, so this is deterministic; a 3-s.e. band still fails ~0.3 % of seeds by chance.)
    coarse = ellipse(MEAN, COV, level=level, n=72)
    p_mc, se = _mc_fraction(MEAN, COV, coarse, seed=2026)
    np.testing.assert_allclose(probability_inside(MEAN, COV, coarse), p_mc, rtol=0, atol=3 * se)
    # ... and the Monte Carlo fraction of Mahalanobis² <= c is `level` within 3 s.e. (chi-square law).
    d = np.random.default_rng(2026).multivariate_normal(MEAN, COV, size=N_MC) - MEAN
    inside = np.einsum("ni,ij,nj->n", d, np.linalg.inv(COV), d) <= chi2.ppf(level, 2)
    np.testing.assert_allclose(inside.mean(), level, rtol=0, atol=3 * np.sqrt(level * (1 - level) / N_MC))
    # Every vertex lies on the ellipse: Mahalanobis² = chi2.ppf(level, 2) (scipy.stats.chi2).
    d = coarse - MEAN
    np.testing.assert_allclose(np.einsum("ni,ij,nj->n", d, np.linalg.inv(COV), d), chi2.ppf(level, 2), rtol=1e-10)


def test_semi_axes_and_orientation_match_numpy_eigh():
    # Reference: numpy.linalg.eigh; semi-axes √(c λ), major axis along the top eigenvector.
    lam, vec = np.linalg.eigh(COV)
    c = chi2.ppf(0.95, 2)
    np.testing.assert_allclose(semi_axes(COV, 0.95), np.sqrt(c * lam[::-1]), rtol=1e-12)
    angle = np.degrees(np.arctan2(vec[1, 1], vec[0, 1]))
    angle = (angle + 90.0) % 180.0 - 90.0
    np.testing.assert_allclose(orientation_deg(COV), angle, rtol=0, atol=1e-9)
    ring = ellipse(MEAN, COV, 0.95, n=8)
    assert ring.shape == (8, 2)
    x, y = ring[:, 0], ring[:, 1]
    assert np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y) > 0      # counter-clockwise
    batch = ellipse(np.zeros((2, 3, 3)), np.broadcast_to(np.diag([4.0, 1.0, 9.0]), (2, 3, 3, 3)), 0.5, n=16)
    assert batch.shape == (2, 3, 16, 2)
    np.testing.assert_allclose(np.abs(batch[..., 0]).max(), 2.0 * np.sqrt(chi2.ppf(0.5, 2)), rtol=1e-12)


# ---------------------------------------------------------------- first arrival
def test_first_arrival_matches_closed_form_for_drift_and_diffusion():
    # Uniform drift u and diffusivity K: m(t) = x0 + u t, P(t) = 2 K t I (Einstein 1905); the probability
    # of a rectangle is then a product of normal-CDF differences (closed form).
    u, k = np.array([0.2, 0.0]), 3.0
    times = np.arange(0.0, 86400.0 + 1, 1800.0)
    means = (times[:, None] * u)[None]
    covs = (2 * k * times[:, None, None] * np.eye(2))[None]
    box = _rect(8000.0, 12000.0, -1500.0, 1500.0)
    spread = make_spread("closed-form", as_releases([[0.0, 0.0]]), times, means, covs, polygon_m=box, threshold=0.5)
    sig = np.sqrt(np.maximum(2 * k * times, 1e-300))
    fx = norm.cdf((12000.0 - u[0] * times) / sig) - norm.cdf((8000.0 - u[0] * times) / sig)
    fy = norm.cdf(1500.0 / sig) - norm.cdf(-1500.0 / sig)
    np.testing.assert_allclose(spread.probability[0], fx * fy, rtol=1e-10, atol=1e-14)
    expected = times[np.argmax(fx * fy >= 0.5)]
    assert spread.first_arrival_s == (expected,)
    assert first_arrival_time(spread, box, 0.5) == (expected,)
    assert first_arrival_time(spread, box, 0.9999) == (None,)
    np.testing.assert_allclose(spread.semi_axes_m[0, -1, 2], np.sqrt(chi2.ppf(0.95, 2) * 2 * k * times[-1]) * np.ones(2),
                               rtol=1e-12)


# ---------------------------------------------------------------- bad input
@pytest.mark.parametrize("polygon, message", [
    ([[0, 0], [1, 1]], "at least 3"),
    ([[0, 0], [1, 1], [2, 2]], "no area"),
    ([[0, 0], [1, np.nan], [2, 0]], "finite"),
    (np.zeros((3, 3)), "(k, 2)"),
])
def test_bad_polygons_raise_input_error(polygon, message):
    with pytest.raises(InputError, match=message.replace("(", r"\(").replace(")", r"\)")):
        probability_inside(MEAN, COV, polygon)


def test_bad_releases_and_times_raise_input_error():
    with pytest.raises(InputError, match="2 or 3 finite numbers"):
        Release([1.0])
    with pytest.raises(InputError, match="positive semi-definite"):
        Release([0.0, 0.0], cov0_m2=[[1.0, 0.0], [0.0, -1.0]])
    with pytest.raises(InputError, match="same dimension"):
        as_releases([Release([0.0, 0.0]), Release([0.0, 0.0, 0.0])])
    with pytest.raises(InputError, match="start at 0"):
        check_times([3600.0, 7200.0])
    with pytest.raises(InputError, match="not positive semi-definite"):
        probability_inside(MEAN, [[1.0, 2.0], [2.0, 1.0]], L_SHAPE)
    assert [r.name for r in as_releases([[0.0, 0.0], [1.0, 2.0]])] == ["r1", "r2"]


# ---------------------------------------------------------------- spread() on an analytic SDE
def test_spread_on_a_decaying_rotation_matches_closed_form_for_every_method():
    # The sweep's reference problem (tests/sweeps.py): a linear SDE with a closed form (Jazwinski 1970 §7).
    import jax

    from driftwise.dynamics.methods import make_method
    from driftwise.dynamics.spread import spread_releases

    sde, rels, times, exact_mean, exact_cov, max_var = decaying_rotation()
    for name in METHOD_NAMES:
        method, integrator = make_method(name, particles=20_000, step_s=60.0)
        out = spread_releases(sde, rels, times, method=method, integrator=integrator, key=jax.random.key(1))
        assert out.method == name and out.means.shape == (2, 7, 2) and out.covs.shape == (2, 7, 2, 2)
        if name == "ensemble":   # Monte Carlo: within 4 standard errors sqrt(P/N) (and 5 % on the covariance)
            np.testing.assert_allclose(out.means, exact_mean, rtol=0, atol=4 * np.sqrt(max_var / 20_000))
            np.testing.assert_allclose(out.covs, exact_cov, rtol=0, atol=0.05 * max_var)
        else:                    # exact for a linear SDE, up to the RK4 error (O(step⁴), ~1e-10 relative at 60 s)
            np.testing.assert_allclose(out.means, exact_mean, rtol=1e-8, atol=1e-7)   # metres, on a 100 m scale
            np.testing.assert_allclose(out.covs, exact_cov, rtol=1e-8, atol=1e-6)     # m², on a 1e4 m² scale
    assert [r.name for r in out.releases] == ["=cmd", "r2"]
    with pytest.raises(InputError, match="random key"):
        spread_releases(sde, rels, times, method=make_method("ensemble")[0])
    with pytest.raises(InputError, match="unknown"):
        make_method("kalman")
