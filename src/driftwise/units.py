"""Parsing of physical quantities written with a unit, such as ``10m``, ``6h`` or ``2d``.

All values are returned in SI base units: metres, seconds, m/s, m²/s.  A length
or a duration must carry its unit (``48`` could be seconds or hours): a bare
number is refused unless the caller names the unit bare numbers are in
(``bare_unit``).  Zero needs no unit.  Speeds and diffusivities read a bare
number as SI (m/s, m²/s).
"""

from __future__ import annotations

import math
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



# --------------------------------------------------------------------------------------
# Printing: a value in the unit that fits its size, three significant figures
# --------------------------------------------------------------------------------------
# (unit, size of one unit in SI, smallest SI value printed in it); the last entry takes everything smaller
_LENGTH_STEPS = (("km", 1000.0, 1000.0), ("m", 1.0, 1.0), ("mm", 1e-3, 1e-5), ("µm", 1e-6, 0.0))
_DURATION_STEPS = (("d", 86400.0, 2 * 86400.0), ("h", 3600.0, 3600.0), ("min", 60.0, 60.0), ("s", 1.0, 1.0),
                   ("ms", 1e-3, 1e-3), ("µs", 1e-6, 0.0))
_SPEED_STEPS = (("m/s", 1.0, 0.1), ("mm/s", 1e-3, 1e-5), ("µm/s", 1e-6, 0.0))
_DIFFUSIVITY_STEPS = (("m²/s", 1.0, 0.01), ("mm²/s", 1e-6, 1e-8), ("µm²/s", 1e-12, 0.0))
_AREA_STEPS = (("km²", 1e6, 1e4), ("m²", 1.0, 0.1), ("cm²", 1e-4, 1e-5), ("mm²", 1e-6, 0.0))
_ZERO_UNIT = {id(_LENGTH_STEPS): "m", id(_DURATION_STEPS): "s", id(_SPEED_STEPS): "m/s", id(_DIFFUSIVITY_STEPS): "m²/s",
              id(_AREA_STEPS): "m²"}


def _fitted(value: float | None, steps: tuple[tuple[str, float, float], ...], digits: int) -> str:
    """``value`` (SI) in the first unit of ``steps`` whose lower bound it reaches, ``digits`` significant figures.

    The bound is tested on the value after rounding to ``digits`` figures, so 999.96 m prints as '1 km'.
    """
    if value is None:
        return "—"
    value = float(value)
    if not math.isfinite(value):
        return str(value)
    if value == 0:
        return f"0 {_ZERO_UNIT[id(steps)]}"
    size = abs(float(f"{value:.{digits}g}"))
    unit, scale = next((u, s) for u, s, lower in steps if size >= lower)
    return f"{_sig(value / scale, digits)} {unit}"


def _sig(value: float, digits: int) -> str:
    """``value`` to ``digits`` significant figures, plain notation from 10⁻⁶ to below 10⁶ with as many decimals as
    the figures need (1234 → '1230', 0.5 → '0.5', 1.234e-6 → '0.00000123', not '0.000001'); outside it scientific
    (3.2e-09 → '3.2e-09', not '0')."""
    text = f"{value:.{digits}g}"
    if "e" in text and 1e-6 <= abs(value) < 1e6:
        rounded = float(text)
        text = f"{rounded:.{max(0, digits - 1 - math.floor(math.log10(abs(rounded))))}f}"
        text = text.rstrip("0").rstrip(".") if "." in text else text
    return text


def format_estimate(value: float, sd: float | None) -> str:
    """A dimensionless estimate and its s.d., to 3 and 2 significant figures: (0.00497, 0.0012) → '0.00497 ±
    0.0012' (a share of 0.005 printed to two decimals read '0.00 ± 0.00'); no s.d.: the value alone."""
    if sd is None or not math.isfinite(float(sd)):
        return _sig(float(value), 3)
    return f"{_sig(float(value), 3)} ± {_sig(float(sd), 2)}"


def format_length(value_m: float, digits: int = 3) -> str:
    """A length in m printed in km, m, mm or µm, whichever fits: 12345 → '12.3 km', 0.0005 → '0.5 mm'."""
    return _fitted(value_m, _LENGTH_STEPS, digits)


def format_duration(value_s: float, digits: int = 3) -> str:
    """A duration in s printed in d, h, min, s or ms, whichever fits: 5400 → '1.5 h', 0.5 → '500 ms'."""
    return _fitted(value_s, _DURATION_STEPS, digits)


def format_area(value_m2: float, digits: int = 3) -> str:
    """An area in m² printed in km², m², cm² or mm², whichever fits: 2.5e6 → '2.5 km²', 0.0091 → '91 cm²'."""
    return _fitted(value_m2, _AREA_STEPS, digits)


def format_speed(value_m_s: float, digits: int = 3) -> str:
    """A speed in m/s printed in m/s, mm/s or µm/s: 0.0123 → '12.3 mm/s'."""
    return _fitted(value_m_s, _SPEED_STEPS, digits)


def format_diffusivity(value_m2_s: float, digits: int = 3) -> str:
    """A diffusivity in m²/s printed in m²/s, mm²/s or µm²/s: 1e-5 → '10 mm²/s'."""
    return _fitted(value_m2_s, _DIFFUSIVITY_STEPS, digits)


FORMAT_BY_UNIT = {"m": format_length, "s": format_duration, "m/s": format_speed, "m²/s": format_diffusivity}
_FORMAT_BY_SUFFIX = (("_m2_s", format_diffusivity), ("_m_s", format_speed), ("_s", format_duration),
                     ("_m", format_length))


def format_named(name: str, value: float, digits: int = 3) -> str:
    """``value`` printed by the unit its ``name`` ends in (``_m``, ``_s``, ``_m_s``, ``_m2_s``), in the unit that
    fits its size: ``format_named("length_scale_m", 1234.0)`` → '1.23 km'.  Other names: ``digits`` significant
    figures and no unit (``_per_s``, ``_m2`` and the like are not lengths or durations)."""
    for suffix, formatter in _FORMAT_BY_SUFFIX:
        if name.endswith(suffix) and not name.endswith(("_per_s", "_per_m")):
            return formatter(value, digits)
    return "—" if value is None else _sig(float(value), digits)
