"""NetCDF products as CF-1.11 / ACDD-1.3 datasets: the spread as a discrete-sampling-geometry
trajectory file, and the global attributes every product shares.

When the model knows its time origin, the spread file is a CF "trajectory" feature collection in
the multidimensional array representation (CF-1.11 §9.3.1 and appendix H.4.1): one trajectory per
release (dimension ``trajectory``), the output times along ``obs``.  A discrete sampling geometry
needs a CF time coordinate, so without a time origin the same variables form a plain CF file (no
``featureType``) and no calendar date is invented.  Each release's name is the ``cf_role =
trajectory_id`` character variable ``release_name`` (a label, not a coordinate variable).  The
mean path is ``lon``/``lat`` (a lon/lat model) and always ``x_m``/``y_m`` in the model's local
frame; ``time`` is CF time (``seconds since <origin>``) when the model knows its time origin, and
``forecast_period`` (seconds since the release) is given in every case.  Quantities the CF
standard-name table does not define carry a ``long_name`` only.

Global attributes follow the ACDD 1.3 discovery set (title, summary, keywords, geospatial and
time coverage, creator, license, date_created, history); ``license`` is a placeholder the user
replaces (``DEFAULT_LICENSE``).
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from typing import Any

import numpy as np

from ..data.utctime import cf_time_units, iso_utc
from ..version import __version__

# CF-1.11 (the newest the IOOS compliance-checker tests) and CF-1.8 (the newest cfchecker 4.1 knows):
# the files use nothing that the two versions treat differently except the optional units_metadata.
CONVENTIONS = "CF-1.11, CF-1.8, ACDD-1.3"
DEFAULT_LICENSE = "not set: replace with the licence under which you share this file"
RESEARCH_CAUTION = "Caution: a research product; validate locally and defer to the responsible authorities."
_NAME_CHARS = "name_strlen"


def discovery_attributes(title: str, summary: str, keywords: str, *, lonlat: tuple | None = None,
                         time_range: tuple[str, str] | None = None) -> dict[str, Any]:
    """CF/ACDD-1.3 global attributes: Conventions, title, summary, keywords, creator, license,
    date_created and history (now, UTC), and for ``lonlat = (lon (...), lat (...))`` degrees and
    ``time_range = (start ISO, end ISO)`` the geospatial and time coverage."""
    now = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    attrs = {"Conventions": CONVENTIONS, "title": title, "summary": summary, "keywords": keywords,
             "source": f"driftwise {__version__}", "creator_name": "driftwise user (set creator_name)",
             "creator_type": "person", "institution": "not set", "license": DEFAULT_LICENSE,
             "date_created": now, "history": f"{now} created by driftwise {__version__}",
             "product_version": __version__, "processing_level": "model output (research)",
             "comment": RESEARCH_CAUTION}
    if lonlat is not None:
        lon, lat = (np.asarray(v, np.float64) for v in lonlat)
        attrs.update(geospatial_lon_min=float(np.nanmin(lon)), geospatial_lon_max=float(np.nanmax(lon)),
                     geospatial_lat_min=float(np.nanmin(lat)), geospatial_lat_max=float(np.nanmax(lat)),
                     geospatial_lon_units="degrees_east", geospatial_lat_units="degrees_north")
    if time_range is not None:
        attrs.update(time_coverage_start=time_range[0], time_coverage_end=time_range[1])
    return attrs


def crs_attributes(frame: dict) -> dict[str, Any]:
    """CF grid mapping of the local frame: azimuthal equidistant on WGS 84 (CF-1.11 appendix F)."""
    return {"grid_mapping_name": "azimuthal_equidistant", "longitude_of_projection_origin": frame["lon0_deg"],
            "latitude_of_projection_origin": frame["lat0_deg"], "false_easting": 0.0, "false_northing": 0.0,
            "semi_major_axis": 6378137.0, "inverse_flattening": 298.257223563,
            "long_name": "the model's local metric frame", "proj4_text": frame.get("proj", "")}


def _var(dims: tuple, values: Any, units: str | None, long_name: str, **extra) -> tuple:
    attrs = {"long_name": long_name, **({} if units is None else {"units": units}),
             "coverage_content_type": "modelResult", **extra}
    return dims, np.asarray(values), attrs


def _position_variables(spread, coords: str) -> dict[str, tuple]:
    """Mean positions (trajectory, obs): x_m, y_m[, z_m] local metres; lon, lat degrees for a lon/lat model."""
    out = {}
    for i, axis in enumerate("xyz"[: spread.dim]):
        out[f"{axis}_m"] = _var(("trajectory", "obs"), spread.means[..., i], "m",
                                f"mean {axis} position in the model's local frame"
                                + (" (x east, y north)" if i < 2 else ""), coordinates=coords)
        if i < 2 and spread.mean_lonlat is not None:   # coordinates of the crs grid mapping (CF-1.11 §5.6)
            out[f"{axis}_m"][2].update(standard_name=f"projection_{axis}_coordinate", grid_mapping="crs")
    if spread.mean_lonlat is not None:
        out["lon"] = (("trajectory", "obs"), spread.mean_lonlat[..., 0], {
            "standard_name": "longitude", "units": "degrees_east", "long_name": "longitude of the mean position",
            "axis": "X", "coverage_content_type": "coordinate"})
        out["lat"] = (("trajectory", "obs"), spread.mean_lonlat[..., 1], {
            "standard_name": "latitude", "units": "degrees_north", "long_name": "latitude of the mean position",
            "axis": "Y", "coverage_content_type": "coordinate"})
    return out


def _covariance_variables(spread, coords: str) -> dict[str, tuple]:
    axes = "xyz"[: spread.dim]
    return {f"cov_{axes[i]}{axes[j]}_m2": _var(("trajectory", "obs"), spread.covs[..., i, j], "m2",
                                               f"position covariance {axes[i]}{axes[j]} in the local frame",
                                               coordinates=coords)
            for i in range(spread.dim) for j in range(i, spread.dim)}


def _ellipse_variables(spread, coords: str) -> dict[str, tuple]:
    out = {}
    for i, level in enumerate(spread.levels):
        pct = f"{100 * level:g}"
        for k, which in enumerate(("major", "minor")):
            out[f"semi_{which}_{pct}_m"] = _var(("trajectory", "obs"), spread.semi_axes_m[:, :, i, k], "m",
                                                f"semi-{which} axis of the {pct} % horizontal probability ellipse",
                                                coordinates=coords)
    out["bearing_deg"] = _var(("trajectory", "obs"), spread.bearing_deg, "degree",
                              "compass bearing of the ellipses' major axis, clockwise from north, in [0, 180)",
                              coordinates=coords)
    out["angle_ccw_from_east_deg"] = _var(("trajectory", "obs"), spread.orientation_deg, "degree",
                                          "major-axis angle counter-clockwise from local +x (east), in (-90, 90]",
                                          coordinates=coords)
    return out


def _time_variables(spread) -> tuple[dict[str, tuple], str]:
    """(variables, the ``coordinates`` list of the data variables): CF time when the origin is known."""
    period = {"forecast_period": (("obs",), np.asarray(spread.times_s, np.float64), {
        "standard_name": "forecast_period", "units": "s", "long_name": "time since the release",
        "coverage_content_type": "coordinate"})}
    starts = np.array([r.start_time_s for r in spread.releases], np.float64)
    if spread.time_origin_utc is None:
        period["start_time_s"] = _var(("trajectory",), starts, "s", "release time on the model's time axis "
                                      "(the tracks had no absolute times, so it has no calendar date)")
        return period, "forecast_period"
    units = cf_time_units(spread.time_origin_utc)
    period["time"] = (("trajectory", "obs"), starts[:, None] + np.asarray(spread.times_s)[None, :], {
        "standard_name": "time", "units": units, "calendar": "standard", "axis": "T",
        "units_metadata": "leap_seconds: none",
        "long_name": "forecast valid time", "coverage_content_type": "coordinate"})
    period["start_time"] = (("trajectory",), starts, {"units": units, "units_metadata": "leap_seconds: none",
                                                      "long_name": "release time",
                                                      "coverage_content_type": "auxiliaryInformation"})
    return period, "time forecast_period"


def _polygon_variables(spread, coords: str) -> dict[str, tuple]:
    if spread.probability is None:
        return {}
    out = {"probability_inside": _var(("trajectory", "obs"), spread.probability, "1",
                                      "probability of being inside the polygon", coordinates=coords),
           "polygon_x_m": _var(("vertex",), spread.polygon_m[:, 0], "m", "polygon vertex x, local frame"),
           "polygon_y_m": _var(("vertex",), spread.polygon_m[:, 1], "m", "polygon vertex y, local frame")}
    if spread.first_arrival_s is not None:
        arrival = np.array([np.nan if a is None else a for a in spread.first_arrival_s], np.float64)
        out["first_arrival_s"] = _var(("trajectory",), arrival, "s", "first time since the release at which "
                                      f"the probability inside the polygon reaches {spread.threshold:g} "
                                      "(missing: never)", coordinates="release_name")
    return out


def _support_variables(spread, coords: str) -> dict[str, tuple]:
    """outside_support (a flag, CF-1.11 §3.5), variance_ratio and distance_to_data_m along the mean paths."""
    if spread.support is None:
        return {}
    flag = _var(("trajectory", "obs"), spread.support.outside_support.astype("int8"), None,
                "1 from the first output time at which the mean position lies outside the model's data support "
                "(posterior over prior velocity variance above 0.9): from there on the forecast rests partly on "
                "the prior", coordinates=coords, flag_values=np.array([0, 1], dtype="int8"),
                flag_meanings="inside_support outside_support")
    flag[2]["coverage_content_type"] = "qualityInformation"
    return {"outside_support": flag,
            "variance_ratio": _var(("trajectory", "obs"), spread.support.variance_ratio, "1",
                                   "posterior over prior velocity variance of the stationary part at the mean "
                                   "position (1: the data taught nothing there)", coordinates=coords),
            "distance_to_data_m": _var(("trajectory", "obs"), spread.support.distance_to_data_m, "m",
                                       "distance from the mean position to the nearest fitted observation",
                                       coordinates=coords)}


def spread_dataset(spread):
    """The Spread as an xarray Dataset: a CF-1.11 trajectory DSG file (see the module doc)."""
    import xarray as xr

    lonlat = spread.mean_lonlat is not None
    data, time_coords = _time_variables(spread)
    coords = time_coords + (" lat lon" if lonlat else "")
    names = np.array([r.name for r in spread.releases], dtype=object)
    data["release_name"] = (("trajectory",), names, {"long_name": "release name"})
    if spread.time_origin_utc is not None:   # the trajectory identifier of the DSG file (CF-1.11 §9.5)
        data["release_name"][2]["cf_role"] = "trajectory_id"
    for part in (_position_variables, _covariance_variables, _ellipse_variables, _polygon_variables,
                 _support_variables):
        data.update(part(spread, coords))
    if lonlat:
        data["crs"] = ((), np.int32(0), crs_attributes(spread.frame.to_dict()))
    dataset = xr.Dataset(data, attrs=_spread_attributes(spread))
    dataset["release_name"].encoding.update(dtype="S1", char_dim_name=_NAME_CHARS)
    for name, var in dataset.variables.items():
        if var.dtype.kind == "f":
            fill = name not in ("time", "forecast_period", "lon", "lat", "start_time") and np.isnan(var.values).any()
            var.encoding["_FillValue"] = np.nan if fill else None
    return dataset


def _spread_attributes(spread) -> dict[str, Any]:
    lonlat = None if spread.mean_lonlat is None else (spread.mean_lonlat[..., 0], spread.mean_lonlat[..., 1])
    time_range = None
    if spread.time_origin_utc is not None:
        starts = np.array([r.start_time_s for r in spread.releases])
        time_range = (iso_utc(spread.time_origin_utc, starts.min()),
                      iso_utc(spread.time_origin_utc, starts.max() + spread.times_s[-1]))
    attrs = discovery_attributes(
        "driftwise spread forecast",
        f"Forecast of {len(spread.releases)} release(s) through a flow field fitted to drifter tracks "
        f"(Gaussian moment matching, method {spread.method}): mean path, position covariance and the "
        f"{', '.join(f'{100 * lv:g}' for lv in spread.levels)} % ellipses at times since each release.",
        "ocean currents, drifter, trajectory forecast, dispersion, uncertainty", lonlat=lonlat, time_range=time_range)
    if spread.time_origin_utc is not None:   # a CF trajectory needs a CF time coordinate (CF-1.11 §9.1)
        attrs.update(featureType="trajectory", cdm_data_type="Trajectory")
    attrs.update(method=spread.method,
                 frame=json.dumps(spread.frame.to_dict()) if spread.frame is not None else "",
                 time_origin_utc=spread.time_origin_utc or "unknown (the tracks had relative times)",
                 time_coverage_duration=f"PT{float(spread.times_s[-1]):g}S")
    if spread.threshold is not None:
        attrs["probability_threshold"] = float(spread.threshold)
    return attrs
