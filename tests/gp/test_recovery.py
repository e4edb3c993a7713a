"""Field and diffusivity recovery from simulated drifters, against published closed forms.

* Lamb–Oseen vortex: u_θ(r) = Γ/(2πr) (1 − exp(−r²/r_c²)) (Oseen 1912, Ark. Mat. Astron.
  Fys. 7; Lamb 1932, Hydrodynamics, 6th ed., §334a).
* Taylor–Green cells: u = U sin kx cos ky, v = −U cos kx sin ky, k = π/L (Taylor & Green
  1937, Proc. R. Soc. A 158, 499).
* Random walk of diffusivity K: each displacement component ~ N(0, 2KΔt) (Einstein 1905,
  Ann. Phys. 17, 549), so finite-difference velocities carry variance 2K/Δt.

The truth is evaluated here from the formulas above, not from driftwise.synthetic
(which only simulates the drifters).  Checks: inside the data hull (an alpha shape, see
_grid_inside_hull) the
fitted mean's RMS error is below 10 % of the RMS speed, and the true velocity falls
inside the 95 % predictive ellipse (χ² with 2 degrees of freedom, quantile 5.991;
scipy.stats.chi2) at between 85 % and 99 % of the grid points.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.stats import chi2

import driftwise
from driftwise.data.synthetic import LambOseenVortex, TaylorGreen, random_walk, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from geometry import grid_inside_alpha_shape

CHI2_95_2DOF = chi2.ppf(0.95, 2)  # 5.991
ALPHA_M = 250.0  # alpha-shape radius of the data hull (m)


def lamb_oseen_velocity(xy, circulation_m2_s, core_radius_m):
    """Oseen (1912) / Lamb (1932): azimuthal u_θ = Γ/(2πr)(1 − e^{−r²/r_c²}), no radial part."""
    r = np.hypot(xy[:, 0], xy[:, 1])
    u_theta = circulation_m2_s / (2.0 * math.pi * r) * (1.0 - np.exp(-(r / core_radius_m) ** 2))
    return np.stack([-u_theta * xy[:, 1] / r, u_theta * xy[:, 0] / r], axis=1)


def taylor_green_velocity(xy, speed_m_s, cell_m):
    """Taylor & Green (1937) steady cells: u = U sin kx cos ky, v = −U cos kx sin ky."""
    k = math.pi / cell_m
    return np.stack([speed_m_s * np.sin(k * xy[:, 0]) * np.cos(k * xy[:, 1]),
                     -speed_m_s * np.cos(k * xy[:, 0]) * np.sin(k * xy[:, 1])], axis=1)




def _grid_inside_hull(points_m, alpha_m=ALPHA_M, n=50):
    """Grid points inside the alpha shape of the data (tests/geometry.py); it keeps out the wide empty stretches
    between the few drifters that leave along the Taylor–Green separatrices."""
    return grid_inside_alpha_shape(points_m, alpha_m, n)


def _scores(field, truth, obs_position_m):
    grid = _grid_inside_hull(obs_position_m)
    grid = grid[np.hypot(grid[:, 0], grid[:, 1]) > 1.0]  # keep off the vortex axis, where r = 0
    mean, cov = field.predict(grid)
    true = truth(grid)
    err = mean - true
    rms_error = float(np.sqrt(np.mean(np.sum(err**2, axis=1))))
    rms_speed = float(np.sqrt(np.mean(np.sum(true**2, axis=1))))
    mahalanobis2 = np.einsum("ni,nij,nj->n", err, np.linalg.inv(cov), err)
    return rms_error / rms_speed, float(np.mean(mahalanobis2 <= CHI2_95_2DOF)), grid.shape[0]


def _fit(frame, **options):
    tracks = tracks_from_frame(frame)
    field = driftwise.fit(tracks, position_error_m=5.0, progress=False, **options)
    obs = driftwise.velocity_observations(tracks, position_error_m=5.0)
    return field, np.asarray(obs.position_m)


@pytest.mark.slow
def test_lamb_oseen_vortex_is_recovered_with_calibrated_uncertainty():
    gamma, core = 3000.0, 1000.0
    rng = np.random.default_rng(21)
    radius = 2500.0 * np.sqrt(rng.uniform(0.0, 1.0, 120))
    angle = rng.uniform(0.0, 2.0 * math.pi, 120)
    starts = np.column_stack([radius * np.cos(angle), radius * np.sin(angle)])
    frame = simulate_drifters(LambOseenVortex(gamma, core), starts, duration_s=6 * 3600.0, fix_interval_s=1200.0,
                              diffusivity_m2_s=1.0, position_error_m=5.0, seed=21)
    field, positions = _fit(frame, kernel="helmholtz", inducing=81, seed=0)
    rel_error, coverage, n_grid = _scores(field, lambda xy: lamb_oseen_velocity(xy, gamma, core), positions)
    assert n_grid > 300
    assert rel_error < 0.10, rel_error
    assert 0.85 <= coverage <= 0.99, coverage


@pytest.mark.slow
def test_taylor_green_cells_are_recovered_with_calibrated_uncertainty():
    speed, cell = 0.2, 1000.0
    rng = np.random.default_rng(22)
    starts = rng.uniform(0.0, 2000.0, (120, 2))
    frame = simulate_drifters(TaylorGreen(speed, cell), starts, duration_s=3 * 3600.0, fix_interval_s=600.0,
                              diffusivity_m2_s=1.0, position_error_m=5.0, seed=22)
    field, positions = _fit(frame, kernel="helmholtz", inducing=100, seed=0)
    rel_error, coverage, n_grid = _scores(field, lambda xy: taylor_green_velocity(xy, speed, cell), positions)
    assert n_grid > 300
    assert rel_error < 0.10, rel_error
    assert 0.85 <= coverage <= 0.99, coverage


@pytest.mark.slow
def test_diffusivity_of_a_random_walk_is_recovered():
    k_true = 5.0
    # Two fix intervals so that 2K/Δt separates from the constant floor σ₀².
    fast = random_walk(40, 30, fix_interval_s=600.0, diffusivity_m2_s=k_true, seed=31, position_error_m=2.0)
    slow = random_walk(40, 30, fix_interval_s=3600.0, diffusivity_m2_s=k_true, seed=32, position_error_m=2.0)
    slow["track_id"] = "S" + slow["track_id"]
    tracks = tracks_from_frame(pd.concat([fast, slow], ignore_index=True))
    field = driftwise.fit(tracks, "independent", inducing=36, position_error_m=2.0, progress=False, seed=0)
    # Einstein (1905): displacement variance 2KΔt per component.
    assert field.diffusivity_m2_s == pytest.approx(k_true, rel=0.20)
