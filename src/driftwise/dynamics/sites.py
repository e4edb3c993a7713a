"""Sites for connectivity: named polygons, read from files, seeded with releases spread over their area.

A site is a simple polygon in the model's local frame (metres).  Files:

* **GeoJSON** (RFC 7946, lon/lat; needs a model fitted on lon/lat tracks): every ``Polygon`` feature
  (exterior ring) of a FeatureCollection is one site, named by its ``name`` (or ``site``/``id``) property,
  else ``site1``, ``site2``, … in file order.
* **CSV** (local metres): columns ``site, x_m, y_m``, one vertex per row, the vertices of a site in
  order along its boundary (either direction; the ring closes itself); a site's rows need not be adjacent
  but keep their order.

Seeding (:func:`seed_site`): N release points from a scrambled Sobol sequence (Owen-scrambled, seeded;
``scipy.stats.qmc.Sobol``) over the polygon's bounding box, kept when inside the polygon (rejection, drawing
further points of the same sequence until N are inside).  Each release stands for a cell of area A/N around
its point; a uniform square cell of side s = √(A/N) has variance s²/12 along each axis (the variance of the
uniform distribution on an interval of length s) and no correlation, so each release starts with covariance
``(A / (12 N)) I`` (m²).  The mixture of the N Gaussians then has (nearly) the site's mean and covariance.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy.stats import qmc

from ..errors import InputError
from .spread import check_polygon, signed_area

__all__ = ["Site", "read_sites", "seed_site", "inside_polygon", "cell_covariance_m2"]


@dataclass(frozen=True, eq=False)
class Site:
    """A named site: ``polygon_m (k, 2)`` vertices in metres (local frame), ring not closed."""

    name: str
    polygon_m: np.ndarray

    @property
    def area_m2(self) -> float:
        """Area (m²) by the shoelace formula."""
        return abs(signed_area(self.polygon_m))


def inside_polygon(points: Any, polygon: Any) -> np.ndarray:
    """Boolean (n,): points (n, 2) inside the polygon (k, 2) by the even-odd (crossing-number) rule."""
    pts, poly = np.asarray(points, np.float64), np.asarray(polygon, np.float64)
    x, y = pts[:, 0, None], pts[:, 1, None]
    xa, ya = poly[None, :, 0], poly[None, :, 1]
    xb, yb = np.roll(poly[:, 0], -1)[None, :], np.roll(poly[:, 1], -1)[None, :]
    straddles = (ya > y) != (yb > y)
    with np.errstate(divide="ignore", invalid="ignore"):
        x_cross = xa + (y - ya) * (xb - xa) / (yb - ya)
    return np.sum(straddles & (x < x_cross), axis=1) % 2 == 1


def cell_covariance_m2(area_m2: float, n: int) -> np.ndarray:
    """Covariance (2, 2) of one of n releases sharing a site of ``area_m2``: (A / (12 n)) I (see the module doc)."""
    return float(area_m2) / (12.0 * int(n)) * np.eye(2)


def seed_site(site: Site, n: int, *, seed: int = 0) -> np.ndarray:
    """n points (n, 2) inside the site: scrambled Sobol points in its bounding box, kept by rejection."""
    if not (isinstance(n, (int, np.integer)) and n >= 1):
        raise InputError(f"releases per site must be a positive integer, got {n!r}")
    poly = site.polygon_m
    lo, hi = poly.min(axis=0), poly.max(axis=0)
    sampler = qmc.Sobol(d=2, scramble=True, seed=np.random.default_rng([int(seed), int(n)]))
    kept: list[np.ndarray] = []
    count = 0
    for _ in range(64):
        need = n - count
        fill = max(site.area_m2 / float(np.prod(hi - lo)), 1e-3)
        batch = 2 ** int(np.ceil(np.log2(max(2.0, 1.3 * need / fill))))
        pts = lo + sampler.random(batch) * (hi - lo)
        pts = pts[inside_polygon(pts, poly)]
        kept.append(pts)
        count += len(pts)
        if count >= n:
            return np.concatenate(kept)[:n]
    raise InputError(f"site {site.name!r}: could not place {n} points inside the polygon (is it degenerate?)")


def read_sites(path: Any, *, frame: Any = None) -> tuple[Site, ...]:
    """Sites from a GeoJSON (lon/lat polygons) or a CSV (site, x_m, y_m) file; see the module doc."""
    text = str(path)
    if text.lower().endswith((".geojson", ".json")):
        sites = _geojson_sites(path, frame)
    else:
        sites = _csv_sites(path)
    if len(sites) < 1:
        raise InputError(f"{path}: contains no site")
    names = [s.name for s in sites]
    duplicate = next((n for n in names if names.count(n) > 1), None)
    if duplicate is not None:
        raise InputError(f"{path}: the site name {duplicate!r} appears twice; give every site its own name")
    return tuple(sites)


def _csv_sites(path: Any) -> list[Site]:
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False)
    except (OSError, ValueError, pd.errors.ParserError) as err:
        raise InputError(f"{path}: cannot read the sites file ({err})") from None
    cols = {str(c).strip().lstrip("\ufeff").lower(): c for c in table.columns}
    missing = [c for c in ("site", "x_m", "y_m") if c not in cols]
    if missing:
        raise InputError(f"{path}: needs columns site, x_m, y_m (metres, local frame); missing {', '.join(missing)}")
    xy = np.stack([pd.to_numeric(table[cols[c]], errors="coerce").to_numpy(np.float64) for c in ("x_m", "y_m")], -1)
    bad = np.flatnonzero(~np.all(np.isfinite(xy), axis=1))
    if bad.size:
        raise InputError(f"{path}: row {bad[0] + 2}: x_m, y_m must be finite numbers (metres)")
    names = table[cols["site"]].astype(str).str.strip()
    if (names == "").any():
        raise InputError(f"{path}: row {int(np.argmax((names == '').to_numpy())) + 2}, column 'site': empty name")
    order = list(dict.fromkeys(names))
    return [Site(n, check_polygon(xy[(names == n).to_numpy()], what=f"{path}: site {n!r}")) for n in order]


def _geojson_sites(path: Any, frame: Any) -> list[Site]:
    if frame is None or getattr(frame, "kind", "metric") != "lonlat":
        raise InputError(f"{path}: GeoJSON sites are lon/lat, but the model was fitted in a local metric frame; "
                         "give a CSV with columns site, x_m, y_m instead")
    try:
        with open(path, encoding="utf-8") as handle:
            data = json.load(handle)
    except (OSError, ValueError) as err:
        raise InputError(f"{path}: cannot read the sites file ({err})") from None
    features = data.get("features", [data]) if isinstance(data, dict) else []
    sites = []
    for i, feature in enumerate(features):
        geometry = feature.get("geometry", feature) if isinstance(feature, dict) else None
        if not isinstance(geometry, dict) or geometry.get("type") != "Polygon":
            continue
        try:
            ring = np.asarray(geometry["coordinates"][0], dtype=np.float64)[:, :2]
        except (KeyError, IndexError, TypeError, ValueError):
            raise InputError(f"{path}: feature {i}: the Polygon has no readable exterior ring") from None
        if np.any(np.abs(ring[:, 0]) > 360) or np.any(np.abs(ring[:, 1]) > 90):
            raise InputError(f"{path}: feature {i}: coordinates are not lon, lat in degrees")
        props = feature.get("properties") or {}
        name = next((str(props[k]) for k in ("name", "site", "id") if props.get(k) not in (None, "")),
                    f"site{len(sites) + 1}")
        polygon = check_polygon(frame.from_lonlat(ring[:, 0], ring[:, 1]), what=f"{path}: site {name!r}")
        sites.append(Site(name, polygon))
    return sites
