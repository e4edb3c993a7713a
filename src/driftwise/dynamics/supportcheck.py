"""Forecasts against the data's support: warn before running, mark outputs beyond it.

A point is **outside the data support** when the data leave more than ``SUPPORT_VARIANCE_FRACTION``
(90 %) of the prior velocity variance of the field's stationary part there
(``FlowField.local_variance_ratio`` > 0.9): the flow used there is the prior's (zero mean plus the
background's linear terms), extrapolated, not observed.  Each warning also says how far the point is
from the nearest data (``FlowField.distance_to_data_m``, :mod:`driftwise.data.support`), in the unit
that fits (:func:`driftwise.units.format_length`).

For a forecast, ``outside_support[r, t]`` is True from the first output time at which the mean
position of release r lies outside the support: everything after that point has left the observed
flow at least once, so it rests partly on the prior even if the path comes back.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..units import format_duration, format_length

__all__ = ["SUPPORT_VARIANCE_FRACTION", "PathSupport", "SupportWarning", "path_support", "point_support_text",
           "unsupported_releases", "warn_beyond_time_span", "warn_left_support", "warn_unsupported_finds",
           "warn_unsupported_releases"]

SUPPORT_VARIANCE_FRACTION = 0.9


class SupportWarning(UserWarning):
    """A release, a forecast or a grid lies where the model has (almost) no data."""


def point_support_text(distance_m: float, ratio: float) -> str:
    """'4.2 km from the nearest data; the data leave 100 % of the prior velocity variance there'."""
    return (f"{format_length(float(distance_m))} from the nearest data; the data leave {100 * float(ratio):.0f} % "
            "of the prior velocity variance there")


def _unsupported_points(field: Any, points_m, times_s) -> list[tuple[int, float, float]]:
    """(index, variance ratio, distance to the data in m) of every point (n, d) at its time (n,) s outside the data
    support (module docstring; a steady field ignores the times)."""
    points_m = np.atleast_2d(np.asarray(points_m, np.float64))
    ratio = field.local_variance_ratio(points_m, np.asarray(times_s, np.float64))
    distance = field.distance_to_data_m(points_m)
    return [(k, float(f), float(d)) for k, (f, d) in enumerate(zip(ratio, distance)) if f > SUPPORT_VARIANCE_FRACTION]


def _where(point_m) -> str:
    return ", ".join(format_length(v) for v in point_m)


def unsupported_releases(field: Any, releases) -> list[tuple[Any, float, float]]:
    """(release, variance ratio, distance to the data in m) for every release whose start lies outside
    the data support (module docstring)."""
    starts = np.stack([r.start_m for r in releases])
    outside = _unsupported_points(field, starts, np.array([r.start_time_s for r in releases]))
    return [(releases[k], f, d) for k, f, d in outside]


def warn_unsupported_releases(field: Any, releases) -> None:
    """One SupportWarning per release that starts outside the data support — before anything runs."""
    for rel, ratio, distance in unsupported_releases(field, releases):
        warnings.warn(f"release {rel.name} at ({_where(rel.start_m)}) is outside the model's data support "
                      f"({point_support_text(distance, ratio)}), so its forecast extrapolates the prior, not observed "
                      "flow; its outputs are marked outside_support", SupportWarning, stacklevel=3)


def warn_unsupported_finds(field: Any, position_m, time_s) -> None:
    """One SupportWarning per find (``position_m`` (K, 2) local frame, ``time_s`` (K,)) outside the data support:
    the flow that carried it there, and so where and when it was released, is the prior's, not observed."""
    position_m = np.atleast_2d(np.asarray(position_m, np.float64))
    for k, ratio, distance in _unsupported_points(field, position_m, time_s):
        warnings.warn(f"find {k + 1} at ({_where(position_m[k])}) is outside the model's data support "
                      f"({point_support_text(distance, ratio)}), so the flow that carried it there is the prior's, "
                      "not observed: its release map and times extrapolate", SupportWarning, stacklevel=2)


def warn_beyond_time_span(field: Any, start_s: float, end_s: float, what: str = "the forecast",
                          stacklevel: int = 3) -> None:
    """A SupportWarning when a field with a slow part is used over [``start_s``, ``end_s``] (s on the track file's
    axis) more than its slow time scale T_s before the first or after the last fix: there the slow part s(x, t)
    has relaxed to its prior (Matérn-3/2 correlation (1 + √3 Δt/T_s) e^{−√3 Δt/T_s} ≤ 0.48 at Δt = T_s), so
    ``what`` (the forecast, a map) rests on the steady and periodic parts only."""
    kernel = getattr(getattr(field, "params", None), "kernel", None)
    span = (getattr(field, "data_summary", None) or {}).get("time_span_s")
    if not getattr(kernel, "has_slow", False) or not span:
        return
    scale_s = float(np.exp(kernel.log_slow_time_scale_s))
    before, after = float(span[0]) - start_s, end_s - float(span[1])
    if max(before, after) > scale_s:
        side = (f"{format_duration(after)} after the data's last fix" if after >= before
                else f"{format_duration(before)} before the data's first fix")
        warnings.warn(f"{what} reaches {side}, more than the slow part's time scale {format_duration(scale_s)}: "
                      f"there the slow part is the prior's (no slow change known), so {what} rests on the "
                      "steady and periodic parts only", SupportWarning, stacklevel=stacklevel)


@dataclass(frozen=True)
class PathSupport:
    """Support along forecast mean paths, (R, T) each: ``variance_ratio``, ``distance_to_data_m`` (m) and
    ``outside_support`` (True from the first time the mean lies outside the support)."""

    variance_ratio: np.ndarray
    distance_to_data_m: np.ndarray
    outside_support: np.ndarray


def path_support(field: Any, means_m, times_s=None) -> PathSupport:
    """:class:`PathSupport` of mean paths ``means_m`` (R, T, d) in metres; ``times_s`` (R, T) their absolute
    times (s), needed by a time-varying field."""
    means = np.asarray(means_m, dtype=np.float64)
    points = means.reshape(-1, means.shape[-1])
    times = None if times_s is None else np.asarray(times_s, dtype=np.float64).ravel()
    ratio = np.asarray(field.local_variance_ratio(points, times)).reshape(means.shape[:-1])
    distance = np.asarray(field.distance_to_data_m(points)).reshape(means.shape[:-1])
    outside = np.logical_or.accumulate(ratio > SUPPORT_VARIANCE_FRACTION, axis=1)
    return PathSupport(ratio, distance, outside)


def warn_left_support(names, times_s, support: PathSupport) -> None:
    """A SupportWarning for each release whose mean path *leaves* the support during the forecast."""
    for r, name in enumerate(names):
        row = support.outside_support[r]
        if row.any() and not row[0]:
            t = int(np.argmax(row))
            warnings.warn(f"release {name}: the mean path leaves the model's data support after "
                          f"{format_duration(float(times_s[t]))} ({point_support_text(support.distance_to_data_m[r, t], support.variance_ratio[r, t])}); "
                          "outputs from then on are marked outside_support", SupportWarning, stacklevel=3)
