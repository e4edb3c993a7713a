"""Defaults taken from the data at tank scale: the estimated position error in fit and its record,
data-derived calibration lags and bounds, refusals, and no checkpoint left after a failure.

Tank-scale tracks: Brownian motion (Einstein 1905: each displacement component N(0, 2KΔt))
with white fix noise, 2 Hz fixes, K = 1e-5 m²/s, σ = 0.5 mm, via driftwise.synthetic.random_walk;
and a solid-body rotation, for which x(t + h) = R(ωh) x(t) + N(0, 2Kh I) is exact (a rotation
keeps an isotropic covariance isotropic), so no integrator error enters the truth.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from driftwise.app import cmd_fit
from driftwise.data import datascales, synthetic
from driftwise.data.tracks import Tracks, tracks_from_frame
from driftwise.dynamics import calibrate as cal
from driftwise.errors import InputError
from driftwise.gp.schedule import Schedule
from driftwise.gp.training import fit, fit_report

K_TANK = 1e-5
SIGMA_TANK = 5e-4


def tank_walk(n_tracks=8, n_fixes=200, seed=0, diffusivity_m2_s=K_TANK):
    table = synthetic.random_walk(n_tracks, n_fixes, fix_interval_s=0.5, diffusivity_m2_s=diffusivity_m2_s, seed=seed,
                                  position_error_m=SIGMA_TANK)
    return tracks_from_frame(table)


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class Rotation:
    """A known field with the posterior interface: solid-body rotation u = ω ẑ × x, no velocity uncertainty."""

    omega_rad_s: jax.Array

    def mean_at(self, x):
        return self.omega_rad_s * jnp.stack([-x[1], x[0]])

    def cov_at(self, x):
        return jnp.zeros((2, 2))


def rotating_tracks(n_tracks, n_fixes, *, step_s, omega_rad_s, diffusivity_m2_s, sigma_m, seed):
    """Exact solid-body rotation plus Brownian motion, sampled every ``step_s``, fixes with noise σ."""
    rng = np.random.default_rng(seed)
    c, s = math.cos(omega_rad_s * step_s), math.sin(omega_rad_s * step_s)
    rot = np.array([[c, -s], [s, c]])
    x = rng.uniform(-0.3, 0.3, (n_tracks, 2))
    path = [x]
    for _ in range(n_fixes - 1):
        x = x @ rot.T + math.sqrt(2 * diffusivity_m2_s * step_s) * rng.standard_normal(x.shape)
        path.append(x)
    fixes = np.stack(path, axis=1) + sigma_m * rng.standard_normal((n_tracks, n_fixes, 2))
    ids = np.repeat(np.array([f"R{i:03d}" for i in range(n_tracks)], dtype=object), n_fixes)
    return Tracks(track_id=ids, time_s=np.tile(step_s * np.arange(n_fixes), n_tracks),
                  position_m=fixes.reshape(-1, 2))


# ------------------------------------------------------------------ calibration at tank scale
def test_tank_calibration_uses_the_data_lags_and_recovers_k():
    """2 Hz fixes for 5 min in a rotation of period 63 s (ω = 0.1 rad/s): the default lags follow the
    data (geomspace(1 s, 100 s, 5) on whole fixes: 1, 3, 10, 31.5, 100 s, not 1–24 h), the K bounds contain 1e-5 m²/s (the former fixed lower bound was
    1e-3), and the calibrated K is within 25 % of the truth (K only: the field has no velocity
    uncertainty, as in test_calibration's diffusivity recovery)."""
    tracks = rotating_tracks(30, 601, step_s=0.5, omega_rad_s=0.1, diffusivity_m2_s=K_TANK, sigma_m=SIGMA_TANK,
                             seed=1)
    scales = datascales.data_scales(tracks)
    found = cal.calibrate_transport(Rotation(jnp.asarray(0.1)), tracks, position_error_m=SIGMA_TANK,
                                    initial=(1e-4, 10.0), max_starts=600)
    assert list(found.lags_s) == list(scales.calibration_lags_s) == [1.0, 3.0, 10.0, 31.5, 100.0]
    assert found.converged and not found.at_bound["diffusivity_m2_s"]
    assert found.diffusivity_m2_s == pytest.approx(K_TANK, rel=0.25)


def test_calibration_message_names_the_lag_not_a_score():
    tracks = rotating_tracks(3, 20, step_s=0.5, omega_rad_s=0.1, diffusivity_m2_s=K_TANK, sigma_m=SIGMA_TANK,
                             seed=2)
    with pytest.raises(InputError, match=r"calibration needs a track observed for 1 h after a fix"):
        cal.transitions_from_tracks(tracks, lags_s=[3600.0], position_error_m=SIGMA_TANK)


# ------------------------------------------------------------------ fit
def test_fit_estimates_the_position_error_when_none_is_given():
    tracks = tank_walk(diffusivity_m2_s=1e-6)
    field = fit(tracks, "independent", inducing=12, schedule=Schedule(steps=3), progress=False)
    report = fit_report(field)
    estimate = report["position_error_estimate"]
    assert report["position_error_source"] == "estimated"
    assert report["position_error_m"] == pytest.approx(estimate["value_m"], rel=1e-12)
    assert field.position_error_m == pytest.approx(estimate["value_m"], rel=1e-12)
    # K = 1e-6 m²/s (2Kh = 4σ²), 8 tracks × 195 windows × 2 components: SE(σ²)/σ² ≈ 2·6/√3120 ≈ 0.2
    # (positionerror module docstring); the estimate within 3 SE of 0.5 mm
    assert estimate["identified"]
    assert abs(estimate["value_m"] - SIGMA_TANK) < 3 * estimate["standard_error_m"]
    json.dumps(report["position_error_estimate"], allow_nan=False)


def test_fit_records_a_given_position_error_and_refuses_an_implausible_one():
    tracks = tank_walk()
    field = fit(tracks, "independent", inducing=12, schedule=Schedule(steps=2), position_error_m=4e-4, progress=False)
    report = fit_report(field)
    assert (report["position_error_m"], report["position_error_source"]) == (4e-4, "given")
    assert report["position_error_estimate"] is None
    with pytest.raises(InputError, match=r"position error \(--position-error\) 10 m is larger than the typical step"):
        fit(tracks, "independent", inducing=12, schedule=Schedule(steps=2), position_error_m=10.0, progress=False)


# ------------------------------------------------------------------ the command line
@pytest.fixture
def tank_csv(tmp_path):
    path = tmp_path / "tank.csv"
    synthetic.random_walk(4, 60, fix_interval_s=0.5, diffusivity_m2_s=K_TANK, seed=3,
                          position_error_m=SIGMA_TANK).to_csv(path, index=False)
    return path


def test_cli_fit_reports_the_position_error(run_cli, tank_csv, tmp_path):
    code, out, _ = run_cli("fit", tank_csv, "--out", tmp_path / "m.npz", "--kernel", "independent",
                           "--inducing", "8", "--no-calibrate", "--json")
    assert code == 0
    report = json.loads(out)
    assert report["position_error_source"] == "estimated" and report["position_error_m"] > 0
    assert not (tmp_path / "m.ckpt.npz").exists()
    code, out, _ = run_cli("fit", tank_csv, "--out", tmp_path / "m.npz", "--kernel", "independent",
                           "--inducing", "8", "--no-calibrate", "--position-error", "0.5mm", "--quiet")
    assert code == 0
    assert "position error σ = 0.5 mm (given)" in out


def test_cli_refuses_a_position_error_larger_than_the_step(run_cli, tank_csv, tmp_path):
    code, _, err = run_cli("fit", tank_csv, "--out", tmp_path / "m.npz", "--position-error", "10m")
    assert code == 2
    assert "position error (--position-error) 10 m is larger than the typical step between fixes" in err
    assert not (tmp_path / "m.ckpt.npz").exists() and not (tmp_path / "m.npz").exists()


def test_cli_leaves_no_checkpoint_when_calibration_fails(run_cli, tank_csv, tmp_path, monkeypatch):
    def fail(field, tracks, **_):
        raise InputError("calibration failed on purpose")

    monkeypatch.setattr(cmd_fit, "calibrate", fail)
    code, _, err = run_cli("fit", tank_csv, "--out", tmp_path / "m.npz", "--kernel", "independent",
                           "--inducing", "8")
    assert code == 2 and "calibration failed on purpose" in err
    assert list(tmp_path.glob("*.ckpt.npz")) == []


# ------------------------------------------------------------------ the 3-D tank flow used end to end
def test_abc_flow_is_divergence_free_and_beltrami():
    """ABC flow (Dombre et al. 1986): ∇·u = 0 and ∇ × u = k u, by central differences (h = 1e-5 m in a
    1 m box; truncation O(k²h²) ≈ 4e-9 relative), atol 1e-7 × U k."""
    flow = synthetic.ABCFlow(speed_m_s=2e-3, box_m=1.0)
    points = np.random.default_rng(0).uniform(0.0, 1.0, (50, 3))
    h = 1e-5
    grad = np.stack([(flow.velocity(points + h * e) - flow.velocity(points - h * e)) / (2 * h)
                     for e in np.eye(3)], axis=-1)                          # (n, component, derivative)
    scale = 2e-3 * 2 * np.pi
    np.testing.assert_allclose(np.trace(grad, axis1=1, axis2=2), 0.0, atol=1e-7 * scale)
    curl = np.stack([grad[:, 2, 1] - grad[:, 1, 2], grad[:, 0, 2] - grad[:, 2, 0], grad[:, 1, 0] - grad[:, 0, 1]], -1)
    np.testing.assert_allclose(curl, flow.vorticity(points), atol=1e-7 * scale)


def test_simulate_drifters_in_3d():
    table = synthetic.simulate_drifters(synthetic.ABCFlow(speed_m_s=2e-3, box_m=1.0), [[0.1, 0.2, 0.3]],
                                        duration_s=10.0, fix_interval_s=0.5, diffusivity_m2_s=0.0,
                                        position_error_m=0.0, seed=0, substeps=20)
    assert list(table.columns) == ["track_id", "time_s", "x_m", "y_m", "z_m"] and len(table) == 21
    # K = 0: the fixes follow the streamline; first step ≈ u(x0) Δt (Euler, error O(|∇u| u Δt²) ≈ 2e-6 m)
    step = table[["x_m", "y_m", "z_m"]].to_numpy()[1] - [0.1, 0.2, 0.3]
    np.testing.assert_allclose(step, 0.5 * synthetic.ABCFlow(2e-3, 1.0).velocity(np.array([0.1, 0.2, 0.3])),
                               atol=5e-6)
