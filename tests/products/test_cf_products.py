"""Products other tools accept (issue 16): CF checkers on every NetCDF product, GeoJSON read by GIS
tooling, absolute ISO-8601 times and compass bearings.

External references beside each check:
* IOOS ``compliance-checker`` (PyPI) ``cf`` suite at its newest CF version and ``acdd:1.3``;
  ``cfchecker`` (PyPI, the CF community checker) — both offline with the CF standard-name table
  bundled in compliance-checker (``tests/products/cf_checkers.py`` says how).
* RFC 7946 (Butler et al. 2016) §3.1.6 rings and winding, §4 lon/lat and no ``crs`` member;
  OGC simple-feature validity as implemented by GEOS (shapely ``is_valid``); ``geopandas.read_file``.
* CF time decoding by xarray/cftime (CF-1.11 §4.4).
"""

from __future__ import annotations

import csv
import dataclasses
import json
import types

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import driftwise  # noqa: F401  (switches on float64)
from driftwise.app import cli
from driftwise.app.bay import DemoBay
from driftwise.app.scenarios import release_subset
from driftwise.data.frame import Frame
from driftwise.data.tracks import read_tracks, tracks_from_frame
from driftwise.data.utctime import UNIX_EPOCH_UTC, iso_utc, seconds_since_origin
from driftwise.diagnostics.grid import field_grid
from driftwise.dynamics.spread import Release, as_releases, bearing_deg, make_spread
from driftwise.dynamics.supportcheck import PathSupport
from driftwise.gp import field as F
from driftwise.gp import training as fitting
from driftwise.gp.modelfile import load_model, save_model
from driftwise.products.cfproducts import spread_dataset
from driftwise.products.writers import field_grid_dataset, write_field_grid, write_spread

cf_checkers = pytest.importorskip("cf_checkers")      # tests/products/cf_checkers.py (needs the `test` extra)

FRAME = Frame("lonlat", -9.0, 44.0)
TIMES = np.arange(0.0, 6 * 3600.0 + 1, 1800.0)
T0_S = 1717416000.0                                   # 2024-06-03T12:00:00Z in Unix seconds
BOX = np.array([[2000.0, -800.0], [5000.0, -800.0], [5000.0, 900.0], [2000.0, 900.0]])


def _spread(frame=FRAME, dim=2, origin=UNIX_EPOCH_UTC, polygon=True):
    """Analytic moments: a point release (zero covariance at t = 0) and one with a release spread, 2 h later."""
    rels = as_releases([Release(np.r_[0.0, 0.0, -2.0][:dim], start_time_s=T0_S, name="pier Ø"),
                        Release(np.r_[500.0, -300.0, -1.0][:dim], start_time_s=T0_S + 7200.0,
                                cov0_m2=25.0 * np.eye(dim), name="buoy 2")])
    means = np.stack([r.start_m + TIMES[:, None] * np.r_[0.15, 0.02, 0.0][:dim] for r in rels])
    angle = 1e-4 * TIMES
    rot = np.stack([np.stack([np.cos(angle), -np.sin(angle)], -1), np.stack([np.sin(angle), np.cos(angle)], -1)], -2)
    cov2 = rot @ (np.diag([3.0, 0.8]) * TIMES[:, None, None]) @ np.swapaxes(rot, -1, -2)
    covs = np.zeros((2, len(TIMES), dim, dim))
    covs[..., :2, :2] = cov2
    covs[1] += 25.0 * np.eye(dim)
    if dim == 3:
        covs[..., 2, 2] += 0.01 * TIMES
    spread = make_spread("cubature", rels, TIMES, means, covs, frame=frame, polygon_m=BOX if polygon else None,
                         threshold=0.3 if polygon else None, time_origin_utc=origin)
    ratio = np.stack([np.linspace(0.2, 1.0, len(TIMES)), np.full(len(TIMES), 0.95)])   # leaves / never in support
    return dataclasses.replace(spread, support=PathSupport(ratio, 1e4 * ratio, np.logical_or.accumulate(ratio > 0.9, 1)))


def _bay_field(frame, summary_extra=None):
    """A GP with fixed hyperparameters and closed-form optimal q on noisy DemoBay velocities (as in test_map)."""
    rng = np.random.default_rng(11)
    x = rng.uniform(-8000.0, 8000.0, (300, 2))
    v = DemoBay().velocity(x) + rng.normal(0.0, 0.02, x.shape)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(300, 3600.0), position_error_m=10.0)
    z = np.stack(np.meshgrid(*[np.linspace(-8000.0, 8000.0, 8)] * 2), -1).reshape(-1, 2)
    params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=0.15, length_scale_m=3000.0,
                           diffusivity_m2_s=0.5, noise_floor_m_s=0.01)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    summary = {"extent_m": {"min": x.min(axis=0).tolist(), "max": x.max(axis=0).tolist()}, **(summary_extra or {})}
    return F.FlowField.from_params(params, frame=frame, data_summary=summary)


@pytest.fixture(scope="module")
def netcdf_products(tmp_path_factory):
    """Every NetCDF product driftwise writes: spread (lon/lat or metric frame, with or without a time origin,
    3-D) and map (lon/lat and metric)."""
    out = tmp_path_factory.mktemp("cf")
    paths = {"spread_lonlat": write_spread(_spread(), out / "spread_lonlat.nc"),
             "spread_metric": write_spread(_spread(None, origin=None, polygon=False), out / "spread_metric.nc"),
             "spread_3d": write_spread(_spread(None, dim=3, origin=None), out / "spread_3d.nc"),
             "spread_lonlat_relative": write_spread(_spread(origin=None), out / "spread_lonlat_relative.nc"),
             "spread_metric_absolute": write_spread(_spread(None, polygon=False), out / "spread_metric_absolute.nc")}
    for name, frame in (("map_lonlat", FRAME), ("map_metric", Frame())):
        paths[name] = write_field_grid(field_grid(_bay_field(frame), spacing_m=1000.0), out / f"{name}.nc")
    return paths


# ------------------------------------------------------------------------------------------- CF checkers
@pytest.mark.parametrize("product", ["spread_lonlat", "spread_metric", "spread_3d", "spread_lonlat_relative",
                                     "spread_metric_absolute", "map_lonlat", "map_metric"])
def test_every_netcdf_product_passes_both_cf_checkers(netcdf_products, product):
    path = netcdf_products[product]
    suite = cf_checkers.newest_cf_suite()                       # cf:1.11 with compliance-checker 6.1
    result = cf_checkers.compliance_results(path, suite)
    assert result["errors"] == {}, result["errors"]             # no check crashed inside the checker
    assert result["high"] == [] and result["medium"] == [], (result["high"], result["medium"])
    assert result["scored"] == result["possible"] > 200
    messages = cf_checkers.cfchecker_messages(path)             # cfchecker 4.1 (CF-1.8, its newest)
    assert messages["FATAL"] == [] and messages["ERROR"] == [], messages
    acdd = cf_checkers.compliance_results(path, "acdd:1.3")      # ACDD 1.3: the global discovery set is complete
    globals_high = [msgs for name, msgs in acdd["high"] if name == "Global Attributes"]
    assert globals_high == [], globals_high


def test_the_checkers_do_catch_what_the_issue_reported(tmp_path):
    """Negative control: an undefined standard name and a _FillValue on a coordinate variable are flagged."""
    dataset = spread_dataset(_spread())
    dataset["bearing_deg"].attrs["standard_name"] = "bearing_of_spread_ellipse"
    path = tmp_path / "bad.nc"
    dataset.to_netcdf(path, engine="h5netcdf")
    result = cf_checkers.compliance_results(path, cf_checkers.newest_cf_suite())
    assert "bearing_of_spread_ellipse" in " ".join(" ".join(msgs) for _, msgs in result["high"])
    assert any("bearing_of_spread_ellipse" in m for m in cf_checkers.cfchecker_messages(path)["ERROR"])
    grid = field_grid_dataset(field_grid(_bay_field(Frame()), spacing_m=2000.0))
    grid["x_m"].encoding["_FillValue"] = -1.0
    grid.to_netcdf(tmp_path / "bad_map.nc", engine="h5netcdf")
    result = cf_checkers.compliance_results(tmp_path / "bad_map.nc", cf_checkers.newest_cf_suite())
    assert "'x_m' must not have the _FillValue" in " ".join(" ".join(msgs) for _, msgs in result["high"])


def test_netcdf_discovery_attributes_and_no_fill_on_coordinates(netcdf_products):
    import netCDF4

    for name, path in netcdf_products.items():
        with netCDF4.Dataset(path) as ds:
            attrs = ds.__dict__
            for key in ("title", "summary", "keywords", "creator_name", "license", "date_created", "history"):
                assert attrs.get(key), (name, key)
            assert attrs["Conventions"].split(", ") == ["CF-1.11", "CF-1.8", "ACDD-1.3"]
            np.datetime64(attrs["date_created"].rstrip("Z"))             # ISO 8601 (numpy parses it or raises)
            for var in ds.variables.values():
                if var.name in ("x_m", "y_m", "lon", "lat", "lon_deg", "lat_deg", "time", "forecast_period"):
                    assert "_FillValue" not in var.ncattrs(), (name, var.name)
            if name.endswith("lonlat"):
                assert -9.2 < attrs["geospatial_lon_min"] <= attrs["geospatial_lon_max"] < -8.7
        with xr.open_dataset(path, engine="h5netcdf") as ds:
            assert "divergence_per_s" not in ds or "standard_name" not in ds["divergence_per_s"].attrs


def test_spread_netcdf_is_a_trajectory_file_with_cf_time(netcdf_products):
    spread = _spread()
    with xr.open_dataset(netcdf_products["spread_lonlat"], engine="h5netcdf") as ds:   # CF time decoded by xarray
        assert ds.attrs["featureType"] == "trajectory" and ds["release_name"].attrs["cf_role"] == "trajectory_id"
        assert [v.decode() if isinstance(v, bytes) else v for v in ds["release_name"].values] == ["pier Ø", "buoy 2"]
        expected = np.datetime64("2024-06-03T12:00:00") + (TIMES * 1e6).astype("timedelta64[us]")
        np.testing.assert_array_equal(ds["time"].values[0], expected.astype(ds["time"].dtype))
        np.testing.assert_array_equal(ds["time"].values[1], (expected + np.timedelta64(2, "h")).astype(ds["time"].dtype))
        np.testing.assert_array_equal(ds["forecast_period"].values.astype("timedelta64[s]").astype(float), TIMES)
        assert ds.attrs["time_coverage_start"] == "2024-06-03T12:00:00Z"
        assert ds.attrs["time_coverage_end"] == "2024-06-03T20:00:00Z"            # 2 h later start + 6 h
        for name in ("x_m", "semi_major_95_m", "bearing_deg", "probability_inside"):
            assert set(ds[name].encoding["coordinates"].split()) == {"time", "forecast_period", "lat", "lon"}
        np.testing.assert_allclose(ds["lon"].values, spread.mean_lonlat[..., 0], rtol=0, atol=0)
        np.testing.assert_allclose(ds["bearing_deg"].values, spread.bearing_deg, rtol=0, atol=0)
    with xr.open_dataset(netcdf_products["spread_metric"], engine="h5netcdf") as ds:
        assert "time" not in ds.variables and "featureType" not in ds.attrs   # no calendar date is invented
        np.testing.assert_allclose(ds["start_time_s"].values, [T0_S, T0_S + 7200.0], rtol=0, atol=0)


# ------------------------------------------------------------------------------------------- GeoJSON
def test_geojson_is_read_by_geopandas_and_every_geometry_is_valid(tmp_path):
    geopandas = pytest.importorskip("geopandas")
    from shapely.geometry import shape

    spread = _spread()
    path = write_spread(spread, tmp_path / "s.geojson")
    raw = json.loads(path.read_text())
    assert "crs" not in raw                                                     # RFC 7946 §4
    frame = geopandas.read_file(path)
    assert len(frame) == len(raw["features"]) == 3 * 2 * len(TIMES) + 2
    assert frame.geometry.is_valid.all()                                        # GEOS validity
    assert str(frame.crs).upper().endswith("4326")                              # read as WGS 84 lon/lat
    for feature in raw["features"]:
        geometry = shape(feature["geometry"])
        assert geometry.is_valid, feature["properties"]
        if feature["geometry"]["type"] == "Polygon":
            ring = np.asarray(feature["geometry"]["coordinates"][0])
            np.testing.assert_array_equal(ring[0], ring[-1])                    # §3.1.6 closed
            assert geometry.exterior.is_ccw                                     # §3.1.6 exterior counter-clockwise
            assert np.all(np.abs(ring[:, 0] + 9.0) < 0.2) and np.all(np.abs(ring[:, 1] - 44.0) < 0.2)  # lon, lat
    # the point release's t = 0 ellipses have zero size: a Point at the release with its level (one per level)
    points = [f for f in raw["features"] if f["geometry"]["type"] == "Point"]
    assert sorted(f["properties"]["level"] for f in points) == [0.5, 0.9, 0.95]
    for feature in points:
        assert feature["properties"]["release"] == "pier Ø" and feature["properties"]["time_s"] == 0.0
        np.testing.assert_allclose(feature["geometry"]["coordinates"], spread.mean_lonlat[0, 0], rtol=0, atol=1e-7)
    # the release with a 5 m spread is a polygon from t = 0
    assert all(f["geometry"]["type"] == "Polygon" for f in raw["features"]
               if f["properties"]["release"] == "buoy 2" and f["properties"]["kind"] == "ellipse")


def test_geojson_properties_carry_iso_times_and_bearings(tmp_path):
    spread = _spread()
    raw = json.loads(write_spread(spread, tmp_path / "s.geojson").read_text())
    for feature in raw["features"]:
        props = feature["properties"]
        start = T0_S + (7200.0 if props["release"] == "buoy 2" else 0.0)
        assert props["start_time_utc"] == ("2024-06-03T14:00:00Z" if props["release"] == "buoy 2"
                                           else "2024-06-03T12:00:00Z")
        if props["kind"] == "ellipse":
            when = np.datetime64(props["time_utc"].rstrip("Z"), "s").astype("int64")
            assert when == start + props["time_s"]
            assert 0.0 <= props["bearing_deg"] < 180.0
        else:
            assert props["end_time_utc"] == ("2024-06-03T20:00:00Z" if props["release"] == "buoy 2"
                                             else "2024-06-03T18:00:00Z")


# ------------------------------------------------------------------------------------------- JSON, CSV times
def test_json_and_csv_give_iso_times_next_to_seconds(tmp_path):
    spread = _spread()
    data = json.loads(write_spread(spread, tmp_path / "s.json").read_text())
    assert data["time_origin_utc"] == "1970-01-01T00:00:00Z"
    rel = data["releases"][1]
    assert {"method", "releases"} <= set(data) and {"start", "times_s", "mean", "covariance", "mean_lonlat"} <= set(rel)
    assert rel["start_time_utc"] == "2024-06-03T14:00:00Z"
    assert rel["times_utc"][0] == "2024-06-03T14:00:00Z" and rel["times_utc"][-1] == "2024-06-03T20:00:00Z"
    assert len(rel["times_utc"]) == len(rel["times_s"]) == len(TIMES)
    ellipse = rel["ellipses"][2]
    np.testing.assert_allclose(ellipse["bearing_deg"], spread.bearing_deg[1], rtol=0, atol=0)
    np.testing.assert_allclose(ellipse["angle_ccw_from_east_deg"], spread.orientation_deg[1], rtol=0, atol=0)
    assert "orientation_deg" not in ellipse
    with open(write_spread(spread, tmp_path / "s.csv"), newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert rows[0]["time_utc"] == "2024-06-03T12:00:00Z" and rows[1]["time_utc"] == "2024-06-03T12:30:00Z"
    assert rows[-1]["start_time_utc"] == "2024-06-03T14:00:00Z" and rows[-1]["time_utc"] == "2024-06-03T20:00:00Z"
    np.testing.assert_allclose([float(r["bearing_deg"]) for r in rows], spread.bearing_deg.ravel(), rtol=1e-15)
    # without a time origin there is no absolute time anywhere
    plain = _spread(origin=None)
    assert "start_time_utc" not in json.loads(write_spread(plain, tmp_path / "p.json").read_text())["releases"][0]
    with open(write_spread(plain, tmp_path / "p.csv"), newline="") as handle:
        assert "time_utc" not in next(csv.reader(handle))


def test_bearing_is_clockwise_from_north():
    # metric frame: an axis along +x (east) has bearing 90°, along +y (north) 0°, 30° ccw from east 60°
    np.testing.assert_allclose(bearing_deg(np.array([0.0, 90.0, 30.0, -45.0]), np.zeros((4, 2))),
                               [90.0, 0.0, 60.0, 135.0], rtol=0, atol=1e-12)
    # lon/lat frame, at the centre: AEQD keeps azimuths from the centre exact (Snyder 1987 §25)
    np.testing.assert_allclose(bearing_deg(np.array([0.0, 90.0, 30.0]), np.zeros((3, 2)), FRAME),
                               [90.0, 0.0, 60.0], rtol=0, atol=1e-6)
    # 10 km east of the centre, local +y is rotated from true north by the grid convergence γ ≈ Δλ sin φ
    # (spherical approximation, from memory): Δλ = 0.1249°, φ = 44° → γ = 0.0868°; tolerance 0.005°
    at = np.array([[10_000.0, 0.0]])
    lon, lat = FRAME.to_lonlat(at)
    gamma = (lon[0] + 9.0) * np.sin(np.radians(lat[0]))
    got = bearing_deg(np.array([90.0]), at, FRAME)[0]
    assert abs(got - gamma) < 0.005 and abs(gamma - 0.0868) < 0.001


# ------------------------------------------------------------------------------------------- time origin
def test_fit_records_the_time_origin_only_for_absolute_times():
    rows = [("a", f"2024-06-03T{h:02d}:00:00Z", -9.0 + 0.001 * h, 44.0) for h in range(6)]
    rows += [("b", f"2024-06-03T{h:02d}:00:00Z", -9.0, 44.0 + 0.001 * h) for h in range(6)]

    table = pd.DataFrame(rows, columns=["track_id", "time", "lon", "lat"])
    absolute = fitting.data_summary(fitting.prepare_data(tracks_from_frame(table), 10.0))
    assert absolute["time_origin_utc"] == "1970-01-01T00:00:00Z"
    assert absolute["time_span_s"][1] == pytest.approx(T0_S - 3600.0 * 7.5, abs=1e-6)   # last midpoint 04:30Z
    relative = table.assign(time=np.tile(3600.0 * np.arange(6), 2))
    assert "time_origin_utc" not in fitting.data_summary(fitting.prepare_data(tracks_from_frame(relative), 10.0))


def test_cli_spread_uses_the_model_time_origin_and_old_files_still_load(tmp_path, capsys):
    summary = {"time_origin_utc": UNIX_EPOCH_UTC, "time_span_s": [T0_S - 86400.0, T0_S]}
    model = tmp_path / "m.npz"
    save_model(_bay_field(FRAME, summary), model)
    out = tmp_path / "s.json"
    assert cli.main(["spread", str(model), "--release=-9.0,44.0", "--horizon", "2h", "--every", "1h",
                     "--out", str(out), "--out", str(tmp_path / "s.nc")]) == 0
    rel = json.loads(out.read_text())["releases"][0]
    assert rel["start_time_utc"] == "2024-06-03T12:00:00Z"                 # default: the model's last observation
    assert rel["times_utc"] == ["2024-06-03T12:00:00Z", "2024-06-03T13:00:00Z", "2024-06-03T14:00:00Z"]
    assert cli.main(["spread", str(model), "--release=-9.0,44.0", "--start", "2024-06-05T08:30:00+02:00",
                     "--horizon", "1h", "--out", str(out)]) == 0
    assert json.loads(out.read_text())["releases"][0]["start_time_utc"] == "2024-06-05T06:30:00Z"
    # a model file written before time_origin_utc was recorded: loads, and its outputs carry no absolute time
    old = tmp_path / "old.npz"
    save_model(_bay_field(FRAME), old)
    field = load_model(old)
    assert "time_origin_utc" not in field.data_summary
    assert cli.main(["spread", str(old), "--release=-9.0,44.0", "--horizon", "1h", "--out", str(out)]) == 0
    data = json.loads(out.read_text())
    assert data["time_origin_utc"] is None and "times_utc" not in data["releases"][0]
    assert data["releases"][0]["start_time_s"] == 0.0
    code = cli.main(["spread", str(old), "--release=-9.0,44.0", "--start", "2024-06-05T08:30Z", "--out", str(out)])
    assert code == 2 and "relative times" in capsys.readouterr().err


def test_release_subset_keeps_the_time_origin():
    spread = _spread()
    part = release_subset(spread, [1])
    assert part.time_origin_utc == UNIX_EPOCH_UTC and part.start_times_utc == ["2024-06-03T14:00:00Z"]
    assert dataclasses.replace(spread, time_origin_utc=None).times_utc(0) is None


def test_iso_utc_text():
    # reference values: pandas.Timestamp(1717416000, unit="s") == 2024-06-03 12:00:00 (checked by hand)
    assert iso_utc(UNIX_EPOCH_UTC, [T0_S, T0_S + 0.5]) == ["2024-06-03T12:00:00Z", "2024-06-03T12:00:00.500Z"]
    assert iso_utc(UNIX_EPOCH_UTC, 0.0) == "1970-01-01T00:00:00Z"
    assert seconds_since_origin(UNIX_EPOCH_UTC, "2024-06-03T14:00:00+02:00") == T0_S
    assert seconds_since_origin(UNIX_EPOCH_UTC, "yesterday") is None


def test_flat_ellipse_becomes_the_linestring_of_its_major_axis(tmp_path):
    from shapely.geometry import shape

    # a release spread along x only (σx = 30 m, σy = 0) at t = 0: no area, so a LineString through the
    # two ends of the major axis, ±√(χ²₂(level)) σx from the mean (χ²₂ quantile −2 ln(1 − level))
    rel = as_releases([Release([0.0, 0.0], start_time_s=T0_S, cov0_m2=np.diag([900.0, 0.0]), name="flat")])
    covs = np.array([[np.diag([900.0, 0.0]), np.diag([1000.0, 100.0])]])
    spread = make_spread("cubature", rel, np.array([0.0, 3600.0]), np.zeros((1, 2, 2)), covs, frame=FRAME,
                         time_origin_utc=UNIX_EPOCH_UTC)
    raw = json.loads(write_spread(spread, tmp_path / "f.geojson").read_text())
    flat = [f for f in raw["features"] if f["properties"]["kind"] == "ellipse" and f["properties"]["time_s"] == 0.0]
    for feature in flat:
        assert feature["geometry"]["type"] == "LineString" and shape(feature["geometry"]).is_valid
        ends = FRAME.from_lonlat(*np.asarray(feature["geometry"]["coordinates"]).T)
        half = np.sqrt(-2.0 * np.log(1.0 - feature["properties"]["level"])) * 30.0
        np.testing.assert_allclose(np.sort(ends[:, 0]), [-half, half], rtol=0, atol=0.02)   # 1e-7° rounding ≈ 1 cm
        np.testing.assert_allclose(ends[:, 1], 0.0, rtol=0, atol=0.02)
        assert feature["properties"]["bearing_deg"] == pytest.approx(90.0, abs=1e-6)      # along east
    assert all(f["geometry"]["type"] == "Polygon" for f in raw["features"]
               if f["properties"]["kind"] == "ellipse" and f["properties"]["time_s"] == 3600.0)


def test_the_spread_trajectory_file_reads_back_as_tracks(netcdf_products):
    # the package's own CF trajectory reader (data/trackcf) takes the forecast file as drifter tracks: the mean
    # paths at their absolute times (a tool that reads drifter files reads forecasts too)
    spread = _spread()
    tracks = read_tracks(netcdf_products["spread_lonlat"])
    assert tracks.time_is_absolute and sorted(set(tracks.track_id)) == ["buoy 2", "pier Ø"]
    for r, rel in enumerate(spread.releases):
        rows = tracks.track_id == rel.name
        np.testing.assert_allclose(tracks.time_s[rows], rel.start_time_s + TIMES, rtol=0, atol=1e-6)
        lon, lat = tracks.frame.to_lonlat(tracks.position_m[rows])
        np.testing.assert_allclose(np.stack([lon, lat], -1), spread.mean_lonlat[r], rtol=0, atol=1e-9)
