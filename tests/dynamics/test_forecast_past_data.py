"""Forecasts past the end of the data: the harmonic parts continue, the slow part relaxes to its prior.

The model is fitted small and fast: drifters in a gyre whose strength follows a + b cos ω t (ω of M2) for three
days; a time-varying field with the steady part, M2 and the slow part (Matérn-3/2 in time, time scale fixed at
T = 12 h) at fixed hyperparameters, with the ELBO-optimal q (Titsias 2009, the collapsed bound's optimum).  What
is checked holds for any hyperparameters, so none are learned here.

Outside references, each named beside its check:
* (a) the harmonic part is a_c cos ω t + b_c sin ω t (the model's definition) with (a_c, b_c) from
  ``harmonic_posterior``, whose own values are checked against the exact GP in tests/gp/test_temporal.py;
  the cosines and sines here are numpy's, on the absolute time axis;
* (b) the Matérn-3/2 time correlation k(τ) = (1 + a) e^{−a}, a = √3|τ|/T (Rasmussen & Williams 2006, Gaussian
  Processes for Machine Learning, eq. 4.17).  It is the covariance of a Gauss–Markov process whose state is
  (s, ṡ) (Rasmussen & Williams 2006, §B.2; Hartikainen & Särkkä 2010, "Kalman filtering and smoothing solutions
  to temporal Gaussian process regression models"; both from memory), so whatever is known about the slow part up to the end of the
  data t_e, its variance at t_e + Δ is at least that given the exact state (s, ṡ) at t_e:
      Var ≥ K_s(x, x) [1 − k(Δ)² − k′(Δ)² T²/3] = K_s(x, x) [1 − ((1 + a)² + a²) e^{−2a}],  a = √3 Δ/T
  (Gaussian conditioning on (s(t_e), ṡ(t_e)) with Var ṡ = 3σ²/T² and Cov[s(t_e + Δ), ṡ(t_e)] = −σ² k′(Δ), worked
  out here from eq. 4.17; for a kernel separable in space and time the same bound holds per spatial mode).  The
  sparse posterior's deficit Aₛ(I − SSᵀ)Aₛᵀ is at most the Nyström term Aₛ Aₛᵀ (0 ⪯ SSᵀ ⪯ I at the optimal q)
  and that is the information in inducing values at times ≤ t_e, so the same bound applies: this is the tolerance
  of the relaxation check, analytic and not tuned.
"""

from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np
import pytest

import driftwise
from driftwise.data.synthetic import GaussianGyre, PulsingGyre, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics.spread import Release, spread_from_field
from driftwise.gp import field as fld
from driftwise.gp.initial import initial_inducing
from driftwise.gp.temporalfit import TemporalChoice, temporal_start

OMEGA_M2 = 2.0 * math.pi / (12.4206012 * 3600.0)   # rad/s (Doodson 1921 / common practice, from memory)
PERIOD_M2_S = 2.0 * math.pi / OMEGA_M2
T_SLOW_S = 12.0 * 3600.0                            # the slow part's fixed time scale T
T_START = 1.7e9                                     # s since 1970, as ISO-timed track files give
HOUR = 3600.0
X0 = np.array([700.0, -1700.0])   # m: the median place of the fixes in the last 6 h of data


def fit_small(n_slow=64):
    """(field, first data time t₀, last data time t_e) of a steady + M2 + slow fit on three days of drifters."""
    flow = PulsingGyre(GaussianGyre(0.3, 1500.0), 0.5, -1.0, OMEGA_M2)
    starts = np.random.default_rng(5).uniform(-2000.0, 2000.0, (12, 2))
    frame = simulate_drifters(flow, starts, duration_s=72 * HOUR, fix_interval_s=HOUR, diffusivity_m2_s=0.5,
                              position_error_m=3.0, seed=6, start_times_s=T_START)
    tracks = tracks_from_frame(frame)
    obs = driftwise.velocity_observations(tracks, position_error_m=3.0)
    batch = fld.batch_from_observations(obs)
    z = initial_inducing(np.asarray(obs.position_m), 16, seed=0)
    choice = TemporalChoice(("M2",), "fixed", T_SLOW_S).to_json()
    start = temporal_start(choice, batch, tracks.frame, n_inducing=n_slow, length_scale_m=1500.0,
                           velocity_scale_m_s=0.2, seed=0)
    params = fld.init_params("helmholtz", 2, z, velocity_scale_m_s=0.2, length_scale_m=1500.0, temporal=start,
                             diffusivity_m2_s=0.5, noise_floor_m_s=0.01)
    field = fld.FlowField.from_params(fld.optimal_q(params, batch), frame=tracks.frame, position_error_m=3.0)
    times = np.asarray(obs.time_s)
    return field, float(times.min()), float(times.max())


@pytest.fixture(scope="module")
def fitted():
    return fit_small()


def matern32_state_bound(delta_s):
    """Largest possible fraction of the prior variance explained at t_e + Δ (module docstring, (b))."""
    a = math.sqrt(3.0) * np.asarray(delta_s) / T_SLOW_S
    return ((1.0 + a) ** 2 + a**2) * np.exp(-2.0 * a)


def test_harmonic_part_continues_with_its_fitted_amplitudes(fitted):
    field, _, t_end = fitted
    x = jnp.asarray(X0)
    mean_ab, cov_ab = (np.asarray(v) for v in field.harmonic_posterior(x, "M2"))
    a, b = mean_ab[:2], mean_ab[2:]
    assert np.linalg.norm(a) > 0.02            # the fit found the tide (truth: b = −1 × the gyre, ~0.2 m/s here)
    for t in t_end + np.array([0.5, 6.0, 24.0, 72.0, 240.0]) * HOUR:
        c, s = math.cos(OMEGA_M2 * t), math.sin(OMEGA_M2 * t)
        np.testing.assert_allclose(np.asarray(field.mean_at(x, "M2", t_s=t)), a * c + b * s,
                                   rtol=1e-10, atol=1e-10 * np.abs(mean_ab).max())
        # its uncertainty is periodic too: [cI, sI] Cov[(a, b)] [cI, sI]ᵀ, no growth with the horizon
        w = np.hstack([c * np.eye(2), s * np.eye(2)])
        np.testing.assert_allclose(np.asarray(field.cov_between(x, x, "M2", "M2", t_x_s=t, t_y_s=t)),
                                   w @ cov_ab @ w.T, rtol=1e-10, atol=1e-10 * np.abs(cov_ab).max())


def test_slow_part_relaxes_monotonically_to_its_prior_past_the_end(fitted):
    field, _, t_end = fitted
    x = jnp.asarray(X0)
    prior = float(np.trace(np.asarray(field.params.kernel.slow.block(x, x))))
    deltas = np.array([0.0, 1.0, 3.0, 6.0, 12.0, 24.0, 48.0, 96.0]) * HOUR
    post = np.array([float(jnp.trace(field.cov_between(x, x, "slow", "slow", t_x_s=t_end + d, t_y_s=t_end + d)))
                     for d in deltas])
    deficit = (prior - post) / prior
    assert deficit[0] > 0.3, deficit              # the data did teach the slow part something at the end
    assert np.all(np.diff(post) > 0.0), post      # monotone growth
    assert np.all(deficit >= -1e-12)              # never above the prior
    np.testing.assert_array_less(deficit[1:], matern32_state_bound(deltas[1:]) + 1e-12)
    assert deficit[-1] < 4e-10                    # 96 h = 8 T past the end: the prior (bound 3.8e-10)


def test_forecast_started_near_the_end_spreads_faster_than_one_in_the_middle(fitted):
    """The same release at the same tidal phase, once in the middle of the record and once 2 h before its end,
    forecast 12 h (cubature, τ = 1 h): the second runs past the data, where the slow part relaxes to its prior,
    so the posterior velocity variance it meets, and the rate its covariance grows at, are larger.  Measured when
    written: trace P = 3.19e6 / 4.72e6 m² (middle / late) at 6 h and 2.10e7 / 2.78e7 m² at 12 h, ratios 1.40, 1.48,
    1.29, 1.32 at 3, 6, 9, 12 h."""
    field, t0, t_end = fitted
    late = t_end - 2.0 * HOUR
    middle = late - 3.0 * PERIOD_M2_S              # same phase of the tide, 37.3 h earlier
    assert middle - t0 > 24.0 * HOUR and t_end - middle > 24.0 * HOUR   # a day of data on either side
    times = np.arange(0.0, 12.0 * HOUR + 1.0, 3.0 * HOUR)
    spread = spread_from_field(field, [Release(X0, middle), Release(X0, late)], times, decorrelation_time_s=HOUR,
                               posterior="exact")
    trace = np.trace(spread.covs, axis1=-2, axis2=-1)            # (release, time) m²; 0 at the release
    assert np.all(np.diff(trace, axis=1) > 0.0), trace
    ratio = trace[1, 1:] / trace[0, 1:]
    assert np.all(ratio > 1.2), ratio
