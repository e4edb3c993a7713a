"""GeoJSON (RFC 7946) of a spread forecast: ellipses per release, time and level, and the mean paths.

RFC 7946 (Butler et al. 2016): WGS 84 lon/lat positions (§4, no ``crs`` member), closed linear rings
with counter-clockwise exteriors (§3.1.6).  Every geometry is also valid under the OGC simple-feature
rules GIS tools apply (shapely/GEOS ``is_valid``): an ellipse without area is written as a Point or a
LineString instead of a degenerate Polygon.
"""

from __future__ import annotations

import numpy as np

from ..data.utctime import iso_utc
from ..errors import InputError

GEOJSON_DECIMALS = 7            # 1e-7 degree ≈ 1.1 cm (RFC 7946 §11.2 suggests 6; one more keeps cm)
MIN_POLYGON_AXIS_M = 1.0        # ellipse axes below 1 m (≈ 90 × the rounding) are drawn as a Point/LineString


def _ccw_ring(lon, lat) -> list:
    """Closed RFC 7946 exterior ring: counter-clockwise in lon/lat, first point repeated last."""
    ring = np.stack([lon, lat], -1)
    x, y = ring[:, 0], ring[:, 1]
    if np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y) < 0:
        ring = ring[::-1]
    ring = np.round(np.concatenate([ring, ring[:1]]), GEOJSON_DECIMALS)
    return ring.tolist()


def _ellipse_geometry(ring_lon, ring_lat, centre, semi_axes_m) -> dict:
    """Polygon of the ellipse ring; a zero-size ellipse (a point release at t = 0) is a Point at the mean and a
    flat one (minor axis < 1 m) the LineString of its major axis, so that every geometry is valid (OGC simple
    features: a polygon needs a non-zero area)."""
    major, minor = semi_axes_m
    if minor >= MIN_POLYGON_AXIS_M:
        return {"type": "Polygon", "coordinates": [_ccw_ring(ring_lon, ring_lat)]}
    if major < MIN_POLYGON_AXIS_M:
        return {"type": "Point", "coordinates": np.round(centre, GEOJSON_DECIMALS).tolist()}
    tips = [0, len(ring_lon) // 2]       # ellipse() puts the major-axis ends at t = 0 and t = π
    return {"type": "LineString",
            "coordinates": np.round(np.stack([ring_lon[tips], ring_lat[tips]], -1), GEOJSON_DECIMALS).tolist()}


def _path_geometry(lonlat) -> dict:
    """LineString of the mean path (repeated positions dropped), or a Point when it does not move."""
    path = np.round(lonlat, GEOJSON_DECIMALS)
    keep = np.concatenate([[True], np.any(path[1:] != path[:-1], axis=-1)])
    path = path[keep]
    return ({"type": "Point", "coordinates": path[0].tolist()} if len(path) < 2
            else {"type": "LineString", "coordinates": path.tolist()})


def _time_properties(spread, r: int, t: int | None = None) -> dict:
    """release start (and output time ``t``) in seconds, plus ISO-8601 UTC when the model knows its time origin."""
    rel = spread.releases[r]
    props = {"start_time_s": rel.start_time_s} if t is None else {"time_s": float(spread.times_s[t]),
                                                                  "start_time_s": rel.start_time_s}
    if spread.time_origin_utc is not None:
        props["start_time_utc"] = spread.start_times_utc[r]
        offset = spread.times_s[-1] if t is None else spread.times_s[t]
        props["end_time_utc" if t is None else "time_utc"] = iso_utc(spread.time_origin_utc,
                                                                    rel.start_time_s + float(offset))
    return props


def spread_geojson(spread, *, n: int = 72) -> dict:
    """RFC 7946 FeatureCollection (lon/lat WGS84 only): a Feature per release, time and level (properties
    release, kind "ellipse", time_s, start_time_s, time_utc/start_time_utc when the time origin is known,
    level, semi-axes, bearing_deg) whose geometry is the ellipse Polygon, or a Point (zero-size ellipse, e.g.
    t = 0 of a point release) or LineString (flat ellipse); and a LineString of each mean path.  ``n`` (even)
    vertices per ellipse."""
    if int(n) < 8 or int(n) % 2:
        raise InputError(f"GeoJSON: n = {n} vertices per ellipse; give an even number >= 8")
    if spread.frame is None or getattr(spread.frame, "kind", "metric") != "lonlat":
        raise InputError("GeoJSON (RFC 7946) holds WGS84 lon/lat only, but this model was fitted in a local "
                         "metric frame; write .json, .csv or .nc instead")
    features, bearing = [], spread.bearing_deg
    for i, level in enumerate(spread.levels):
        rings = spread.ellipses(level, n)                                     # (R, T, n, 2) metres
        lon, lat = spread.frame.to_lonlat(rings.reshape(-1, 2))
        lon, lat = np.asarray(lon).reshape(rings.shape[:-1]), np.asarray(lat).reshape(rings.shape[:-1])
        if np.any(np.ptp(lon, axis=-1) > 180.0):
            raise InputError("GeoJSON: an ellipse crosses the antimeridian, which this writer does not split; "
                             "write .json, .csv or .nc instead")
        for r, rel in enumerate(spread.releases):
            for t in range(len(spread.times_s)):
                props = {"release": rel.name, "kind": "ellipse", **_time_properties(spread, r, t), "level": level,
                         "semi_major_m": float(spread.semi_axes_m[r, t, i, 0]),
                         "semi_minor_m": float(spread.semi_axes_m[r, t, i, 1]), "bearing_deg": float(bearing[r, t])}
                geometry = _ellipse_geometry(lon[r, t], lat[r, t], spread.mean_lonlat[r, t], spread.semi_axes_m[r, t, i])
                features.append({"type": "Feature", "properties": props, "geometry": geometry})
    for r, rel in enumerate(spread.releases):
        features.append({"type": "Feature", "properties": {"release": rel.name, "kind": "mean_path",
                                                           **_time_properties(spread, r)},
                         "geometry": _path_geometry(spread.mean_lonlat[r])})
    return {"type": "FeatureCollection", "features": features}
