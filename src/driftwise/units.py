"""Parsing of physical quantities written with a unit, such as ``10m``, ``6h`` or ``2d``.

All values are returned in SI base units: metres, seconds, m/s, m²/s.  A length
or a duration must carry its unit (``48`` could be seconds or hours): a bare
number is refused unless the caller names the unit bare numbers are in
(``bare_unit``).  Zero needs no unit.  Speeds and diffusivities read a bare
number as SI (m/s, m²/s).
"""

from __future__ import annotations

import re

from .errors import InputError

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_PATTERN = re.compile(rf"^\s*({_NUMBER})\s*([A-Za-z/²0-9^]*)\s*$")

LENGTH_M = {"m": 1.0, "km": 1000.0, "cm": 0.01, "mm": 0.001}
DURATION_S = {"s": 1.0, "min": 60.0, "h": 3600.0, "d": 86400.0}
SPEED_M_S = {"m/s": 1.0, "cm/s": 0.01, "km/h": 1000.0 / 3600.0, "kn": 1852.0 / 3600.0}
DIFFUSIVITY_M2_S = {"m2/s": 1.0, "m²/s": 1.0, "m^2/s": 1.0, "cm2/s": 1e-4}


def parse_quantity(text: str, units: dict[str, float], *, what: str, bare_unit: str | None = None) -> float:
    """Return ``text`` (a number with a unit from ``units``) in SI units.

    A number without a unit is read in ``bare_unit`` (a key of ``units``); with
    ``bare_unit=None`` it is an InputError suggesting units, except 0.  ``what``
    names the option in the error message, e.g. ``"--horizon"``.
    """
    match = _PATTERN.match(str(text))
    if not match:
        raise InputError(f"{what}: cannot read {text!r} as a number with a unit (e.g. {_example(units)})")
    value, unit = float(match.group(1)), match.group(2)
    if unit == "":
        if bare_unit is None and value != 0.0:
            options = [match.group(1) + u for u in units]
            raise InputError(f"{what}: {str(text).strip()!r} has no unit; write it with one: "
                             f"{', '.join(options[:-1])} or {options[-1]}")
        unit = bare_unit or next(iter(units))
    if unit not in units:
        raise InputError(f"{what}: unknown unit {unit!r} in {text!r}; use one of {', '.join(units)}")
    return value * units[unit]


def parse_length_m(text: str, *, what: str = "length", bare_unit: str | None = None) -> float:
    """``"500m"`` → 500.0, ``"2km"`` → 2000.0 (metres); a bare number only with ``bare_unit`` (e.g. ``"m"``)."""
    return parse_quantity(text, LENGTH_M, what=what, bare_unit=bare_unit)


def parse_duration_s(text: str, *, what: str = "duration", bare_unit: str | None = None) -> float:
    """``"6h"`` → 21600.0, ``"2d"`` → 172800.0 (seconds); a bare number only with ``bare_unit`` (e.g. ``"s"``)."""
    return parse_quantity(text, DURATION_S, what=what, bare_unit=bare_unit)


def parse_speed_m_s(text: str, *, what: str = "speed") -> float:
    """``"5m/s"`` → 5.0, ``"20cm/s"`` → 0.2 (m/s)."""
    return parse_quantity(text, SPEED_M_S, what=what, bare_unit="m/s")


def parse_diffusivity_m2_s(text: str, *, what: str = "diffusivity") -> float:
    """``"10m2/s"`` → 10.0 (m²/s)."""
    return parse_quantity(text, DIFFUSIVITY_M2_S, what=what, bare_unit="m2/s")


def parse_durations_s(text: str, *, what: str = "durations", bare_unit: str | None = None) -> list[float]:
    """A comma-separated list: ``"6h,12h,24h"`` → [21600.0, 43200.0, 86400.0]."""
    return [parse_duration_s(part, what=what, bare_unit=bare_unit) for part in str(text).split(",") if part.strip()]


def _example(units: dict[str, float]) -> str:
    return f"10{next(iter(units))}"

