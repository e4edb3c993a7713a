"""Calibrating the eddy diffusivity K and the decorrelation time τ from transitions (calib.calibrate_transport).

The fields here are *known*: a Lamb–Oseen vortex (Oseen 1912; Lamb 1932, Hydrodynamics §334a)
as the mean flow, written in jax so the propagator can run through it, and an optional map of
velocity uncertainty Σ(x).  Drifters are simulated outside driftwise's SDE code.

τ recovery — how the truth is built.  K and τ enter the SDE as D(x, a) = 2(K I + τ(1 − e^{−a/τ}) Σ(x))
at release age a, so they are told apart by the growth of the spread with lag and where Σ varies
in space.  The true drifters therefore carry an
*unresolved velocity* u′ on top of a weak vortex: per drifter an Ornstein–Uhlenbeck process with
decorrelation time τ and local variance Σ(x) per component, Σ(x) = s² exp(−|x|²/2L²) (a bump
of radius L = 3 km; the drifters start along a 24 km strip across it, so some live inside and
some outside), plus a white-noise random walk of diffusivity K.  For lags t much longer than τ
this disperses as Var = 2Στ[t − τ(1 − e^{−t/τ})] + 2Kt per component (Taylor 1921, "Diffusion by
continuous movements", Proc. London Math. Soc. 20), which is the SDE's D integrated over the
release age (for a Σ that is constant along the path).  The lags used are 3, 6 and 12 h (≥ 18 τ);
the calibration sees Σ(x) as the field's velocity covariance and must return the τ of the
simulated u′ and the K outside it.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

from driftwise.data import synthetic
from driftwise.data.tracks import tracks_from_frame, velocity_observations
from driftwise.dynamics import calibrate as calib
from driftwise.gp.schedule import Schedule

LAGS_S = (3 * 3600.0, 6 * 3600.0, 12 * 3600.0)
SIGMA_POS_M = 10.0
GAMMA_M2_S = 2 * math.pi * 5000.0 * 0.2 / (1 - math.exp(-1))  # peak speed 0.2 m/s at r = r_c = 5 km
CORE_M = 5000.0


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class KnownVortex:
    """A known field with the posterior interface (mean_at, cov_at).

    Lamb–Oseen mean velocity; velocity covariance Σ(x) = s² e^{−|x−c|²/2L²} I.
    """

    circulation_m2_s: jax.Array
    core_radius_m: jax.Array
    velocity_var_m2_s2: jax.Array
    var_center_m: jax.Array
    var_radius_m: jax.Array

    def mean_at(self, x):
        s = jnp.sum(x * x) / self.core_radius_m**2
        ratio = jnp.where(s > 1e-12, -jnp.expm1(-s) / jnp.where(s > 1e-12, s, 1.0), 1.0 - 0.5 * s)
        omega = self.circulation_m2_s / (2 * math.pi * self.core_radius_m**2) * ratio
        return jnp.stack([-omega * x[1], omega * x[0]])

    def variance(self, x):
        return self.velocity_var_m2_s2 * jnp.exp(-jnp.sum((x - self.var_center_m) ** 2) / (2 * self.var_radius_m**2))

    def cov_at(self, x):
        return self.variance(x) * jnp.eye(2)


def known_field(velocity_sd_m_s: float = 0.0, *, circulation_m2_s: float = GAMMA_M2_S,
                bump_radius_m: float = 3000.0) -> KnownVortex:
    return KnownVortex(jnp.asarray(circulation_m2_s), jnp.asarray(CORE_M), jnp.asarray(velocity_sd_m_s**2),
                       jnp.asarray([0.0, 0.0]), jnp.asarray(bump_radius_m))


def test_known_vortex_matches_the_synthetic_one():
    # the jax vortex used by the calibration equals driftwise.synthetic.LambOseenVortex (closed form, Oseen 1912)
    x = np.array([[3000.0, 1000.0], [-200.0, 7000.0], [1.0, 0.0]])
    ref = synthetic.LambOseenVortex(GAMMA_M2_S, CORE_M).velocity(x)
    got = np.asarray(jax.vmap(known_field().mean_at)(jnp.asarray(x)))
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-15)


def _vortex_tracks(k_m2_s: float, seed: int, n_tracks: int = 20):
    starts = np.random.default_rng(seed).uniform(-8000.0, 8000.0, (n_tracks, 2))
    table = synthetic.simulate_drifters(synthetic.LambOseenVortex(GAMMA_M2_S, CORE_M), starts,
                                        duration_s=2 * 86400.0, fix_interval_s=3600.0, diffusivity_m2_s=k_m2_s,
                                        position_error_m=SIGMA_POS_M, seed=seed, substeps=12)
    return tracks_from_frame(table)


@pytest.mark.slow
@pytest.mark.parametrize("k_true", [1.0, 5.0, 20.0, 50.0])
def test_diffusivity_recovery(k_true):
    # Tracks in the known vortex with random-walk diffusivity K (Einstein 1905) and 10 m GPS error;
    # the field has no velocity uncertainty, so only K is identified and τ is flagged as flat.
    tracks = _vortex_tracks(k_true, seed=int(k_true))
    found = calib.calibrate_transport(known_field(), tracks, lags_s=LAGS_S, position_error_m=SIGMA_POS_M,
                                      initial=(2.0, 3600.0), max_starts=600)
    k, tau, info = found.diffusivity_m2_s, found.decorrelation_time_s, found.to_dict()
    assert k == pytest.approx(k_true, rel=0.25)
    assert info["converged"] and info["n_transitions"] > 1000
    assert info["log_std"]["log_decorrelation_time"] == math.inf
    assert info["log_std"]["log_diffusivity"] < 0.1


def _ou_tracks(field: KnownVortex, k_m2_s: float, tau_s: float, seed: int, n_tracks: int = 40):
    """Vortex + Ornstein–Uhlenbeck unresolved velocity (variance Σ(x), time scale τ) + random walk K.

    Exact OU update over a step h: u ← a u + √((1 − a²) Σ(x)) ξ, a = e^{−h/τ} (Uhlenbeck & Ornstein 1930).
    """
    rng = np.random.default_rng(seed)
    vortex = synthetic.LambOseenVortex(float(field.circulation_m2_s), CORE_M)
    x = np.column_stack([rng.uniform(-12000.0, 12000.0, n_tracks), rng.uniform(-3000.0, 3000.0, n_tracks)])
    centre, radius, s2 = np.asarray(field.var_center_m), float(field.var_radius_m), float(field.velocity_var_m2_s2)

    def variance(p):
        return s2 * np.exp(-np.sum((p - centre) ** 2, axis=1) / (2 * radius**2))

    h, fix = 60.0, 3600.0
    a = math.exp(-h / tau_s)
    u = np.sqrt(variance(x))[:, None] * rng.standard_normal(x.shape)
    rows = []
    for j in range(49):
        if j:
            for _ in range(int(fix / h)):
                x = x + (vortex.velocity(x) + u) * h + math.sqrt(2 * k_m2_s * h) * rng.standard_normal(x.shape)
                u = a * u + np.sqrt((1 - a * a) * variance(x))[:, None] * rng.standard_normal(x.shape)
        fixes = x + SIGMA_POS_M * rng.standard_normal(x.shape)
        rows += [(f"T{i:03d}", j * fix, fixes[i, 0], fixes[i, 1]) for i in range(n_tracks)]
    table = pd.DataFrame(rows, columns=["track_id", "time_s", "x_m", "y_m"]).sort_values(["track_id", "time_s"])
    return tracks_from_frame(table)


@pytest.mark.slow
def test_decorrelation_time_recovery():
    # truth: K = 5 m²/s, τ = 600 s, s = 0.2 m/s (τ s² = 24 m²/s at the bump's centre, K alone far
    # from it); weak vortex, peak speed 0.02 m/s
    field = known_field(velocity_sd_m_s=0.2, circulation_m2_s=GAMMA_M2_S / 10)
    tracks = _ou_tracks(field, 5.0, 600.0, seed=11)
    found = calib.calibrate_transport(field, tracks, lags_s=LAGS_S, position_error_m=SIGMA_POS_M,
                                      initial=(1.0, 3600.0), max_starts=600)
    k, tau, info = found.diffusivity_m2_s, found.decorrelation_time_s, found.to_dict()
    assert tau == pytest.approx(600.0, rel=0.25)
    assert k == pytest.approx(5.0, rel=0.25)
    assert np.isfinite(info["log_std"]["log_decorrelation_time"])

    # the same fixes given as velocity observations rebuild the same transitions (x = mid ∓ v Δt/2)
    obs = velocity_observations(tracks, position_error_m=SIGMA_POS_M)
    found2 = calib.calibrate_transport(field, obs, lags_s=LAGS_S, position_error_m=SIGMA_POS_M,
                                       initial=(1.0, 3600.0), max_starts=600)
    k2, tau2 = found2.diffusivity_m2_s, found2.decorrelation_time_s
    assert k2 == pytest.approx(k, rel=1e-6) and tau2 == pytest.approx(tau, rel=1e-6)


def test_gradient_matches_finite_differences():
    # Route 2 (SphericalCubature, propagator inside the objective): the forward-mode jax gradient
    # against central finite differences
    # (a general numerical reference; step 1e-4 in log space, O(h²) error).
    from driftwise.dynamics.moments import RK4, SphericalCubature

    field = known_field(velocity_sd_m_s=0.05)
    tracks = _vortex_tracks(3.0, seed=5)  # same shapes as the recovery tests: one compilation serves all
    trans = calib.transitions_from_tracks(tracks, lags_s=LAGS_S, position_error_m=SIGMA_POS_M, max_starts=600)
    r = trans.start_m.shape[0]
    args = (field, SphericalCubature(), RK4(step_s=1800.0), r, jnp.asarray(trans.start_m),
            jnp.asarray(np.broadcast_to(SIGMA_POS_M**2 * np.eye(2), (r, 2, 2))), jnp.asarray(trans.times_s),
            jnp.asarray(trans.observed_m), jnp.asarray(trans.obs_var_m2), jnp.asarray(trans.weight))
    theta = np.log([3.0, 2000.0])
    value, grad = calib.propagated_value_and_grad(jnp.asarray(theta), *args)
    step = 1e-4
    fd = []
    for j in range(2):
        e = np.zeros(2)
        e[j] = step
        up, _ = calib.propagated_value_and_grad(jnp.asarray(theta + e), *args)
        down, _ = calib.propagated_value_and_grad(jnp.asarray(theta - e), *args)
        fd.append((float(up) - float(down)) / (2 * step))
    np.testing.assert_allclose(np.asarray(grad), fd, rtol=1e-5, atol=1e-9)
    assert np.isfinite(float(value))


def test_linear_decomposition_equals_propagating_inside_the_objective():
    # Linearized moments: P(K, τ) = K A + τ B + C exactly (the moment ODE is linear in P, K, τ
    # along the fixed mean path; Maybeck 1982 vol. 2 §12.3).  The fast route's value and gradient
    # must equal running the propagator inside the objective with the same method.
    from driftwise.dynamics.moments import RK4, Linearize

    field = known_field(velocity_sd_m_s=0.05)
    tracks = _vortex_tracks(3.0, seed=5)
    trans = calib.transitions_from_tracks(tracks, lags_s=LAGS_S, position_error_m=SIGMA_POS_M, max_starts=600)
    fast = calib.transition_objective(field, trans, SIGMA_POS_M, Linearize(), RK4(step_s=1800.0), 4096)
    slow = calib.transition_objective(field, trans, SIGMA_POS_M, _Unfast(), RK4(step_s=1800.0), 4096)
    for theta in (np.log([3.0, 2000.0]), np.log([20.0, 50.0])):
        (v1, g1), (v2, g2) = fast(theta), slow(theta)
        assert v1 == pytest.approx(v2, rel=1e-10)
        np.testing.assert_allclose(g1, g2, rtol=1e-8, atol=1e-12)


@dataclass(frozen=True)
class _Unfast:
    """Linearize's expectations, under another type so calibrate takes the propagate-inside route."""

    def expectations(self, sde_, mean, cov, age_s=0.0):
        from driftwise.dynamics.moments import Linearize

        return Linearize().expectations(sde_, mean, cov, age_s)


def test_calibrate_a_fitted_field_and_round_trip(tmp_path):
    # A small real fit: posterior_refit on all its own tracks reproduces the fitted q (the fit ends
    # with the ELBO-optimal q for its hyperparameters, Titsias 2009), and the calibrated K and τ
    # survive the model file.
    import driftwise

    tracks = _vortex_tracks(5.0, seed=3, n_tracks=8)
    field = driftwise.fit(tracks, "divergence-free", inducing=16, schedule=Schedule(steps=40), position_error_m=SIGMA_POS_M,
                          progress=False)
    again = calib.posterior_refit(field, tracks)
    np.testing.assert_allclose(np.asarray(again.params.q_mean), np.asarray(field.params.q_mean),
                               rtol=1e-7, atol=1e-9)
    folds, held = calib.cross_validation_folds(tracks, lambda t: calib.posterior_refit(field, t), folds=2)
    assert [h.n_tracks for h in held] == [4, 4]
    assert set(held[0].unique_ids).isdisjoint(held[1].unique_ids)
    cal = calib.calibrate(field, tracks, max_starts=200)
    record = cal.fit_info["calibration"]
    assert record["folds"] == 2 and record["n_transitions"] > 100
    assert cal.diffusivity_m2_s == pytest.approx(record["diffusivity_m2_s"], rel=1e-12)
    loaded = driftwise.load(driftwise.save(cal, tmp_path / "m.npz"))
    assert loaded.diffusivity_m2_s == pytest.approx(cal.diffusivity_m2_s, rel=1e-12)
    assert loaded.decorrelation_time_s == pytest.approx(cal.decorrelation_time_s, rel=1e-12)
    assert loaded.fit_info["decorrelation_time_source"].startswith("calibrated")


def test_calibration_needs_a_position_error():
    from driftwise.errors import InputError

    with pytest.raises(InputError, match="position error"):
        calib.calibrate_transport(known_field(), _vortex_tracks(1.0, seed=1, n_tracks=2))


# ------------------------------------------------------------------ robustness of the optimiser
def _quadratic_with_a_hole(theta):
    """(θ − (1, 2))ᵀ(θ − (1, 2)) with its exact gradient; NaN where θ₀ < −1 (a region where the likelihood
    cannot be evaluated, e.g. a covariance that is not positive definite)."""
    theta = np.asarray(theta, dtype=float)
    if theta[0] < -1.0:
        return math.nan, np.full(2, math.nan)
    diff = theta - np.array([1.0, 2.0])
    return float(diff @ diff), 2.0 * diff


def test_the_optimiser_recovers_from_a_start_where_the_likelihood_is_not_finite():
    from scipy.optimize import minimize

    bounds = [(-3.0, 3.0), (-3.0, 3.0)]
    plain = minimize(_quadratic_with_a_hole, np.array([-2.0, 0.0]), jac=True, method="L-BFGS-B", bounds=bounds)
    assert not (plain.success and np.allclose(plain.x, [1.0, 2.0], atol=1e-4))    # scipy alone fails here
    found = calib._minimise(_quadratic_with_a_hole, np.array([-2.0, 0.0]), bounds)
    np.testing.assert_allclose(found.x, [1.0, 2.0], atol=1e-5)                       # the analytic minimum
    assert found.success and found.fun < 1e-9
    std = calib._log_std(_quadratic_with_a_hole, np.array([-1.0005, 0.0]), 10, bounds)
    assert std == {"log_diffusivity": math.inf, "log_decorrelation_time": math.inf}   # no NaN from a determinant
    # the curvature of Σ over n = 10 copies is 2n I, so the standard errors are 1/√(2n) (central differences)
    std = calib._log_std(_quadratic_with_a_hole, np.array([1.0, 2.0]), 10, bounds)
    assert std["log_diffusivity"] == pytest.approx(1 / math.sqrt(20)) == std["log_decorrelation_time"]


@pytest.mark.slow
def test_fit_with_calibration_recovers_k_in_taylor_green_cells(tmp_path, run_cli):
    """`driftwise fit` with no options (velocity fit, then the cross-validated transition calibration) on steady
    1 km cells u = U sin kx cos ky, v = −U cos kx sin ky (Taylor & Green 1937, Proc. R. Soc. A 158, 499), U = 0.2 m/s,
    plus a random walk of K = 1 m²/s (Einstein 1905) and 5 m fix noise; 120 drifters, 10-min fixes for 3 h (the case
    of tests/gp/test_background.py).  The calibrated K must lie within 30 % of the truth, the optimiser must end
    normally and every number of its record must be finite or null (no NaN).  Measured when written: K = 1.02 m²/s,
    σ estimated 8.9 m, L-BFGS-B "CONVERGENCE: NORM OF PROJECTED GRADIENT <= PGTOL" in 20 iterations (τ at its
    30-day bound: the steady cells give the velocity error no memory limit)."""
    starts = np.random.default_rng(22).uniform(0.0, 2000.0, (120, 2))
    table = synthetic.simulate_drifters(synthetic.TaylorGreen(0.2, 1000.0), starts, duration_s=3 * 3600.0,
                                        fix_interval_s=600.0, diffusivity_m2_s=1.0, position_error_m=5.0, seed=22)
    table.to_csv(tmp_path / "tg.csv", index=False)
    code, out, err = run_cli("fit", tmp_path / "tg.csv", "--out", tmp_path / "tg.npz", "--json", "--quiet")
    assert code == 0, err
    report = json.loads(out)
    record = report["calibration"]
    assert record["converged"] and "ABNORMAL" not in record["message"]
    assert report["diffusivity_m2_s"] == pytest.approx(1.0, rel=0.30)
    assert not record["at_bound"]["diffusivity_m2_s"] and math.isfinite(record["log_std"]["log_diffusivity"])
