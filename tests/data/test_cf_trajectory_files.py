"""CF trajectory NetCDF files written by other tools read back identical (driftwise.data.trackcf).

Writers: ``netCDF4`` by hand (each layout as CF 1.8 appendix H.4 shows it), ``xarray`` (``Dataset.to_netcdf``
with its default encoding) and the ``pocean-core`` DSG writers (``ContiguousRaggedTrajectory`` and
``IncompleteMultidimensionalTrajectory``; pocean-core 2025.1 has no orthogonal multidimensional trajectory writer,
so that layout is written by netCDF4 and xarray only).  Layouts: contiguous ragged array (CF 1.8 §H.4.3, §9.3.3),
incomplete multidimensional array (§H.4.1 example H.12, §9.3.2) and orthogonal multidimensional array (§H.4.1's
common-times form with a ``time(time)`` coordinate variable, §9.3.1).

The reference is the table written: track ids, times (exact, as seconds since 1970-01-01T00:00:00Z), and
positions, compared after the projection round trip (``Frame.to_lonlat``, pyproj's inverse azimuthal equidistant
projection) to 1e-9 relative; QC counts are the masked fixes and padding slots the test put in.
"""

from __future__ import annotations

import warnings

import netCDF4
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from pocean.dsg import ContiguousRaggedTrajectory, IncompleteMultidimensionalTrajectory

from driftwise.data.tracks import TrackError, TrackWarning, read_tracks

FILL = -999.0
EPOCH = np.datetime64("1970-01-01T00:00:00", "s")
# name and attributes of the two position variables in each naming of the test files
NAMINGS = {
    "standard": (("lon", {"standard_name": "longitude", "units": "degrees_east"}),
                 ("lat", {"standard_name": "latitude", "units": "degrees_north"})),
    # the case of the issue: positions named x/y, no standard_name, CF §4.1-4.2 alias units
    "degrees_named_xy": (("x", {"units": "degree_E"}), ("y", {"units": "degreesN"})),
    "axis_degrees": (("pos_a", {"axis": "X", "units": "degrees_east"}), ("pos_b", {"axis": "Y", "units": "degrees_north"})),
    "axis_km": (("pos_a", {"axis": "X", "units": "km"}), ("pos_b", {"axis": "Y", "units": "km"})),
}
MASKED = ((0, 2), (2, 1))  # (track, fix) pairs written as fill values in the masked files


# ---------------------------------------------------------------- the reference table
def _reference(*, common_times: bool, metric: bool) -> pd.DataFrame:
    """Three drifters, hourly fixes; lon/lat in degrees (or x/y in km), a temperature; deterministic."""
    lengths, starts_h = ((6, 6, 6), (0, 0, 0)) if common_times else ((6, 8, 5), (0, 3, 1))
    rows = []
    for k, (name, n, start) in enumerate(zip(("MB-01", "MB-02", "MB-07"), lengths, starts_h)):
        i = np.arange(n)
        time = np.datetime64("2024-06-03T00:00:00", "s") + (start + i) * np.timedelta64(3600, "s")
        a = (-4.1525 + 0.0031 * i + 0.02 * k) if not metric else (1.25 + 0.61 * i - 3.5 * k)
        b = (50.3125 + 0.0017 * i * (k + 1)) if not metric else (-2.0 + 0.37 * i * (k + 1))
        rows.append(pd.DataFrame({"track_id": name, "time": time, "a": a, "b": b,
                                  "temp_c": np.round(14.5 + 0.1 * i + k, 2), "track": k, "fix": i}))
    return pd.concat(rows, ignore_index=True)


def _masked_rows(table: pd.DataFrame, masked: bool) -> np.ndarray:
    hit = np.zeros(len(table), bool)
    for track, fix in MASKED if masked else ():
        hit |= ((table.track == track) & (table.fix == fix)).to_numpy()
    return hit


def _grid(table: pd.DataFrame, column: str, fill) -> np.ndarray:
    """(trajectory, obs) array of ``column``, unused slots ``fill``."""
    width = table.fix.max() + 1
    out = np.full((table.track.max() + 1, width), fill, dtype=np.asarray(table[column]).dtype)
    out[table.track, table.fix] = table[column].to_numpy()
    return out


# ---------------------------------------------------------------- writers
def _write_netcdf4(path, table, layout, naming, hidden):
    """netCDF4 by hand: masked fixes as the _FillValue -999, as CF §2.5.1 and §9.6 describe."""
    (xname, xattrs), (yname, yattrs) = NAMINGS[naming]
    ids = table.groupby("track").track_id.first().to_numpy()
    with netCDF4.Dataset(path, "w") as nc:
        nc.setncatts({"Conventions": "CF-1.8", "featureType": "trajectory"})
        nc.createDimension("trajectory", ids.size)
        traj = nc.createVariable("trajectory", str, ("trajectory",))
        traj.cf_role = "trajectory_id"
        traj[:] = ids.astype(object)
        hours = ((table.time.to_numpy() - np.datetime64("2024-06-01T00:00:00", "s")) / np.timedelta64(3600, "s"))
        a, b = table.a.to_numpy().copy(), table.b.to_numpy().copy()
        a[hidden] = b[hidden] = FILL
        if layout == "contiguous_ragged":
            dims = ("obs",)
            nc.createDimension("obs", len(table))
            size = nc.createVariable("rowSize", "i4", ("trajectory",))
            size.sample_dimension = "obs"
            size[:] = table.groupby("track").size().to_numpy()
            values = {"time": hours, "a": a, "b": b, "temp_c": table.temp_c.to_numpy()}
        else:
            frame = table.assign(a=a, b=b, hours=hours)
            nc.createDimension("obs" if layout == "incomplete_multidimensional" else "time", frame.fix.max() + 1)
            dims = ("trajectory", "obs" if layout == "incomplete_multidimensional" else "time")
            values = {"time": _grid(frame, "hours", FILL), "a": _grid(frame, "a", FILL), "b": _grid(frame, "b", FILL),
                      "temp_c": _grid(frame, "temp_c", FILL)}
            if layout == "orthogonal_multidimensional":
                values["time"] = values["time"][0]
        time_dims = ("time",) if layout == "orthogonal_multidimensional" else dims
        time = nc.createVariable("time", "f8", time_dims, fill_value=FILL)
        time.setncatts({"standard_name": "time", "units": "hours since 2024-06-01 00:00:00", "calendar": "standard"})
        time[:] = values["time"]
        for key, name, attrs in (("a", xname, xattrs), ("b", yname, yattrs), ("temp_c", "temp_c", {"units": "degC"})):
            var = nc.createVariable(name, "f8", dims, fill_value=FILL)
            var.setncatts(attrs)
            var[:] = values[key]


def _write_xarray(path, table, layout, naming, hidden):
    """xarray with its default encoding: masked fixes as NaN (the default _FillValue of float variables)."""
    (xname, xattrs), (yname, yattrs) = NAMINGS[naming]
    table = table.copy()
    table.loc[hidden, ["a", "b"]] = np.nan
    ids = table.groupby("track").track_id.first().to_numpy().astype(object)
    variables = {"trajectory": ("trajectory", ids, {"cf_role": "trajectory_id"})}
    if layout == "contiguous_ragged":
        dims, grid = "obs", (lambda c, fill: table[c].to_numpy())
        variables["rowSize"] = ("trajectory", table.groupby("track").size().to_numpy(np.int32),
                                {"sample_dimension": "obs"})
    else:
        dims, grid = ("trajectory", "obs"), (lambda c, fill: _grid(table, c, fill))
    time = grid("time", np.datetime64("NaT", "s"))
    if layout == "orthogonal_multidimensional":
        dims, time = ("trajectory", "time"), time[0]
    variables.update({"time": (dims[-1:] if layout.startswith("orthogonal") else dims, time, {"standard_name": "time"}),
                      xname: (dims, grid("a", np.nan), xattrs), yname: (dims, grid("b", np.nan), yattrs),
                      "temp_c": (dims, grid("temp_c", np.nan), {"units": "degC"})})
    xr.Dataset(variables, attrs={"featureType": "trajectory", "Conventions": "CF-1.8"}).to_netcdf(path)


def _write_pocean(path, table, layout, naming, hidden):
    """pocean-core's DSG writers from a DataFrame; masked fixes as NaN in the DataFrame."""
    (xname, xattrs), (yname, yattrs) = NAMINGS[naming]
    frame = pd.DataFrame({"trajectory": table.track_id.astype(object), "time": table.time,
                          xname: table.a.where(~hidden), yname: table.b.where(~hidden), "z": 0.0,
                          "temp_c": table.temp_c})
    writer = {"contiguous_ragged": ContiguousRaggedTrajectory,
              "incomplete_multidimensional": IncompleteMultidimensionalTrajectory}[layout]
    writer.from_dataframe(frame, str(path), axes={"t": "time", "x": xname, "y": yname, "z": "z"},
                          attributes={xname: xattrs, yname: yattrs}).close()


WRITERS = {"netCDF4": _write_netcdf4, "xarray": _write_xarray, "pocean": _write_pocean}
CASES = [(w, layout) for w in WRITERS for layout in ("contiguous_ragged", "incomplete_multidimensional",
                                                      "orthogonal_multidimensional")
         if not (w == "pocean" and layout == "orthogonal_multidimensional")]


def _read(path):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        tracks = read_tracks(path, max_speed_m_s=None)
    return tracks, caught


# ---------------------------------------------------------------- round trips
@pytest.mark.parametrize("masked", [False, True], ids=["complete", "masked"])
@pytest.mark.parametrize("naming", list(NAMINGS))
@pytest.mark.parametrize("writer,layout", CASES)
def test_round_trip(tmp_path, writer, layout, naming, masked):
    metric = naming == "axis_km"
    table = _reference(common_times=layout.startswith("orthogonal"), metric=metric)
    hidden = _masked_rows(table, masked)
    WRITERS[writer](tmp_path / "t.nc", table, layout, naming, hidden)
    tracks, caught = _read(tmp_path / "t.nc")
    kept = table.loc[~hidden].sort_values(["track_id", "time"])

    assert tracks.track_id.tolist() == kept.track_id.tolist()
    expected_s = ((kept.time.to_numpy() - EPOCH) / np.timedelta64(1, "s")).astype(np.float64)
    np.testing.assert_array_equal(tracks.time_s, expected_s)              # exactly: whole seconds
    assert tracks.time_is_absolute
    if metric:                                                            # km -> m (x 1000), no projection
        assert tracks.frame.kind == "metric"
        np.testing.assert_allclose(tracks.position_m, 1000.0 * kept[["a", "b"]].to_numpy(), rtol=1e-12, atol=0)
    else:                                                                 # pyproj inverse projection round trip
        assert tracks.frame.kind == "lonlat"
        lon, lat = tracks.frame.to_lonlat(tracks.position_m)
        np.testing.assert_allclose(lon, kept.a.to_numpy(), rtol=1e-9, atol=0)
        np.testing.assert_allclose(lat, kept.b.to_numpy(), rtol=1e-9, atol=0)
    np.testing.assert_array_equal(tracks.extra["temp_c"], kept.temp_c.to_numpy())

    expected_qc = {"masked_fixes": len(MASKED)} if masked else {}
    if layout == "incomplete_multidimensional":                           # the unused slots of shorter tracks
        width = table.fix.max() + 1
        expected_qc["padding"] = int(width * table.track.nunique() - len(table))
    assert {a.name: a.count for a in tracks.qc} == expected_qc
    assert not [w for w in caught if "span only" in str(w.message)]


# ---------------------------------------------------------------- the other two CF layouts
def _write_indexed(path, table, naming, hidden, *, by):
    """Indexed ragged array (CF 1.8 §H.4.4, example H.15): fixes in time order, interleaving the drifters."""
    (xname, xattrs), (yname, yattrs) = NAMINGS[naming]
    order = np.lexsort((table.track.to_numpy(), table.time.to_numpy()))
    table, hidden = table.iloc[order].reset_index(drop=True), hidden[order]
    a, b = table.a.where(~hidden), table.b.where(~hidden)
    ids = np.array(["MB-01", "MB-02", "MB-07"], dtype=object)
    if by == "xarray":
        xr.Dataset({"trajectory": ("trajectory", ids, {"cf_role": "trajectory_id"}),
                    "trajectory_index": ("obs", table.track.to_numpy(np.int32), {"instance_dimension": "trajectory"}),
                    "time": ("obs", table.time.to_numpy(), {"standard_name": "time"}),
                    xname: ("obs", a.to_numpy(), xattrs), yname: ("obs", b.to_numpy(), yattrs),
                    "temp_c": ("obs", table.temp_c.to_numpy())}, attrs={"featureType": "trajectory"}).to_netcdf(path)
        return
    with netCDF4.Dataset(path, "w") as nc:
        nc.featureType = "trajectory"
        nc.createDimension("obs", None)                      # unlimited, the canonical streaming case
        nc.createDimension("trajectory", 3)
        nc.createDimension("name_strlen", 5)
        traj = nc.createVariable("trajectory", "S1", ("trajectory", "name_strlen"))
        traj.cf_role = "trajectory_id"
        traj[:] = netCDF4.stringtochar(ids.astype("S5"))
        index = nc.createVariable("trajectory_index", "i4", ("obs",))
        index.instance_dimension = "trajectory"
        index[:] = table.track.to_numpy(np.int32)
        _obs_variables(nc, table, ("obs",), ((xname, xattrs, a), (yname, yattrs, b)))


def _obs_variables(nc, table, dims, positions):
    """time (seconds since 1970, as in CF §4.4) and the positions (_FillValue for masked fixes) on ``dims``."""
    time = nc.createVariable("time", "f8", dims)
    time.setncatts({"standard_name": "time", "units": "seconds since 1970-01-01T00:00:00Z"})
    time[:] = (table.time.to_numpy() - EPOCH) / np.timedelta64(1, "s")
    for name, attrs, values in positions:
        var = nc.createVariable(name, "f8", dims, fill_value=FILL)
        var.setncatts(attrs)
        var[:] = np.where(np.isnan(values), FILL, values)
    nc.createVariable("temp_c", "f8", dims)[:] = table.temp_c.to_numpy()


def _write_single(path, table, naming, hidden, *, by):
    """A single trajectory (CF 1.8 §H.4.2, example H.13): no trajectory dimension, a char-array id."""
    (xname, xattrs), (yname, yattrs) = NAMINGS[naming]
    a, b = table.a.where(~hidden), table.b.where(~hidden)
    if by == "xarray":
        xr.Dataset({"trajectory": ((), "MB-07", {"cf_role": "trajectory_id"}),
                    "time": ("time", table.time.to_numpy(), {"standard_name": "time"}),
                    xname: ("time", a.to_numpy(), xattrs), yname: ("time", b.to_numpy(), yattrs),
                    "temp_c": ("time", table.temp_c.to_numpy())}, attrs={"featureType": "trajectory"}).to_netcdf(path)
        return
    with netCDF4.Dataset(path, "w") as nc:
        nc.featureType = "trajectory"
        nc.createDimension("time", len(table))
        nc.createDimension("name_strlen", 8)
        traj = nc.createVariable("trajectory", "S1", ("name_strlen",))
        traj.cf_role = "trajectory_id"
        traj[:] = netCDF4.stringtochar(np.array(["MB-07"], dtype="S8"))[0]
        _obs_variables(nc, table, ("time",), ((xname, xattrs, a), (yname, yattrs, b)))


@pytest.mark.parametrize("masked", [False, True], ids=["complete", "masked"])
@pytest.mark.parametrize("naming", ["standard", "degrees_named_xy", "axis_km"])
@pytest.mark.parametrize("by", ["netCDF4", "xarray"])
@pytest.mark.parametrize("layout", ["indexed_ragged", "single_trajectory"])
def test_round_trip_indexed_ragged_and_single(tmp_path, layout, by, naming, masked):
    metric = naming == "axis_km"
    table = _reference(common_times=False, metric=metric)
    if layout == "single_trajectory":
        table = table[table.track_id == "MB-07"].reset_index(drop=True)
        table["track"] = 0
    hidden = _masked_rows(table, masked) if layout == "indexed_ragged" else \
        np.isin(np.arange(len(table)), [2] if masked else [])
    writer = _write_indexed if layout == "indexed_ragged" else _write_single
    writer(tmp_path / "t.nc", table, naming, hidden, by=by)
    tracks, _ = _read(tmp_path / "t.nc")
    kept = table.loc[~hidden].sort_values(["track_id", "time"])
    assert tracks.track_id.tolist() == kept.track_id.tolist()
    np.testing.assert_array_equal(tracks.time_s, (kept.time.to_numpy() - EPOCH) / np.timedelta64(1, "s"))
    if metric:
        np.testing.assert_allclose(tracks.position_m, 1000.0 * kept[["a", "b"]].to_numpy(), rtol=1e-12, atol=0)
    else:                                                                 # pyproj inverse projection round trip
        lon, lat = tracks.frame.to_lonlat(tracks.position_m)
        np.testing.assert_allclose(np.column_stack([lon, lat]), kept[["a", "b"]].to_numpy(), rtol=1e-9, atol=0)
    np.testing.assert_array_equal(tracks.extra["temp_c"], kept.temp_c.to_numpy())
    assert {a.name: a.count for a in tracks.qc} == ({"masked_fixes": int(hidden.sum())} if masked else {})


def test_indexed_ragged_index_out_of_range_is_refused(tmp_path):
    table = _reference(common_times=False, metric=False)
    _write_indexed(tmp_path / "i.nc", table, "standard", _masked_rows(table, False), by="netCDF4")
    with netCDF4.Dataset(tmp_path / "i.nc", "a") as nc:
        nc["trajectory_index"][4] = 3
    with pytest.raises(TrackError) as info:
        read_tracks(tmp_path / "i.nc")
    assert str(info.value) == (f"{tmp_path / 'i.nc'}, observation index 4, column 'trajectory_index': the trajectory "
                               "index 3 is not one of the 3 trajectories (0…2)")


def test_masked_fix_message_names_the_observation_index(tmp_path):
    table = _reference(common_times=False, metric=False)
    hidden = _masked_rows(table, True)
    _write_netcdf4(tmp_path / "r.nc", table, "contiguous_ragged", "standard", hidden)
    _write_netcdf4(tmp_path / "m.nc", table, "incomplete_multidimensional", "standard", hidden)
    first = int(np.flatnonzero(hidden)[0])  # observation index along the ragged sample dimension
    assert first == 2
    _, caught = _read(tmp_path / "r.nc")
    message = next(str(w.message) for w in caught if "fill value" in str(w.message))
    assert "dropped 2 fixes" in message and f"first at observation index {first}" in message
    assert issubclass(next(w.category for w in caught if "fill value" in str(w.message)), TrackWarning)
    _, caught = _read(tmp_path / "m.nc")
    message = next(str(w.message) for w in caught if "fill value" in str(w.message))
    assert "first at trajectory index 0, observation index 2" in message


# ---------------------------------------------------------------- the issue's file and its axis-only sibling
def _issue_file(path, xattrs, yattrs):
    """The issue's contiguous ragged file: positions named x/y, 40 fixes of one drifter 10 min apart."""
    n = 40
    ds = xr.Dataset({"trajectory": ("trajectory", np.array(["D1"], dtype=object), {"cf_role": "trajectory_id"}),
                     "rowSize": ("trajectory", np.array([n], np.int32), {"sample_dimension": "obs"}),
                     "time": ("obs", np.arange(n) * 600.0, {"units": "seconds since 2024-06-03 00:00:00"}),
                     "x": ("obs", -4.15 + 0.0004 * np.arange(n), xattrs),
                     "y": ("obs", 50.31 + 0.0002 * np.arange(n), yattrs)},
                    attrs={"featureType": "trajectory"})
    ds.to_netcdf(path)


def test_issue_file_with_degree_units_is_read_as_lonlat(tmp_path):
    _issue_file(tmp_path / "d.nc", {"units": "degrees_east"}, {"units": "degrees_north"})
    tracks, caught = _read(tmp_path / "d.nc")
    assert tracks.frame.kind == "lonlat"
    span_km = np.ptp(tracks.position_m[:, 0]) / 1e3
    # 39 x 0.0004 deg of longitude at 50.31 N: 0.0156 deg x 111.32 km x cos(50.31 deg) = 1.11 km (spherical
    # estimate, common practice; the ellipsoidal value differs by < 0.5 %)
    assert span_km == pytest.approx(0.0156 * 111.32 * np.cos(np.radians(50.31)), rel=5e-3)
    assert not [w for w in caught if "span only" in str(w.message)]


@pytest.mark.parametrize("xattrs,words", [
    ({"axis": "X"}, ["variable 'x'", "by axis 'X'", "has no units", "metres or degrees"]),
    ({}, ["variable 'x'", "by its name", "has no units"]),
    ({"axis": "X", "units": "degrees"}, ["variable 'x'", "'degrees'", "rotated-pole"]),
    ({"units": "furlongs"}, ["variable 'x'", "'furlongs'", "neither a length"]),
    ({"standard_name": "longitude", "units": "m"}, ["variable 'x'", "standard_name 'longitude'", "'m'"]),
])
def test_positions_that_cannot_be_placed_are_refused_naming_the_variable(tmp_path, xattrs, words):
    yattrs = {k: v.replace("longitude", "latitude") for k, v in xattrs.items()} | (
        {"axis": "Y"} if "axis" in xattrs else {})
    _issue_file(tmp_path / "a.nc", xattrs, yattrs)
    with pytest.raises(TrackError) as info:
        read_tracks(tmp_path / "a.nc")
    message = str(info.value)
    assert all(w in message for w in words), message
    assert info.value.column == "x"


def test_pocean_default_output_without_units_is_refused(tmp_path):
    """pocean-core writes axis X/Y and no units unless told: degrees or metres cannot be told apart."""
    table = _reference(common_times=False, metric=False)
    frame = pd.DataFrame({"trajectory": table.track_id.astype(object), "time": table.time, "x": table.a,
                          "y": table.b, "z": 0.0})
    ContiguousRaggedTrajectory.from_dataframe(frame, str(tmp_path / "p.nc")).close()
    with pytest.raises(TrackError, match=r"variable 'x' \(x position by axis 'X'\) has no units"):
        read_tracks(tmp_path / "p.nc")


def test_longitude_without_latitude_is_refused(tmp_path):
    _issue_file(tmp_path / "h.nc", {"units": "degrees_east"}, {"units": "m"})
    with pytest.raises(TrackError, match="no pair of position variables.*'x' \\(longitude by units"):
        read_tracks(tmp_path / "h.nc")


# ---------------------------------------------------------------- errors name observations, not rows
def test_bad_value_is_reported_by_observation_index(tmp_path):
    table = _reference(common_times=False, metric=False)
    table.loc[5, "b"] = 95.0  # trajectory 0 has 6 fixes: observation index 5 is its last
    _write_netcdf4(tmp_path / "r.nc", table, "contiguous_ragged", "degrees_named_xy", _masked_rows(table, False))
    with pytest.raises(TrackError) as info:
        read_tracks(tmp_path / "r.nc")
    # the file's variable (y, a latitude by its units), not the table's column name
    assert str(info.value).startswith(f"{tmp_path / 'r.nc'}, observation index 5, column 'y': latitude 95")
    assert info.value.row is None


def test_duplicate_time_is_reported_by_trajectory_and_observation(tmp_path):
    table = _reference(common_times=False, metric=False)
    table.loc[9, "time"] = table.loc[8, "time"]  # trajectory 1, observations 2 and 3
    _write_netcdf4(tmp_path / "m.nc", table, "incomplete_multidimensional", "standard", _masked_rows(table, False))
    with pytest.raises(TrackError) as info:
        read_tracks(tmp_path / "m.nc")
    message = str(info.value)
    assert "(trajectory index 1, observation index 2 and trajectory index 1, observation index 3)" in message
    assert "row" not in message


# ---------------------------------------------------------------- units of time and the tiny-span warning
def test_time_in_plain_hours_is_scaled_to_seconds(tmp_path):
    _issue_file(tmp_path / "h.nc", {"units": "degrees_east"}, {"units": "degrees_north"})
    with xr.open_dataset(tmp_path / "h.nc", decode_times=False) as ds:
        ds = ds.load()
    ds["time"] = ("obs", np.arange(40) / 6.0, {"units": "hours"})  # 10-minute steps in hours, no epoch
    ds.to_netcdf(tmp_path / "p.nc")
    tracks, _ = _read(tmp_path / "p.nc")
    assert not tracks.time_is_absolute
    np.testing.assert_allclose(tracks.time_s, np.arange(40) * 600.0, rtol=1e-12, atol=1e-9)


def test_time_in_a_model_calendar_is_refused_naming_it(tmp_path):
    _issue_file(tmp_path / "c.nc", {"units": "degrees_east"}, {"units": "degrees_north"})
    with netCDF4.Dataset(tmp_path / "c.nc", "a") as nc:
        nc["time"].calendar = "360_day"
    with pytest.raises(TrackError, match="time variable 'time' .*calendar '360_day'.* standard \\(Gregorian\\)"):
        read_tracks(tmp_path / "c.nc")


def test_positions_read_as_metres_spanning_under_a_metre_warn(write_file):
    # degrees written into x/y metre columns: 0.0156 "m" over 6.5 h
    rows = "\n".join(f"D1,{600 * i},{-4.15 + 0.0004 * i:.4f},{50.31 + 0.0002 * i:.4f}" for i in range(40))
    path = write_file("deg_as_m.csv", "track_id,time_s,x,y\n" + rows + "\n")
    tracks, caught = _read(path)
    warned = [w for w in caught if "span only" in str(w.message)]
    assert len(warned) == 1 and issubclass(warned[0].category, TrackWarning)
    assert "0.0174 m over 23400 s" in str(warned[0].message)  # hypot(0.0156, 0.0078) = 0.01744 m
    assert [a.name for a in tracks.qc] == ["tiny_metre_span"]


def test_metre_positions_that_move_do_not_warn(write_file):
    rows = "\n".join(f"D1,{600 * i},{12.5 * i},{-3.0 * i}" for i in range(40))
    _, caught = _read(write_file("m.csv", "track_id,time_s,x,y\n" + rows + "\n"))
    assert not [w for w in caught if "span only" in str(w.message)]
