"""Back-tracking products: highest-probability regions as polygons, GeoJSON, CF NetCDF and the JSON contract.

Regions: the 50 % and 90 % highest-probability regions of the release-point map (summed over candidate times)
are the cells whose probability is at or above ``backtrack.hpd_levels``; their boundaries are the contour of
the cell-centre map at that level (``contourpy`` filled contours, linear interpolation between cell centres),
as polygons with holes: exterior rings counter-clockwise, holes clockwise, rings closed.  GeoJSON (RFC 7946,
lon/lat models only): one MultiPolygon feature per region, plus the most probable release point.

NetCDF (CF-1.11 / ACDD-1.3): ``probability (release_time, y_m, x_m)`` and ``probability_summed (y_m, x_m)``
per cell; ``release_time`` a CF time coordinate when the model knows its time origin, else seconds on the
model's time axis.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from ..data.utctime import cf_time_units, iso_utc
from ..dynamics.backtrack import hpd_levels
from ..errors import InputError
from ..files import CAUTION, atomic_write, atomic_write_text
from .cfproducts import crs_attributes, discovery_attributes
from .spreadgeojson import GEOJSON_DECIMALS

BACKTRACK_SUFFIXES = (".nc", ".geojson", ".json")
REGION_SHARES = (0.5, 0.9)


def _oriented(ring: np.ndarray, ccw: bool) -> list:
    x, y = ring[:, 0], ring[:, 1]
    area = 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)
    ring = ring if (area > 0) == ccw else ring[::-1]
    return np.concatenate([ring, ring[:1]]).tolist()


def region_polygons(result, share: float) -> list[list[list]]:
    """Polygons of the ``share`` highest-probability region: each [exterior, hole, ...] rings of [x, y] m."""
    import contourpy

    level = hpd_levels(result.marginal, (share,))[0]
    gen = contourpy.contour_generator(result.x_m, result.y_m, result.marginal, fill_type="OuterOffset")
    points, offsets = gen.filled(level, np.inf)
    polygons = []
    for pts, off in zip(points, offsets):
        rings = [pts[a:b] for a, b in zip(off[:-1], off[1:])]
        rings = [r[:-1] if np.all(r[0] == r[-1]) else r for r in rings]
        rings = [r for r in rings if len(r) >= 3]
        if rings:
            polygons.append([_oriented(rings[0], True)] + [_oriented(h, False) for h in rings[1:]])
    return polygons


def _lonlat_rings(frame, polygons: list) -> list:
    out = []
    for poly in polygons:
        rings = []
        for ring in poly:
            lon, lat = frame.to_lonlat(np.asarray(ring))
            rings.append(np.round(np.stack([lon, lat], -1), GEOJSON_DECIMALS).tolist())
        out.append(rings)
    return out


def _lonlat(result) -> bool:
    return result.frame is not None and getattr(result.frame, "kind", "metric") == "lonlat"


def backtrack_to_dict(result) -> dict[str, Any]:
    """The JSON contract: ``most_probable`` (``position_m``, ``time_s``, ``probability``, ``time_utc`` /
    ``position_lonlat`` when known), ``region_50``/``region_90`` (``polygon_m``: exterior rings [x, y] m;
    ``holes_m``; ``area_m2``; ``polygon_lonlat`` for lon/lat models), ``probability_by_time`` (each
    ``release_time_s``, ``probability``, ``release_time_utc``), ``posterior_mean_m`` / ``posterior_cov_m2``
    of the release point, ``finds``, the grid and ``step_s`` (the RK4 step used, s)."""
    x, y, t = result.most_probable
    best = {"position_m": [x, y], "time_s": t, "probability_cell": float(result.probability.max())}
    if _lonlat(result):
        lon, lat = result.frame.to_lonlat(np.array([[x, y]]))
        best["position_lonlat"] = [float(np.ravel(lon)[0]), float(np.ravel(lat)[0])]
    if result.time_origin_utc is not None:
        best["time_utc"] = iso_utc(result.time_origin_utc, t)
    out: dict[str, Any] = {"most_probable": best}
    for share in REGION_SHARES:
        polys = region_polygons(result, share)
        level = hpd_levels(result.marginal, (share,))[0]
        region = {"share": share, "polygon_m": [p[0] for p in polys], "holes_m": [p[1:] for p in polys],
                  "area_m2": float((result.marginal >= level).sum() * result.cell_area_m2)}
        if _lonlat(result):
            region["polygon_lonlat"] = [p[0] for p in _lonlat_rings(result.frame, polys)]
        out[f"region_{round(100 * share)}"] = region
    by_time = []
    for k, release_s in enumerate(result.release_times_s):
        item = {"release_time_s": float(release_s), "probability": float(result.by_time[k])}
        if result.time_origin_utc is not None:
            item["release_time_utc"] = iso_utc(result.time_origin_utc, release_s)
        by_time.append(item)
    mean, cov = result.mean_cov()
    out.update(probability_by_time=by_time, posterior_mean_m=mean.tolist(), posterior_cov_m2=cov.tolist(),
               method=result.method, log_evidence=result.log_evidence, step_s=result.step_s,
               finds={"position_m": result.finds.position_m.tolist(), "time_s": result.finds.time_s.tolist(),
                      "sd_m": result.finds.sd_m.tolist()},
               grid={"x0_m": float(result.x_m[0]), "y0_m": float(result.y_m[0]), "nx": len(result.x_m),
                     "ny": len(result.y_m), "spacing_m": [float(result.x_m[1] - result.x_m[0]),
                                                          float(result.y_m[1] - result.y_m[0])]})
    return out


def backtrack_geojson(result) -> dict[str, Any]:
    """RFC 7946 FeatureCollection: the 50/90 % regions (MultiPolygon) and the most probable release point."""
    if not _lonlat(result):
        raise InputError("GeoJSON (RFC 7946) holds lon/lat only, but this model was fitted in a local metric frame; "
                         "write .json or .nc instead")
    features = []
    for share in REGION_SHARES:
        rings = _lonlat_rings(result.frame, region_polygons(result, share))
        features.append({"type": "Feature", "geometry": {"type": "MultiPolygon", "coordinates": rings},
                         "properties": {"kind": "release region", "share": share, "caution": CAUTION}})
    best = backtrack_to_dict(result)["most_probable"]
    features.append({"type": "Feature", "properties": {"kind": "most probable release", **{
        k: v for k, v in best.items() if k != "position_lonlat"}},
        "geometry": {"type": "Point", "coordinates": np.round(best["position_lonlat"], GEOJSON_DECIMALS).tolist()}})
    return {"type": "FeatureCollection", "features": features}


def backtrack_dataset(result):
    """The probability maps as an xarray Dataset with CF-1.11 / ACDD-1.3 attributes (module doc)."""
    import xarray as xr

    coords = {axis: (axis, np.asarray(getattr(result, axis), float), {
        "standard_name": f"projection_{axis[0]}_coordinate", "units": "m", "axis": axis[0].upper(),
        "long_name": f"candidate release {axis[0]}, model's local frame", "coverage_content_type": "coordinate"})
        for axis in ("x_m", "y_m")}
    times = np.asarray(result.release_times_s, float)
    if result.time_origin_utc is None:
        coords["release_time"] = ("release_time", times, {"units": "s", "long_name": "candidate release time on the "
                                  "model's time axis (no calendar date)", "coverage_content_type": "coordinate"})
    else:
        coords["release_time"] = ("release_time", times, {
            "standard_name": "time", "units": cf_time_units(result.time_origin_utc), "calendar": "standard",
            "axis": "T", "units_metadata": "leap_seconds: none", "long_name": "candidate release time",
            "coverage_content_type": "coordinate"})
    data = {"probability": (("release_time", "y_m", "x_m"), result.probability, {
                "units": "1", "long_name": "posterior probability that the release was in this cell at this time",
                "coverage_content_type": "modelResult"}),
            "probability_summed": (("y_m", "x_m"), result.marginal, {
                "units": "1", "long_name": "posterior probability that the release was in this cell (all times)",
                "coverage_content_type": "modelResult"})}
    lonlat = None
    if _lonlat(result):
        data["crs"] = ((), np.int32(0), crs_attributes(result.frame.to_dict()))
        for name in ("probability", "probability_summed"):
            data[name][2]["grid_mapping"] = "crs"
        corners = np.array([[result.x_m[0], result.y_m[0]], [result.x_m[-1], result.y_m[-1]]])
        lonlat = result.frame.to_lonlat(corners)
    span = None if result.time_origin_utc is None else (iso_utc(result.time_origin_utc, times.min()),
                                                         iso_utc(result.time_origin_utc, times.max()))
    attrs = discovery_attributes(
        "driftwise back-tracking map", f"Posterior probability of the release point and time of something found "
        f"{len(result.finds.time_s)} time(s), from forward moment propagation ({result.method}) through a flow "
        "field fitted to drifter tracks, with a uniform prior over the region and window.",
        "ocean currents, drifter, back-tracking, source attribution", lonlat=lonlat, time_range=span)
    attrs.update(caution=CAUTION, method=result.method, finds=json.dumps(backtrack_to_dict(result)["finds"]))
    dataset = xr.Dataset(data, coords=coords, attrs=attrs)
    for name in dataset.variables:
        dataset[name].encoding["_FillValue"] = None
    return dataset


def write_backtrack(result, path) -> Path:
    """Write by suffix: ``.nc`` (CF NetCDF maps), ``.geojson`` (regions, lon/lat models) or ``.json``."""
    suffix = Path(path).suffix.lower()
    if suffix == ".nc":
        dataset = backtrack_dataset(result)
        return atomic_write(path, lambda tmp: dataset.to_netcdf(tmp, engine="h5netcdf"))
    if suffix == ".geojson":
        return atomic_write_text(path, json.dumps(backtrack_geojson(result), allow_nan=False))
    if suffix == ".json":
        return atomic_write_text(path, json.dumps({**backtrack_to_dict(result), "caution": CAUTION}, allow_nan=False))
    raise InputError(f"--out {path}: unknown format; use a name ending in {', '.join(BACKTRACK_SUFFIXES)}")
