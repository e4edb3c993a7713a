"""Periodic constituents a time-varying flow can carry: the main tides and the inertial oscillation.

Periods of the astronomical tides as the trade uses them (Doodson 1921, "The harmonic development of the
tide-generating potential", Proc. R. Soc. A 100, 305; the values are the common-practice tables, from memory):

    M2 12.4206012 h   S2 12 h   N2 12.65834751 h   K1 23.93447213 h   O1 25.81933871 h

and the inertial oscillation at the local Coriolis frequency f = 2Ω|sin φ| (period 2π/f), with
Ω = 7.2921159e-5 rad/s the Earth's rotation rate (sidereal day) and φ the latitude of the data, here the
centre of the lon/lat frame the tracks were projected in (``Frame.lat0_deg``).  Angular frequencies are
ω = 2π/period in rad/s.  :data:`CONSTITUENTS` is the registry the command line and the fit read.
"""

from __future__ import annotations

import math

from ..errors import InputError

__all__ = ["CONSTITUENTS", "EARTH_ROTATION_RAD_S", "INERTIAL", "TIDAL_PERIODS_H", "angular_frequency_rad_s",
           "inertial_period_s", "parse_constituents"]

TIDAL_PERIODS_H = {"M2": 12.4206012, "S2": 12.0, "N2": 12.65834751, "K1": 23.93447213, "O1": 25.81933871}
INERTIAL = "inertial"
CONSTITUENTS = (*TIDAL_PERIODS_H, INERTIAL)
EARTH_ROTATION_RAD_S = 7.2921159e-5
MIN_INERTIAL_LATITUDE_DEG = 0.5   # |φ| below this: the inertial period exceeds 57 days and is no oscillation to fit


def inertial_period_s(latitude_deg: float) -> float:
    """2π / (2Ω |sin φ|) in s for latitude φ in degrees (16.92 h at 45°)."""
    lat = float(latitude_deg)
    if not (math.isfinite(lat) and -90.0 <= lat <= 90.0):
        raise InputError(f"inertial period: latitude must lie in −90…90°, got {latitude_deg!r}")
    if abs(lat) < MIN_INERTIAL_LATITUDE_DEG:
        raise InputError(f"inertial oscillations are not defined near the equator (latitude {lat:g}°; "
                         f"|latitude| must be at least {MIN_INERTIAL_LATITUDE_DEG}°); drop 'inertial' from the tides")
    return 2.0 * math.pi / (2.0 * EARTH_ROTATION_RAD_S * abs(math.sin(math.radians(lat))))


def angular_frequency_rad_s(name: str, latitude_deg: float | None = None) -> float:
    """ω = 2π/period (rad/s) of constituent ``name`` (a key of :data:`CONSTITUENTS`).

    "inertial" needs the data's latitude (tracks given as lon/lat); InputError otherwise.
    """
    if name in TIDAL_PERIODS_H:
        return 2.0 * math.pi / (TIDAL_PERIODS_H[name] * 3600.0)
    if name == INERTIAL:
        if latitude_deg is None:
            raise InputError("the 'inertial' constituent needs the data's latitude: give the tracks as lon/lat "
                             "(a local metre frame has none), or drop 'inertial' from the tides")
        return 2.0 * math.pi / inertial_period_s(latitude_deg)
    raise InputError(f"unknown constituent {name!r}; choose from {', '.join(CONSTITUENTS)}")


def parse_constituents(text, *, what: str = "--tides") -> tuple[str, ...]:
    """``"M2,S2,inertial"`` → ("M2", "S2", "inertial"); ``"none"`` or "" → (); a tuple/list is checked as is.

    Names are matched without regard to case; duplicates and unknown names are refused naming ``what``.
    """
    if isinstance(text, str):
        items = [] if text.strip().lower() in ("", "none") else [p.strip() for p in text.split(",")]
    else:
        items = [str(p) for p in text]
    lookup = {name.lower(): name for name in CONSTITUENTS}
    names = []
    for item in items:
        if item.lower() not in lookup:
            raise InputError(f"{what}: unknown constituent {item!r}; choose from {', '.join(CONSTITUENTS)} or none")
        names.append(lookup[item.lower()])
    if len(set(names)) != len(names):
        raise InputError(f"{what}: each constituent may be listed once, got {', '.join(names)}")
    return tuple(names)
