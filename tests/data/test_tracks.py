"""Reading tracks, the local frame, velocity observations and the inspect summary."""

from __future__ import annotations

import importlib
import json
import math
import warnings

import jax
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pyproj import Geod

from driftwise.data import trackfile
from driftwise.data.frame import Frame, ProjectionWarning, projection_stretch
from driftwise.data.synthetic import random_walk
from driftwise.data.tracks import (
    TrackError,
    TrackNotice,
    Tracks,
    format_summary,
    inspect_summary,
    read_tracks,
    tracks_from_frame,
    velocity_observations,
)

WGS84 = Geod(ellps="WGS84")  # pyproj's geodesics (Karney 2013, J. Geodesy 87, 43) are the reference distances


def _quiet(function, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return function(*args, **kwargs)


# ---------------------------------------------------------------- projection
def _points_around(lon0, lat0, radius_m, n, seed):
    rng = np.random.default_rng(seed)
    azimuth, distance = rng.uniform(0, 360, n), radius_m * np.sqrt(rng.uniform(0, 1, n))
    lon, lat, _ = WGS84.fwd(np.full(n, lon0), np.full(n, lat0), azimuth, distance)
    return lon, lat, distance


def test_projection_round_trip_and_distances_match_wgs84_geodesics_within_50_km():
    lon, lat, _ = _points_around(-9.0, 44.0, 50e3, 2000, seed=0)
    frame = Frame("lonlat", -9.0, 44.0)
    xy = frame.from_lonlat(lon, lat)
    back_lon, back_lat = frame.to_lonlat(xy)
    np.testing.assert_allclose(back_lon, lon, rtol=0, atol=1e-10)
    np.testing.assert_allclose(back_lat, lat, rtol=0, atol=1e-10)
    j = np.random.default_rng(1).permutation(lon.size)
    _, _, geodesic = WGS84.inv(lon, lat, lon[j], lat[j])
    planar = np.linalg.norm(xy - xy[j], axis=1)
    far = geodesic > 100.0
    np.testing.assert_allclose(planar[far], geodesic[far], rtol=1e-3, atol=0)  # the 0.1 % requirement
    # and within the AEQD bound c/sin c − 1 at 50 km (Snyder 1987, USGS PP 1395, §25; ≈1.0e-5), 10 % slack
    np.testing.assert_array_less(np.abs(planar[far] / geodesic[far] - 1), 1.1 * projection_stretch(50e3))


def test_distance_from_the_centre_is_the_geodesic_distance():
    lon, lat, distance = _points_around(150.0, -33.0, 50e3, 500, seed=2)
    xy = Frame("lonlat", 150.0, -33.0).from_lonlat(lon, lat)
    np.testing.assert_allclose(np.linalg.norm(xy, axis=1), distance, rtol=1e-9, atol=1e-6)  # AEQD (Snyder 1987)


@pytest.mark.parametrize("radius_m", [500e3, 1500e3])
def test_far_edge_stretch_is_measured_and_warned(radius_m):
    # the warning's number against pyproj's geodesics: two points 100 m apart across the radial direction
    lon, lat, _ = WGS84.fwd([-9.0] * 3, [44.0] * 3, [90.0, 90.0 + math.degrees(100.0 / radius_m), 270.0],
                            [radius_m] * 3)
    _, _, across = WGS84.inv(lon[0], lat[0], lon[1], lat[1])
    frame = Frame("lonlat", -9.0, 44.0)
    xy = frame.from_lonlat(lon[:2], lat[:2])
    measured = np.linalg.norm(xy[0] - xy[1]) / across - 1
    np.testing.assert_allclose(projection_stretch(radius_m), measured, rtol=0.01)  # sphere vs WGS 84: ~0.2 %
    table = pd.DataFrame({"id": ["A", "A", "B", "B"], "time": [0.0, 1e6, 0.0, 1e6],
                          "lon": [lon[0], lon[0] + 0.01, lon[2], lon[2] + 0.01],
                          "lat": [lat[0], lat[0], lat[2], lat[2]]})
    with pytest.warns(ProjectionWarning, match=r"reach \d+ km .* by up to (\d+\.\d+) %") as record:
        tracks_from_frame(table)
    stated = float(str(record[0].message).split("up to ")[1].split(" %")[0])
    np.testing.assert_allclose(stated / 100, measured, rtol=0.05, atol=5e-5)


def test_no_projection_warning_for_a_bay(write_file):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        tracks = read_tracks("demo_data/bay_fit.csv")
    assert tracks.frame.kind == "lonlat"


def test_frame_description_round_trips_through_json():
    frame = Frame("lonlat", -9.02, 44.01)
    assert Frame.from_dict(json.loads(json.dumps(frame.to_dict()))) == frame
    assert "+proj=aeqd" in frame.to_dict()["proj"] and "+datum=WGS84" in frame.to_dict()["proj"]
    assert Frame.from_dict(Frame().to_dict()) == Frame()
    with pytest.raises(Exception, match="no geographic reference"):
        Frame().to_lonlat(np.zeros((1, 2)))
    with pytest.raises(Exception, match="kind"):
        Frame.from_dict({"kind": "utm"})


def test_centre_across_the_antimeridian():
    table = pd.DataFrame({"id": ["A", "A"], "time": [0.0, 3600.0], "lon": [179.995, -179.995], "lat": [10.0, 10.0]})
    tracks = tracks_from_frame(table)
    assert abs(abs(tracks.frame.lon0_deg) - 180.0) < 1e-9
    _, _, step = WGS84.inv(179.995, 10.0, -179.995, 10.0)
    np.testing.assert_allclose(np.linalg.norm(np.diff(tracks.position_m, axis=0)), step, rtol=1e-6)


# ---------------------------------------------------------------- velocity observations
@pytest.mark.parametrize("dim", [2, 3])
def test_straight_constant_speed_track_gives_that_velocity(dim):
    velocity = np.array([0.31, -0.12, 0.05][:dim])
    times = np.array([0.0, 600.0, 1500.0, 1620.0, 5000.0])
    start = np.array([100.0, -50.0, 3.0][:dim])
    table = pd.DataFrame({"track_id": "A", "time_s": times} | {
        axis: start[i] + velocity[i] * times for i, axis in enumerate("xyz"[:dim])})
    obs = velocity_observations(tracks_from_frame(table), position_error_m=5.0)
    np.testing.assert_allclose(obs.velocity_m_s, np.tile(velocity, (4, 1)), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(obs.dt_s, np.diff(times), rtol=0, atol=0)
    np.testing.assert_allclose(obs.time_s, 0.5 * (times[1:] + times[:-1]), rtol=0, atol=0)
    np.testing.assert_allclose(obs.position_m, start + velocity * obs.time_s[:, None], rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(obs.track_index, 0)


@pytest.mark.parametrize("dim", [2, 3])
def test_random_walk_velocity_variance_is_2K_over_dt(dim):
    # Einstein (1905): a displacement over Δt has variance 2KΔt per component, so (Δx/Δt) has 2K/Δt
    k, dt = 3.0, 120.0
    table = random_walk(400, 51, fix_interval_s=dt, diffusivity_m2_s=k, seed=11, dim=dim)
    obs = velocity_observations(tracks_from_frame(table), position_error_m=0.0)
    n = obs.n  # 20 000 per component; the variance estimate has relative standard error √(2/n) ≈ 1 %
    variance = obs.velocity_m_s.var(axis=0, ddof=1)
    np.testing.assert_allclose(variance, 2 * k / dt, rtol=5 * math.sqrt(2 / n))
    np.testing.assert_allclose(obs.noise_variance_m2_s2(k), 2 * k / dt, rtol=1e-12)


def test_position_error_adds_2sigma2_over_dt2_and_anticorrelates_neighbours():
    # white position noise σ on each fix: Var(Δx/Δt) = 2K/Δt + 2σ²/Δt², Cov(neighbours) = −σ²/Δt²
    # (variance of a difference of independent errors; common practice)
    k, dt, sigma = 1.0, 60.0, 10.0
    table = random_walk(500, 41, fix_interval_s=dt, diffusivity_m2_s=k, seed=5, position_error_m=sigma)
    obs = velocity_observations(tracks_from_frame(table), position_error_m=sigma)
    expected = 2 * k / dt + 2 * sigma**2 / dt**2
    rse = 5 * math.sqrt(2 / obs.n)
    np.testing.assert_allclose(obs.velocity_m_s.var(axis=0, ddof=1), expected, rtol=rse)
    np.testing.assert_allclose(obs.noise_variance_m2_s2(k), expected, rtol=1e-12)
    v = obs.velocity_m_s[:, 0].reshape(500, 40)
    lag1 = np.mean((v[:, 1:] - v.mean()) * (v[:, :-1] - v.mean()))
    np.testing.assert_allclose(lag1, -sigma**2 / dt**2, rtol=0.1, atol=0)


def test_noise_terms_are_separate_components():
    table = pd.DataFrame({"track_id": ["A"] * 3 + ["B"] * 2, "time_s": [0.0, 10.0, 40.0, 0.0, 5.0],
                          "x": [0.0, 1.0, 2.0, 0.0, 1.0], "y": [0.0] * 5})
    obs = velocity_observations(tracks_from_frame(table), position_error_m=3.0)
    np.testing.assert_array_equal(obs.dt_s, [10.0, 30.0, 5.0])
    np.testing.assert_allclose(obs.random_walk_coefficient_s_inv, [0.2, 2 / 30, 0.4], rtol=1e-15)
    np.testing.assert_allclose(obs.position_noise_var_m2_s2, [0.18, 0.02, 0.72], rtol=1e-14)
    np.testing.assert_allclose(obs.noise_variance_m2_s2(2.0, 0.01), [0.59, 0.02 + 4 / 30 + 0.01, 1.53], rtol=1e-14)
    np.testing.assert_array_equal(obs.track_index, [0, 0, 1])
    with pytest.raises(Exception, match="position error"):
        velocity_observations(tracks_from_frame(table), position_error_m=-1.0)


def test_observations_are_a_jax_pytree():
    importlib.import_module("driftwise.gp.field")   # registers Observations (so reading tracks need not import jax)
    table = random_walk(3, 5, fix_interval_s=60.0, diffusivity_m2_s=1.0, seed=0)
    obs = velocity_observations(tracks_from_frame(table), position_error_m=2.0)
    assert len(jax.tree_util.tree_leaves(obs)) == 5
    total = jax.jit(lambda o: (o.velocity_m_s**2).sum() + o.position_noise_var_m2_s2.sum())(obs)
    np.testing.assert_allclose(total, (obs.velocity_m_s**2).sum() + obs.position_noise_var_m2_s2.sum(), rtol=1e-12)


# ---------------------------------------------------------------- Tracks
def test_select_segments_and_counts():
    table = random_walk(4, 6, fix_interval_s=60.0, diffusivity_m2_s=1.0, seed=3, dim=3)
    table["depth_note"] = "surface"
    tracks = tracks_from_frame(table)
    assert (tracks.n_tracks, tracks.n_fixes, tracks.dim) == (4, 24, 3)
    ids = [tid for tid, _, _ in tracks.segments()]
    assert ids == tracks.unique_ids.tolist() == ["W00001", "W00002", "W00003", "W00004"]
    sub = tracks.select(["W00003", "W00001"])
    assert sub.unique_ids.tolist() == ["W00001", "W00003"] and sub.n_fixes == 12
    np.testing.assert_array_equal(sub.position_m[6:], tracks.position_m[12:18])
    assert sub.extra["depth_note"].shape == (12,)
    with pytest.raises(Exception, match="no track with id 'nope'"):
        tracks.select(["nope"])
    np.testing.assert_array_equal(tracks.track_index, np.repeat(np.arange(4), 6))
    bad = Tracks(track_id=np.array(["A", "B", "A"], dtype=object), time_s=np.zeros(3), position_m=np.zeros((3, 2)))
    with pytest.raises(Exception, match="contiguous"):
        bad.n_tracks


def test_dataframe_with_typed_columns():
    stamps = pd.to_datetime(["2024-06-03T06:00Z", "2024-06-03T07:00Z", "2024-06-03T06:00Z", "2024-06-03T06:30Z"])
    table = pd.DataFrame({"drifter": [7, 7, 12, 12], "timestamp": stamps, "x_m": [0.0, 1.0, 2.0, 3.0],
                          "y_m": [0, 0, 1, 1]})
    tracks = tracks_from_frame(table)
    assert tracks.unique_ids.tolist() == ["12", "7"] and tracks.time_is_absolute
    np.testing.assert_array_equal(tracks.time_s, [1717394400, 1717396200, 1717394400, 1717398000])
    with pytest.warns(TrackNotice, match="without a time zone"):
        naive = tracks_from_frame(table.assign(timestamp=stamps.tz_localize(None)))
    np.testing.assert_array_equal(naive.time_s, tracks.time_s)
    with pytest.raises(TrackError, match=r"row 4, column 'x_m': the value is missing \(NaN\)"):
        tracks_from_frame(table.assign(x_m=[0.0, np.nan, 1.0, 2.0]).iloc[[0, 2, 1, 3]])


def test_chunked_csv_matches_whole_and_keeps_row_numbers(write_file, monkeypatch):
    table = random_walk(5, 30, fix_interval_s=60.0, diffusivity_m2_s=1.0, seed=8).sample(frac=1.0, random_state=0)
    path = write_file("t.csv", table.to_csv(index=False))
    whole = _quiet(read_tracks, path)
    monkeypatch.setattr(trackfile, "CSV_CHUNK_ROWS", 7)
    chunked = _quiet(read_tracks, path)
    np.testing.assert_array_equal(chunked.position_m, whole.position_m)
    np.testing.assert_array_equal(chunked.track_id, whole.track_id)
    lines = path.read_text().splitlines()
    lines[100] = lines[100].rsplit(",", 1)[0] + ",bad"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(TrackError) as info:
        read_tracks(path)
    assert (info.value.row, info.value.column) == (101, "y_m")
    lines[100], lines[120] = lines[100].rsplit(",", 1)[0] + ",0", "W00001,2024-06-03T06:00:00Z,0,0"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(TrackError, match="mixes time formats: row 2 has numeric seconds") as info:
        read_tracks(path)
    assert info.value.row == 121


def test_mixed_extra_column_across_chunks_is_text(write_file, monkeypatch):
    monkeypatch.setattr(trackfile, "CSV_CHUNK_ROWS", 3)
    rows = "".join(f"A,{60 * i},{i},0,{'late' if i == 7 else i}\n" for i in range(9))
    tracks = read_tracks(write_file("t.csv", "track_id,time,x,y,note\n" + rows))
    assert tracks.extra["note"].dtype == object
    assert tracks.extra["note"].tolist() == ["0", "1", "2", "3", "4", "5", "6", "late", "8"]


def test_package_exports_and_error_types():
    import driftwise
    from driftwise.errors import InputError

    for name in ("read_tracks", "Tracks", "Frame", "TrackError", "velocity_observations", "Observations"):
        assert name in driftwise.__all__ and hasattr(driftwise, name)
    assert issubclass(driftwise.TrackError, InputError) and issubclass(driftwise.TrackError, ValueError)
    err = driftwise.TrackError("a.csv", "the value is empty", row=4, column="x")
    assert str(err) == "a.csv, row 4, column 'x': the value is empty"
    assert (err.file, err.row, err.column, err.problem) == ("a.csv", 4, "x", "the value is empty")


# ---------------------------------------------------------------- round trips
_ID = st.text(st.characters(categories=("L", "N", "P", "S"), exclude_characters="\r\n\x85\u2028\u2029"),
              min_size=1, max_size=10)


@st.composite
def _track_tables(draw):
    ids = draw(st.lists(_ID, min_size=1, max_size=4, unique=True))
    iso = draw(st.booleans())
    rows = []
    for track in ids:
        if iso:
            times = draw(st.lists(st.integers(-2_000_000_000, 4_000_000_000), min_size=2, max_size=6, unique=True))
        else:
            times = draw(st.lists(st.floats(-1e9, 1e10, allow_nan=False), min_size=2, max_size=6, unique=True))
        for t in times:
            x, y = draw(st.floats(-1e7, 1e7)), draw(st.floats(-1e7, 1e7))
            rows.append((track, t, x, y))
    order = draw(st.permutations(range(len(rows))))
    table = pd.DataFrame([rows[i] for i in order], columns=["track_id", "time", "x", "y"])
    if iso:
        table["time"] = pd.to_datetime(table["time"], unit="s", utc=True).dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    return table, rows, iso


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(_track_tables())
def test_any_valid_track_table_reads_back_identical_from_csv(tmp_path, case):
    table, rows, iso = case
    path = tmp_path / "t.csv"
    table.to_csv(path, index=False)
    tracks = _quiet(read_tracks, path, max_speed_m_s=None)
    expected = sorted((track, float(t), x, y) for track, t, x, y in rows)
    assert tracks.track_id.tolist() == [r[0] for r in expected]
    np.testing.assert_array_equal(tracks.time_s, [r[1] for r in expected])
    np.testing.assert_array_equal(tracks.position_m, [[r[2], r[3]] for r in expected])
    assert tracks.time_is_absolute == iso
    from_frame = _quiet(tracks_from_frame, table, max_speed_m_s=None)
    np.testing.assert_array_equal(from_frame.position_m, tracks.position_m)
    np.testing.assert_array_equal(from_frame.time_s, tracks.time_s)


def _bay_table():
    """A small lon/lat table with ragged tracks and an extra column, as text-exact floats."""
    table = pd.read_csv("demo_data/bay_fit.csv", dtype={"track_id": str})
    table = table[table.track_id.isin(["MB-001", "MB-002", "MB-004"])]
    table = table[~((table.track_id == "MB-002") & (table.index % 3 == 0))].reset_index(drop=True)
    table["temp_c"] = np.round(15 + 0.01 * np.arange(len(table)), 2)
    return table


def _ragged_dataset(table):
    ids, counts = np.unique(table.track_id, return_counts=True)
    times = pd.to_datetime(table.time).dt.tz_localize(None).to_numpy()
    return xr.Dataset(
        {"trajectory": ("trajectory", ids.astype(object), {"cf_role": "trajectory_id"}),
         "rowSize": ("trajectory", counts.astype(np.int32), {"sample_dimension": "obs"}),
         "time": ("obs", times, {"standard_name": "time"}),
         "lon": ("obs", table.lon.to_numpy(), {"standard_name": "longitude", "units": "degrees_east"}),
         "lat": ("obs", table.lat.to_numpy(), {"standard_name": "latitude", "units": "degrees_north"}),
         "temp_c": ("obs", table.temp_c.to_numpy())}, attrs={"featureType": "trajectory", "Conventions": "CF-1.8"})


def _multidim_dataset(table, *, shared_time):
    ids = sorted(table.track_id.unique())
    groups = [table[table.track_id == i] for i in ids]
    width = max(len(g) for g in groups)

    def pad(column, fill):
        out = np.full((len(ids), width), fill)
        for row, g in enumerate(groups):
            out[row, : len(g)] = g[column].to_numpy()
        return out

    times = pad("time", None)
    times = np.where(times == None, np.datetime64("NaT"), times)  # noqa: E711
    times = pd.to_datetime(times.ravel(), utc=True).tz_localize(None).to_numpy().reshape(times.shape)
    variables = {"trajectory": ("trajectory", np.array(ids, dtype=object), {"cf_role": "trajectory_id"}),
                 "lon": (("trajectory", "obs"), pad("lon", np.nan), {"standard_name": "longitude"}),
                 "lat": (("trajectory", "obs"), pad("lat", np.nan), {"standard_name": "latitude"}),
                 "temp_c": (("trajectory", "obs"), pad("temp_c", np.nan))}
    variables["time"] = ("obs", times[0], {"standard_name": "time"}) if shared_time else \
        (("trajectory", "obs"), times, {"standard_name": "time"})
    return xr.Dataset(variables, attrs={"featureType": "trajectory"})


@pytest.mark.parametrize("form", ["contiguous_ragged", "incomplete_multidimensional", "orthogonal_multidimensional"])
def test_netcdf_cf_trajectories_read_back_identical_to_csv(tmp_path, form):
    table = _bay_table()
    if form == "orthogonal_multidimensional":  # every track on the same times
        table = table[table.track_id != "MB-002"].copy()
        table["time"] = table.groupby("track_id").cumcount().map(lambda i: f"2024-06-03T{i % 24:02d}:00:00Z")
        table = table[table.groupby("track_id").cumcount() < 24]
    table.to_csv(tmp_path / "t.csv", index=False)
    ds = _ragged_dataset(table) if form == "contiguous_ragged" else \
        _multidim_dataset(table, shared_time=form.startswith("orthogonal"))
    ds.to_netcdf(tmp_path / "t.nc", engine="h5netcdf",
                 encoding={"time": {"units": "seconds since 1970-01-01T00:00:00", "dtype": "float64"}})
    from_csv, from_nc = read_tracks(tmp_path / "t.csv"), read_tracks(tmp_path / "t.nc")
    assert from_nc.frame == from_csv.frame
    np.testing.assert_array_equal(from_nc.track_id, from_csv.track_id)
    np.testing.assert_array_equal(from_nc.time_s, from_csv.time_s)
    np.testing.assert_array_equal(from_nc.position_m, from_csv.position_m)
    np.testing.assert_array_equal(from_nc.extra["temp_c"], from_csv.extra["temp_c"])


def test_parquet_reads_back_identical_to_csv(tmp_path):
    table = _bay_table()
    table.to_csv(tmp_path / "t.csv", index=False)
    table.assign(time=pd.to_datetime(table.time)).to_parquet(tmp_path / "t.parquet")
    from_csv, from_pq = read_tracks(tmp_path / "t.csv"), read_tracks(tmp_path / "t.parquet")
    np.testing.assert_array_equal(from_pq.time_s, from_csv.time_s)
    np.testing.assert_array_equal(from_pq.position_m, from_csv.position_m)
    assert from_pq.unique_ids.tolist() == ["MB-001", "MB-002", "MB-004"]


# ---------------------------------------------------------------- inspect
def test_inspect_summary_numbers(write_file):
    path = write_file("t.csv", "track_id,time,x,y,temp\nA,0,0,0,1\nA,100,30,40,2\nA,300,30,40,3\n"
                               "B,0,0,0,4\nB,50,5,0,5\n")
    summary = inspect_summary(read_tracks(path))
    json.dumps(summary, allow_nan=False)
    assert (summary["n_tracks"], summary["n_fixes"], summary["dim"]) == (2, 5, 2)
    assert summary["sampling_interval_s"] == {"median": 100.0, "min": 50.0, "max": 200.0}
    # speeds 0.5, 0, 0.1 m/s → percentiles by linear interpolation (numpy.percentile's default)
    assert summary["speed_m_s"]["p50"] == pytest.approx(np.percentile([0.5, 0.0, 0.1], 50), rel=1e-12)
    assert summary["speed_m_s"]["max"] == pytest.approx(0.5, rel=1e-12)
    assert summary["time"] == {"start_s": 0.0, "end_s": 300.0, "span_s": 300.0, "absolute": False}
    assert summary["frame"] == {"kind": "metric"} and summary["extra_columns"] == ["temp"]
    assert summary["extent_m"] == {"x": [0.0, 30.0], "y": [0.0, 40.0]}
    text = format_summary(summary)
    assert "2 tracks, 5 fixes" in text and "median 1.67 min" in text and "QC           none needed" in text


def test_cli_inspect_demo_json(run_cli):
    code, out, err = run_cli("inspect", "demo_data/bay_fit.csv", "--json")
    assert code == 0 and err == ""
    summary = json.loads(out)
    for key in ("n_tracks", "n_fixes", "dim", "time", "sampling_interval_s", "speed_m_s", "frame", "qc"):
        assert key in summary
    assert summary["time"]["start_iso"].endswith("Z") and summary["frame"]["kind"] == "lonlat"
    code, out, _ = run_cli("inspect", "demo_data/bay_fit.csv")
    assert code == 0 and "40 tracks" in out and "azimuthal equidistant" in out
