"""Analytic flows, the drifter simulator and the bundled demo data."""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np
import pytest

from driftwise.app.bay import DemoBay, DemoScenario, main, write_demo_data
from driftwise.data import synthetic
from driftwise.data.frame import Frame
from driftwise.data.synthetic import (
    GaussianGyre,
    LambOseenVortex,
    Mixture,
    PotentialSources,
    TaylorGreen,
    UniformFlow,
    random_walk,
    simulate_drifters,
)
from driftwise.data.tracks import read_tracks

DEMO = Path(__file__).resolve().parents[2] / "demo_data"

FIELDS = {
    "lamb_oseen": LambOseenVortex(circulation_m2_s=5e3, core_radius_m=800.0, center_m=(300.0, -200.0)),
    "taylor_green": TaylorGreen(velocity_scale_m_s=0.3, length_scale_m=2000.0),
    "gaussian_gyre": GaussianGyre(peak_speed_m_s=-0.2, radius_m=1500.0, center_m=(100.0, 50.0)),
    "potential_sources": PotentialSources(((0.0, 0.0), (1500.0, 800.0)), (300.0, -150.0), 900.0),
    "mixture_70_30": Mixture(PotentialSources(((0.0, 0.0),), (400.0,), 1200.0),
                             LambOseenVortex(4e3, 700.0), weight_b=0.3),
    "demo_bay": DemoBay(),
    "uniform": UniformFlow((0.1, -0.05)),
}


def _grid(half_width_m, n=25):
    axis = np.linspace(-half_width_m, half_width_m, n)
    return np.stack(np.meshgrid(axis, axis), axis=-1).reshape(-1, 2) + 13.7  # avoid landing exactly on centres


def _jacobian_fd(field, xy, h=0.5):
    """Central differences, error O(h²): J[:, i, j] = ∂u_i/∂x_j."""
    cols = []
    for j in range(2):
        step = np.zeros(2)
        step[j] = h
        cols.append((field.velocity(xy + step) - field.velocity(xy - step)) / (2 * h))
    return np.stack(cols, axis=-1)


@pytest.mark.parametrize("name", list(FIELDS))
def test_divergence_and_vorticity_match_central_differences(name):
    field = FIELDS[name]
    xy = _grid(8000.0 if name == "demo_bay" else 3000.0)
    jac = _jacobian_fd(field, xy)
    scale = np.abs(jac).max() + 1e-30
    np.testing.assert_allclose(field.divergence(xy), jac[:, 0, 0] + jac[:, 1, 1], rtol=0, atol=1e-6 * scale)
    np.testing.assert_allclose(field.vorticity(xy), jac[:, 1, 0] - jac[:, 0, 1], rtol=0, atol=1e-6 * scale)
    assert field.velocity(xy).shape == xy.shape


def test_lamb_oseen_matches_the_published_profile_and_circulation():
    gamma, rc = 5e3, 800.0
    vortex = LambOseenVortex(gamma, rc, center_m=(0.0, 0.0))
    r = np.array([1e-3, 100.0, 800.0, 1120.9, 5000.0])
    u = vortex.velocity(np.stack([r, np.zeros_like(r)], axis=-1))
    # Lamb (1932) §334a: u_θ = Γ/(2πr)(1 − exp(−r²/r_c²)), purely azimuthal
    np.testing.assert_allclose(u[:, 1], gamma / (2 * np.pi * r) * -np.expm1(-r**2 / rc**2), rtol=1e-9)
    np.testing.assert_allclose(u[:, 0], 0.0, atol=1e-15)
    # Stokes' theorem: the circulation around a circle of radius R is Γ(1 − exp(−R²/r_c²))
    theta = np.linspace(0, 2 * np.pi, 2001)[:-1]
    for radius in (400.0, 2000.0):
        ring = radius * np.stack([np.cos(theta), np.sin(theta)], axis=-1)
        tangent = np.stack([-np.sin(theta), np.cos(theta)], axis=-1)
        circulation = np.sum(np.sum(vortex.velocity(ring) * tangent, axis=1)) * radius * (2 * np.pi / theta.size)
        np.testing.assert_allclose(circulation, gamma * (1 - np.exp(-radius**2 / rc**2)), rtol=1e-9)
    # the peak of u_θ is at r ≈ 1.1209 r_c (a standard property of the Lamb–Oseen profile, from memory)
    radii = np.linspace(500, 1500, 10001)
    speed = np.linalg.norm(vortex.velocity(np.stack([radii, 0 * radii], axis=-1)), axis=1)
    np.testing.assert_allclose(radii[np.argmax(speed)], 1.1209 * rc, rtol=1e-3)


def test_taylor_green_cells_are_a_steady_euler_solution():
    # Taylor & Green (1937): (u·∇)u = −∇p/ρ with p/ρ = (U²/4)(cos 2kx + cos 2ky) (from memory)
    flow = TaylorGreen(velocity_scale_m_s=0.3, length_scale_m=2000.0)
    xy = _grid(3000.0, 17)
    u = flow.velocity(xy)
    advection = np.einsum("nj,nij->ni", u, _jacobian_fd(flow, xy))
    k, big_u = math.pi / 2000.0, 0.3
    minus_grad_p = 0.5 * big_u**2 * k * np.stack([np.sin(2 * k * xy[:, 0]), np.sin(2 * k * xy[:, 1])], axis=-1)
    np.testing.assert_allclose(advection, minus_grad_p, rtol=0, atol=1e-10)
    np.testing.assert_allclose(flow.velocity(np.array([[1000.0, 0.0]])), [[0.3, 0.0]], atol=1e-15)


def test_gyre_peak_speed_and_source_flux():
    gyre = GaussianGyre(peak_speed_m_s=0.25, radius_m=4000.0)
    radii = np.linspace(100, 12000, 11900)
    speed = np.linalg.norm(gyre.velocity(np.stack([radii, 0 * radii], axis=-1)), axis=1)
    np.testing.assert_allclose([radii[np.argmax(speed)], speed.max()], [4000.0, 0.25], rtol=1e-3)
    assert gyre.velocity(np.array([[4000.0, 0.0]]))[0, 1] > 0  # positive speed turns counter-clockwise
    # Gauss's divergence theorem: outward flux through a circle = ∫ ∇·u dA over the disc
    source = PotentialSources(((0.0, 0.0),), (500.0,), 1000.0)
    radius, theta = 1700.0, np.linspace(0, 2 * np.pi, 721)[:-1]
    normal = np.stack([np.cos(theta), np.sin(theta)], axis=-1)
    flux = np.sum(source.velocity(radius * normal) * normal) * radius * 2 * np.pi / theta.size
    rings = np.linspace(0, radius, 4001)
    integrand = source.divergence(np.stack([rings, 0 * rings], axis=-1)) * 2 * np.pi * rings
    np.testing.assert_allclose(flux, np.trapezoid(integrand, rings), rtol=1e-6)


def test_demo_bay_is_a_divergent_river_plus_a_rotational_gyre():
    bay = DemoBay()
    xy = _grid(9000.0, 41)
    inside = np.linalg.norm(xy, axis=1) < 9000
    speed = np.linalg.norm(bay.velocity(xy[inside]), axis=1)
    assert 0.05 < np.percentile(speed, 10) and np.percentile(speed, 90) < 0.3
    np.testing.assert_allclose(bay.gyre.divergence(xy), 0.0, atol=0)
    np.testing.assert_allclose(bay.river.vorticity(xy), 0.0, atol=0)
    near_mouth = np.linalg.norm(xy - np.array(bay.river_mouth_m), axis=1) < 1000
    assert np.all(bay.divergence(xy[near_mouth]) > 1e-5)  # 2q/w² ≈ 9.9e-5 1/s at the mouth
    np.testing.assert_allclose(np.linalg.norm(bay.river.velocity(np.array(bay.river_mouth_m) + [[2500.0, 0.0]])),
                               0.15, rtol=1e-12)


# ---------------------------------------------------------------- drifters
def test_no_diffusion_uniform_flow_gives_straight_lines():
    table = simulate_drifters(UniformFlow((0.2, -0.1)), [[0.0, 0.0], [500.0, 100.0]], duration_s=7200.0,
                              fix_interval_s=600.0, diffusivity_m2_s=0.0, position_error_m=0.0, seed=1,
                              start_times_s=[0.0, 300.0])
    assert list(table.columns) == ["track_id", "time_s", "x_m", "y_m"] and len(table) == 26
    second = table[table.track_id == "D002"]
    np.testing.assert_allclose(second.time_s, 300.0 + 600.0 * np.arange(13), rtol=0, atol=0)
    np.testing.assert_allclose(second.x_m, 500.0 + 0.2 * 600.0 * np.arange(13), rtol=1e-12)
    np.testing.assert_allclose(second.y_m, 100.0 - 0.1 * 600.0 * np.arange(13), rtol=1e-12)


def test_euler_maruyama_without_noise_is_first_order():
    # Kloeden & Platen (1992): with no noise Euler–Maruyama is Euler's method, global error O(h)
    vortex = LambOseenVortex(2e3, 500.0)  # 0.31 m/s at 1 km: about one radian in the hour
    start = np.array([[1000.0, 0.0]])
    omega = np.linalg.norm(vortex.velocity(start)) / 1000.0
    exact = 1000.0 * np.array([np.cos(omega * 3600.0), np.sin(omega * 3600.0)])
    errors = []
    for substeps in (20, 40, 80):
        table = simulate_drifters(vortex, start, duration_s=3600.0, fix_interval_s=3600.0, diffusivity_m2_s=0.0,
                                  position_error_m=0.0, seed=0, substeps=substeps)
        errors.append(np.linalg.norm(table[["x_m", "y_m"]].to_numpy()[-1] - exact))
    np.testing.assert_allclose(np.log2(np.array(errors[:-1]) / errors[1:]), 1.0, atol=0.1)


def test_diffusion_spreads_as_2Kt_and_fixes_carry_gps_noise():
    # Einstein (1905): with no flow, each component's displacement variance after t is 2Kt
    k, t, n = 4.0, 6 * 3600.0, 4000
    table = simulate_drifters(UniformFlow((0.0, 0.0)), np.zeros((n, 2)), duration_s=t, fix_interval_s=t,
                              diffusivity_m2_s=k, position_error_m=0.0, seed=3, substeps=6)
    last = table.groupby("track_id").tail(1)[["x_m", "y_m"]].to_numpy()
    np.testing.assert_allclose(last.var(axis=0, ddof=1), 2 * k * t, rtol=5 * math.sqrt(2 / n))
    noisy = simulate_drifters(UniformFlow((0.0, 0.0)), np.zeros((n, 2)), duration_s=60.0, fix_interval_s=60.0,
                              diffusivity_m2_s=0.0, position_error_m=10.0, seed=4)
    np.testing.assert_allclose(noisy[["x_m", "y_m"]].to_numpy().var(axis=0, ddof=1), 100.0,
                               rtol=5 * math.sqrt(2 / (2 * n)))


def test_time_jitter_whole_seconds_and_seeds():
    kwargs = dict(duration_s=86400.0, fix_interval_s=3600.0, diffusivity_m2_s=1.0, position_error_m=5.0,
                  time_jitter_s=120.0)
    a = simulate_drifters(DemoBay(), [[0.0, 0.0], [1000.0, 0.0]], seed=7, **kwargs)
    b = simulate_drifters(DemoBay(), [[0.0, 0.0], [1000.0, 0.0]], seed=7, **kwargs)
    c = simulate_drifters(DemoBay(), [[0.0, 0.0], [1000.0, 0.0]], seed=8, **kwargs)
    assert a.equals(b) and not a.equals(c)
    offset = a.time_s.to_numpy() - np.tile(3600.0 * np.arange(25), 2)
    assert np.all(np.abs(offset) <= 120) and np.all(offset == np.round(offset)) and offset.std() > 30
    assert np.all(offset[[0, 25]] == 0) and np.all(np.diff(a.time_s.to_numpy().reshape(2, 25), axis=1) > 0)


def test_lonlat_output_through_a_frame():
    frame = Frame("lonlat", -9.0, 44.0)
    table = simulate_drifters(DemoBay(), [[2000.0, 3000.0]], duration_s=7200.0, fix_interval_s=3600.0,
                              diffusivity_m2_s=5.0, position_error_m=10.0, seed=2, frame=frame)
    np.testing.assert_allclose(frame.from_lonlat(table.lon, table.lat), table[["x_m", "y_m"]], rtol=0, atol=1e-6)


def test_random_walk_in_3d_has_the_right_shape_and_spread():
    table = random_walk(300, 11, fix_interval_s=100.0, diffusivity_m2_s=2.0, seed=9, dim=3, drift_m_s=[0.1, 0, 0])
    assert list(table.columns) == ["track_id", "time_s", "x_m", "y_m", "z_m"] and len(table) == 3300
    end = table[table.time_s == 1000.0][["x_m", "y_m", "z_m"]].to_numpy()
    np.testing.assert_allclose(end.mean(axis=0), [100.0, 0.0, 0.0], rtol=0, atol=5 * math.sqrt(4000 / 300))
    np.testing.assert_allclose(end.var(axis=0, ddof=1), 4000.0, rtol=5 * math.sqrt(2 / 300))  # 2Kt, Einstein 1905


# ---------------------------------------------------------------- demo data
def test_demo_data_regenerates_byte_for_byte(tmp_path):
    assert main(["--out", str(tmp_path)]) == 0
    for name in ("bay_fit.csv", "bay_holdout.csv", "README.md"):
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name


def test_demo_data_is_small_clean_and_split_by_track():
    sizes = [(DEMO / n).stat().st_size for n in ("bay_fit.csv", "bay_holdout.csv")]
    assert sum(sizes) < 2 * 2**20
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit, holdout = read_tracks(DEMO / "bay_fit.csv"), read_tracks(DEMO / "bay_holdout.csv")
    assert (fit.n_tracks, holdout.n_tracks) == (40, 30) and fit.n_fixes >= 2500 and holdout.n_fixes >= 2000
    assert not set(fit.unique_ids) & set(holdout.unique_ids)
    assert fit.time_is_absolute and fit.frame.kind == "lonlat" and fit.qc == ()
    readme = (DEMO / "README.md").read_text()
    scenario = DemoScenario()
    assert "invented" in readme and f"K = {scenario.diffusivity_m2_s:g} m²/s" in readme
    assert "python -m driftwise.app.bay --out demo_data" in readme   # the generator moved to app/bay


def test_write_demo_data_returns_the_paths(tmp_path):
    paths = write_demo_data(tmp_path / "nested")
    assert sorted(p.name for p in paths) == ["README.md", "bay_fit.csv", "bay_holdout.csv"]


def test_in_periodic_box_folds_positions_and_cuts_tracks_at_faces():
    """Folding into one period of a periodic flow: every fix lands in [0, L)³ at its position modulo L (numpy
    ``mod``), a track is cut wherever it changes period cell, and within a piece the steps are those of the
    unfolded track (so finite-difference velocities are unchanged)."""
    flow = synthetic.ABCFlow(speed_m_s=1e-2, box_m=1.0)
    starts = np.random.default_rng(0).uniform(0.0, 1.0, (10, 3))
    table = synthetic.simulate_drifters(flow, starts, duration_s=120.0, fix_interval_s=0.5, diffusivity_m2_s=1e-5,
                                        position_error_m=5e-4, seed=1)
    folded = synthetic.in_periodic_box(table, 1.0, min_fixes=1)
    xyz = folded[["x_m", "y_m", "z_m"]].to_numpy()
    assert len(folded) == len(table) and xyz.min() >= 0.0 and xyz.max() < 1.0
    np.testing.assert_allclose(xyz, np.mod(table[["x_m", "y_m", "z_m"]].to_numpy(), 1.0), atol=1e-12)
    assert folded["track_id"].nunique() > table["track_id"].nunique()
    for _, piece in folded.groupby("track_id"):
        assert np.all(np.abs(np.diff(piece[["x_m", "y_m", "z_m"]].to_numpy(), axis=0)) < 0.1)
    dropped = synthetic.in_periodic_box(table, 1.0, min_fixes=6)
    assert dropped.groupby("track_id").size().min() >= 6 and len(dropped) < len(table)
