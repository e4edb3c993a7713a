"""Forecast windows: start fixes of tracks and their observed future on one output-time grid.

Every fix of a track that has a fix before it is a possible *start*; the observed position at a
lead time is the track interpolated linearly in time, used only where the track covers that time.
Shared by the forecast scores (``diagnostics.skill``) and the K/τ calibration (``dynamics.calibrate``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..units import format_duration, parse_duration_s

__all__ = ["Windows", "output_times_s", "forecast_windows", "evenly_spaced", "track_slices"]


@dataclass(frozen=True)
class Windows:
    """Start fixes of held-out tracks and the observed positions at the forecast times.

    R starts, T output times (relative, seconds after the start), d dimensions.
    ``start_m`` (R, d) start fixes; ``previous_velocity_m_s`` (R, d) from the two fixes before
    the start; ``times_s`` (T,); ``observed_m`` (R, T, d) interpolated track (NaN where not
    covered); ``length_m`` (R, T) observed track length from the start; ``valid`` (R, T);
    ``obs_var_factor`` (R, T) the interpolated fix's error variance in units of σ_pos²
    ((1 − w)² + w² for weight w between the two bracketing fixes); ``track_index`` (R,);
    ``start_time_s`` (R,) the start fixes' own times (s, the tracks' time axis).
    """

    start_m: np.ndarray
    previous_velocity_m_s: np.ndarray
    times_s: np.ndarray
    observed_m: np.ndarray
    length_m: np.ndarray
    valid: np.ndarray
    obs_var_factor: np.ndarray
    track_index: np.ndarray
    start_time_s: np.ndarray


def output_times_s(horizon_s: float, every_s: float, *, include=()) -> np.ndarray:
    """The one output-time grid of every forecast (s since the release, increasing, from 0).

    0, every_s, 2·every_s, … up to ``horizon_s`` (within 1e-9 relative), then ``horizon_s`` itself and
    the times in ``include`` (e.g. the scoring horizons) when they are not on the grid; rounded to 1 µs
    so that grid points and requested times that differ by rounding coincide.
    """
    count = int(np.floor(float(horizon_s) / float(every_s) * (1.0 + 1e-9)))
    grid = float(every_s) * np.arange(count + 1)
    extra = np.asarray(list(include), dtype=float).ravel()
    return np.unique(np.round(np.concatenate([grid, [float(horizon_s)], extra]), 6))


MAX_OUTPUT_TIMES = 100_000   # output times a forecast, connectivity or back-tracking run may ask for


def output_times_from_text(span_text: str, every_text: str, *, names: tuple[str, str] = ("--horizon", "--every"),
                           limit: int = MAX_OUTPUT_TIMES) -> np.ndarray:
    """:func:`output_times_s` for a span and an interval given as text with their units (a command's options,
    named by ``names`` in the messages).  InputError when either is not a positive duration, when the interval
    is longer than the span (the only outputs would be the start and the end, which is rarely what was meant),
    or when more than ``limit`` outputs would result."""
    span_name, every_name = names
    span = parse_duration_s(span_text, what=span_name)
    every = parse_duration_s(every_text, what=every_name)
    if not (span > 0 and every > 0):
        raise InputError(f"{span_name} and {every_name} must be positive, got {span_text!r} and {every_text!r}")
    if every > span * (1.0 + 1e-9):
        raise InputError(f"{every_name} {every_text} is longer than {span_name} {span_text} (outputs would fall at "
                         f"0 and {format_duration(span)} only); give {every_name} at most {span_text}")
    if span / every > limit:
        raise InputError(f"{span_name} {span_text} every {every_text} asks for more than {limit} outputs")
    return output_times_s(span, every)


def track_slices(track_id: np.ndarray) -> list[slice]:
    """Contiguous runs of equal track id (tracks are sorted by track, then time)."""
    ids = np.asarray(track_id)
    change = np.flatnonzero(ids[1:] != ids[:-1]) + 1
    bounds = np.concatenate([[0], change, [ids.size]])
    return [slice(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:])]


def _track_windows(t: np.ndarray, x: np.ndarray, rel_times: np.ndarray, first_horizon_s: float):
    """Windows of one track (n fixes): starts are fixes 1..n−1 reaching ``first_horizon_s``."""
    starts = np.flatnonzero((np.arange(t.size) >= 1) & (t + first_horizon_s <= t[-1] + 1e-9))
    if starts.size == 0:
        return None
    target = t[starts, None] + rel_times[None, :]
    valid = target <= t[-1] + 1e-9
    clipped = np.minimum(target, t[-1])
    seg = np.clip(np.searchsorted(t, clipped, side="right") - 1, 0, t.size - 2)
    w = (clipped - t[seg]) / (t[seg + 1] - t[seg])
    observed = x[seg] * (1.0 - w)[..., None] + x[seg + 1] * w[..., None]
    steps = np.linalg.norm(np.diff(x, axis=0), axis=1)
    cum = np.concatenate([[0.0], np.cumsum(steps)])
    length = cum[seg] + w * steps[seg] - cum[starts, None]
    observed[~valid] = np.nan
    length[~valid] = np.nan
    velocity = (x[starts] - x[starts - 1]) / (t[starts] - t[starts - 1])[:, None]
    return x[starts], velocity, observed, length, valid, (1.0 - w) ** 2 + w ** 2, t[starts]


def forecast_windows(tracks, horizons_s, *, step_s: float | None = None,
                     max_starts: int | None = 2000) -> Windows:
    """All (track, start-fix) pairs of ``tracks`` and their observed future, on one time grid.

    ``step_s`` is the output spacing for the Liu–Weisberg sums (default: the median fix
    interval, at least 1/96 of the longest horizon).  When more than ``max_starts`` pairs reach
    the shortest horizon, an evenly spaced subset of them is used (deterministic).
    """
    horizons = np.asarray(horizons_s, float)
    if horizons.size == 0 or np.any(~np.isfinite(horizons)) or np.any(horizons <= 0):
        raise InputError(f"horizons must be positive durations, got {list(horizons)}")
    t_all, x_all = np.asarray(tracks.time_s, float), np.asarray(tracks.position_m, float)
    slices = track_slices(tracks.track_id)
    if step_s is None:
        dts = np.concatenate([np.diff(t_all[s]) for s in slices]) if slices else np.array([])
        step_s = float(np.median(dts)) if dts.size else horizons.min()
        step_s = max(step_s, horizons.max() / 96.0)
    rel = output_times_s(horizons.max(), step_s, include=horizons)[1:]
    parts, index = [], []
    for k, sl in enumerate(slices):
        if sl.stop - sl.start >= 2:
            win = _track_windows(t_all[sl], x_all[sl], rel, horizons.min())
            if win is not None:
                parts.append(win)
                index.append(np.full(win[0].shape[0], k))
    if not parts:
        raise InputError(f"{tracks.source}: no held-out track is long enough to score a "
                         f"{format_duration(horizons.min())} forecast (needs two fixes before and coverage after)")
    arrays = [np.concatenate(col) for col in zip(*parts)]
    track_index = np.concatenate(index)
    keep = evenly_spaced(track_index.size, max_starts)
    start, vel, obs, length, valid, factor, t0 = (a[keep] for a in arrays)
    return Windows(start, vel, rel, obs, length, valid, factor, track_index[keep], t0)


def _subsample(n: int, max_n: int | None) -> np.ndarray:
    if max_n is None or n <= max_n:
        return np.arange(n)
    return np.unique(np.round(np.linspace(0, n - 1, int(max_n))).astype(int))


def evenly_spaced(n: int, max_n: int | None) -> np.ndarray:
    """Indices of at most ``max_n`` of ``n`` items, evenly spaced and deterministic (all when n ≤ max_n)."""
    if max_n is None or n <= max_n:
        return np.arange(n)
    return np.unique(np.round(np.linspace(0, n - 1, int(max_n))).astype(int))
