"""The position error estimated from the tracks (driftwise.positionerror).

Simulations: Brownian tracks with diffusivity K (Einstein 1905, Ann. Phys. 17, 549: each
displacement component over Δt is N(0, 2KΔt)) plus white position noise σ per component,
optionally carried round a solid-body rotation.  Tolerances are stated beside each check.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from driftwise.data import positionerror as pe
from driftwise.data.tracks import Tracks
from driftwise.errors import InputError


def brownian_tracks(n_tracks, n_fixes, *, step_s, diffusivity_m2_s, sigma_m, seed, dim=2, irregular=False,
                    rotation_rad_s=0.0, radius_m=0.3, drift_m_s=0.0):
    """Tracks of a random walk (exact Gaussian steps, Einstein 1905) with white fix noise σ.

    ``irregular``: steps uniform in [0.5, 1.5] × step_s.  ``rotation_rad_s`` ω: the walk is added
    to a circle of radius ``radius_m`` travelled at ω (solid-body rotation, random phase per track).
    """
    rng = np.random.default_rng(seed)
    shape = (n_tracks, n_fixes - 1)
    dt = rng.uniform(0.5 * step_s, 1.5 * step_s, shape) if irregular else np.full(shape, float(step_s))
    time = np.concatenate([np.zeros((n_tracks, 1)), np.cumsum(dt, axis=1)], axis=1)
    steps = np.sqrt(2.0 * diffusivity_m2_s * dt)[..., None] * rng.standard_normal(shape + (dim,))
    path = np.concatenate([np.zeros((n_tracks, 1, dim)), np.cumsum(steps, axis=1)], axis=1)
    path[..., 0] += drift_m_s * time
    if rotation_rad_s:
        phase = rng.uniform(0.0, 2.0 * np.pi, (n_tracks, 1)) + rotation_rad_s * time
        path[..., 0] += radius_m * np.cos(phase)
        path[..., 1] += radius_m * np.sin(phase)
    path += sigma_m * rng.standard_normal(path.shape)
    ids = np.repeat(np.array([f"T{i:05d}" for i in range(n_tracks)], dtype=object), n_fixes)
    return Tracks(track_id=ids, time_s=time.reshape(-1), position_m=path.reshape(-1, dim))


# ------------------------------------------------------------------ the moment coefficients
def test_equal_step_coefficients_are_those_of_the_second_difference():
    """Equal steps h: the noise weights of a_j are (1, −2, 1)/h², whose lag-0/1/2 autocorrelation is
    (6, −4, 1) (filtered white noise, e.g. Box & Jenkins, MA(2) autocovariance); the walk's (4, −2, 0)/h³
    follow from independent increments of variance 2Kh (Einstein 1905).  rtol 1e-12."""
    h = 0.5
    time = h * np.arange(12.0)
    _, noise, walk, tau, _ = pe._window_moments(time, np.zeros((12, 2)), np.zeros(12, np.int64))
    np.testing.assert_allclose(noise, np.tile([6.0, -4.0, 1.0, 0.0], (noise.shape[0], 1)) / h**4, rtol=1e-12)
    np.testing.assert_allclose(walk, np.tile([4.0, -2.0, 0.0, 0.0], (walk.shape[0], 1)) / h**3, rtol=1e-12)
    np.testing.assert_allclose(tau[0], [0.0, h, 2 * h, 3 * h], rtol=1e-12)


def test_irregular_coefficients_match_a_brute_force_covariance():
    """Irregular steps: N_m and R_m equal W Wᵀ and B diag(2h) Bᵀ built independently from the
    difference operators as dense matrices (noise: a = W e; walk: a = B r, Var r_i = 2K h_i).  rtol 1e-10."""
    rng = np.random.default_rng(5)
    h = rng.uniform(0.3, 2.0, 9)
    time = np.r_[0.0, np.cumsum(h)]
    n = time.size
    diff1 = np.zeros((n - 1, n))
    diff1[np.arange(n - 1), np.arange(n - 1)] = -1.0 / h
    diff1[np.arange(n - 1), np.arange(1, n)] = 1.0 / h                 # v = diff1 @ x
    accel = (2.0 / (h[:-1] + h[1:]))[:, None] * (diff1[1:] - diff1[:-1])  # a = accel @ x
    noise_cov = accel @ accel.T
    from_steps = (2.0 / (h[:-1] + h[1:]))[:, None] * (np.diag(1.0 / h)[1:] - np.diag(1.0 / h)[:-1])
    walk_cov = from_steps @ np.diag(2.0 * h) @ from_steps.T
    _, noise, walk, _, _ = pe._window_moments(time, np.zeros((n, 1)), np.zeros(n, np.int64))
    for q in range(noise.shape[0]):
        np.testing.assert_allclose(noise[q], [noise_cov[q, q + m] for m in range(4)], rtol=1e-10, atol=1e-14)
        np.testing.assert_allclose(walk[q], [walk_cov[q, q + m] for m in range(4)], rtol=1e-10, atol=1e-14)


# ------------------------------------------------------------------ the estimator
def test_estimates_fall_within_their_standard_error_over_seeds():
    """20 seeds, σ = 1 m, K = 0.05 m²/s, 60 s fixes (2Kh = 6 m² per step against 2σ² = 2 m²):
    every estimate within 3 stated SE of the truth, at least 16 of 20 within 2 SE (95 % nominal;
    P(fewer than 16 | p = 0.95) ≈ 0.016), and the spread of the estimates agrees with the mean
    stated SE within a factor 1.6 (chi-square on 19 d.o.f.: a ratio outside [0.68, 1.32] has p < 0.05)."""
    sigma = 1.0
    estimates, errors = [], []
    for seed in range(20):
        est = pe.estimate_position_error(brownian_tracks(30, 300, step_s=60.0, diffusivity_m2_s=0.05,
                                                         sigma_m=sigma, seed=seed))
        assert est.identified
        estimates.append(est.value_m)
        errors.append(est.standard_error_m)
    estimates, errors = np.array(estimates), np.array(errors)
    z = np.abs(estimates - sigma) / errors
    assert np.all(z < 3.0), z
    assert np.count_nonzero(z < 2.0) >= 16, z
    assert 1 / 1.6 < np.std(estimates, ddof=1) / np.mean(errors) < 1.6


def test_tank_scale():
    """1 m tank, 2 Hz fixes, σ = 0.5 mm, K = 1e-5 m²/s, 3-D, 100 tracks of 10 min: within 20 % of σ."""
    tracks = brownian_tracks(100, 1200, step_s=0.5, diffusivity_m2_s=1e-5, sigma_m=5e-4, seed=11, dim=3)
    est = pe.estimate_position_error(tracks)
    assert est.identified and est.n_tracks == 100 and est.n_used == 100 * (1200 - 5)
    assert abs(est.value_m - 5e-4) < 0.2 * 5e-4
    assert abs(est.value_m - 5e-4) < 3.0 * est.standard_error_m
    assert "bootstrap over tracks" in est.method


@pytest.mark.slow
def test_ocean_scale():
    """σ = 10 m, 30 min fixes, K = 5 m²/s (2Kh = 18 000 m² per step against 2σ² = 200 m²), a 0.1 m/s
    mean current: 1000 drifters × 4000 fixes (83 days) identify σ within 20 % (stated SE about 6 %)."""
    tracks = brownian_tracks(1000, 4000, step_s=1800.0, diffusivity_m2_s=5.0, sigma_m=10.0, seed=3,
                             drift_m_s=0.1)
    est = pe.estimate_position_error(tracks)
    assert est.identified
    assert abs(est.value_m - 10.0) < 2.0
    assert est.standard_error_m < 1.0


def test_irregular_sampling():
    """Steps uniform in [0.25, 0.75] s (tank scale, 2-D): within 20 % and 3 SE of σ = 0.5 mm."""
    tracks = brownian_tracks(100, 1000, step_s=0.5, diffusivity_m2_s=1e-5, sigma_m=5e-4, seed=4, irregular=True)
    est = pe.estimate_position_error(tracks)
    assert est.identified
    assert abs(est.value_m - 5e-4) < 0.2 * 5e-4
    assert abs(est.value_m - 5e-4) < 3.0 * est.standard_error_m


@pytest.mark.parametrize("irregular", [False, True])
def test_solid_body_rotation_does_not_bias(irregular):
    """Solid-body rotation ω = 0.2 rad/s at r = 0.3 m (|a| = ω²r = 12 mm/s², a²h⁴ = 36 σ² at h = 0.5 s)
    plus K = 1e-6 m²/s and σ = 0.5 mm: within 20 % of σ.  Cancelling only a constant acceleration
    would leave a bias ≈ −a²h⁴(ωh)²/2 ≈ −0.18 σ² (module docstring), which the estimator detects and
    removes with the local-quadratic term."""
    tracks = brownian_tracks(60, 1200, step_s=0.5, diffusivity_m2_s=1e-6, sigma_m=5e-4, seed=8,
                             irregular=irregular, rotation_rad_s=0.2)
    est = pe.estimate_position_error(tracks)
    assert est.identified and "local-quadratic" in est.method
    assert abs(est.value_m - 5e-4) < 0.2 * 5e-4


def test_not_identifiable_gives_a_flagged_upper_bound():
    """No position noise under a strong random walk: flagged, value = √(max(σ̂², 0) + 2 SE) (an upper
    bound), with the reason; never a silent number."""
    tracks = brownian_tracks(30, 200, step_s=60.0, diffusivity_m2_s=1.0, sigma_m=0.0, seed=2)
    est = pe.estimate_position_error(tracks)
    assert not est.identified
    assert "not identifiable" in est.note
    var_se = 2.0 * est.standard_error_m * est.value_m           # SE(σ²) = 2 σ SE(σ) at the reported value
    assert est.value_m == pytest.approx(math.sqrt(est.estimate_m**2 + 2.0 * var_se), rel=1e-9)
    # SE(σ²) ≈ 2 · 2Kh / √(windows × 2) ≈ 2.2 m² (the estimator's variance is about 4 (2Kh)²/N, module
    # docstring), so the bound √(2 SE) is about 2 m, a fifth of the 11 m RMS step √(2Kh)
    assert 0.5 < est.value_m < 3.0


def test_too_few_fixes():
    tracks = brownian_tracks(2, 10, step_s=60.0, diffusivity_m2_s=1.0, sigma_m=1.0, seed=2)
    est = pe.estimate_position_error(tracks)
    assert not est.identified and est.n_used == 2 * 5 and est.value_m == 0.0
    assert math.isinf(est.standard_error_m) and "need 30" in est.note


def test_deterministic_and_few_tracks_use_blocks():
    tracks = brownian_tracks(3, 2000, step_s=60.0, diffusivity_m2_s=0.05, sigma_m=1.0, seed=9)
    a, b = pe.estimate_position_error(tracks), pe.estimate_position_error(tracks)
    assert a == b
    assert "blocks of 64 windows" in a.method
    assert a.identified and abs(a.value_m - 1.0) < 3.0 * a.standard_error_m


def test_bad_input_is_refused():
    tracks = brownian_tracks(2, 50, step_s=60.0, diffusivity_m2_s=1.0, sigma_m=1.0, seed=2)
    bad = tracks.position_m.copy()
    bad[7, 1] = np.nan
    with pytest.raises(InputError, match="NaN"):
        pe.estimate_position_error(Tracks(track_id=tracks.track_id, time_s=tracks.time_s, position_m=bad))
    with pytest.raises(InputError, match="track_id"):
        pe.estimate_position_error(np.zeros((5, 2)))
