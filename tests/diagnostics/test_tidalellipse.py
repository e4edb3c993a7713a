"""Tidal current ellipses: analytic cases, round trips, a brute-force check of the definitions, and the
delta-method standard deviations against Monte Carlo.

Outside references: the definitions themselves, checked by sampling u(t) = a cos ωt + b sin ωt densely over
one period (semi-major = the largest |u|, semi-minor = the smallest, signed by the sense of rotation;
inclination = direction of the largest current in [0°, 180°); phase = ωt at that maximum, the lag of the
greatest current along the inclination; e.g. Foreman 1978, Manual for tidal currents analysis and prediction,
Pacific Marine Science Report 78-6, from memory); Monte Carlo sampling of (a, b) from the Gaussian posterior
(the sample s.d. has relative standard error about 1/√(2N)).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from driftwise.diagnostics.tidalellipse import amplitudes_from_ellipse, tidal_ellipses
from driftwise.errors import InputError


def _params(ellipses):
    return np.stack([ellipses.semi_major_m_s, ellipses.semi_minor_m_s, ellipses.inclination_deg,
                     ellipses.phase_deg], axis=-1)


@pytest.mark.parametrize("amplitudes, expected", [
    ((0.5, 0.0, 0.0, 0.0), (0.5, 0.0, 0.0, 0.0)),        # u = 0.5 cos ωt: east–west, greatest at t = 0
    ((0.0, 0.0, 0.5, 0.0), (0.5, 0.0, 0.0, 90.0)),       # u = 0.5 sin ωt: greatest a quarter period later
    ((-0.5, 0.0, 0.0, 0.0), (0.5, 0.0, 0.0, 180.0)),     # u = −0.5 cos ωt: greatest eastward half a period later
    ((0.0, 0.3, 0.0, 0.0), (0.3, 0.0, 90.0, 0.0)),       # v = 0.3 cos ωt: north–south
    ((0.2, 0.0, 0.0, 0.2), (0.2, 0.2, 0.0, 0.0)),        # circle, counter-clockwise (east, then north)
    ((0.2, 0.0, 0.0, -0.2), (0.2, -0.2, 0.0, 0.0)),      # circle, clockwise (east, then south)
])
def test_analytic_cases(amplitudes, expected):
    ellipses = tidal_ellipses(np.array(amplitudes))
    np.testing.assert_allclose(_params(ellipses)[0], expected, atol=1e-12)   # analytic (formulas in the docstring)
    assert np.all(np.isnan(ellipses.semi_major_sd_m_s))                      # no covariance given


def test_round_trip_of_inclined_ellipses():
    rng = np.random.default_rng(0)
    major = rng.uniform(0.05, 1.0, 200)
    minor = major * rng.uniform(-0.95, 0.95, 200)
    incl, phase = rng.uniform(0.0, 180.0, 200), rng.uniform(0.0, 360.0, 200)
    amps = amplitudes_from_ellipse(major, minor, incl, phase)
    back = _params(tidal_ellipses(amps))
    np.testing.assert_allclose(back, np.stack([major, minor, incl, phase], -1), rtol=0, atol=1e-12)
    np.testing.assert_allclose(amplitudes_from_ellipse(*back.T), amps, rtol=0, atol=1e-12)


def test_definitions_by_sampling_one_period():
    """Largest and smallest |u(t)|, its direction and its time, found by sampling 2·10⁵ instants."""
    rng = np.random.default_rng(1)
    wt = np.linspace(0.0, 2 * np.pi, 200_001)
    for amps in rng.normal(0.0, 0.3, (20, 4)):
        u = amps[0] * np.cos(wt) + amps[2] * np.sin(wt)
        v = amps[1] * np.cos(wt) + amps[3] * np.sin(wt)
        speed = np.hypot(u, v)
        k = int(np.argmax(speed))
        direction = np.degrees(np.arctan2(v[k], u[k]))
        lag = np.degrees(wt[k])
        if direction < 0 or direction >= 180:       # the other end of the major axis, half a period away
            direction, lag = direction % 180.0, (lag + 180.0) % 360.0
        spin = np.sign(np.mean(u[:-1] * np.diff(v) - v[:-1] * np.diff(u)))  # + counter-clockwise
        got = _params(tidal_ellipses(amps))[0]
        tol_deg = 360.0 / 200_000 * 5
        # sampling step 3.1e-5 rad: |u| near its minimum B is off by at most about A²δ²/(2|B|) < 1e-6 m/s here
        np.testing.assert_allclose(got[:2], [speed.max(), spin * speed.min()], rtol=1e-7, atol=1e-6)
        assert abs((got[2] - direction + 90) % 180 - 90) < tol_deg
        assert abs((got[3] - lag + 180) % 360 - 180) < tol_deg


def test_delta_method_sd_agrees_with_monte_carlo():
    """At small noise (s.d. of a, b ≈ 3 % of the axes) the delta-method s.d. is within 5 % of the sampled s.d."""
    rng = np.random.default_rng(2)
    means = amplitudes_from_ellipse(np.array([0.3, 0.15]), np.array([0.1, -0.06]), np.array([30.0, 150.0]),
                                    np.array([45.0, 300.0]))
    factors = rng.normal(0.0, 1.0, (2, 4, 4))
    covs = 0.004**2 * (np.einsum("nij,nkj->nik", factors, factors) / 4 + np.eye(4))
    ellipses = tidal_ellipses(means, covs)
    delta_sd = np.stack([ellipses.semi_major_sd_m_s, ellipses.semi_minor_sd_m_s, ellipses.inclination_sd_deg,
                         ellipses.phase_sd_deg], -1)
    n_samples = 40_000                     # relative s.e. of a sample s.d. ≈ 1/√(2N) = 0.35 %
    for i in range(2):
        draws = rng.multivariate_normal(means[i], covs[i], n_samples)
        params = _params(tidal_ellipses(draws))
        centre = _params(tidal_ellipses(means[i]))[0]
        diff = params - centre
        diff[:, 2] = (diff[:, 2] + 90.0) % 180.0 - 90.0     # inclination is defined modulo 180°
        diff[:, 3] = (diff[:, 3] + 180.0) % 360.0 - 180.0   # phase modulo 360°
        np.testing.assert_allclose(delta_sd[i], diff.std(axis=0), rtol=0.05)


def test_sd_nan_where_not_differentiable_and_json_ready():
    ellipses = tidal_ellipses(np.array([[0.2, 0.0, 0.0, 0.2], [0.3, 0.1, 0.0, 0.05]]),
                              np.tile(1e-6 * np.eye(4), (2, 1, 1)))
    assert np.isnan(ellipses.inclination_sd_deg[0])        # circle: W₋ = 0, inclination undefined
    assert np.all(np.isfinite([ellipses.semi_major_sd_m_s[1], ellipses.phase_sd_deg[1]]))
    text = json.dumps(ellipses.to_dict(), allow_nan=False)
    assert json.loads(text)["inclination_sd_deg"][0] is None


@pytest.mark.parametrize("mean, cov, match", [
    (np.zeros((3, 2)), None, r"shape \(n, 4\)"),
    (np.zeros((3, 4)), np.zeros((2, 4, 4)), r"\(3, 4, 4\)"),
])
def test_bad_shapes_are_refused(mean, cov, match):
    with pytest.raises(InputError, match=match):
        tidal_ellipses(mean, cov)
