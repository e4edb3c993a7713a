"""Quality control of fixes: order, duplicates, impossible speeds, isolated spikes, gaps, lone fixes.

Each step that changes the data is recorded as a :class:`QCAction` with a count
and a one-line message; :mod:`driftwise.data.tracks` emits it as a warning and keeps
it on the Tracks (``driftwise inspect`` lists them).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..units import format_length
from .trackfile import TrackError


@dataclass(frozen=True)
class QCAction:
    """One quality-control step: a short ``name``, how many fixes/tracks it touched, and the message shown.

    ``level`` is ``"warning"`` when data were changed (sorted, dropped, split)
    and ``"notice"`` when a format choice was made (delimiter, time zone).
    """

    name: str
    count: int
    message: str
    level: str = "notice"


SPIKE_LIMIT = 10.0   # robust deviations off the line through its neighbours beyond which a lone fix is a spike
MIN_SPIKE_LIMIT = 3.0   # a smaller factor on the command line is refused: it would cut into ordinary noise
SPIKE_NEIGHBOUR_RATIO = 0.75   # a spike's neighbours lie at most this fraction of its own distance off their lines


@dataclass(frozen=True)
class QCLimits:
    """The limits quality control applies (None: that check is off).

    max_speed_m_s   drop fixes that imply a faster speed (m/s)
    max_gap_s       split a track at longer gaps (s)
    spike_limit     drop an isolated spike: a fix whose distance from the line through its two neighbours (at its
                    own time) exceeds ``spike_limit`` robust standard deviations of that distance in the file and is
                    the largest of its neighbourhood (:func:`_despike`)
    """

    max_speed_m_s: float | None = 5.0
    max_gap_s: float | None = None
    spike_limit: float | None = SPIKE_LIMIT


@dataclass(frozen=True)
class Cleaned:
    """The result of :func:`clean`: ``index`` into the parsed arrays, in (track, time) order."""

    index: np.ndarray
    codes: np.ndarray
    labels: list[str]
    actions: tuple[QCAction, ...]


def clean(codes: np.ndarray, labels: list[str], time_s: np.ndarray, position_m: np.ndarray, rows: np.ndarray, *,
          file: str, time_column: str, show_time: Callable[[float], str], limits: QCLimits,
          show_row: Callable[[int], str] | None = None) -> Cleaned:
    """Sort by (track id, time), refuse duplicated times, drop impossible fixes and isolated spikes, split at gaps,
    drop lone fixes (``limits``: :class:`QCLimits`).

    ``show_row`` names a table row in messages where rows mean nothing to the user (NetCDF observations).
    """
    rank = np.empty(len(labels), dtype=np.int64)
    rank[sorted(range(len(labels)), key=labels.__getitem__)] = np.arange(len(labels))
    labels = sorted(labels)
    track = rank[codes]
    actions = [a for a in (_unsorted(track, time_s, file),) if a]
    index = np.lexsort((time_s, track))
    track, time_s = track[index], time_s[index]
    _refuse_duplicates(track, time_s, rows, index, labels, file=file, column=time_column, show_time=show_time,
                       show_row=show_row)
    if limits.max_speed_m_s is not None and math.isfinite(limits.max_speed_m_s):
        keep, action = _speed_filter(track, time_s, position_m, index, limits.max_speed_m_s, file)
        index, track, time_s = index[keep], track[keep], time_s[keep]
        actions += [action] if action else []
    if limits.spike_limit is not None and limits.spike_limit > 0:
        keep, action = _despike(track, time_s, position_m[index], rows[index], limits.spike_limit, file=file,
                                labels=labels, show_time=show_time, show_row=show_row)
        index, track, time_s = index[keep], track[keep], time_s[keep]
        actions += [action] if action else []
    if limits.max_gap_s is not None:
        track, labels, action = _split_gaps(track, time_s, labels, limits.max_gap_s, file)
        actions += [action] if action else []
    keep, track, labels, action = _drop_lone_fixes(track, labels, file)
    actions += [action] if action else []
    if not keep.any():
        done = "; ".join(a.message.split(": ", 1)[-1] for a in actions if a.level == "warning")
        raise TrackError(file, f"no track has two or more usable fixes after quality control ({done})")
    return Cleaned(index[keep], track, labels, tuple(actions))


def _same_track(track: np.ndarray) -> np.ndarray:
    """(n−1,) True where fix i+1 belongs to the same track as fix i."""
    return track[1:] == track[:-1]


def _unsorted(track: np.ndarray, time_s: np.ndarray, file: str) -> QCAction | None:
    by_track = np.argsort(track, kind="stable")  # file order within each track
    backwards = _same_track(track[by_track]) & (np.diff(time_s[by_track]) < 0)
    count = int(np.count_nonzero(backwards))
    if not count:
        return None
    n_tracks = np.unique(track[by_track][1:][backwards]).size
    return QCAction("unsorted_times", count, f"{file}: sorted the fixes of {plural(n_tracks, 'track')} by time "
                    f"({plural(count, 'fix')} out of order)", "warning")


def _refuse_duplicates(track, time_s, rows, index, labels, *, file, column, show_time, show_row) -> None:
    dup = _same_track(track) & (time_s[1:] == time_s[:-1])
    if dup.any():
        i = int(np.argmax(dup))
        first, second = sorted((int(rows[index[i]]), int(rows[index[i + 1]])))
        both = f"rows {first} and {second}" if show_row is None else f"{show_row(first)} and {show_row(second)}"
        raise TrackError(file, f"track {labels[track[i]]!r} has two fixes at the same time {show_time(time_s[i])} "
                         f"({both}); remove one", row=second, column=column)


def _speed_filter(track, time_s, position_m, index, max_speed_m_s, file) -> tuple[np.ndarray, QCAction | None]:
    """Drop fixes that imply a speed above ``max_speed_m_s`` from the previous kept fix.

    ``position_m[index]`` are the fixes in (track, time) order.  Only tracks
    with a violation are visited.  Each is filtered forwards and backwards (so
    a bad first fix does not condemn the rest) and the pass that keeps more
    fixes wins.
    """
    squared = np.zeros(max(track.size - 1, 0))
    for k in range(position_m.shape[1]):  # one component at a time: no (n, d) temporaries
        squared += np.diff(position_m[:, k][index]) ** 2
    speed = np.sqrt(squared) / np.maximum(np.diff(time_s), 1e-300)
    violation = _same_track(track) & (speed > max_speed_m_s)
    keep = np.ones(track.size, dtype=bool)
    if not violation.any():
        return keep, None
    starts = np.flatnonzero(np.r_[True, ~_same_track(track), True])
    bad_tracks = np.unique(track[1:][violation])
    for t in bad_tracks:
        lo, hi = starts[t], starts[t + 1]
        keep[lo:hi] = _filter_one(time_s[lo:hi], position_m[index[lo:hi]], max_speed_m_s)
    dropped = int(np.count_nonzero(~keep))
    fastest = float(speed[violation].max())
    return keep, QCAction("impossible_speed", dropped, f"{file}: dropped {plural(dropped, 'fix')} implying speeds "
                          f"above {max_speed_m_s:g} m/s (fastest {fastest:.3g} m/s) in "
                          f"{plural(bad_tracks.size, 'track')}", "warning")


def _filter_one(time_s: np.ndarray, position_m: np.ndarray, max_speed_m_s: float) -> np.ndarray:
    forward = _keep_reachable(time_s, position_m, max_speed_m_s)
    backward = _keep_reachable(-time_s[::-1], position_m[::-1], max_speed_m_s)[::-1]
    return backward if backward.sum() > forward.sum() else forward


def _keep_reachable(time_s: np.ndarray, position_m: np.ndarray, max_speed_m_s: float) -> np.ndarray:
    keep = np.zeros(time_s.size, dtype=bool)
    keep[0] = True
    times, points, anchor = time_s.tolist(), position_m.tolist(), 0
    for i in range(1, len(times)):
        if math.dist(points[i], points[anchor]) <= max_speed_m_s * (times[i] - times[anchor]):
            keep[i], anchor = True, i
    return keep


def spike_deviations_m(track: np.ndarray, time_s: np.ndarray, position_m: np.ndarray) -> np.ndarray:
    """(n,) distance (m) of each fix from the straight line through its two neighbours of the same track, taken at
    the fix's own time (linear interpolation in time); NaN at the ends of a track."""
    out = np.full(track.size, np.nan)
    if track.size < 3:
        return out
    inner = (track[1:-1] == track[:-2]) & (track[1:-1] == track[2:])
    span = time_s[2:] - time_s[:-2]
    w = np.divide(time_s[1:-1] - time_s[:-2], span, out=np.full(span.shape, 0.5), where=span > 0)
    squared = np.zeros(track.size - 2)
    for k in range(position_m.shape[1]):   # one component at a time: no (n, d) temporaries
        line = position_m[:-2, k] + w * (position_m[2:, k] - position_m[:-2, k])
        squared += (position_m[1:-1, k] - line) ** 2
    out[1:-1] = np.where(inner, np.sqrt(squared), np.nan)
    return out


def _despike(track, time_s, position_m, rows, limit, *, file, labels, show_time, show_row) -> tuple[np.ndarray,
                                                                                                     QCAction | None]:
    """Drop isolated spikes (a Hampel-type rule on the deviation from the neighbours; Hampel 1974, "The influence
    curve and its role in robust estimation", JASA 69, 383, for the median-absolute-deviation scale).

    δ_i = :func:`spike_deviations_m`; the scale is s = 1.4826 · median δ over the file (the s.d. of a normal
    variable from its median absolute value); fix i is a spike when δ_i > ``limit`` · s and it stands alone: each
    neighbour's δ is at most SPIKE_NEIGHBOUR_RATIO · δ_i (a spike of size D moves each neighbour's line by about
    D/2, so only its centre is dropped, while a path that really curves, such as a drifter circling an eddy core
    at coarse fixes, bends at every fix by about the same amount and is kept).  For white position noise of s.d. σ
    per axis δ is about 1.2σ√d-sized, so at the default limit of 10 a clean file loses nothing (the chance of one
    such δ under Gaussian noise is below 1e-60).  ``position_m`` and ``rows`` are in (track, time) order."""
    delta = spike_deviations_m(track, time_s, position_m)
    keep = np.ones(track.size, dtype=bool)
    finite = delta[np.isfinite(delta)]
    scale = 1.4826 * float(np.median(finite)) if finite.size >= 10 else 0.0
    if not scale > 0:
        return keep, None
    padded = np.concatenate([[-np.inf], np.nan_to_num(delta, nan=-np.inf), [-np.inf]])
    isolated = np.maximum(padded[:-2], padded[2:]) <= SPIKE_NEIGHBOUR_RATIO * padded[1:-1]
    spike = np.isfinite(delta) & (delta > limit * scale) & isolated
    if not spike.any():
        return keep, None
    keep[spike] = False
    first = int(np.argmax(spike))
    row = int(rows[first])
    where = f"row {row}" if show_row is None else show_row(row)
    count = int(np.count_nonzero(spike))
    return keep, QCAction("isolated_spike", count, f"{file}: dropped {plural(count, 'isolated spike')} (a fix more "
                          f"than {limit:g} × {format_length(scale)} off the line through its neighbours, the file's "
                          f"robust spread of that distance), the first in track {labels[track[first]]!r} at "
                          f"{show_time(time_s[first])} ({where}, {format_length(float(delta[first]))} off); "
                          "--spike-limit sets the factor, 0 keeps every fix", "warning")


def tiny_metre_span(position_m: np.ndarray, time_s: np.ndarray, file: str) -> QCAction | None:
    """A warning when positions read as metres span less than 1 m over more than a minute at a crawl.

    The horizontal span is the diagonal of the bounding box of ``position_m[:, :2]`` (n, d) in metres; the
    speed is the median of |Δx|/Δt between consecutive rows.  Degrees read as metres give a drifter at
    0.1–1 m/s a "speed" of 1e-6–1e-5, while particles in a laboratory tank move faster than 1e-4 m/s; so
    the warning needs a span under 1 m, a duration over 60 s and a median speed under 1e-4 m/s.
    """
    if position_m.shape[0] < 2:
        return None
    span_m = float(np.hypot(*np.ptp(position_m[:, :2], axis=0)))
    duration_s = float(np.ptp(time_s))
    dt = np.diff(time_s)
    step = np.linalg.norm(np.diff(position_m[:, :2], axis=0), axis=1)
    moving = dt > 0
    speed = float(np.median(step[moving] / dt[moving])) if moving.any() else 0.0
    if not (span_m < 1.0 and duration_s > 60.0 and speed < 1e-4):
        return None
    return QCAction("tiny_metre_span", int(position_m.shape[0]), f"{file}: the positions, read as metres, span "
                    f"only {span_m:.3g} m over {duration_s:.6g} s (median speed {speed:.2g} m/s); if they are "
                    "longitude/latitude in degrees, name the columns lon/lat (NetCDF: units degrees_east/"
                    "degrees_north)", "warning")


def _split_gaps(track, time_s, labels, max_gap_s, file):
    gap = _same_track(track) & (np.diff(time_s) > max_gap_s)
    if not gap.any():
        return track, labels, None
    start = np.r_[True, ~_same_track(track) | gap]
    segment = np.cumsum(start) - 1
    parents = track[start]
    taken, new_labels, part = set(labels), [], {}
    for parent in parents.tolist():
        part[parent] = part.get(parent, 0) + 1
        label = labels[parent] if part[parent] == 1 else f"{labels[parent]}#{part[parent]}"
        while part[parent] > 1 and label in taken:
            label += "#"
        taken.add(label)
        new_labels.append(label)
    n_gaps, n_tracks = int(gap.sum()), np.unique(track[1:][gap]).size
    return segment, new_labels, QCAction("gap_split", n_gaps, f"{file}: split {plural(n_tracks, 'track')} at "
                                         f"{plural(n_gaps, 'gap')} longer than {max_gap_s:g} s", "warning")


def _drop_lone_fixes(track, labels, file):
    counts = np.bincount(track, minlength=len(labels))
    lone = counts == 1
    keep = ~lone[track]
    if not lone.any():
        return keep, track, labels, None
    survivors = np.flatnonzero(~lone)
    renumber = np.full(len(labels), -1, dtype=np.int64)
    renumber[survivors] = np.arange(survivors.size)
    n = int(lone.sum())
    return keep, renumber[track[keep]], [labels[i] for i in survivors], QCAction(
        "single_fix_tracks", n, f"{file}: dropped {plural(n, 'track')} with a single fix", "warning")


def plural(count: int, noun: str) -> str:
    """``3 fixes``, ``1 track``: a count with its noun in the right number."""
    if count == 1:
        return f"1 {noun}"
    return f"{count} {noun}es" if noun.endswith(("x", "s")) else f"{count} {noun}s"
