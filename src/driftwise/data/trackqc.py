"""Quality control of fixes: order, duplicates, impossible speeds, gaps, lone fixes.

Each step that changes the data is recorded as a :class:`QCAction` with a count
and a one-line message; :mod:`driftwise.data.tracks` emits it as a warning and keeps
it on the Tracks (``driftwise inspect`` lists them).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

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


@dataclass(frozen=True)
class Cleaned:
    """The result of :func:`clean`: ``index`` into the parsed arrays, in (track, time) order."""

    index: np.ndarray
    codes: np.ndarray
    labels: list[str]
    actions: tuple[QCAction, ...]


def clean(codes: np.ndarray, labels: list[str], time_s: np.ndarray, position_m: np.ndarray, rows: np.ndarray, *,
          file: str, time_column: str, show_time: Callable[[float], str], max_speed_m_s: float | None,
          max_gap_s: float | None, show_row: Callable[[int], str] | None = None) -> Cleaned:
    """Sort by (track id, time), refuse duplicated times, drop impossible fixes, split at gaps, drop lone fixes.

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
    if max_speed_m_s is not None and math.isfinite(max_speed_m_s):
        keep, action = _speed_filter(track, time_s, position_m, index, max_speed_m_s, file)
        index, track, time_s = index[keep], track[keep], time_s[keep]
        actions += [action] if action else []
    if max_gap_s is not None:
        track, labels, action = _split_gaps(track, time_s, labels, max_gap_s, file)
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
