"""The data's own scales, and the defaults and plausibility checks that follow from them.

A 1 m tank sampled at 2 Hz and an ocean basin sampled every 30 min differ by six orders of
magnitude in length and four in time, so no fixed default (1 h calibration lags, 10 m
position error, 6 h forecast horizons) can suit both.  :func:`data_scales` measures, from
a Tracks object (``track_id`` (n,), ``time_s`` (n,) s, ``position_m`` (n, d) m):

* the median sampling interval Δt between consecutive fixes of a track (s),
* the median and the longest track duration D (s),
* the extent: the side lengths of the bounding box (m) and the longest side L,
* the median step |x_{i+1} − x_i| between consecutive fixes (m) and the median speed (m/s),

and derives

* calibration lags: at most 5, geometric from 2Δt up to D/3 (D the median duration),
  rounded to whole multiples of Δt (transitions then fall on fixes, no interpolation);
  for hourly drifters tracked for 3 days: 2, 4, 7, 13, 24 h;
* forecast horizons for scoring: D/12, D/6 and D/3 rounded to multiples of Δt, at least Δt
  (3-day hourly tracks: 6, 12, 24 h — the previous fixed defaults);
* map spacing: a 1-2-5 step giving about 80 cells over L;
* bounds for the calibrated diffusivity, 1e-5 … 1e3 × s²/Δt with s the median step
  (the diffusivity of a random walk with that step is s²/(2Δt) per component, Einstein
  1905), and for the decorrelation time, min(1 s, Δt/10) … 30 d.

:func:`check_position_error` and :func:`check_horizons` refuse given values that cannot be
meant for these data (an InputError naming the option and the data's scale).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..units import format_duration, format_length

__all__ = ["DataScales", "check_horizons", "check_horizons_s", "check_position_error", "data_scales", "map_spacing_m",
           "resolve_horizons"]

MAX_LAGS = 5
MAP_CELLS = 80
TAU_MAX_S = 30 * 86400.0


@dataclass(frozen=True)
class DataScales:
    """Measured scales of a track set (SI units) and the defaults derived from them (module docstring)."""

    n_tracks: int
    n_fixes: int
    dim: int
    sampling_interval_s: float
    median_duration_s: float
    max_duration_s: float
    extent_m: tuple[float, ...]
    median_step_m: float
    median_speed_m_s: float

    @property
    def longest_side_m(self) -> float:
        return max(self.extent_m)

    @property
    def calibration_lags_s(self) -> tuple[float, ...]:
        """≤ 5 lags, geometric from 2Δt to D/3, whole multiples of Δt (module docstring)."""
        dt = self.sampling_interval_s
        top = max(self.median_duration_s / 3.0, dt)
        low = min(2.0 * dt, top)
        return _multiples(np.geomspace(low, top, MAX_LAGS), dt)

    @property
    def horizons_s(self) -> tuple[float, ...]:
        """D/12, D/6, D/3 rounded to whole multiples of Δt (at least Δt)."""
        top = self.median_duration_s / 3.0
        return _multiples(np.array([top / 4.0, top / 2.0, top]), self.sampling_interval_s)

    @property
    def map_spacing_m(self) -> float:
        """A 1-2-5 step giving about 80 cells over the longest side (:func:`map_spacing_m`)."""
        return map_spacing_m(self.longest_side_m)

    @property
    def diffusivity_bounds_m2_s(self) -> tuple[float, float]:
        """(1e-5, 1e3) × s²/Δt, s the median step (m), Δt the sampling interval (s)."""
        scale = self.median_step_m**2 / self.sampling_interval_s
        scale = scale if scale > 0 else 1.0
        return 1e-5 * scale, 1e3 * scale

    @property
    def decorrelation_time_bounds_s(self) -> tuple[float, float]:
        return min(1.0, 0.1 * self.sampling_interval_s), TAU_MAX_S

    def to_dict(self) -> dict:
        return {"n_tracks": self.n_tracks, "n_fixes": self.n_fixes, "dim": self.dim,
                "sampling_interval_s": self.sampling_interval_s, "median_duration_s": self.median_duration_s,
                "max_duration_s": self.max_duration_s, "extent_m": list(self.extent_m),
                "median_step_m": self.median_step_m, "median_speed_m_s": self.median_speed_m_s,
                "calibration_lags_s": list(self.calibration_lags_s), "horizons_s": list(self.horizons_s),
                "map_spacing_m": self.map_spacing_m}


def _multiples(values: np.ndarray, unit: float) -> tuple[float, ...]:
    """``values`` rounded to whole multiples (≥ 1) of ``unit``, sorted, duplicates dropped."""
    counts = np.unique(np.maximum(np.rint(np.asarray(values) / unit), 1.0))
    return tuple(float(c * unit) for c in counts)


def nice_step(value: float) -> float:
    """The 1-2-5 number (…, 0.5, 1, 2, 5, 10, …) nearest ``value`` on a log scale; 1 for value ≤ 0."""
    if not (math.isfinite(value) and value > 0):
        return 1.0
    exponent = math.floor(math.log10(value))
    mantissa = value / 10**exponent
    best = min((1.0, 2.0, 5.0, 10.0), key=lambda m: abs(math.log(mantissa / m)))
    return best * 10**exponent


def map_spacing_m(longest_side_m: float) -> float:
    """The default map step for data spanning ``longest_side_m``: the 1-2-5 number nearest
    L/80 (a 1 m tank: 1 cm; a 40 km bay: 500 m)."""
    return nice_step(longest_side_m / MAP_CELLS)


# ---------------------------------------------------------------- measuring
def data_scales(tracks) -> DataScales:
    """The scales of ``tracks`` (a Tracks: contiguous tracks sorted by time); InputError without a
    single pair of consecutive fixes (nothing to measure a sampling interval from)."""
    time = np.asarray(tracks.time_s, dtype=np.float64)
    position = np.asarray(tracks.position_m, dtype=np.float64)
    index = _track_index(tracks)
    same = index[1:] == index[:-1]
    dt = np.diff(time)[same]
    if dt.size == 0:
        raise InputError(f"{getattr(tracks, 'source', 'tracks')}: no track has two fixes, so the data have no "
                         "sampling interval or step length")
    step = np.linalg.norm(np.diff(position, axis=0)[same], axis=1)
    durations = _durations(time, index)
    positive = dt > 0
    speed = float(np.median(step[positive] / dt[positive])) if positive.any() else 0.0
    return DataScales(n_tracks=int(durations.size), n_fixes=int(time.size), dim=int(position.shape[1]),
                      sampling_interval_s=float(np.median(dt)), median_duration_s=float(np.median(durations)),
                      max_duration_s=float(durations.max()), extent_m=tuple(float(v) for v in np.ptp(position, 0)),
                      median_step_m=float(np.median(step)), median_speed_m_s=speed)


def _track_index(tracks) -> np.ndarray:
    index = getattr(tracks, "track_index", None)
    if index is not None:
        return np.asarray(index)
    ids = np.asarray(tracks.track_id)
    change = np.r_[True, ids[1:] != ids[:-1]]
    return np.cumsum(change) - 1


def _durations(time: np.ndarray, index: np.ndarray) -> np.ndarray:
    """(n_tracks,) last − first time of each track (s)."""
    starts = np.flatnonzero(np.r_[True, index[1:] != index[:-1]])
    ends = np.r_[starts[1:], time.size] - 1
    return time[ends] - time[starts]


# ---------------------------------------------------------------- plausibility
def check_position_error(position_error_m: float, scales: DataScales, *, option: str = "--position-error") -> None:
    """Refuse a position error larger than the median step between fixes: such noise would dominate
    every velocity, so it is almost certainly a unit slip (e.g. 10 m for a tank measured in mm)."""
    if position_error_m > scales.median_step_m:
        raise InputError(f"{option} {format_length(position_error_m)} is larger than the typical step between "
                         f"fixes of these data ({format_length(scales.median_step_m)}, median); give the "
                         f"standard deviation of one fix per axis, or leave it out to estimate it from the tracks")


def check_horizons(horizons_s: Iterable[float], scales: DataScales, *, option: str = "--horizons") -> None:
    """Refuse a horizon shorter than the sampling interval (nothing observed to score it against)."""
    check_horizons_s(horizons_s, scales.sampling_interval_s, option=option)


def check_horizons_s(horizons_s: Iterable[float], sampling_interval_s: float | None, *, option: str) -> None:
    """Refuse a horizon shorter than ``sampling_interval_s`` (the median fix interval of the data, e.g. a
    model's ``data_summary["median_dt_s"]``); nothing is checked when the interval is unknown."""
    if not sampling_interval_s:
        return
    values = [float(h) for h in horizons_s]
    short = [h for h in values if h < sampling_interval_s * (1 - 1e-9)]
    if short:
        raise InputError(f"{option}: {format_duration(min(short))} is shorter than the sampling interval of these "
                         f"data ({format_duration(sampling_interval_s)}, median); a unit may be missing "
                         f"(a bare number means seconds)")


def resolve_horizons(horizons_s, tracks, *, option: str = "--horizons") -> list[float]:
    """The given horizons (s), positive and checked against ``tracks`` (:func:`check_horizons`), or,
    when None, the tracks' own (:attr:`DataScales.horizons_s`)."""
    if horizons_s is not None and (len(horizons_s) == 0 or min(horizons_s) <= 0):
        raise InputError(f"{option}: give positive durations such as 6h,12h,24h")
    scales = data_scales(tracks)
    chosen = list(scales.horizons_s) if horizons_s is None else [float(h) for h in horizons_s]
    check_horizons(chosen, scales, option=option)
    return chosen
