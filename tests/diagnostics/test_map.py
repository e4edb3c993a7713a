"""The gridded export: physics.field_grid, io.write_field_grid and `driftwise map`."""

from __future__ import annotations

import csv
import json
import types

import h5netcdf
import numpy as np
import pytest
import xarray as xr

import driftwise  # noqa: F401  (switches on float64)
from driftwise.app import cli
from driftwise.app.bay import DemoBay
from driftwise.data.frame import Frame
from driftwise.diagnostics import physics as P
from driftwise.diagnostics.grid import field_grid
from driftwise.gp import field as F
from driftwise.gp.modelfile import save_model

LENGTH_M = 3000.0
HALF_WIDTH_M = 8000.0


def bay_field(family: str = "helmholtz", *, frame: Frame | None = None) -> F.FlowField:
    """A GP with fixed hyperparameters and closed-form optimal q on noisy DemoBay velocities."""
    rng = np.random.default_rng(11)
    x = rng.uniform(-HALF_WIDTH_M, HALF_WIDTH_M, (300, 2))
    v = DemoBay().velocity(x) + rng.normal(0.0, 0.02, x.shape)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(300, 3600.0), position_error_m=10.0)
    z = np.stack(np.meshgrid(*[np.linspace(-HALF_WIDTH_M, HALF_WIDTH_M, 8)] * 2), -1).reshape(-1, 2)
    params = F.init_params(family, 2, z, velocity_scale_m_s=0.15, length_scale_m=LENGTH_M, diffusivity_m2_s=0.5,
                           noise_floor_m_s=0.01)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    summary = {"extent_m": {"min": x.min(axis=0).tolist(), "max": x.max(axis=0).tolist()}}
    return F.FlowField.from_params(params, frame=frame or Frame(), data_summary=summary)


@pytest.fixture(scope="module")
def lonlat_model(tmp_path_factory):
    path = tmp_path_factory.mktemp("map") / "bay.npz"
    save_model(bay_field(frame=Frame("lonlat", -9.0, 44.0)), path)
    return path


def run_cli(argv, capsys):
    code = cli.main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


def test_netcdf_passes_cf_sanity_checks(lonlat_model, tmp_path, capsys):
    out = tmp_path / "field.nc"
    code, stdout, _ = run_cli(["map", str(lonlat_model), "--out", str(out), "--spacing", "500m", "--json"], capsys)
    assert code == 0
    report = json.loads(stdout)
    assert report["components"] == ["eastward", "northward"] and report["spacing_m"] == 500.0
    ds = xr.open_dataset(out, engine="h5netcdf")          # CF decoding must work
    assert "CF-1.11" in ds.attrs["Conventions"].split(", ")       # newest CF the IOOS checker tests (issue 16)
    for name in ("x_m", "y_m"):
        axis = ds[name].values
        assert np.all(np.diff(axis) > 0) and ds[name].attrs["units"] == "m"
        np.testing.assert_allclose(np.diff(axis), 500.0, rtol=1e-12)
    assert ds["x_m"].attrs["standard_name"] == "projection_x_coordinate"
    assert ds["y_m"].attrs["standard_name"] == "projection_y_coordinate"
    assert ds["lon_deg"].attrs["units"] == "degrees_east" and ds["lat_deg"].attrs["units"] == "degrees_north"
    assert ds["lon_deg"].dims == ("y_m", "x_m") and ds["divergence_per_s"].dims == ("y_m", "x_m")
    # CF standard names (the CF standard-name table v93 bundled with compliance-checker) and units; the table has
    # no divergence of sea-water velocity, so divergence has a long_name only (issue 16)
    expected = {"eastward_velocity_m_s": ("eastward_sea_water_velocity", "m s-1"),
                "northward_velocity_std_m_s": ("northward_sea_water_velocity standard_error", "m s-1"),
                "vorticity_std_per_s": ("ocean_relative_vorticity standard_error", "s-1")}
    assert "standard_name" not in ds["divergence_per_s"].attrs and ds["divergence_per_s"].attrs["units"] == "s-1"
    for name, (standard_name, units) in expected.items():
        assert ds[name].attrs["standard_name"] == standard_name
        assert ds[name].attrs["units"] == units
        assert ds[name].attrs["grid_mapping"] == "crs"
    for name in ds.data_vars:
        if name != "crs":
            assert "units" in ds[name].attrs or "flag_values" in ds[name].attrs, name
    assert ds["crs"].attrs["grid_mapping_name"] == "azimuthal_equidistant"
    assert set(np.unique(ds["supported"].values)) <= {0, 1}
    with h5netcdf.File(out, "r") as raw:                   # the `coordinates` attribute as written
        assert set(raw.variables["divergence_per_s"].attrs["coordinates"].split()) == {"lon_deg", "lat_deg"}
    lon, lat = Frame("lonlat", -9.0, 44.0).to_lonlat(np.array([[ds["x_m"].values[3], ds["y_m"].values[5]]]))
    np.testing.assert_allclose([ds["lon_deg"].values[5, 3], ds["lat_deg"].values[5, 3]], [lon[0], lat[0]], atol=1e-9)
    ds.close()


def _gradient_divergence(u, v, h):
    return np.gradient(u, h, axis=1) + np.gradient(v, h, axis=0)


@pytest.mark.parametrize("frame", [Frame(), Frame("lonlat", -9.0, 44.0)], ids=["metric", "lonlat"])
def test_divergence_matches_numpy_gradient_of_the_velocity_grid(frame, tmp_path):
    grid = field_grid(bay_field(frame=frame), spacing_m=LENGTH_M / 30)
    path = tmp_path / "field.nc"
    from driftwise.products.writers import write_field_grid

    write_field_grid(grid, path)
    ds = xr.open_dataset(path, engine="h5netcdf")
    c = list(grid.components)
    u, v = ds[f"{c[0]}_velocity_m_s"].values, ds[f"{c[1]}_velocity_m_s"].values
    div, vort = ds["divergence_per_s"].values, ds["vorticity_per_s"].values
    h = float(ds["x_m"].values[1] - ds["x_m"].values[0])
    # reference: numpy.gradient (second-order central differences) of the exported velocity grid, interior nodes;
    # the lon/lat grid is rotated to true east/north, which differs from the frame axes by < 1e-3 rad here
    inner = (slice(2, -2), slice(2, -2))
    scale_div, scale_vort = np.max(np.abs(div[inner])), np.max(np.abs(vort[inner]))
    tol = 3e-3 if frame.kind == "metric" else 5e-3     # measured: 8e-4 and 1.1e-3 of the maximum
    np.testing.assert_allclose(_gradient_divergence(u, v, h)[inner], div[inner], rtol=0, atol=tol * scale_div)
    fd_vort = np.gradient(v, h, axis=1) - np.gradient(u, h, axis=0)
    np.testing.assert_allclose(fd_vort[inner], vort[inner], rtol=0, atol=tol * scale_vort)
    ds.close()


def test_csv_has_the_same_columns_one_row_per_node(lonlat_model, tmp_path, capsys):
    nc, table = tmp_path / "f.nc", tmp_path / "f.csv"
    assert run_cli(["map", str(lonlat_model), "--out", str(nc), "--spacing", "1km", "--json"], capsys)[0] == 0
    assert run_cli(["map", str(lonlat_model), "--out", str(table), "--spacing", "1km", "--json"], capsys)[0] == 0
    ds = xr.open_dataset(nc, engine="h5netcdf")
    with open(table, newline="") as handle:
        rows = list(csv.DictReader(handle))
    ny, nx = ds.sizes["y_m"], ds.sizes["x_m"]
    assert len(rows) == ny * nx
    names = [n for n in ds.data_vars if n != "crs"]
    assert set(rows[0]) == set(names) | {"x_m", "y_m", "lon_deg", "lat_deg"}
    k = 7 * nx + 4                                    # row-major: node (y=7, x=4)
    for name in names:
        np.testing.assert_allclose(float(rows[k][name]), float(ds[name].values[7, 4]), rtol=1e-12, atol=0)
    np.testing.assert_allclose(float(rows[k]["x_m"]), ds["x_m"].values[4], rtol=1e-12)
    ds.close()


def test_support_mask_follows_the_variance_ratio():
    field = bay_field()
    grid = field_grid(field, spacing_m=2000.0)
    np.testing.assert_array_equal(grid.supported, grid.variance_ratio < P.SUPPORT_RATIO)
    assert grid.supported.mean() > 0.8                # the data cover the extent densely
    far = np.array([[60_000.0, 60_000.0]])
    _, cov = field.predict(far)
    prior = np.asarray(field.prior_variance_at(far[0]))
    np.testing.assert_allclose(np.trace(cov[0]) / np.trace(prior), 1.0, rtol=1e-6)   # no data: posterior = prior


def test_divergence_free_model_exports_zero_with_the_reason(tmp_path):
    grid = field_grid(bay_field("divergence-free"), spacing_m=2000.0)
    assert "divergence" in grid.reasons
    np.testing.assert_array_equal(grid.divergence_s, 0.0)
    from driftwise.products.writers import write_field_grid

    write_field_grid(grid, tmp_path / "df.nc")
    ds = xr.open_dataset(tmp_path / "df.nc", engine="h5netcdf")
    assert "divergence-free by construction" in ds["divergence_per_s"].attrs["comment"]
    # a metric frame has no geographic directions: local-frame components, no sea-water standard names
    assert ds["x_velocity_m_s"].attrs["units"] == "m s-1" and "standard_name" not in ds["x_velocity_m_s"].attrs
    assert "lon_deg" not in ds.coords
    ds.close()


def test_bad_input_exits_2(lonlat_model, tmp_path, capsys):
    code, _, err = run_cli(["map", str(lonlat_model), "--out", str(tmp_path / "f.txt")], capsys)
    assert code == 2 and ".nc or .csv" in err
    code, _, err = run_cli(["map", str(tmp_path / "missing.npz"), "--out", str(tmp_path / "f.nc")], capsys)
    assert code == 2 and "no such model file" in err
    code, _, err = run_cli(["map", str(lonlat_model), "--out", str(tmp_path / "f.nc"), "--spacing", "1m"], capsys)
    assert code == 2 and "larger --spacing" in err
    code, _, err = run_cli(["map", str(lonlat_model), "--out", str(tmp_path / "f.nc"), "--spacing", "-5m"], capsys)
    assert code == 2 and "--spacing" in err
