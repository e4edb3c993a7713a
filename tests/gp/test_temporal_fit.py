"""Fitting time-varying flows: recovery of a tidal gyre from simulated drifters, and the fit's command-line flags.

Truth: a divergence-free Gaussian gyre, ψ = Ψ₀ e^{−r²/2R²}, u = (∂ψ/∂y, −∂ψ/∂x) (peak speed V at r = R), whose
strength follows a + b cos ω t with ω the M2 frequency (period 12.4206012 h, Doodson 1921 / common practice,
from memory), a = 0.5, b = −1 (|b| > |a|: the gyre reverses for a third of each cycle).  The truth is evaluated
here from that formula, not from driftwise.data.synthetic (which only simulates the drifters).  Check: on the grid
nodes inside the data's alpha shape (tests/geometry.py), at four phases ωt ≡ 0, π/2, π, 3π/2 (mod 2π) in the
middle of the record, the fitted mean's RMS error is below 10 % of the RMS speed over those phases and nodes, and
the fitted M2 tidal current ellipses on the ring r = R match the analytic ones (tolerances in _assert_ring_ellipses).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from geometry import grid_inside_alpha_shape

import driftwise
from driftwise.app.cli import main
from driftwise.data.synthetic import GaussianGyre, PulsingGyre, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.diagnostics.tidalellipse import tidal_ellipses

OMEGA_M2 = 2.0 * math.pi / (12.4206012 * 3600.0)
PEAK_M_S, RADIUS_M = 0.3, 1500.0
STEADY, HARMONIC = 0.5, -1.0
T_START = 1.7e9     # seconds since 1970 (as ISO-timed files give)


def gyre_velocity(xy, t_s):
    """(a + b cos ωt) × the Gaussian gyre u = V e^{1/2}/R e^{−r²/2R²} (−y, x)."""
    g = PEAK_M_S * math.exp(0.5) / RADIUS_M * np.exp(-0.5 * np.sum(xy**2, axis=1) / RADIUS_M**2)
    strength = STEADY + HARMONIC * np.cos(OMEGA_M2 * t_s)
    return strength * np.stack([-g * xy[:, 1], g * xy[:, 0]], axis=1)


def _tracks(n_tracks=40, hours=48, seed=3):
    flow = PulsingGyre(GaussianGyre(PEAK_M_S, RADIUS_M), STEADY, HARMONIC, OMEGA_M2)
    starts = np.random.default_rng(seed).uniform(-2500.0, 2500.0, (n_tracks, 2))
    frame = simulate_drifters(flow, starts, duration_s=hours * 3600.0, fix_interval_s=3600.0, diffusivity_m2_s=0.5,
                              position_error_m=3.0, seed=seed + 1, start_times_s=T_START)
    return frame


def phase_times_s(centre_s):
    """Times near ``centre_s`` at which ωt ≡ 0, π/2, π, 3π/2 (mod 2π)."""
    base = centre_s - math.fmod(OMEGA_M2 * centre_s, 2.0 * math.pi) / OMEGA_M2
    return [base + k * (math.pi / 2.0) / OMEGA_M2 for k in range(4)]


@pytest.mark.slow
def test_a_tidal_gyre_is_recovered_at_every_phase(capsys):
    tracks = tracks_from_frame(_tracks())
    field = driftwise.fit(tracks, position_error_m=3.0, progress=False, tides=("M2",))
    obs = driftwise.velocity_observations(tracks, position_error_m=3.0)
    grid = grid_inside_alpha_shape(np.asarray(obs.position_m), 300.0)
    times = phase_times_s(T_START + 24 * 3600.0)
    errors, truths = [], []
    for t in times:
        mean, _ = field.predict(grid, t)
        truth = gyre_velocity(grid, t)
        errors.append(float(np.sqrt(np.mean(np.sum((mean - truth) ** 2, axis=1)))))
        truths.append(truth)
    rms_speed = float(np.sqrt(np.mean(np.sum(np.concatenate(truths) ** 2, axis=1))))
    with capsys.disabled():
        print(f"\ntidal gyre: {grid.shape[0]} nodes, rms speed {rms_speed:.4f} m/s; RMSE per phase (0, π/2, π, 3π/2): "
              + ", ".join(f"{e:.4f} m/s ({e / rms_speed:.1%})" for e in errors))
    assert max(errors) < 0.10 * rms_speed
    # the M2 amplitude field: a_M2 = b u_g (in phase with cos ωt), b_M2 = 0, at the gyre's ring r = R
    mean, _ = field.harmonic_posterior(np.array([RADIUS_M, 0.0]), "M2")
    expected = np.array([0.0, HARMONIC * PEAK_M_S, 0.0, 0.0])
    assert np.all(np.abs(np.asarray(mean) - expected) < 0.1 * PEAK_M_S), np.asarray(mean)
    fitted = _assert_ring_ellipses(field)
    with capsys.disabled():
        print("M2 ellipses on r = R at 0°, 90°, 180°, 270° (truth 0.3 m/s, 0, 90/0/90/0°, 180/0/0/180°): "
              + "; ".join(f"{fitted.semi_major_m_s[k]:.3f} m/s, {fitted.semi_minor_m_s[k]:+.3f}, "
                          f"{fitted.inclination_deg[k]:.1f}°, {fitted.phase_deg[k]:.1f}°" for k in range(4)))
    assert field.is_time_varying and list(field.constituents) == ["M2"]


def _ring_ellipses_analytic(angle_deg):
    """The truth's M2 ellipse at (R cos φ, R sin φ): the current is b V (−sin φ, cos φ) cos ωt with b = −1, a line
    (semi-minor 0) of semi-major |b| V along the ring's tangent (inclination (φ − 90°) mod 180°), at its greatest
    along that inclination at t = 0 when b V (−sin φ, cos φ) points along it (phase 0°), else half a period later
    (phase 180°).  Definitions as in Prandle 1982 (from memory; driftwise.diagnostics.tidalellipse)."""
    direction = (angle_deg - 90.0) % 360.0          # the direction of b V (−sin φ, cos φ) with b < 0
    return abs(HARMONIC) * PEAK_M_S, 0.0, direction % 180.0, 0.0 if direction < 180.0 else 180.0


def _assert_ring_ellipses(field):
    """The fitted M2 ellipses at four points on the ring r = R against the analytic ones: semi-major within
    10 % of V, semi-minor below 0.1 V, inclination and phase within 10° (an inclination just below 180° is the
    same line as one just above 0°, with the phase half a period on: compared as such)."""
    angles = (0.0, 90.0, 180.0, 270.0)
    centres = [RADIUS_M * np.array([math.cos(math.radians(a)), math.sin(math.radians(a))]) for a in angles]
    posteriors = [field.harmonic_posterior(c, "M2") for c in centres]
    fitted = tidal_ellipses(np.stack([np.asarray(m) for m, _ in posteriors]),
                            np.stack([np.asarray(c) for _, c in posteriors]))
    for k, angle in enumerate(angles):
        major, minor, inclination, phase = _ring_ellipses_analytic(angle)
        assert fitted.semi_major_m_s[k] == pytest.approx(major, abs=0.1 * PEAK_M_S), (angle, fitted)
        assert abs(fitted.semi_minor_m_s[k] - minor) < 0.1 * PEAK_M_S, (angle, fitted)
        turns = round((fitted.inclination_deg[k] - inclination) / 180.0)   # θ near 0° ≡ 180° moves g by 180°
        assert abs(fitted.inclination_deg[k] - inclination - 180.0 * turns) < 10.0, (angle, fitted)
        assert abs((fitted.phase_deg[k] - 180.0 * turns - phase + 180.0) % 360.0 - 180.0) < 10.0, (angle, fitted)
    return fitted


@pytest.mark.slow
def test_fit_command_takes_tides_and_a_slow_time_scale(tmp_path, capsys):
    csv = tmp_path / "tracks.csv"
    _tracks(n_tracks=8, hours=18, seed=5).to_csv(csv, index=False)
    out = tmp_path / "model.npz"
    code = main(["fit", str(csv), "--out", str(out), "--tides", "m2", "--slow-time-scale", "2d", "--inducing", "12",
                 "--position-error", "3m", "--json"])
    assert code == 0
    report = json.loads(capsys.readouterr().out)
    temporal = report["temporal"]
    assert temporal["components"] == ["steady", "M2", "slow"]
    np.testing.assert_allclose(temporal["constituents"]["M2"]["period_s"], 12.4206012 * 3600.0, rtol=1e-12)
    assert temporal["slow"]["time_scale_s"] == pytest.approx(2 * 86400.0, rel=1e-12) and not temporal["slow"]["time_scale_learned"]
    assert {"velocity_scale_m_s", "length_scale_m"} <= set(temporal["constituents"]["M2"]["hyperparameters"]) | {
        k.split("divergence_free_")[-1] for k in temporal["constituents"]["M2"]["hyperparameters"]}
    assert report["likelihood"] == "velocities" and "skipped" in report["calibration"]
    field = driftwise.load(out)
    assert field.is_time_varying and field.time_origin_s == pytest.approx(T_START + 1800.0)


@pytest.mark.parametrize("flags,message", [
    (["--tides", "Q1"], "--tides: unknown constituent 'Q1'"),
    (["--slow-time-scale", "5"], "--slow-time-scale"),
    (["--tides", "inertial"], "'inertial' constituent needs the data's latitude"),
    (["--tides", "M2", "--likelihood", "transitions"], "--likelihood transitions needs a steady model"),
])
def test_fit_command_refuses_bad_time_options(tmp_path, capsys, flags, message):
    csv = tmp_path / "tracks.csv"
    _tracks(n_tracks=4, hours=6, seed=6).to_csv(csv, index=False)
    code = main(["fit", str(csv), "--out", str(tmp_path / "m.npz"), "--position-error", "3m", *flags])
    assert code == 2
    assert message in capsys.readouterr().err
