"""FlowField.steady_part: the steady part v̄ of a time-varying field as a steady field.

Check: the whitened inducing values are ordered [v̄(Z), a(Z), b(Z), …] and S is lower triangular, so the marginal of
v̄'s block is N(m₁, S₁₁S₁₁ᵀ) (the marginal of a Gaussian is its sub-vector and sub-block; e.g. Rasmussen & Williams
2006, eq. A.6).  The steady field built from it must give the same mean and covariance as the time-varying field's
own ``part="steady"`` posterior, to round-off (1e-10 relative), and be steady (no times needed).
"""

from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np

import driftwise
from driftwise.data.synthetic import GaussianGyre, PulsingGyre, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.gp.schedule import Schedule

OMEGA_M2 = 2.0 * math.pi / (12.4206012 * 3600.0)


def test_steady_part_equals_the_steady_part_posterior():
    flow = PulsingGyre(GaussianGyre(0.3, 1500.0), 0.5, -1.0, OMEGA_M2)
    starts = np.random.default_rng(5).uniform(-2000.0, 2000.0, (12, 2))
    table = simulate_drifters(flow, starts, duration_s=24 * 3600.0, fix_interval_s=3600.0, diffusivity_m2_s=0.5,
                              position_error_m=3.0, seed=6, start_times_s=1.7e9)
    field = driftwise.fit(tracks_from_frame(table), inducing=8, position_error_m=3.0, progress=False,
                          tides=("M2",), schedule=Schedule(steps=5))
    steady = field.steady_part()
    assert field.is_time_varying and not steady.is_time_varying and steady.steady_part() is steady
    points = np.array([[0.0, 0.0], [800.0, -600.0], [-1500.0, 1200.0]])
    mean, cov = steady.predict(points)
    for i, x in enumerate(points):
        want_mean = np.asarray(field.mean_at(jnp.asarray(x), "steady"))
        want_cov = np.asarray(field.cov_between(jnp.asarray(x), jnp.asarray(x), "steady", "steady"))
        np.testing.assert_allclose(mean[i], want_mean, rtol=1e-10, atol=1e-14)
        np.testing.assert_allclose(cov[i], want_cov, rtol=1e-10, atol=1e-16)
    assert steady.diffusivity_m2_s == field.diffusivity_m2_s and steady.frame == field.frame
