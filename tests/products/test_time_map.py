"""Maps and checks of a time-varying field (issue 14, Deliver 4): `driftwise map --times`, the time mean, the tidal
ellipse maps and figure, divergence/vorticity at a time and averaged over the data's span, `check --model`.

External references beside each check:
* IOOS ``compliance-checker`` (PyPI) ``cf`` suite at its newest CF version and ``acdd:1.3``, and ``cfchecker``
  (PyPI, the CF community checker), both offline (tests/products/cf_checkers.py);
* CF time decoding by xarray/cftime (CF-1.11 §4.4) against ``numpy.datetime64`` arithmetic;
* the time mean (1/T)∫ f dt by ``scipy.integrate.simpson`` on 121 equally spaced times (composite Simpson rule,
  error O(h⁴): (ωh)⁴/180 ≈ 1e-6 of the harmonic amplitude here);
* derivatives by central differences, (f(x + h) − f(x − h)) / 2h, error O(h²).
Fields are small (16 inducing points, q in closed form at fixed hyperparameters), so no optimiser runs here.
"""

from __future__ import annotations

import json
import math
import types
import warnings

import jax.numpy as jnp
import numpy as np
import pytest
import xarray as xr
from scipy.integrate import simpson

import driftwise  # noqa: F401  (switches on float64)
from driftwise.app import cli
from driftwise.data.frame import Frame
from driftwise.data.synthetic import GaussianGyre, PulsingGyre, simulate_drifters
from driftwise.diagnostics import physics as P
from driftwise.dynamics.supportcheck import SupportWarning
from driftwise.diagnostics.grid import east_north_jacobian, field_grid
from driftwise.diagnostics.tidalellipse import tidal_ellipses
from driftwise.diagnostics.timewindow import TimeWindow, at_time, span_average, window_velocity
from driftwise.gp import field as F
from driftwise.gp.modelfile import load_model, save_model
from driftwise.gp.temporal import TemporalStart

cf_checkers = pytest.importorskip("cf_checkers")      # tests/products/cf_checkers.py (needs the `test` extra)

OMEGA_M2 = 2.0 * math.pi / (12.4206012 * 3600.0)      # M2 period 12.4206012 h (Doodson 1921, from memory)
T0 = 1717416000.0                                     # 2024-06-03T12:00:00Z in Unix seconds
SPAN_S = 30 * 3600.0
HALF_M = 3000.0
FRAME = Frame("lonlat", -9.0, 44.0)


def tidal_field(frame=FRAME, *, absolute=True, seed=0, t_start=T0):
    """A Helmholtz steady + M2 GP (fixed hyperparameters, q in closed form) on noisy velocities of a gyre whose
    strength follows 0.5 − cos ωt, plus a weak uniform divergence, sampled at random (x, t) over 30 h."""
    rng = np.random.default_rng(seed)
    n = 240
    x = rng.uniform(-HALF_M, HALF_M, (n, 2))
    t = t_start + np.sort(rng.uniform(0.0, SPAN_S, n))
    g = 0.3 / 1500.0 * np.exp(0.5 - 0.5 * np.sum(x**2, axis=1) / 1500.0**2)
    v = (0.5 - np.cos(OMEGA_M2 * t))[:, None] * np.stack([-g * x[:, 1], g * x[:, 0]], 1) + 1e-5 * x
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v + rng.normal(0.0, 0.02, x.shape),
                                dt_s=np.full(n, 3600.0), time_s=t, position_error_m=3.0)
    z = np.stack(np.meshgrid(*[np.linspace(-HALF_M, HALF_M, 4)] * 2), -1).reshape(-1, 2)
    start = TemporalStart(("M2",), (OMEGA_M2,), float(t[0]), harmonic_velocity_scale_m_s=0.2)
    params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=0.15, length_scale_m=1500.0, temporal=start,
                           noise_floor_m_s=0.02, diffusivity_m2_s=0.01)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    summary = {"extent_m": {"min": x.min(0).tolist(), "max": x.max(0).tolist()},
               "time_span_s": [float(t[0]), float(t[-1])]}
    if absolute:
        summary["time_origin_utc"] = "1970-01-01T00:00:00Z"
    return F.FlowField.from_params(params, frame=frame, data_summary=summary)


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tvmap")
    paths = {"absolute": folder / "tide.npz", "relative": folder / "tide_relative.npz"}
    save_model(tidal_field(), paths["absolute"])
    save_model(tidal_field(Frame(), absolute=False), paths["relative"])
    return paths


@pytest.fixture(scope="module")
def maps(models, tmp_path_factory):
    """`driftwise map` at two ISO times and as the time mean (absolute model), and at 6 h on the relative clock."""
    folder = tmp_path_factory.mktemp("tvmapout")
    runs = {"times": [str(models["absolute"]), "--times", "2024-06-03T15:00Z,2024-06-04T01:30:00Z",
                      "--figures", str(folder)],
            "mean": [str(models["absolute"])],
            "relative": [str(models["relative"]), "--times", "6h"]}
    out = {}
    for name, argv in runs.items():
        path = folder / f"{name}.nc"
        assert cli.main(["map", *argv, "--out", str(path), "--spacing", "1500m", "--json"]) == 0
        out[name] = path
    out["figure"] = folder / "tidal_ellipses_M2.png"
    return out


@pytest.mark.parametrize("name", ["times", "mean", "relative"])
def test_time_map_passes_both_cf_checkers(maps, name):
    path = maps[name]
    result = cf_checkers.compliance_results(path, cf_checkers.newest_cf_suite())     # compliance-checker cf:1.11
    assert result["errors"] == {}, result["errors"]
    assert result["high"] == [] and result["medium"] == [], (result["high"], result["medium"])
    assert result["scored"] == result["possible"] > 200
    messages = cf_checkers.cfchecker_messages(path)                                   # cfchecker (CF-1.8)
    assert messages["FATAL"] == [] and messages["ERROR"] == [], messages
    acdd = cf_checkers.compliance_results(path, "acdd:1.3")
    assert [m for n, m in acdd["high"] if n == "Global Attributes"] == []


def test_time_slices_are_the_posterior_at_those_times(models, maps):
    field = load_model(models["absolute"])
    with xr.open_dataset(maps["times"], engine="h5netcdf") as ds:
        # CF time decoding (xarray/cftime) against numpy datetime64 arithmetic
        expected = np.array(["2024-06-03T15:00:00", "2024-06-04T01:30:00"], dtype="datetime64[ns]")
        np.testing.assert_array_equal(ds["time"].values.astype("datetime64[ns]"), expected)
        assert ds["time"].attrs["standard_name"] == "time" and ds["time"].attrs["axis"] == "T"
        assert ds["eastward_velocity_m_s"].dims == ("time", "y_m", "x_m")
        assert ds["eastward_velocity_m_s"].attrs["cell_methods"] == "time: point"
        gx, gy = np.meshgrid(ds["x_m"].values, ds["y_m"].values)
        points = np.column_stack([gx.ravel(), gy.ravel()])
        jac = east_north_jacobian(FRAME, points)
        for k, t in enumerate([T0 + 3 * 3600.0, T0 + 13.5 * 3600.0]):
            mean, cov = field.predict(points, t)
            mean, cov = np.einsum("nab,nb->na", jac, mean), np.einsum("nab,nbc,ndc->nad", jac, cov, jac)
            got = np.stack([ds["eastward_velocity_m_s"].values[k], ds["northward_velocity_m_s"].values[k]], -1)
            np.testing.assert_allclose(got.reshape(-1, 2), mean, rtol=0, atol=1e-10)
            std = np.stack([ds["eastward_velocity_std_m_s"].values[k], ds["northward_velocity_std_m_s"].values[k]], -1)
            np.testing.assert_allclose(std.reshape(-1, 2), np.sqrt(np.diagonal(cov, axis1=1, axis2=2)), rtol=0,
                                       atol=1e-10)
            div = P.divergence_posterior(field, points, window=at_time(t))
            np.testing.assert_allclose(ds["divergence_per_s"].values[k].ravel(), div.mean, rtol=0, atol=1e-14)
        # the two slices differ (the tide turned between them)
        assert np.max(np.abs(ds["eastward_velocity_m_s"].values[0] - ds["eastward_velocity_m_s"].values[1])) > 0.02


def test_divergence_at_a_time_is_the_derivative_of_the_mean():
    """Central differences of field.mean_at(x, t) (h = 1 m, error O(h²) ≈ 1e-12 s⁻¹ here) against the exact GP
    derivative posterior at that time."""
    field = tidal_field(Frame())
    t, h = T0 + 7 * 3600.0, 1.0
    points = np.array([[400.0, -900.0], [-1300.0, 200.0]])
    got_div = P.divergence_posterior(field, points, window=at_time(t)).mean
    got_vort = P.vorticity_posterior(field, points, window=at_time(t)).mean
    for i, x in enumerate(points):
        d = [(np.asarray(field.mean_at(jnp.asarray(x + h * e), t_s=t)) -
              np.asarray(field.mean_at(jnp.asarray(x - h * e), t_s=t))) / (2 * h) for e in np.eye(2)]
        np.testing.assert_allclose(got_div[i], d[0][0] + d[1][1], rtol=1e-6, atol=1e-11)
        np.testing.assert_allclose(got_vort[i], d[0][1] - d[1][0], rtol=1e-6, atol=1e-11)


def test_time_mean_over_the_span_equals_simpson_of_the_instants():
    """The span average (steady part + exact means of cos/sin) against the Simpson rule over 121 instants, applied to
    the whole field at each instant: means and variances of velocity and divergence."""
    field = tidal_field(Frame())
    start, end = field.data_summary["time_span_s"]
    times = np.linspace(start, end, 121)
    weights = np.array([simpson(e, x=times) for e in np.eye(times.size)]) / (end - start)   # scipy's Simpson weights
    simpson_window = TimeWindow((jnp.asarray(times),), (jnp.asarray(weights),), (None,))
    points = np.array([[400.0, -900.0], [-1300.0, 200.0], [0.0, 1500.0]])
    mean, cov = window_velocity(field, points, span_average(field))
    ref_mean, ref_cov = window_velocity(field, points, simpson_window)
    np.testing.assert_allclose(mean, ref_mean, rtol=0, atol=1e-6 * np.abs(ref_mean).max())
    np.testing.assert_allclose(cov, ref_cov, rtol=0, atol=1e-6 * np.abs(ref_cov).max())
    div = P.divergence_posterior(field, points, window=span_average(field))
    ref = P.divergence_posterior(field, points, window=simpson_window)
    np.testing.assert_allclose(div.mean, ref.mean, rtol=0, atol=1e-6 * np.abs(ref.mean).max())
    np.testing.assert_allclose(div.var, ref.var, rtol=1e-5)
    # averaging removes most of the tide: the mean's s.d. lies between the steady part's and an instant's
    instant = P.divergence_posterior(field, points, window=at_time(start + 3600.0))
    assert np.all(div.std < instant.std)


def test_time_mean_map_is_one_bounded_slice(maps):
    field = tidal_field()
    start, end = field.data_summary["time_span_s"]
    with xr.open_dataset(maps["mean"], engine="h5netcdf", decode_times=False) as ds:
        assert ds.sizes["time"] == 1 and ds["time"].attrs["bounds"] == "time_bnds"
        np.testing.assert_allclose(ds["time_bnds"].values, [[start, end]], rtol=0, atol=1e-6)
        np.testing.assert_allclose(ds["time"].values, [0.5 * (start + end)], rtol=0, atol=1e-6)
        assert ds["divergence_per_s"].attrs["cell_methods"] == "time: mean"
        assert "time mean" in ds.attrs["time_slices"]
        gx, gy = np.meshgrid(ds["x_m"].values, ds["y_m"].values)
        points = np.column_stack([gx.ravel(), gy.ravel()])
        div = P.divergence_posterior(field, points, window=span_average(field, start, end))
        np.testing.assert_allclose(ds["divergence_per_s"].values[0].ravel(), div.mean, rtol=0, atol=1e-14)
        np.testing.assert_allclose(ds["divergence_std_per_s"].values[0].ravel(), div.std, rtol=0, atol=1e-14)
        grid = field_grid(field, spacing_m=1500.0)          # a time-varying field's default window: the span mean
        np.testing.assert_allclose(ds["eastward_velocity_m_s"].values[0], grid.mean_m_s[..., 0], rtol=0, atol=1e-14)


def test_ellipse_maps_equal_tidalellipse_at_the_nodes(maps):
    field = tidal_field()
    with xr.open_dataset(maps["times"], engine="h5netcdf") as ds:
        gx, gy = np.meshgrid(ds["x_m"].values, ds["y_m"].values)
        points = np.column_stack([gx.ravel(), gy.ravel()])
        jac = east_north_jacobian(FRAME, points)
        for k in (0, 7, points.shape[0] - 1):
            mean, cov = (np.asarray(v) for v in field.harmonic_posterior(jnp.asarray(points[k]), "M2"))
            both = np.kron(np.eye(2), jac[k])                      # rotate a and b alike to true east/north
            ref = tidal_ellipses(both @ mean, both @ cov @ both.T)
            for name in ("semi_major_m_s", "semi_minor_m_s", "inclination_deg", "phase_deg", "semi_major_sd_m_s",
                         "semi_minor_sd_m_s", "inclination_sd_deg", "phase_sd_deg"):
                variable = ds[f"M2_{name}"]
                np.testing.assert_allclose(variable.values.ravel()[k], getattr(ref, name)[0], rtol=0, atol=1e-10)
        assert ds["M2_semi_major_m_s"].attrs["units"] == "m s-1" and ds["M2_phase_deg"].attrs["units"] == "degree"
        assert ds["M2_semi_major_m_s"].attrs["ancillary_variables"] == "M2_semi_major_sd_m_s"
        np.testing.assert_allclose(ds["M2_semi_major_m_s"].attrs["constituent_period_s"], 12.4206012 * 3600.0,
                                   rtol=1e-12)
        # the truth's tide is a gyre of amplitude 0.3 m/s at r = 1.5 km, rectilinear along the ring (semi-minor 0)
        assert 0.1 < float(np.nanmax(ds["M2_semi_major_m_s"].values)) < 0.5
    assert maps["figure"].stat().st_size > 10_000


def test_steady_model_refuses_times_and_time_varying_refuses_csv(models, tmp_path, capsys):
    steady = tmp_path / "steady.npz"
    rng = np.random.default_rng(1)
    x = rng.uniform(-HALF_M, HALF_M, (50, 2))
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=rng.normal(0, 0.1, x.shape), dt_s=np.full(50, 3600.0),
                                position_error_m=3.0)
    params = F.optimal_q(F.init_params("helmholtz", 2, x[:9], velocity_scale_m_s=0.1, length_scale_m=1500.0),
                         F.batch_from_observations(obs))
    save_model(F.FlowField.from_params(params, frame=Frame(), data_summary={
        "extent_m": {"min": x.min(0).tolist(), "max": x.max(0).tolist()}}), steady)
    assert cli.main(["map", str(steady), "--out", str(tmp_path / "s.nc"), "--times", "6h"]) == 2
    assert "steady model" in capsys.readouterr().err and not (tmp_path / "s.nc").exists()
    assert cli.main(["map", str(models["absolute"]), "--out", str(tmp_path / "t.csv")]) == 2
    assert "NetCDF only" in capsys.readouterr().err
    assert cli.main(["map", str(models["relative"]), "--out", str(tmp_path / "r.nc"), "--times", "2024-06-03"]) == 2
    assert "relative times" in capsys.readouterr().err


def test_relative_clock_map_says_it_has_no_calendar_date(maps):
    with xr.open_dataset(maps["relative"], engine="h5netcdf", decode_times=False) as ds:
        np.testing.assert_allclose(ds["time"].values, [6 * 3600.0], rtol=0, atol=0)
        assert "no calendar date" in ds["time"].attrs["comment"] and "time_coverage_start" not in ds.attrs


def test_check_tests_a_time_varying_model_averaged_over_its_span(tmp_path, capsys):
    flow = PulsingGyre(GaussianGyre(0.3, 1500.0), 0.5, -1.0, OMEGA_M2)
    starts = np.random.default_rng(3).uniform(-2500.0, 2500.0, (8, 2))
    frame = simulate_drifters(flow, starts, duration_s=14 * 3600.0, fix_interval_s=3600.0, diffusivity_m2_s=0.5,
                              position_error_m=3.0, seed=4, start_times_s=0.0)
    csv = tmp_path / "tracks.csv"
    frame.to_csv(csv, index=False)
    tracks = driftwise.read_tracks(csv)
    obs = driftwise.velocity_observations(tracks, position_error_m=3.0)
    field = tidal_field(Frame(), absolute=False, t_start=0.0)
    params = F.optimal_q(field.params, F.batch_from_observations(obs))
    time = np.asarray(obs.time_s)
    model = F.FlowField.from_params(params, frame=Frame(), data_summary={
        "extent_m": field.data_summary["extent_m"], "time_span_s": [float(time.min()), float(time.max())]})
    save_model(model, tmp_path / "tide.npz")
    code = cli.main(["check", str(csv), "--model", str(tmp_path / "tide.npz"), "--inducing", "8", "--steps", "15",
                     "--position-error", "3m", "--json"])
    assert code == 0
    summary = json.loads(capsys.readouterr().out)
    assert "averaged over its data's time span" in summary["tested_model"]
    assert summary["time_window"]["span_s"] == [float(time.min()), float(time.max())]
    assert summary["verdict"]["answers"]["divergence_free"] in ("yes", "no", "undetermined")
    assert summary["divergence"]["n_cells"] > 0 and math.isfinite(summary["divergence"]["max_abs_z"])


def _slow_field():
    """A steady + M2 + slow field (slow time scale 9 h, fixed) on 200 made-up velocities over the 30 h span."""
    base = tidal_field(Frame())
    rng = np.random.default_rng(5)
    slow_z = rng.uniform(-HALF_M, HALF_M, (6, 2))
    slow_t = np.linspace(0.0, SPAN_S, 6)
    start = TemporalStart(("M2",), (OMEGA_M2,), T0, slow=True, learn_slow_time_scale=False,
                          harmonic_velocity_scale_m_s=0.2, slow_velocity_scale_m_s=0.1, slow_time_scale_s=9 * 3600.0,
                          slow_inducing_m=slow_z, slow_inducing_time_s=slow_t)
    z = np.asarray(base.params.inducing_m)
    params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=0.15, length_scale_m=1500.0, temporal=start,
                           noise_floor_m_s=0.02, diffusivity_m2_s=0.01)
    x = rng.uniform(-HALF_M, HALF_M, (200, 2))
    t = T0 + np.sort(rng.uniform(0.0, SPAN_S, 200))
    v = 0.1 * np.stack([np.sin(x[:, 1] / 1000.0 + t / 20000.0), np.cos(x[:, 0] / 1000.0)], 1)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(200, 3600.0), time_s=t,
                                position_error_m=3.0)
    field = F.FlowField.from_params(F.optimal_q(params, F.batch_from_observations(obs)), frame=Frame(),
                                    data_summary={"time_span_s": [float(t[0]), float(t[-1])]})
    return field, t


def test_time_mean_with_a_slow_part_against_simpson():
    """With the slow part (Matérn-3/2 in time, T = 9 h over a 30 h span) the span average's Gauss–Legendre nodes
    approximate the Simpson rule (scipy.integrate.simpson, 121 instants) on the whole field."""
    field, t = _slow_field()
    times = np.linspace(t[0], t[-1], 121)
    weights = np.array([simpson(e, x=times) for e in np.eye(times.size)]) / (t[-1] - t[0])
    points = np.array([[400.0, -900.0], [-1300.0, 200.0]])
    mean, cov = window_velocity(field, points, span_average(field, slow_nodes=12))
    ref_mean, ref_cov = window_velocity(field, points, TimeWindow((jnp.asarray(times),), (jnp.asarray(weights),),
                                                                  (None,)))
    scale = np.sqrt(np.max(np.diagonal(ref_cov, axis1=1, axis2=2)))
    np.testing.assert_allclose(mean, ref_mean, rtol=0, atol=1e-3 * scale)        # measured 5.7e-5 · scale
    np.testing.assert_allclose(cov, ref_cov, rtol=0, atol=1e-3 * scale**2)       # measured 1.3e-4 · scale²


def test_a_map_beyond_the_slow_parts_data_says_so():
    """A map 2 d after the last fix of a field whose slow part has a 9 h time scale: there the slow part is its
    prior (Matérn-3/2 correlation 0.48 at one time scale), so the map warns before computing; inside the span and
    for the span average, no such warning."""
    field, t = _slow_field()
    with pytest.warns(SupportWarning, match=r"^the map reaches 2 d after the data's last fix, more than the slow "
                                            r"part's time scale 9 h"):
        field_grid(field, spacing_m=1000.0, window=at_time(float(t[-1]) + 2 * 86400.0))
    for window in (at_time(float(t[len(t) // 2])), None):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            field_grid(field, spacing_m=1000.0, window=window)
        assert not [w for w in caught if "slow part" in str(w.message)], [str(w.message) for w in caught]
