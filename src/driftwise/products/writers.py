"""Product writers: spread forecasts (JSON, CSV, NetCDF, GeoJSON) and gridded fields (NetCDF, CSV).

Every writer goes through :func:`atomic_write`: the bytes land in a temporary
file in the destination folder, are flushed to disk, and replace the target by
``os.replace`` — a reader never sees a half-written file and an interrupted
write never destroys the previous version.
"""

from __future__ import annotations

import csv
import io as _io
import json
from pathlib import Path
from typing import Any

import numpy as np

from ..data.utctime import iso_utc
from ..diagnostics.skill import SCORE_KEYS
from ..errors import InputError
from ..files import (
    atomic_write,
    atomic_write_text,
    csv_safe_text,  # a leading = + - @ in a text cell gets a ' (formula injection)
)
from ..units import format_duration, format_length
from .cfproducts import RESEARCH_CAUTION, crs_attributes, discovery_attributes, spread_dataset
from .spreadgeojson import spread_geojson

# ---------------------------------------------------------------- spread products (spread.py)
SPREAD_SUFFIXES = (".json", ".csv", ".nc", ".geojson")


def _floats(array) -> list:
    """Nested lists of floats with NaN/inf as None (JSON has no NaN)."""
    values = np.asarray(array, dtype=np.float64)
    return np.where(np.isfinite(values), values, None).tolist() if values.ndim else (
        float(values) if np.isfinite(values) else None)


def spread_to_dict(spread) -> dict:
    """The JSON contract of a Spread: ``method``, ``time_origin_utc`` (ISO-8601 of the model's time zero, or
    None), ``releases`` (each ``name``, ``start`` (d,) m, ``start_time_s``, ``times_s`` (T,) since the release,
    ``mean`` (T, d) m, ``covariance`` (T, d, d) m², ``ellipses`` per level with ``bearing_deg`` (clockwise
    from north) and ``angle_ccw_from_east_deg``, ``start_time_utc``/``times_utc`` when the time origin is
    known, ``mean_lonlat``/``start_lonlat`` for a lon/lat model, ``probability_inside`` and
    ``first_arrival_s`` with a polygon)."""
    releases = [_release_dict(spread, r) for r in range(len(spread.releases))]
    out = {"method": spread.method, "dimension": spread.dim,
           "frame": spread.frame.to_dict() if spread.frame is not None else None,
           "time_origin_utc": spread.time_origin_utc,
           "units": {"times_s": "s since the release", "mean": "m (local frame)", "covariance": "m2",
                     "mean_lonlat": "degrees (lon, lat, WGS84)", "times_utc": "ISO-8601 UTC",
                     "bearing_deg": "degrees clockwise from north (true north for a lon/lat model, else local +y), "
                                    "in [0, 180): the major axis has no sense",
                     "angle_ccw_from_east_deg": "degrees counter-clockwise from local +x (east), in (-90, 90]",
                     "outside_support": "true from the first output time at which the mean lies outside the data "
                                        "support (variance_ratio > 0.9): from there on the forecast rests partly "
                                        "on the prior",
                     "variance_ratio": "posterior over prior velocity variance at the mean (1: no data there)",
                     "distance_to_data_m": "m from the mean to the nearest fitted observation"},
           "releases": releases}
    if spread.polygon_m is not None:
        out["polygon_m"] = _floats(spread.polygon_m)
        out["threshold"] = spread.threshold
    if spread.mean_se_m is not None:
        out["particles"] = spread.particles
        out["units"] |= {"mean_se_m": "m, Monte Carlo standard error of the mean", "covariance_se_m2":
                         "m2, Monte Carlo standard error of each covariance entry (fourth sample moment)"}
    return out


def monte_carlo_error(spread, r: int) -> dict[str, float] | None:
    """The ensemble's Monte Carlo error of release ``r`` at the last output time, or None for a moment method:
    ``mean_se_m`` the largest standard error of a mean coordinate (m) and ``variance_relative_se`` the largest
    standard error of a variance relative to the variance (SE of var / var; a semi-axis, ∝ √var, has half)."""
    if spread.mean_se_m is None:
        return None
    var = np.diagonal(spread.covs[r, -1])
    var_se = np.diagonal(spread.cov_se_m2[r, -1])
    relative = np.where(var > 0, var_se / np.where(var > 0, var, 1.0), np.nan)
    return {"mean_se_m": float(np.max(spread.mean_se_m[r, -1])),
            "variance_relative_se": float(np.nanmax(relative)) if np.any(var > 0) else None}


def _release_dict(spread, r: int) -> dict:
    rel = spread.releases[r]
    entry = {"name": rel.name, "start": _floats(rel.start_m), "start_time_s": rel.start_time_s,
             "times_s": _floats(spread.times_s), "mean": _floats(spread.means[r]), "covariance": _floats(spread.covs[r])}
    if spread.time_origin_utc is not None:
        entry["start_time_utc"], entry["times_utc"] = spread.start_times_utc[r], spread.times_utc(r)
    if spread.mean_lonlat is not None:
        entry["start_lonlat"] = _floats(spread.mean_lonlat[r, 0])
        entry["mean_lonlat"] = _floats(spread.mean_lonlat[r])
    bearing, angle = _floats(spread.bearing_deg[r]), _floats(spread.orientation_deg[r])
    entry["ellipses"] = [{"level": level, "semi_major_m": _floats(spread.semi_axes_m[r, :, i, 0]),
                          "semi_minor_m": _floats(spread.semi_axes_m[r, :, i, 1]),
                          "bearing_deg": bearing, "angle_ccw_from_east_deg": angle}
                         for i, level in enumerate(spread.levels)]
    if spread.mean_se_m is not None:
        entry["mean_se_m"], entry["covariance_se_m2"] = _floats(spread.mean_se_m[r]), _floats(spread.cov_se_m2[r])
        entry["monte_carlo_error_at_end"] = monte_carlo_error(spread, r)
    if spread.probability is not None:
        entry["probability_inside"] = _floats(spread.probability[r])
    if spread.support is not None:
        entry["outside_support"] = [bool(v) for v in spread.support.outside_support[r]]
        entry["variance_ratio"] = _floats(spread.support.variance_ratio[r])
        entry["distance_to_data_m"] = _floats(spread.support.distance_to_data_m[r])
    if spread.first_arrival_s is not None:
        arrival = spread.first_arrival_s[r]
        entry["first_arrival_s"] = arrival
        if spread.time_origin_utc is not None:
            entry["first_arrival_utc"] = None if arrival is None else iso_utc(spread.time_origin_utc,
                                                                              rel.start_time_s + arrival)
    return entry


def write_spread_json(spread, path) -> Path:
    """Write :func:`spread_to_dict` as one JSON object (atomically)."""
    return atomic_write_text(path, json.dumps(spread_to_dict(spread), allow_nan=False, indent=1) + "\n")


def _spread_rows(spread):

    axes_names = "xyz"[: spread.dim]
    pairs = [(i, j) for i in range(spread.dim) for j in range(i, spread.dim)]
    absolute = spread.time_origin_utc is not None
    header = ["release", "start_time_s", "time_s"] + (["start_time_utc", "time_utc"] if absolute else [])
    header += [f"{a}_m" for a in axes_names] + [f"cov_{axes_names[i]}{axes_names[j]}_m2" for i, j in pairs]
    header += ["semi_major_50_m", "semi_minor_50_m", "semi_major_95_m", "semi_minor_95_m", "bearing_deg",
               "angle_ccw_from_east_deg"]
    header += ["lon_deg", "lat_deg"] if spread.mean_lonlat is not None else []
    header += ["probability_inside"] if spread.probability is not None else []
    header += ["outside_support", "variance_ratio", "distance_to_data_m"] if spread.support is not None else []
    i50, i95 = spread.levels.index(0.5), spread.levels.index(0.95)
    bearing = spread.bearing_deg
    yield header
    for r, rel in enumerate(spread.releases):
        stamps = spread.times_utc(r) if absolute else None
        for t, time_s in enumerate(spread.times_s):
            row = [csv_safe_text(rel.name), rel.start_time_s, float(time_s)]
            row += [spread.start_times_utc[r], stamps[t]] if absolute else []
            row += list(spread.means[r, t]) + [spread.covs[r, t, i, j] for i, j in pairs]
            row += list(spread.semi_axes_m[r, t, i50]) + list(spread.semi_axes_m[r, t, i95])
            row += [bearing[r, t], spread.orientation_deg[r, t]]
            row += list(spread.mean_lonlat[r, t]) if spread.mean_lonlat is not None else []
            row += [spread.probability[r, t]] if spread.probability is not None else []
            if spread.support is not None:
                row += [str(int(spread.support.outside_support[r, t])), spread.support.variance_ratio[r, t],
                        spread.support.distance_to_data_m[r, t]]
            yield [cell if isinstance(cell, str) else repr(float(cell)) for cell in row]


def write_spread_csv(spread, path) -> Path:
    """One row per release and output time: release, start_time_s, time_s[, start_time_utc, time_utc (ISO-8601,
    when the model knows its time origin)], x_m, y_m[, z_m], the upper covariance entries (m²), semi-axes of the
    50 % and 95 % ellipses (m), bearing_deg (clockwise from north) and angle_ccw_from_east_deg, lon/lat when known,
    and for a forecast from a fitted field outside_support (0/1), variance_ratio and distance_to_data_m."""
    buffer = _io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerows(_spread_rows(spread))
    return atomic_write_text(path, buffer.getvalue())


def write_spread_netcdf(spread, path) -> Path:
    """Write :func:`cfproducts.spread_dataset` (a CF trajectory file) as NetCDF-4 (h5netcdf engine), atomically."""
    dataset = spread_dataset(spread)
    return atomic_write(path, lambda tmp: dataset.to_netcdf(tmp, engine="h5netcdf"))


def write_spread_geojson(spread, path) -> Path:
    """Write :func:`spread_geojson` (ellipse polygons at each level and mean paths), atomically."""
    return atomic_write_text(path, json.dumps(spread_geojson(spread), allow_nan=False) + "\n")


def write_spread(spread, path) -> Path:
    """Write a Spread as JSON, CSV, NetCDF or GeoJSON chosen by the suffix of ``path``."""
    writers = {".json": write_spread_json, ".csv": write_spread_csv, ".nc": write_spread_netcdf,
               ".geojson": write_spread_geojson}
    suffix = Path(path).suffix.lower()
    if suffix not in writers:
        raise InputError(f"{path}: unknown output format {suffix!r}; use one of {', '.join(SPREAD_SUFFIXES)}")
    return writers[suffix](spread, path)


# ---------------------------------------------------------------- gridded field (physics.py, `driftwise map`)
FIELD_GRID_SUFFIXES = (".nc", ".csv")
SUPPORT_MEANING = "unsupported supported"
_GEO_NAMES = {  # CF standard names, checked against the table bundled with compliance-checker (v93); the
    # table has no divergence of sea-water velocity, so divergence carries a long_name only
    "eastward": "eastward_sea_water_velocity", "northward": "northward_sea_water_velocity",
    "vorticity": "ocean_relative_vorticity"}


def grid_variables(grid) -> list[tuple[str, object, dict]]:
    """(name, (n_y, n_x) array, CF attributes) of every gridded quantity, in output order."""
    geo = grid.lon_deg is not None
    out = []
    for c, comp in enumerate(grid.components):
        what = "true-east" if comp == "eastward" else "true-north" if comp == "northward" else f"local-frame {comp}"
        for kind, values in (("", grid.mean_m_s[..., c]), ("_std", grid.std_m_s[..., c])):
            attrs = {"units": "m s-1", "long_name": f"posterior {'standard deviation' if kind else 'mean'} of the "
                                                     f"{what} velocity component", "coverage_content_type": "modelResult"}
            if geo:
                attrs["standard_name"] = _GEO_NAMES[comp] + (" standard_error" if kind else "")
            out.append((f"{comp}_velocity{kind}_m_s", values, attrs))
    for quantity, mean, std, text in (("divergence", grid.divergence_s, grid.divergence_std_s, "divergence ∇·u"),
                                      ("vorticity", grid.vorticity_s, grid.vorticity_std_s,
                                       "relative vorticity ∂v/∂x − ∂u/∂y")):
        for kind, values in (("", mean), ("_std", std)):
            attrs = {"units": "s-1", "long_name": f"posterior {'standard deviation' if kind else 'mean'} of the {text}",
                     "coverage_content_type": "modelResult"}
            if geo and quantity in _GEO_NAMES:
                attrs["standard_name"] = _GEO_NAMES[quantity] + (" standard_error" if kind else "")
            if quantity in grid.reasons:
                attrs["comment"] = "identically zero: " + grid.reasons[quantity]
            out.append((f"{quantity}{kind}_per_s", values, attrs))
    out.append(("variance_ratio", grid.variance_ratio, {
        "units": "1", "long_name": "posterior over prior velocity variance of the stationary part, tr(posterior cov)/tr(prior cov)",
        "coverage_content_type": "qualityInformation"}))
    out.append(("supported", grid.supported.astype("int8"), {
        "long_name": "data support: 1 where the posterior velocity variance is below half the prior variance",
        "flag_values": np.array([0, 1], dtype="int8"), "flag_meanings": SUPPORT_MEANING,
        "coverage_content_type": "qualityInformation"}))
    if grid.distance_to_data_m is not None:
        out.append(("distance_to_data_m", grid.distance_to_data_m, {
            "units": "m", "long_name": "distance from the node to the nearest fitted observation",
            "coverage_content_type": "qualityInformation"}))
    return out


def field_grid_dataset(grid):
    """A physics.FieldGrid as an xarray Dataset with CF-1.11 and ACDD-1.3 attributes (dims y_m, x_m).

    Coordinates x_m, y_m (projection_x/y_coordinate, m, increasing, no _FillValue); for a lon/lat
    model also 2-D auxiliary lon_deg, lat_deg (named in each variable's ``coordinates`` attribute)
    and a ``crs`` grid mapping (azimuthal_equidistant on WGS 84; CF-1.11 appendix F).
    """
    import xarray as xr

    dims = ("y_m", "x_m")           # coordinate variables named as their dimensions (CF-1.11 §1.3)
    coords = {axis: (axis, np.asarray(getattr(grid, axis), float), {
                  "standard_name": f"projection_{axis[0]}_coordinate", "units": "m", "axis": axis[0].upper(),
                  "long_name": f"{axis[0]} ({'east' if axis[0] == 'x' else 'north'}) in the model's local metric frame",
                  "coverage_content_type": "coordinate"}) for axis in ("x_m", "y_m")}
    data = {name: (dims, np.asarray(values), attrs) for name, values, attrs in grid_variables(grid)}
    frame = grid.frame.to_dict() if hasattr(grid.frame, "to_dict") else dict(grid.frame or {})
    geo = grid.lon_deg is not None
    if geo:
        for name, values, axis in (("lon_deg", grid.lon_deg, "longitude"), ("lat_deg", grid.lat_deg, "latitude")):
            coords[name] = (dims, values, {"standard_name": axis, "units": f"degrees_{'east' if name[1] == 'o' else 'north'}",
                                           "long_name": f"{axis} (WGS 84)", "coverage_content_type": "coordinate"})
        data["crs"] = ((), np.int32(0), crs_attributes(frame))
        for name, _, attrs in grid_variables(grid):
            data[name][2]["grid_mapping"] = "crs"
    attrs = discovery_attributes(
        "driftwise gridded flow field",
        "Posterior of a Gaussian-process fit to drifter tracks on a regular grid: mean velocity and its standard "
        "deviation, divergence and relative vorticity with their standard deviations (exact GP derivatives), "
        "and a data-support mask.", "ocean currents, drifter, surface velocity, divergence, vorticity, uncertainty",
        lonlat=(grid.lon_deg, grid.lat_deg) if geo else None)
    attrs.update(kernel_family=grid.kernel_family, frame=json.dumps(frame, sort_keys=True),
                 grid_spacing_m=float(grid.x_m[1] - grid.x_m[0]) if len(grid.x_m) > 1 else 0.0,
                 comment="Posterior of a Gaussian-process fit to drifter tracks; derivatives are exact for the GP. "
                         + RESEARCH_CAUTION)
    dataset = xr.Dataset(data, coords=coords, attrs=attrs)
    for name in ("x_m", "y_m", "lon_deg", "lat_deg"):
        if name in dataset.variables:
            dataset[name].encoding["_FillValue"] = None        # no _FillValue on coordinates (CF-1.11 §2.5.1)
    if geo:   # name only the auxiliary coordinates (CF-1.11 §5)
        for name, _, _ in grid_variables(grid):
            dataset[name].encoding["coordinates"] = "lon_deg lat_deg"
    return dataset


def write_field_grid_netcdf(grid, path) -> Path:
    """Write :func:`field_grid_dataset` as NetCDF-4 (h5netcdf engine), atomically."""
    dataset = field_grid_dataset(grid)
    return atomic_write(path, lambda tmp: dataset.to_netcdf(tmp, engine="h5netcdf"))


def write_field_grid_csv(grid, path) -> Path:
    """One row per grid node: x_m, y_m[, lon_deg, lat_deg], then the NetCDF variables' columns."""
    gx, gy = np.meshgrid(np.asarray(grid.x_m, float), np.asarray(grid.y_m, float))
    columns = [("x_m", gx), ("y_m", gy)]
    if grid.lon_deg is not None:
        columns += [("lon_deg", grid.lon_deg), ("lat_deg", grid.lat_deg)]
    columns += [(name, values) for name, values, _ in grid_variables(grid)]
    buffer = _io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([name for name, _ in columns])
    flat = [np.asarray(values).ravel() for _, values in columns]
    for row in zip(*flat):
        writer.writerow([str(int(v)) if isinstance(v, np.integer) else repr(float(v)) for v in row])
    return atomic_write_text(path, buffer.getvalue())


def write_field_grid(grid, path) -> Path:
    """Write a physics.FieldGrid as NetCDF (``.nc``) or CSV (``.csv``), chosen by the suffix of ``path``."""
    writers = {".nc": write_field_grid_netcdf, ".csv": write_field_grid_csv}
    suffix = Path(path).suffix.lower()
    if suffix not in writers:
        raise InputError(f"{path}: unknown gridded-field format {suffix!r}; use one of {', '.join(FIELD_GRID_SUFFIXES)}")
    return writers[suffix](grid, path)


# ---------------------------------------------------------------- forecast scores (driftwise score)
_LABELS = {"driftwise": "driftwise", "persistence": "persistence", "no_motion": "no motion"}


def _rows(result: dict[str, Any]):
    """(forecast name, horizon index, scores) for driftwise and each baseline."""
    sources = {"driftwise": result, **result["baselines"]}
    for k, _ in enumerate(result["horizons_s"]):
        for name, scores in sources.items():
            yield name, k, scores


def _fmt(value: float, spec: str) -> str:
    return "—" if value is None or not np.isfinite(value) else format(value, spec)


def _length_cell(value_m: float | None) -> str:
    """A separation in the unit that fits its size ('12.3 km', '4.1 mm'), '—' when undefined."""
    return "—" if value_m is None or not np.isfinite(value_m) else format_length(value_m)


def _coverage_cell(scores: dict[str, Any], key: str, k: int) -> str:
    """'0.814 ± 0.056' (13 characters), or the value alone when the standard error is undefined."""
    se = scores[f"{key}_se"][k]
    if se is None or not np.isfinite(se):
        return f"{_fmt(scores[key][k], '7.3f'):>13}"
    return f"{_fmt(scores[key][k], '5.3f')} ± {se:5.3f}"


def format_score_table(result: dict[str, Any]) -> str:
    """The readable table the command line prints: one block per horizon, one row per forecast."""
    head = (f"{'horizon':>8}  {'forecast':<12}{'pairs':>6}  {'sep median':>11}  {'sep p90':>9}  "
            f"{'skill':>6}  {'cov 50%':>13}  {'cov 95%':>13}  {'log score':>9}")
    lines = [head, "-" * len(head)]
    for name, k, s in _rows(result):
        label = format_duration(result["horizons_s"][k]) if name == "driftwise" else ""
        lines.append(
            f"{label:>8}  {_LABELS[name]:<12}{s['n_pairs'][k]:>6d}  {_length_cell(s['separation_m'][k]):>11}  "
            f"{_length_cell(s['separation_p90_m'][k]):>9}  {_fmt(s['skill'][k], '6.3f')}  "
            f"{_coverage_cell(s, 'coverage_50', k)}  {_coverage_cell(s, 'coverage_95', k)}  "
            f"{_fmt(s['log_score'][k], '9.2f')}")
    lines.append("sep: distance between forecast and observed position; skill: Liu & Weisberg (2011), 1 = perfect, "
                 "0 = no skill; cov: fraction of observed positions inside the forecast's 50 %/95 % ellipse "
                 "(ideal 0.50/0.95), ± its standard error with the starts clustered by track; "
                 "log score: mean Gaussian log density of the observed position per m², nats (higher is better).")
    lines.extend(result.get("notes", []))
    outside = result.get("outside_support_fraction") or []
    if any(share and share > 0 for share in outside):
        lines.append("outside the data support (the forecast extrapolates the prior): " + ", ".join(
            f"{100 * share:.0f} % of the forecasts at {format_duration(h)}"
            for h, share in zip(result["horizons_s"], outside)))
    return "\n".join(lines)


CSV_COLUMNS = ("forecast", "horizon_s", "n_pairs", "separation_median_m", "separation_p90_m", "skill",
               "coverage_50", "coverage_95", "log_score_nats", "coverage_50_se", "coverage_95_se")


def write_score_csv(result: dict[str, Any], path) -> None:
    """One row per (forecast, horizon); empty cells where a score is undefined.  Atomic write."""
    lines = [",".join(CSV_COLUMNS)]
    for name, k, s in _rows(result):
        cells = [name, repr(float(result["horizons_s"][k]))]
        for key in SCORE_KEYS:
            value = s[key][k]
            cells.append("" if value is None or not np.isfinite(value) else repr(value))
        lines.append(",".join(cells))
    atomic_write_text(path, "\n".join(lines) + "\n")
