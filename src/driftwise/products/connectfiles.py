"""Connectivity products: NetCDF (CF-1.11 / ACDD-1.3), CSV and the JSON contract of ``driftwise connect``.

NetCDF: dimensions ``source``, ``destination`` (the same sites in the same order) and ``time``;
``probability (source, destination, time)``, its Monte Carlo standard error for the ensemble,
``first_passage_time (source, destination)`` (seconds since the release; missing: never),
``outside_support_share (source, time)``, site names as character labels and every site's vertices
(``site_vertex_x_m``/``_y_m`` over ``site, vertex``, padded with missing values).  ``time`` is a CF
time coordinate (``seconds since`` the release instant) when the model knows its time origin, else
the time axis is the coordinate variable ``forecast_period`` (seconds since the release) and names the
dimension instead of ``time`` (no calendar date is invented; CF checkers require a variable named ``time``
to be a calendar time); ``forecast_period`` is given in both cases.

CSV: one row per (source, destination, time): ``source, destination, time_s[, time_utc], probability[,
standard_error]``, a plain table; the JSON, the NetCDF (``caution`` attribute) and the figures carry
the caution text.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from typing import Any

import numpy as np

from ..data.utctime import cf_time_units, iso_utc
from ..errors import InputError
from ..files import CAUTION, atomic_write, atomic_write_text, csv_safe_text
from .cfproducts import crs_attributes, discovery_attributes

CONNECT_SUFFIXES = (".nc", ".csv", ".json")


def _times_utc(result) -> list[str] | None:
    if result.time_origin_utc is None:
        return None
    return iso_utc(result.time_origin_utc, result.start_time_s + np.asarray(result.times_s))


def connect_to_dict(result) -> dict[str, Any]:
    """The JSON contract: ``sites`` (names), ``times_s`` (since the release), ``probability``
    [source][destination][time], ``first_passage_s`` [source][destination] (None: never), ``threshold``,
    ``outside_support`` [source][time], ``method``, ``per_site``, ``start_time_s``, ``step_s`` (the step used, s),
    and ``times_utc`` / ``start_time_utc`` (ISO-8601) when the model knows its time origin, ``standard_error`` for the ensemble."""
    def floats(a):
        a = np.asarray(a, np.float64)
        return np.where(np.isfinite(a), a, None).tolist()

    out = {"sites": result.names, "times_s": floats(result.times_s), "probability": floats(result.probability),
           "first_passage_s": floats(result.first_passage_s), "threshold": result.threshold,
           "outside_support": None if result.outside_support is None else floats(result.outside_support),
           "method": result.method, "per_site": result.per_site, "start_time_s": result.start_time_s,
           "step_s": result.step_s,
           "site_area_m2": [s.area_m2 for s in result.sites],
           "units": {"times_s": "s since the release", "probability": "1 (share of the source's material)",
                     "first_passage_s": "s since the release", "step_s": "s"}}
    if result.standard_error is not None:
        out["standard_error"] = floats(result.standard_error)
    if result.time_origin_utc is not None:
        out["times_utc"] = _times_utc(result)
        out["start_time_utc"] = iso_utc(result.time_origin_utc, result.start_time_s)
    return out


def write_connect_csv(result, path) -> Path:
    """One row per source, destination and time (module doc)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    utc = _times_utc(result)
    se = result.standard_error
    writer.writerow(["source", "destination", "time_s"] + (["time_utc"] if utc else []) + ["probability"]
                    + (["standard_error"] if se is not None else []))
    for i, src in enumerate(result.names):
        for j, dst in enumerate(result.names):
            for t, time_s in enumerate(result.times_s):
                writer.writerow([csv_safe_text(src), csv_safe_text(dst), repr(float(time_s))]
                                + ([utc[t]] if utc else []) + [repr(float(result.probability[i, j, t]))]
                                + ([repr(float(se[i, j, t]))] if se is not None else []))
    return atomic_write_text(path, buffer.getvalue())


def _time_coordinate(result) -> dict[str, tuple]:
    period = ("time",), np.asarray(result.times_s, np.float64), {
        "standard_name": "forecast_period", "units": "s", "long_name": "time since the release",
        "coverage_content_type": "coordinate"}
    if result.time_origin_utc is None:   # no calendar date: the time axis is forecast_period (its own dimension)
        return {"forecast_period": (("forecast_period",),) + period[1:]}
    units = cf_time_units(result.time_origin_utc)
    return {"time": (("time",), result.start_time_s + np.asarray(result.times_s, np.float64), {
        "standard_name": "time", "units": units, "calendar": "standard", "axis": "T",
        "units_metadata": "leap_seconds: none", "long_name": "valid time", "coverage_content_type": "coordinate"}),
        "forecast_period": period}


def _site_variables(result) -> dict[str, tuple]:
    k = max(len(s.polygon_m) for s in result.sites)
    verts = np.full((len(result.sites), k, 2), np.nan)
    for i, s in enumerate(result.sites):
        verts[i, :len(s.polygon_m)] = s.polygon_m
    names = np.array(result.names, dtype=object)
    out = {"source_name": (("source",), names, {"long_name": "source site name"}),
           "destination_name": (("destination",), names, {"long_name": "destination site name"})}
    for axis, c in (("x", 0), ("y", 1)):
        out[f"site_vertex_{axis}_m"] = (("source", "vertex"), verts[..., c], {
            "units": "m", "long_name": f"site polygon vertex {axis}, model's local frame (row: site as source)",
            "coverage_content_type": "referenceInformation"})
    return out


def connect_dataset(result):
    """The connectivity as an xarray Dataset with CF-1.11 / ACDD-1.3 attributes (module doc)."""
    import xarray as xr

    data = {**_time_coordinate(result), **_site_variables(result)}
    time = "time" if result.time_origin_utc is not None else "forecast_period"
    data["probability"] = (("source", "destination", time), result.probability, {
        "units": "1", "long_name": "probability that material released uniformly in the source site is inside "
        "the destination site", "coverage_content_type": "modelResult", "coordinates": "source_name destination_name"})
    if result.standard_error is not None:
        data["probability_standard_error"] = (("source", "destination", time), result.standard_error, {
            "units": "1", "long_name": "Monte Carlo standard error of the probability",
            "coverage_content_type": "qualityInformation", "coordinates": "source_name destination_name"})
    data["first_passage_time"] = (("source", "destination"), result.first_passage_s, {
        "units": "s", "long_name": f"first time since the release at which the probability reaches "
        f"{result.threshold:g} (missing: not within the horizon)", "coverage_content_type": "modelResult",
        "coordinates": "source_name destination_name"})
    if result.outside_support is not None:
        data["outside_support_share"] = (("source", time), result.outside_support, {
            "units": "1", "long_name": "share of the source's releases whose mean lies outside the model's data "
            "support (posterior over prior velocity variance above 0.9)", "coverage_content_type": "qualityInformation",
            "coordinates": "source_name"})
    attrs = _attributes(result)
    if result.frame is not None and getattr(result.frame, "kind", "metric") == "lonlat":
        data["crs"] = ((), np.int32(0), crs_attributes(result.frame.to_dict()))
    dataset = xr.Dataset(data, attrs=attrs)
    for name in ("source_name", "destination_name"):
        dataset[name].encoding.update(dtype="S1", char_dim_name="name_strlen")
    for name, var in dataset.variables.items():
        if var.dtype.kind == "f":
            var.encoding["_FillValue"] = np.nan if np.isnan(var.values).any() else None
    return dataset


def _attributes(result) -> dict[str, Any]:
    lonlat = None
    if result.frame is not None and getattr(result.frame, "kind", "metric") == "lonlat":
        pts = np.concatenate([s.polygon_m for s in result.sites])
        lonlat = result.frame.to_lonlat(pts)
    utc = _times_utc(result)
    attrs = discovery_attributes(
        "driftwise connectivity between sites",
        f"Share of the material released uniformly in each of {len(result.sites)} sites that is inside each site "
        f"at times since the release, method {result.method} ({result.per_site} releases or particles per site), "
        "through a flow field fitted to drifter tracks.", "ocean currents, drifter, connectivity, dispersion",
        lonlat=lonlat, time_range=(utc[0], utc[-1]) if utc else None)
    attrs.update(method=result.method, releases_per_site=int(result.per_site),
                 probability_threshold=float(result.threshold), caution=CAUTION,
                 time_origin_utc=result.time_origin_utc or "unknown (the tracks had relative times)")
    return attrs


def write_connect_netcdf(result, path) -> Path:
    """Write :func:`connect_dataset` as NetCDF-4 (h5netcdf), atomically."""
    dataset = connect_dataset(result)
    return atomic_write(path, lambda tmp: dataset.to_netcdf(tmp, engine="h5netcdf"))


def write_connect(result, path) -> Path:
    """Write by suffix: ``.nc`` (CF NetCDF), ``.csv`` or ``.json`` (the JSON contract plus the caution)."""
    suffix = Path(path).suffix.lower()
    if suffix == ".nc":
        return write_connect_netcdf(result, path)
    if suffix == ".csv":
        return write_connect_csv(result, path)
    if suffix == ".json":
        return atomic_write_text(path, json.dumps({**connect_to_dict(result), "caution": CAUTION}, allow_nan=False))
    raise InputError(f"--out {path}: unknown format; use a name ending in {', '.join(CONNECT_SUFFIXES)}")
