"""The local metric frame: positions in metres, optionally tied to lon/lat.

Positions given in longitude/latitude are projected to an azimuthal
equidistant (AEQD) frame on the WGS 84 ellipsoid, centred on the data::

    +proj=aeqd +lat_0=<lat0> +lon_0=<lon0> +datum=WGS84 +units=m

AEQD keeps the geodesic distance and azimuth from the centre exact; a distance
*across* the radial direction is stretched by the factor ``c / sin c`` (c the
angular distance from the centre, Snyder 1987, Map Projections — A Working
Manual, USGS Prof. Paper 1395, §25, on the sphere).  The stretch reaches 0.1 %
at c ≈ 0.0775 rad (about 490 km), so :func:`projection_stretch` warns past that.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InputError

EARTH_MEAN_RADIUS_M = 6_371_008.8  # IUGG mean radius R1 (Moritz 1980, Geodetic Reference System 1980)
STRETCH_WARN_FRACTION = 1e-3  # warn when distances can be off by more than 0.1 %


class ProjectionWarning(UserWarning):
    """The data span enough of the globe for the local frame to distort distances."""


@functools.lru_cache(maxsize=32)
def _transformer(lon0_deg: float, lat0_deg: float):
    from pyproj import Transformer

    aeqd = f"+proj=aeqd +lat_0={lat0_deg!r} +lon_0={lon0_deg!r} +datum=WGS84 +units=m +no_defs"
    return Transformer.from_crs("EPSG:4326", aeqd, always_xy=True)


@dataclass(frozen=True)
class Frame:
    """How ``position_m`` relates to the Earth.

    ``kind="metric"``: the positions were given in metres; there is no
    geographic reference (``lon0_deg``/``lat0_deg`` are ``None``).
    ``kind="lonlat"``: positions were given in degrees and live in the AEQD
    frame centred at (``lon0_deg``, ``lat0_deg``) on WGS 84.
    """

    kind: str = "metric"
    lon0_deg: float | None = None
    lat0_deg: float | None = None

    def __post_init__(self) -> None:
        if self.kind not in ("metric", "lonlat"):
            raise InputError(f"frame kind must be 'metric' or 'lonlat', not {self.kind!r}")
        if self.kind == "lonlat":
            lon0, lat0 = self.lon0_deg, self.lat0_deg
            if lon0 is None or lat0 is None or not (math.isfinite(lon0) and math.isfinite(lat0)):
                raise InputError("a lon/lat frame needs a finite centre lon0_deg, lat0_deg")
            if not (-90.0 <= lat0 <= 90.0 and -180.0 <= lon0 <= 180.0):
                raise InputError(f"frame centre ({lon0}, {lat0}) is outside lon −180…180, lat −90…90")

    @property
    def is_geographic(self) -> bool:
        return self.kind == "lonlat"

    @property
    def proj_string(self) -> str | None:
        """The PROJ definition of the metric frame, or ``None`` for a plain metric frame."""
        if not self.is_geographic:
            return None
        return f"+proj=aeqd +lat_0={self.lat0_deg!r} +lon_0={self.lon0_deg!r} +datum=WGS84 +units=m +no_defs"

    def from_lonlat(self, lon_deg, lat_deg) -> np.ndarray:
        """(lon, lat) degrees, shapes (n,) → ``xy_m`` (n, 2) metres in this frame."""
        self._require_geographic()
        lon = wrap_longitude(np.asarray(lon_deg, dtype=np.float64))
        x, y = _transformer(self.lon0_deg, self.lat0_deg).transform(lon, np.asarray(lat_deg, dtype=np.float64))
        return np.stack([np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)], axis=-1)

    def to_lonlat(self, xy_m) -> tuple[np.ndarray, np.ndarray]:
        """``xy_m`` (n, 2) metres → (lon, lat) degrees, each (n,); lon in −180…180."""
        self._require_geographic()
        xy = np.asarray(xy_m, dtype=np.float64)
        if xy.ndim < 1 or xy.shape[-1] < 2:
            raise InputError(f"to_lonlat needs positions of shape (n, 2), got {xy.shape}")
        lon, lat = _transformer(self.lon0_deg, self.lat0_deg).transform(xy[..., 0], xy[..., 1], direction="INVERSE")
        return np.asarray(lon, dtype=np.float64), np.asarray(lat, dtype=np.float64)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able description (stored in model files)."""
        out: dict[str, Any] = {"kind": self.kind}
        if self.is_geographic:
            out.update(lon0_deg=float(self.lon0_deg), lat0_deg=float(self.lat0_deg), proj=self.proj_string)
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "Frame":
        """Inverse of :meth:`to_dict`; raises InputError on a malformed description."""
        if not isinstance(data, dict) or data.get("kind") not in ("metric", "lonlat"):
            raise InputError(f"frame description must be a dict with kind 'metric' or 'lonlat', got {data!r}")
        if data["kind"] == "metric":
            return cls()
        try:
            return cls("lonlat", float(data["lon0_deg"]), float(data["lat0_deg"]))
        except (KeyError, TypeError, ValueError):
            raise InputError(f"frame description {data!r} needs numeric lon0_deg and lat0_deg") from None

    def _require_geographic(self) -> None:
        if not self.is_geographic:
            raise InputError("these positions are in a local metric frame with no geographic reference; "
                             "give lon/lat columns to get longitudes and latitudes")


def wrap_longitude(lon_deg: np.ndarray) -> np.ndarray:
    """Longitudes (any convention, e.g. 0–360) → −180 ≤ lon < 180."""
    return (np.asarray(lon_deg, dtype=np.float64) + 180.0) % 360.0 - 180.0


def centre_of(lon_deg: np.ndarray, lat_deg: np.ndarray) -> tuple[float, float]:
    """Centre of the data's lon/lat bounding box, safe across the 0/360 and ±180 meridians.

    Longitudes are taken relative to their circular mean (so 359.9° and 0.1° are
    0.2° apart, not 359.8°) before the box midpoint is taken; the centre is
    rounded to 10⁻⁶ degrees.
    """
    rad = np.deg2rad(lon_deg)
    mean = math.degrees(math.atan2(float(np.mean(np.sin(rad))), float(np.mean(np.cos(rad)))))
    offset = wrap_longitude(np.asarray(lon_deg) - mean)
    lon0 = float(wrap_longitude(np.array(mean + 0.5 * (offset.min() + offset.max()))))
    lat0 = 0.5 * (float(np.min(lat_deg)) + float(np.max(lat_deg)))
    return round(lon0, 6), round(lat0, 6)  # a readable centre; any centre near the data serves


def projection_stretch(radius_m: float) -> float:
    """Largest relative distance error of AEQD at ``radius_m`` from the centre: c/sin(c) − 1, c = radius/R."""
    c = radius_m / EARTH_MEAN_RADIUS_M
    if c >= math.pi:
        return math.inf
    return c / math.sin(c) - 1.0 if c > 1e-8 else c * c / 6.0


def frame_for(lon_deg: np.ndarray, lat_deg: np.ndarray, *, source: str) -> tuple[Frame, np.ndarray]:
    """Build the frame centred on the data, project it, warn if the span distorts distances.

    Returns ``(frame, xy_m)`` with ``xy_m`` of shape (n, 2).
    """
    frame = Frame("lonlat", *centre_of(lon_deg, lat_deg))
    xy = frame.from_lonlat(lon_deg, lat_deg)
    radius_m = float(np.sqrt(np.max(np.sum(xy * xy, axis=1))))
    stretch = projection_stretch(radius_m)
    if stretch > STRETCH_WARN_FRACTION:
        warnings.warn(f"{source}: the fixes reach {radius_m / 1000:.0f} km from the projection centre, where the local "
                      f"azimuthal-equidistant frame stretches distances by up to {100 * stretch:.2f} % "
                      "(split the data into regions for better accuracy)", ProjectionWarning, stacklevel=3)
    return frame, xy
