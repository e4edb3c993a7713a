"""Forecasts through time: SDEs dx = μ(x, t) dt + L(x, t) dβ in absolute time t.

Outside references (each check names its own):
- Moment equations of a linear SDE dx = A(t) x dt + B(t) dβ: dm/dt = A m, dP/dt = A P + P Aᵀ + B Bᵀ
  (Jazwinski 1970, "Stochastic Processes and Filtering Theory", ch. 4, the linear-system moment
  equations; from memory), solved by scipy.integrate.solve_ivp (DOP853, rtol 1e-10).  Every moment
  method is exact for a linear drift and a state-independent diffusion, so only the integrator's
  error remains (RK4 at 60 s steps: ~1e-9 relative, so the tolerance is 1e-8 relative).
- Euler–Maruyama (Kloeden & Platen 1992, "Numerical Solution of Stochastic Differential Equations",
  §9.1 and §14.1, weak order 1): for a linear SDE the scheme's own mean and covariance follow the
  exact recursion m_{k+1} = (I + h A(t_k)) m_k, P_{k+1} = (I + h A(t_k)) P_k (I + h A(t_k))ᵀ + h D(t_k),
  which the sample moments match within Monte Carlo standard errors; that recursion approaches the
  moment ODE at weak order 1 (its error halves with the step).
- Gaussian transition density: scipy.stats.multivariate_normal.logpdf of the exact moments.
- Steady SDEs: numbers saved from `main` before this change (tests/dynamics/steady_case.py).
"""

from __future__ import annotations

import os
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.stats import multivariate_normal
from steady_case import REFERENCE, compute, small_field
from sweeps import MOMENT_METHODS

import driftwise  # noqa: F401  (float64)
from driftwise.data.tracks import Tracks
from driftwise.data.utctime import UNIX_EPOCH_UTC, release_time_s
from driftwise.dynamics import ensemble, moments
from driftwise.dynamics.calibrate import Transitions, transition_objective
from driftwise.dynamics.methods import method_name
from driftwise.dynamics.sde import SDE, sde_from_field, velocity_memory_weight
from driftwise.dynamics.spread import Release, spread_from_field
from driftwise.dynamics.transitions import FixedStepRK4, TransitionSet, transition_log_likelihoods, transition_set
from driftwise.errors import InputError
from driftwise.gp.modelfile import save_model

Partial = jax.tree_util.Partial

OMEGA = 2.0 * np.pi / (12.4206012 * 3600.0)       # the M2 tide's angular frequency (rad/s)
A0 = np.array([[-2e-5, 4e-5], [-3e-5, -1e-5]])   # s⁻¹
A1 = np.array([[3e-5, -1e-5], [2e-5, 1e-5]])     # s⁻¹, the tidal modulation of the drift
D0 = np.array([[2.0, 0.4], [0.4, 1.0]])          # m²/s, B Bᵀ at its mean level
M0 = np.array([2000.0, -1000.0])
P0 = np.array([[1e4, 2e3], [2e3, 5e3]])
HOURS = 3600.0
TIMES = np.array([0.0, 6.0, 12.0, 18.0, 24.0]) * HOURS
ABSOLUTE_START_S = 1717416000.0 + 3 * HOURS       # 2024-06-03T15:00Z in seconds since 1970
TAU_S = 2 * HOURS


def a_of_t(t):
    """A(t) = A0 + A1 cos ωt (s⁻¹)."""
    return A0 + A1 * np.cos(OMEGA * t)


def d_of_t(t):
    """B(t) B(t)ᵀ = D0 (1 + ½ sin ωt) (m²/s)."""
    return D0 * (1.0 + 0.5 * np.sin(OMEGA * t))


def _drift(a0, a1, omega, x, t_s):
    return (a0 + a1 * jnp.cos(omega * t_s)) @ x


def _diffusion(d0, omega, x, t_s):
    return d0 * (1.0 + 0.5 * jnp.sin(omega * t_s))


def _diffusion_aged(d0, omega, tau, x, t_s, age_s):
    return _diffusion(d0, omega, x, t_s) * (-jnp.expm1(-age_s / tau))


def periodic_sde(aged: bool = False) -> SDE:
    drift = Partial(_drift, jnp.asarray(A0), jnp.asarray(A1), jnp.asarray(OMEGA))
    if aged:
        return SDE(drift, Partial(_diffusion_aged, jnp.asarray(D0), jnp.asarray(OMEGA), jnp.asarray(TAU_S)),
                   with_age=True, with_time=True)
    return SDE(drift, Partial(_diffusion, jnp.asarray(D0), jnp.asarray(OMEGA)), with_time=True)


def exact_moments(start_s, times_s, m0=M0, p0=P0, rate=d_of_t):
    """Means (T, 2) and covariances (T, 2, 2) of the moment ODE from absolute time start_s (solve_ivp)."""
    def rhs(t, y):
        a, p = a_of_t(t), y[2:].reshape(2, 2)
        return np.concatenate([a @ y[:2], (a @ p + p @ a.T + rate(t)).ravel()])

    sol = solve_ivp(rhs, (start_s, start_s + times_s[-1]), np.concatenate([m0, p0.ravel()]), method="DOP853",
                    t_eval=start_s + times_s, rtol=1e-10, atol=1e-10)
    assert sol.success
    return sol.y[:2].T, sol.y[2:].T.reshape(-1, 2, 2)


def aged_rate(start_s):
    return lambda t: d_of_t(t) * (1.0 - np.exp(-(t - start_s) / TAU_S))


def _relative_errors(means, covs, ref_m, ref_p):
    """(max |m − m_ref| / max |m_ref|, max over times of ‖P − P_ref‖_F / ‖P_ref‖_F); a zero P_ref (a point
    release at t = 0) counts the absolute error; NaN anywhere gives inf."""
    mean_err = np.max(np.abs(np.asarray(means) - ref_m)) / np.max(np.abs(ref_m))
    diff, scale = np.linalg.norm(np.asarray(covs) - ref_p, axis=(1, 2)), np.linalg.norm(ref_p, axis=(1, 2))
    cov_err = np.max(diff / np.where(scale > 0, scale, 1.0))
    return (mean_err, cov_err) if np.isfinite(mean_err) and np.isfinite(cov_err) else (np.inf, np.inf)


# ------------------------------------------------------------------ (1) moment methods vs the moment ODE
@pytest.mark.parametrize("method", MOMENT_METHODS, ids=method_name)
@pytest.mark.parametrize("start_s", [3 * HOURS, ABSOLUTE_START_S], ids=["start-3h", "start-2024"])
def test_every_moment_method_matches_the_moment_odes_of_a_periodic_linear_sde(method, start_s):
    # Jazwinski 1970 moment equations by solve_ivp (rtol 1e-10); tolerance 1e-8 relative (RK4 at 60 s: ~1e-9)
    ref_m, ref_p = exact_moments(start_s, TIMES)
    means, covs = moments.propagate(periodic_sde(), M0, P0, TIMES, method=method, integrator=moments.RK4(60.0),
                                    start_time_s=start_s)
    mean_err, cov_err = _relative_errors(means, covs, ref_m, ref_p)
    assert mean_err < 1e-8 and cov_err < 1e-8, (mean_err, cov_err)
    # the phase matters: the same release started at t = 0 (time measured from the release) is far off
    wrong_m, wrong_p = moments.propagate(periodic_sde(), M0, P0, TIMES, method=method, integrator=moments.RK4(60.0),
                                         start_time_s=0.0)
    assert min(_relative_errors(wrong_m, wrong_p, ref_m, ref_p)) > 1e-2


@pytest.mark.parametrize("method", MOMENT_METHODS, ids=method_name)
def test_time_and_age_together_and_the_batch_propagator(method):
    # Jazwinski 1970 moment equations with D(t, a) = D0 (1 + ½ sin ωt)(1 − e^{−a/τ}) (solve_ivp, rtol 1e-10);
    # three releases at different absolute starts in one batched call; tolerance 1e-8 relative
    starts = np.array([0.0, 5 * HOURS, ABSOLUTE_START_S])
    covs0 = np.broadcast_to(P0, (3, 2, 2))
    means, covs = moments.propagate_batch(periodic_sde(aged=True), np.stack([M0, -M0, 0.5 * M0]), covs0, TIMES,
                                          method=method, integrator=moments.RK4(60.0), start_times_s=starts)
    for r, (start, m0) in enumerate(zip(starts, (M0, -M0, 0.5 * M0))):
        ref_m, ref_p = exact_moments(start, TIMES, m0=m0, rate=aged_rate(start))
        mean_err, cov_err = _relative_errors(means[r], covs[r], ref_m, ref_p)
        assert mean_err < 1e-8 and cov_err < 1e-8, (r, mean_err, cov_err)


_FOUR_DEVICES = """
import jax, numpy as np
from test_timevarying import *
from test_timevarying import _relative_errors
assert jax.device_count() == 4
starts = ABSOLUTE_START_S + np.arange(6.0) * 2 * HOURS      # 6 releases on 4 devices: rows are padded
m0 = np.stack([M0 * (1 + 0.1 * r) for r in range(6)])
means, covs = moments.propagate_batch(periodic_sde(), m0, np.broadcast_to(P0, (6, 2, 2)), TIMES,
                                      integrator=moments.RK4(60.0), start_times_s=starts, chunk=2)
print(max(max(_relative_errors(means[r], covs[r], *exact_moments(starts[r], TIMES, m0=m0[r]))) for r in range(6)))
"""


def test_start_times_are_sharded_with_their_releases_over_four_devices():
    # Jazwinski 1970 moment equations (solve_ivp, rtol 1e-10) for each release's own start; 1e-8 relative
    env = {k: v for k, v in os.environ.items() if not k.startswith("DRIFTWISE_")}
    here = Path(__file__).parent
    env.update(XLA_FLAGS="--xla_force_host_platform_device_count=4",
               PYTHONPATH=os.pathsep.join([str(here), str(here.parent), env.get("PYTHONPATH", "")]))
    run = subprocess.run([sys.executable, "-c", _FOUR_DEVICES], env=env, capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stderr[-2000:]
    assert float(run.stdout.strip().splitlines()[-1]) < 1e-8


def test_dopri5_carries_the_time_too():
    # Jazwinski 1970 moment equations (solve_ivp, rtol 1e-10); adaptive Dormand–Prince at rtol 1e-11: 1e-8 relative
    ref_m, ref_p = exact_moments(ABSOLUTE_START_S, TIMES)
    means, covs = moments.propagate(periodic_sde(), M0, P0, TIMES, integrator=moments.Dopri5(rtol=1e-11, atol=1e-9),
                                    start_time_s=ABSOLUTE_START_S)
    assert max(_relative_errors(means, covs, ref_m, ref_p)) < 1e-8


def test_a_time_dependent_sde_needs_start_times():
    with pytest.raises(InputError, match="start times"):
        moments.propagate(periodic_sde(), M0, P0, TIMES)
    with pytest.raises(InputError, match="finite"):
        moments.propagate_batch(periodic_sde(), M0[None], P0[None], TIMES, start_times_s=[np.nan])


# ------------------------------------------------------------------ (2) Euler–Maruyama ensemble
def em_recursion(start_s, times_s, h_s, m0=M0, p0=P0):
    """Exact mean and covariance of the Euler–Maruyama scheme for the linear SDE (Kloeden & Platen 1992)."""
    m, p, out_m, out_p, t = m0.copy(), p0.copy(), [m0], [p0], start_s
    for span in np.diff(times_s):
        n = int(np.ceil(span / h_s * (1 - 1e-12)))
        for _ in range(n):
            step = np.eye(2) + (span / n) * a_of_t(t)
            m, p = step @ m, step @ p @ step.T + (span / n) * d_of_t(t)
            t += span / n
        out_m.append(m)
        out_p.append(p)
    return np.array(out_m), np.array(out_p)


def test_euler_maruyama_ensemble_follows_the_time_dependent_sde():
    times = np.array([0.0, 3.0, 6.0, 9.0, 12.0]) * HOURS
    h = 60.0
    res = ensemble.simulate(periodic_sde(), M0, P0, times, method=ensemble.EulerMaruyama(20_000, h, 4096),
                            key=jax.random.key(11), start_time_s=ABSOLUTE_START_S)
    em_m, em_p = em_recursion(ABSOLUTE_START_S, times, h)
    # sample moments vs the scheme's exact moments: within 4 Monte Carlo standard errors (25 numbers)
    z_mean = np.abs(np.asarray(res.mean) - em_m)[1:] / np.asarray(res.mean_se)[1:]
    z_cov = np.abs(np.asarray(res.cov) - em_p)[1:] / np.asarray(res.cov_se)[1:]
    assert z_mean.max() < 4.0 and z_cov.max() < 4.0, (z_mean.max(), z_cov.max())
    # the scheme tends to the moment ODE (Jazwinski 1970, solve_ivp) at weak order 1: halving h halves its error
    ref_m, ref_p = exact_moments(ABSOLUTE_START_S, times)
    err_h = np.abs(em_p[-1] - ref_p[-1]).max()
    err_half = np.abs(em_recursion(ABSOLUTE_START_S, times, h / 2)[1][-1] - ref_p[-1]).max()
    assert 1.8 < err_h / err_half < 2.2
    # and the time is absolute: the same scheme started at t = 0 is many standard errors away
    wrong_m, _ = em_recursion(0.0, times, h)
    assert (np.abs(np.asarray(res.mean) - wrong_m)[1:] / np.asarray(res.mean_se)[1:]).max() > 20.0


# ------------------------------------------------------------------ (3) transition likelihood
def test_transition_log_likelihood_starts_each_transition_at_its_own_fix_time():
    # exact Gaussian transition: moments by solve_ivp (Jazwinski 1970), density by scipy.stats.multivariate_normal
    sigma = 15.0
    start = np.array([[2000.0, -1000.0], [-500.0, 800.0], [100.0, 1500.0], [3000.0, 0.0]])
    end = start + np.array([[120.0, -60.0], [-40.0, 90.0], [300.0, -200.0], [-150.0, 400.0]])
    dt = np.array([1800.0, 3600.0, 10800.0, 7200.0])
    t0 = ABSOLUTE_START_S + np.array([0.0, 2.0, 7.5, 13.0]) * HOURS
    trans = TransitionSet(start, end, dt, np.zeros(4, int), sigma, t0)
    got = transition_log_likelihoods(periodic_sde(), trans, integrator=FixedStepRK4(60.0, 200))
    r = sigma**2 * np.eye(2)
    want = []
    for x0, x1, span, t in zip(start, end, dt, t0):
        m, p = exact_moments(t, np.array([0.0, span]), m0=x0, p0=r)
        want.append(multivariate_normal(m[-1], p[-1] + r).logpdf(x1))
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-7)    # nats; RK4 at 60 s leaves ~1e-9
    with pytest.raises(InputError, match="fixes' times"):
        transition_log_likelihoods(periodic_sde(), TransitionSet(start, end, dt, np.zeros(4, int), sigma))


def test_transitions_from_tracks_carry_the_fix_times():
    tracks = Tracks(track_id=np.array(["a"] * 3 + ["b"] * 2, dtype=object),
                    time_s=np.array([100.0, 1900.0, 5500.0, 40.0, 940.0]),
                    position_m=np.array([[0.0, 0.0], [50.0, 10.0], [90.0, 40.0], [5.0, 5.0], [9.0, 1.0]]), source="t")
    trans = transition_set(tracks, position_error_m=5.0)
    np.testing.assert_allclose(np.sort(trans.start_time_s), [40.0, 100.0, 1900.0], rtol=0, atol=1e-9)
    np.testing.assert_allclose(np.sort(trans.start_time_s + trans.dt_s), [940.0, 1900.0, 5500.0], rtol=0, atol=1e-9)


# ------------------------------------------------------------------ a time-varying field (stand-in)
@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class PeriodicStandIn:
    """An analytic time-varying field with the FlowField time contract: mean (A0 + A1 cos ωt) x (m/s) and
    velocity covariance S0 √(g(t) g(t′)) exp(−|x − y|²/2ℓ²) with g(t) = 1 + ½ sin ωt (m²/s²)."""

    a0: jax.Array
    a1: jax.Array
    s0: jax.Array
    omega: jax.Array
    diffusivity_m2_s: float = field(default=0.7, metadata=dict(static=True))
    decorrelation_time_s: float = field(default=TAU_S, metadata=dict(static=True))
    is_time_varying = True
    dim = 2

    def mean_at(self, x, part=None, *, t_s=None):
        return (self.a0 + self.a1 * jnp.cos(self.omega * t_s)) @ x

    def cov_between(self, x, y, part_x=None, part_y=None, *, t_x_s=None, t_y_s=None):
        g = jnp.sqrt((1.0 + 0.5 * jnp.sin(self.omega * t_x_s)) * (1.0 + 0.5 * jnp.sin(self.omega * t_y_s)))
        return self.s0 * g * jnp.exp(-jnp.sum((x - y) ** 2) / (2.0 * 5000.0**2))

    def local_variance_ratio(self, points, times_s=None):
        return np.zeros(len(points))

    def distance_to_data_m(self, points):
        return np.zeros(len(points))


S0 = np.array([[4e-4, 1e-4], [1e-4, 2e-4]])    # m²/s²


def stand_in() -> PeriodicStandIn:
    return PeriodicStandIn(jnp.asarray(A0), jnp.asarray(A1), jnp.asarray(S0), jnp.asarray(OMEGA))


def field_rate(start_s, k=0.7, tau=TAU_S):
    """2 (K I + τ(1 − e^{−a/τ}) S0 g(t)) at absolute time t, age a = t − start (m²/s)."""
    return lambda t: 2.0 * (k * np.eye(2) + float(velocity_memory_weight(tau, t - start_s))
                            * S0 * (1.0 + 0.5 * np.sin(OMEGA * t)))


@pytest.mark.parametrize("method", ["cubature", "linearize", "ensemble"])
def test_spread_from_a_time_varying_field_integrates_from_each_release_start(method):
    # the field's SDE μ = mean_at(x, t), D = 2(K I + τ(1 − e^{−a/τ}) Σ(x, t)); moments: Jazwinski 1970 by
    # solve_ivp (1e-8 relative at RK4 60 s); ensemble: within 4 Monte Carlo standard errors + the EM weak bias
    sde = sde_from_field(stand_in())
    assert sde.with_time and sde.with_age
    releases = [Release(M0, start_time_s=2 * HOURS, cov0_m2=P0), Release(-M0, start_time_s=ABSOLUTE_START_S)]
    times = TIMES[:3]
    spread = spread_from_field(stand_in(), releases, times, method=method, step_s=60.0, particles=20_000, seed=3)
    for r, rel in enumerate(releases):
        ref_m, ref_p = exact_moments(rel.start_time_s, times, m0=rel.start_m, p0=rel.cov0_m2,
                                     rate=field_rate(rel.start_time_s))
        if method != "ensemble":
            assert max(_relative_errors(spread.means[r], spread.covs[r], ref_m, ref_p)) < 1e-8
        else:   # sd ~ 100 m at N = 2·10⁴: SE(mean) ~ 1 m; the EM bias at h = 60 s is ~1e-3 of |m| (see above)
            assert np.abs(spread.means[r] - ref_m).max() < 4.0 * np.sqrt(ref_p.max() / 20_000) + 2e-3 * np.abs(ref_m).max()


def test_calibration_objective_of_a_time_varying_field_is_the_exact_transition_likelihood():
    # exact Gaussian transitions (Jazwinski 1970 moments by solve_ivp, scipy.stats.multivariate_normal) from each
    # start's own time, for K = 0.3 m²/s and τ = 1 h; Linearize is exact for this linear drift: 1e-7 relative
    sigma, k, tau = 12.0, 0.3, 3600.0
    starts = np.array([[2000.0, -1000.0], [-500.0, 800.0], [100.0, 1500.0]])
    t0 = ABSOLUTE_START_S + np.array([0.0, 4.0, 9.0]) * HOURS
    lags = np.array([0.0, 2.0, 6.0]) * HOURS
    observed = starts[:, None, :] + np.array([[[80.0, -40.0], [200.0, 150.0]]] * 3)
    obs_var = np.full((3, 2), 2 * sigma**2)
    trans = Transitions(starts, lags, observed, obs_var, np.ones((3, 2)), t0)
    fun = transition_objective(stand_in(), trans, sigma, moments.Linearize(), moments.RK4(60.0), 8)
    value, grad = fun(np.log([k, tau]))
    want = []
    for x0, t, obs in zip(starts, t0, observed):
        m, p = exact_moments(t, lags, m0=x0, p0=sigma**2 * np.eye(2), rate=field_rate(t, k, tau))
        want += [multivariate_normal(m[j], p[j] + 2 * sigma**2 * np.eye(2)).logpdf(obs[j - 1]) for j in (1, 2)]
    np.testing.assert_allclose(value, -np.mean(want), rtol=1e-7)
    assert np.all(np.isfinite(grad))


def test_steady_field_sde_is_unchanged_and_ignores_time():
    sde = sde_from_field(small_field())
    assert not sde.with_time
    x = jnp.array([300.0, -200.0])
    assert np.array_equal(sde.drift_at(x, 1e9), sde.drift(x)) and np.array_equal(sde.rate(x, 60.0, 1e9),
                                                                                    sde.diffusion(x, 60.0))


# ------------------------------------------------------------------ (4) steady SDEs bit-identical to main
@pytest.mark.slow
def test_steady_forecasts_are_bit_identical_to_main():
    # numbers saved from main's code before time-dependent SDEs (tests/dynamics/steady_case.py): every moment
    # method, Dopri5, the ensemble, the transition likelihood, spread_from_field (with nonzero start times)
    reference = np.load(REFERENCE)
    out = compute()
    assert sorted(out) == sorted(reference.files)
    # the ensemble keys were saved again when its chunks became equal-sized (500 particles: 2 × 250, not 2 × 256
    # with 12 thrown away; a deliberate change of the random streams, not of the SDE);
    # the transition density's Cholesky moved from LAPACK to driftwise.smallmatrix (no batched LAPACK under vmap):
    # the same arithmetic in another order, so that one key is compared to rounding (1e-12 relative)
    rounding = {"transition_loglik"}
    # the exact field's forecasts (2026-12-04): its drift and diffusion now come from one kernel row per point
    # (SDE.drift_and_rate) and XLA's YNNPACK dot fusions are off (driftwise.YNN_OFF), the same arithmetic in
    # another order: measured 2.6e-15 (mean) and 1.7e-11 (covariance, whose small entries carry the cancellation)
    # relative, so these four keys are compared to 1e-10 relative, the covariances' to 1e-10 of their largest entry
    field_keys = {"field_cubature_mean", "field_cubature_cov", "field_ensemble_mean", "field_ensemble_cov"}
    different = [key for key in reference.files
                 if key not in rounding | field_keys and not np.array_equal(out[key], reference[key])]
    assert different == []
    for key in rounding:
        np.testing.assert_allclose(out[key], reference[key], rtol=1e-12, atol=0)
    for key in field_keys:
        scale = float(np.max(np.abs(reference[key])))
        np.testing.assert_allclose(out[key], reference[key], rtol=1e-10, atol=1e-10 * scale)


# ------------------------------------------------------------------ (5) --start
def test_release_time_parsing():
    absolute = {"time_origin_utc": UNIX_EPOCH_UTC, "time_span_s": [1717329600.0, 1717416000.0]}
    assert release_time_s({}, "36h") == 129600.0 and release_time_s({}, "5400") == 5400.0
    assert release_time_s({}, None) == 0.0 and release_time_s(absolute, None) == 1717416000.0
    assert release_time_s(absolute, "2024-06-03T14:00:00+02:00") == 1717416000.0
    with pytest.raises(InputError, match="relative times .* e.g. 36h"):
        release_time_s({}, "2024-06-03T12:00Z")
    with pytest.raises(InputError, match="absolute .* ISO-8601"):
        release_time_s(absolute, "36h")
    # a bare number on an absolute axis is seconds since 1970: accepted near the data, refused far from it
    assert release_time_s(absolute, "1717419600") == 1717419600.0
    with pytest.raises(InputError, match=r"--start '6'.*1970-01-01T00:00:06Z.*more than a year.*2024-06-03T12:00:00Z"):
        release_time_s(absolute, "6")
    with pytest.raises(InputError, match="not a finite time"):
        release_time_s(absolute, "nan")


@pytest.fixture(scope="module")
def model_files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("models")
    relative, absolute = folder / "relative.npz", folder / "absolute.npz"
    save_model(small_field(), relative)
    save_model(small_field({"time_origin_utc": UNIX_EPOCH_UTC, "time_span_s": [1717329600.0, 1717416000.0]}),
               absolute)
    return relative, absolute


@pytest.mark.parametrize("which, start, message", [
    (0, "2024-06-03T12:00Z", "relative times"),
    (0, "soon", "e.g. 36h or 5400s"),
    (0, "36parsecs", "relative times"),
    (1, "36h", "absolute (UTC), so give an ISO-8601 time"),
    (1, "2024-13-45T99:00", "ISO-8601"),
])
def test_cli_start_errors_exit_2_with_one_clear_line(model_files, run_cli, which, start, message):
    code, _, err = run_cli("spread", model_files[which], "--release", "100,200", "--start", start)
    assert code == 2 and f"--start {start!r}" in err and message in err and err.count("\n") == 1
    assert "Traceback" not in err


def test_cli_start_sets_the_release_time(model_files, run_cli, tmp_path):
    import json

    code, out, _ = run_cli("spread", model_files[0], "--release", "100,200", "--start", "36h", "--horizon", "2h",
                           "--json")
    assert code == 0 and json.loads(out)["releases"][0]["start_time_s"] == 129600.0
    code, out, _ = run_cli("spread", model_files[1], "--release", "100,200", "--start", "2024-06-03T15:00Z",
                           "--horizon", "2h", "--every", "1h", "--json")
    rel = json.loads(out)["releases"][0]
    assert code == 0 and rel["start_time_s"] == ABSOLUTE_START_S
    assert rel["times_utc"] == ["2024-06-03T15:00:00Z", "2024-06-03T16:00:00Z", "2024-06-03T17:00:00Z"]
