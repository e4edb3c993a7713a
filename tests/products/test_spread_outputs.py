"""Spread output formats (driftwise.io writers): JSON, CSV, NetCDF (CF), GeoJSON (RFC 7946).

Each format is written and read back with an independent reader (json, pandas, xarray/h5netcdf,
pyproj through the frame) and compared with the in-memory Spread; the GeoJSON is checked against
the rules of RFC 7946 (Butler et al. 2016, "The GeoJSON Format"): §3.1.6 closed linear rings of
≥ 4 positions with the exterior ring counter-clockwise, §4 WGS 84 longitude/latitude order and ranges.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy.stats import chi2

from driftwise.data.frame import Frame
from driftwise.dynamics.spread import Release, as_releases, make_spread
from driftwise.errors import InputError
from driftwise.products.writers import spread_to_dict, write_spread

TIMES = np.arange(0.0, 6 * 3600.0 + 1, 1800.0)
BOX = np.array([[2000.0, -800.0], [5000.0, -800.0], [5000.0, 900.0], [2000.0, 900.0]])
FRAME = Frame("lonlat", -3.25, 47.6)     # a fictional bay's frame centre (degrees)


def _spread(frame=None, dim=2, polygon=True):
    """Analytic moments: drift u, anisotropic growing covariance with a rotating principal axis."""
    rels = as_releases([Release(np.r_[0.0, 0.0, -2.0][:dim], name="=HYPERLINK(x)"),
                        Release(np.r_[500.0, -300.0, -1.0][:dim], start_time_s=7200.0, name="north pier")])
    u = np.r_[0.15, 0.02, 0.0][:dim]
    means = np.stack([r.start_m + TIMES[:, None] * u for r in rels])
    angle = 1e-4 * TIMES
    rot = np.stack([np.stack([np.cos(angle), -np.sin(angle)], -1), np.stack([np.sin(angle), np.cos(angle)], -1)], -2)
    cov2 = rot @ (np.diag([3.0, 0.8]) * TIMES[:, None, None] + np.eye(2)) @ np.swapaxes(rot, -1, -2)
    covs = np.zeros((len(rels), len(TIMES), dim, dim))
    covs[..., :2, :2] = cov2
    if dim == 3:
        covs[..., 2, 2] = 0.01 * TIMES + 0.1
    return make_spread("cubature", rels, TIMES, means, covs, frame=frame, polygon_m=BOX if polygon else None,
                       threshold=0.3 if polygon else None)


def test_json_contract_round_trip(tmp_path):
    spread = _spread(FRAME)
    path = write_spread(spread, tmp_path / "s.json")
    data = json.loads(path.read_text())
    assert data["method"] == "cubature" and len(data["releases"]) == 2
    for r, rel in enumerate(data["releases"]):
        assert {"start", "times_s", "mean", "covariance", "mean_lonlat", "ellipses", "probability_inside"} <= set(rel)
        assert rel["times_s"][0] == 0.0
        np.testing.assert_allclose(rel["times_s"], TIMES, rtol=0, atol=0)
        np.testing.assert_allclose(rel["mean"], spread.means[r], rtol=1e-15, atol=0)
        np.testing.assert_allclose(rel["covariance"], spread.covs[r], rtol=1e-15, atol=0)
        np.testing.assert_allclose(rel["mean_lonlat"], spread.mean_lonlat[r], rtol=1e-15, atol=0)
        np.testing.assert_allclose(rel["start"], spread.releases[r].start_m, rtol=0, atol=0)
        assert [e["level"] for e in rel["ellipses"]] == [0.5, 0.9, 0.95]
        np.testing.assert_allclose(rel["ellipses"][2]["semi_major_m"], spread.semi_axes_m[r, :, 2, 0], rtol=1e-15)
    assert data["releases"][1]["start_time_s"] == 7200.0
    assert data["frame"]["kind"] == "lonlat"
    # The mean at t = 0 projects back onto the start: frame round trip (pyproj AEQD, exact to < 1 mm).
    back = FRAME.from_lonlat(*np.array(data["releases"][1]["mean_lonlat"])[:1].T)
    np.testing.assert_allclose(back[0], spread.releases[1].start_m, rtol=0, atol=1e-3)
    metric = spread_to_dict(_spread(None, polygon=False))
    assert "mean_lonlat" not in metric["releases"][0] and "probability_inside" not in metric["releases"][0]


def test_csv_round_trip_and_formula_escaping(tmp_path):
    spread = _spread(FRAME, dim=3)
    table = pd.read_csv(write_spread(spread, tmp_path / "s.csv"))
    assert len(table) == 2 * len(TIMES)
    assert {"x_m", "y_m", "z_m", "cov_xx_m2", "cov_xy_m2", "cov_zz_m2", "semi_major_50_m", "semi_minor_95_m",
            "lon_deg", "lat_deg", "probability_inside"} <= set(table.columns)
    # OWASP "CSV injection": a text cell starting with = + - @ gets a leading apostrophe.
    assert table["release"].iloc[0] == "'=HYPERLINK(x)" and table["release"].iloc[-1] == "north pier"
    np.testing.assert_allclose(table[["x_m", "y_m", "z_m"]].to_numpy(), spread.means.reshape(-1, 3), rtol=1e-15, atol=0)
    np.testing.assert_allclose(table["cov_xy_m2"], spread.covs[..., 0, 1].ravel(), rtol=1e-15, atol=0)
    np.testing.assert_allclose(table["semi_major_95_m"], spread.semi_axes_m[:, :, 2, 0].ravel(), rtol=1e-15, atol=0)
    np.testing.assert_allclose(table[["lon_deg", "lat_deg"]].to_numpy(), spread.mean_lonlat.reshape(-1, 2), rtol=1e-15)
    np.testing.assert_allclose(table["probability_inside"], spread.probability.ravel(), rtol=1e-15, atol=0)
    np.testing.assert_allclose(table["time_s"], np.tile(TIMES, 2), rtol=0, atol=0)


def test_netcdf_round_trip_with_cf_attributes(tmp_path):
    # Layout: a CF trajectory file (CF-1.11 §9, appendix H.4.1 multidimensional representation), issue 16.
    spread = _spread(FRAME)
    with xr.open_dataset(write_spread(spread, tmp_path / "s.nc"), engine="h5netcdf") as ds:
        assert "CF-1.11" in ds.attrs["Conventions"] and ds.attrs["method"] == "cubature"
        assert "featureType" not in ds.attrs          # no time origin: no CF time, so not a trajectory DSG
        assert ds["x_m"].dims == ("trajectory", "obs") and ds["cov_xy_m2"].dims == ("trajectory", "obs")
        assert ds["x_m"].attrs["units"] == "m" and ds["cov_xx_m2"].attrs["units"] == "m2"
        assert ds["forecast_period"].attrs["units"] == "s" and ds["semi_major_95_m"].attrs["units"] == "m"
        assert ds["lon"].attrs["standard_name"] == "longitude" and ds["lon"].attrs["units"] == "degrees_east"
        assert ds["lat"].attrs["standard_name"] == "latitude" and ds["lat"].attrs["units"] == "degrees_north"
        np.testing.assert_allclose(np.stack([ds["x_m"], ds["y_m"]], -1), spread.means, rtol=0, atol=0)
        for i, j, name in ((0, 0, "cov_xx_m2"), (0, 1, "cov_xy_m2"), (1, 1, "cov_yy_m2")):
            np.testing.assert_allclose(ds[name].values, spread.covs[..., i, j], rtol=0, atol=0)
        np.testing.assert_allclose(ds["forecast_period"].values, TIMES, rtol=0, atol=0)
        np.testing.assert_allclose(ds["semi_minor_50_m"].values, spread.semi_axes_m[:, :, 0, 1], rtol=0)
        np.testing.assert_allclose(ds["probability_inside"].values, spread.probability, rtol=0, atol=0)
        names = [str(v.decode() if isinstance(v, bytes) else v) for v in ds["release_name"].values]
        assert names == ["=HYPERLINK(x)", "north pier"]
        np.testing.assert_allclose(ds["start_time_s"].values, [0.0, 7200.0], rtol=0, atol=0)
        assert Frame.from_dict(json.loads(ds.attrs["frame"])) == FRAME


def _ring_area(ring):
    x, y = ring[:, 0], ring[:, 1]
    return 0.5 * np.sum(x[:-1] * y[1:] - x[1:] * y[:-1])


def test_geojson_follows_rfc7946_and_traces_the_ellipses(tmp_path):
    spread = _spread(FRAME)
    data = json.loads(write_spread(spread, tmp_path / "s.geojson").read_text())
    assert data["type"] == "FeatureCollection" and "crs" not in data           # RFC 7946 §4: no crs member
    polygons = [f for f in data["features"] if f["geometry"]["type"] == "Polygon"]
    assert len(polygons) == 3 * 2 * len(TIMES)
    for feature in polygons:
        assert feature["type"] == "Feature" and {"release", "time_s", "level"} <= set(feature["properties"])
        (ring,) = feature["geometry"]["coordinates"]
        ring = np.asarray(ring)
        assert ring.shape[0] >= 4 and ring.shape[1] == 2                       # §3.1.6: ≥ 4 positions
        np.testing.assert_array_equal(ring[0], ring[-1])                       # §3.1.6: closed
        assert _ring_area(ring) > 0                                             # §3.1.6: exterior ring CCW
        assert np.all(np.abs(ring[:, 0]) <= 180) and np.all(np.abs(ring[:, 1]) <= 90)   # §4 lon, lat order/range
    # Every vertex, projected back to the local frame, lies on its χ²₂ ellipse (Mahalanobis² = chi2.ppf);
    # from t = 30 min on (semi-axes ≥ 40 m), so the 1e-7° (≈ 1 cm) coordinate rounding stays below 1e-3.
    for feature in [f for f in polygons if f["properties"]["time_s"] >= 1800.0][::4]:
        props = feature["properties"]
        r = [rel.name for rel in spread.releases].index(props["release"])
        t = int(np.flatnonzero(TIMES == props["time_s"])[0])
        ring = np.asarray(feature["geometry"]["coordinates"][0])[:-1]
        d = FRAME.from_lonlat(ring[:, 0], ring[:, 1]) - spread.means[r, t]
        maha = np.einsum("ni,ij,nj->n", d, np.linalg.inv(spread.covs[r, t]), d)
        np.testing.assert_allclose(maha, chi2.ppf(props["level"], 2), rtol=1e-3)
    paths = [f for f in data["features"] if f["geometry"]["type"] == "LineString"]
    assert len(paths) == 2
    np.testing.assert_allclose(paths[1]["geometry"]["coordinates"], spread.mean_lonlat[1], rtol=0, atol=1e-7)


def test_geojson_refused_for_metric_model_and_unknown_suffix(tmp_path):
    with pytest.raises(InputError, match="RFC 7946"):
        write_spread(_spread(None), tmp_path / "s.geojson")
    with pytest.raises(InputError, match="unknown output format"):
        write_spread(_spread(None), tmp_path / "s.xlsx")
    assert not list(tmp_path.iterdir())       # nothing half-written left behind (atomic_write)


def test_metric_3d_writes_json_csv_netcdf(tmp_path):
    spread = _spread(None, dim=3, polygon=False)
    for suffix in (".json", ".csv", ".nc"):
        write_spread(spread, tmp_path / f"s{suffix}")
    data = json.loads((tmp_path / "s.json").read_text())
    assert np.asarray(data["releases"][0]["covariance"]).shape == (len(TIMES), 3, 3)
    with xr.open_dataset(tmp_path / "s.nc", engine="h5netcdf") as ds:
        assert {"x_m", "y_m", "z_m", "cov_zz_m2"} <= set(ds.variables) and "lon" not in ds
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.csv", "s.json", "s.nc"]
