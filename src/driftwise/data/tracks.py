"""Tracks: particle fixes read from a file, checked, cleaned and put in a local metric frame.

``read_tracks(path)`` reads CSV (also ``.csv.gz``), Parquet or a CF trajectory
NetCDF file; :func:`tracks_from_frame` takes a pandas DataFrame.  Columns are
found by name (case-insensitive):

=========  ===========================================================
track id   track_id, track, trajectory, drifter, particle, buoy, id, …
time       time_s, time, t, timestamp, datetime — numeric seconds, or
           ISO-8601 (a zone offset is converted to UTC; no zone = UTC,
           with a notice); absolute times become seconds since
           1970-01-01T00:00:00Z
position   x, y[, z] (or x_m, y_m, z_m) in metres, or lon, lat[, z]
           in degrees (projected, see :mod:`driftwise.data.frame`)
=========  ===========================================================

In a CF trajectory NetCDF file the positions are found by their attributes
(standard_name, CF degree units, axis), whatever their names, and fill values
are dropped with a count (see :mod:`driftwise.data.trackcf`).  Positions read as
metres that span less than a metre over more than a minute get a warning
(degrees in columns named x/y, most likely).

Other columns are kept in ``Tracks.extra``.  Problems the user must fix raise
:class:`TrackError` (file, row, column, problem); quality-control steps that
change the data (sorting, dropping impossible or lone fixes, splitting at gaps)
are warnings with a count, format choices are notices; both are kept in
``Tracks.qc``.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass, field, replace
from typing import Any, Iterable, Iterator

import numpy as np
import pandas as pd

from ..errors import InputError
from ..units import format_duration, format_length, format_speed, parse_duration_s, parse_speed_m_s
from .frame import Frame, frame_for
from .observations import MIN_FIT_OBSERVATIONS, Observations, velocity_observations
from .trackcf import read_netcdf_frame
from .trackfile import TrackError, check_path, file_format, read_csv_chunks, read_parquet_frame
from .trackparse import TableParser, detect_layout
from .trackqc import MIN_SPIKE_LIMIT, SPIKE_LIMIT, QCAction, QCLimits, clean, plural, tiny_metre_span

__all__ = ["Tracks", "Frame", "QCAction", "TrackError", "TrackWarning", "TrackNotice", "Observations",
           "read_tracks", "tracks_from_frame", "velocity_observations", "inspect_summary", "format_summary",
           "read_tracks_from_cli", "fit_shortfall"]


class TrackWarning(UserWarning):
    """Fixes were changed while reading: sorted, dropped or split (the message gives the count)."""


class TrackNotice(UserWarning):
    """A format choice made while reading (delimiter, decimal commas, time zone), for information."""


@dataclass(frozen=True, eq=False)
class Tracks:
    """Fixes of particle tracks, sorted by (track, time), positions in a local metric frame.

    Shapes: ``track_id`` (n,) object array of str, contiguous per track;
    ``time_s`` (n,) float64 seconds (since 1970-01-01T00:00:00Z when
    ``time_is_absolute``); ``position_m`` (n, d) float64 metres, d = 2 or 3;
    ``extra`` maps kept column names to (n,) arrays.
    """

    track_id: np.ndarray
    time_s: np.ndarray
    position_m: np.ndarray
    frame: Frame = field(default_factory=Frame)
    source: str = "<memory>"
    qc: tuple[QCAction, ...] = ()
    extra: dict[str, np.ndarray] = field(default_factory=dict)
    time_is_absolute: bool = False

    def __post_init__(self) -> None:
        n = self.time_s.shape[0]
        if self.track_id.shape != (n,) or self.position_m.ndim != 2 or self.position_m.shape[0] != n \
                or self.position_m.shape[1] not in (2, 3):
            raise InputError(f"Tracks needs track_id (n,), time_s (n,), position_m (n, 2|3); got "
                             f"{self.track_id.shape}, {self.time_s.shape}, {self.position_m.shape}")

    @property
    def n_fixes(self) -> int:
        return int(self.time_s.shape[0])

    @property
    def n_tracks(self) -> int:
        return int(self._runs[0].size)

    @property
    def dim(self) -> int:
        return int(self.position_m.shape[1])

    @property
    def unique_ids(self) -> np.ndarray:
        """(n_tracks,) the track ids in order."""
        return self.track_id[self._runs[0]]

    @property
    def track_index(self) -> np.ndarray:
        """(n,) int64: for each fix, the index of its track in ``unique_ids``."""
        starts = self._runs[0]
        return np.repeat(np.arange(starts.size, dtype=np.int64), np.diff(np.r_[starts, self.n_fixes]))

    @functools.cached_property
    def _runs(self) -> tuple[np.ndarray]:
        codes, uniques = pd.factorize(self.track_id)
        starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]]) if codes.size else np.zeros(0, np.int64)
        if starts.size != uniques.size:
            raise InputError("the fixes of each track must be contiguous (sorted by track, then time)")
        return (starts,)

    def segments(self) -> Iterator[tuple[str, np.ndarray, np.ndarray]]:
        """Yield ``(track_id, time_s (m,), position_m (m, d))`` per track (views, not copies)."""
        bounds = np.r_[self._runs[0], self.n_fixes]
        for lo, hi in zip(bounds[:-1], bounds[1:]):
            yield str(self.track_id[lo]), self.time_s[lo:hi], self.position_m[lo:hi]

    def select(self, track_ids: Iterable[str]) -> "Tracks":
        """The tracks named in ``track_ids`` (in this object's order); an unknown id is an InputError."""
        wanted = {str(t) for t in track_ids}
        unknown = wanted - set(self.unique_ids.tolist())
        if unknown:
            raise InputError(f"{self.source}: no track with id {sorted(unknown)[0]!r}")
        keep = pd.Series(self.track_id).isin(wanted).to_numpy()
        return replace(self, track_id=self.track_id[keep], time_s=self.time_s[keep],
                       position_m=self.position_m[keep], extra={k: v[keep] for k, v in self.extra.items()})


# ---------------------------------------------------------------- reading
def read_tracks(path, *, max_speed_m_s: float | None = 5.0, max_gap_s: float | None = None,
                spike_limit: float | None = SPIKE_LIMIT) -> Tracks:
    """Read, check and clean a tracks file (CSV, CSV.GZ, Parquet, CF-trajectory NetCDF).

    ``max_speed_m_s``: fixes implying a faster speed are dropped (None: keep all).
    ``max_gap_s``: a track is split where consecutive fixes are further apart (None: never).
    ``spike_limit``: isolated spikes beyond this many robust deviations are dropped (None or 0: keep all;
    :class:`driftwise.data.trackqc.QCLimits`).
    Raises TrackError for anything the user must fix; see the module docstring.
    """
    p = check_path(path)
    file = str(path)
    kind = file_format(p)
    limits = QCLimits(max_speed_m_s, max_gap_s, spike_limit)
    if kind == "parquet":
        return _from_whole(read_parquet_frame(p, file), file, limits)
    if kind == "netcdf":
        cf = read_netcdf_frame(p, file)
        with cf.naming_observations():
            return _from_whole(cf.frame, file, limits, naive_is_utc=True, notices=cf.notices, show_row=cf.place)
    delimiter, chunks = read_csv_chunks(p, file)
    parser, first_row, notices = None, 2, []
    for chunk in chunks:
        if parser is None:
            parser = TableParser(file, detect_layout(chunk.columns, file), decimal_comma=delimiter == ";")
        parser.add(chunk, first_row)
        first_row += len(chunk)
    if parser is None:
        raise TrackError(file, "has a header row but no data rows")
    if delimiter == ";":
        notices.append(QCAction("semicolon_delimiter", first_row - 2, f"{file}: semicolon-delimited; a decimal "
                                "comma in a number is read as a decimal point"))
    return _build(parser, file, limits, tuple(notices))


def tracks_from_frame(df: pd.DataFrame, *, source: str = "<dataframe>", max_speed_m_s: float | None = 5.0,
                      max_gap_s: float | None = None, spike_limit: float | None = SPIKE_LIMIT) -> Tracks:
    """Tracks from a DataFrame with the same columns a file would have (see the module docstring)."""
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{source}: expected a pandas DataFrame, got {type(df).__name__}")
    return _from_whole(df, source, QCLimits(max_speed_m_s, max_gap_s, spike_limit))


def _from_whole(df, file, limits: QCLimits, *, naive_is_utc: bool = False,
                notices: tuple[QCAction, ...] = (), show_row=None) -> Tracks:
    if df.shape[1] == 0 and df.shape[0] == 0:
        raise TrackError(file, "the table is empty")
    parser = TableParser(file, detect_layout(df.columns, file), naive_is_utc=naive_is_utc)
    parser.add(df.reset_index(drop=True), 2)
    return _build(parser, file, limits, notices, show_row=show_row)


def _build(parser: TableParser, file, limits: QCLimits, notices: tuple[QCAction, ...], *, show_row=None) -> Tracks:
    table = parser.finish()
    if table.lonlat:
        frame, xy = frame_for(table.coords[:, 0], table.coords[:, 1], source=file)
    else:
        frame, xy = Frame(), table.coords
    position = xy if table.z is None else np.column_stack([xy, table.z])
    table.coords = table.z = xy = None  # release the raw coordinates before sorting (large files)
    show = (lambda t: _iso(t)) if table.time_is_absolute else (lambda t: f"{t:g} s")
    cleaned = clean(table.codes, table.labels, table.time_s, position, table.rows, file=file,
                    time_column=parser.layout.time, show_time=show, limits=limits, show_row=show_row)
    tiny = None if table.lonlat else tiny_metre_span(position[cleaned.index], table.time_s[cleaned.index], file)
    actions = notices + table.notices + cleaned.actions + ((tiny,) if tiny else ())
    for action in actions:
        warnings.warn(action.message, TrackWarning if action.level == "warning" else TrackNotice, stacklevel=3)
    idx = cleaned.index
    return Tracks(track_id=np.asarray(cleaned.labels, dtype=object)[cleaned.codes], time_s=table.time_s[idx],
                  position_m=np.ascontiguousarray(position[idx]), frame=frame, source=file, qc=actions,
                  extra={k: v[idx] for k, v in table.extras.items()}, time_is_absolute=table.time_is_absolute)


def read_tracks_from_cli(args) -> Tracks:
    """``read_tracks`` with the command line's ``tracks``, ``--max-speed``, ``--max-gap`` (unit strings) and
    ``--spike-limit`` (a factor)."""

    max_speed = parse_speed_m_s(args.max_speed, what="--max-speed") if args.max_speed is not None else None
    if max_speed is not None and not max_speed > 0:
        raise InputError(f"--max-speed must be positive, not {args.max_speed!r}")
    max_gap = parse_duration_s(args.max_gap, what="--max-gap") if getattr(args, "max_gap", None) else None
    if max_gap is not None and not max_gap > 0:
        raise InputError(f"--max-gap must be positive, not {args.max_gap!r}")
    spike = SPIKE_LIMIT if getattr(args, "spike_limit", None) is None else args.spike_limit
    if spike is not None and not (math.isfinite(spike) and (spike == 0 or spike >= MIN_SPIKE_LIMIT)):
        raise InputError(f"--spike-limit must be 0 (keep every fix) or at least {MIN_SPIKE_LIMIT:g} robust deviations "
                         "(below that it drops ordinary noisy fixes, not spikes), "
                         f"not {spike!r}")
    return read_tracks(args.tracks, max_speed_m_s=max_speed, max_gap_s=max_gap, spike_limit=spike)


def fit_shortfall(tracks: Tracks, *, calibrate: bool = False) -> str | None:
    """Why a fit cannot start from ``tracks``, or None when it can.

    A fit needs MIN_FIT_OBSERVATIONS velocity observations (see
    :mod:`driftwise.data.observations`); a track of m fixes gives m − 1.  The
    cross-validated calibration (``calibrate``) holds whole tracks out, two
    folds, so it needs at least two tracks.
    """
    n_obs = tracks.n_fixes - tracks.n_tracks
    have = (f"{plural(tracks.n_fixes, 'fix')} in {plural(tracks.n_tracks, 'track')} give "
            f"{plural(n_obs, 'velocity observation')} (a track of m fixes gives m - 1)")
    if n_obs < MIN_FIT_OBSERVATIONS:
        return (f"{have}; fit needs at least {MIN_FIT_OBSERVATIONS} to learn its hyperparameters, e.g. one track "
                f"of {MIN_FIT_OBSERVATIONS + 1} fixes or {MIN_FIT_OBSERVATIONS} tracks of 2")
    if calibrate and tracks.n_tracks < 2:
        return (f"{have}; the calibration of K and tau holds whole tracks out (2 folds), so it needs at least 2 "
                "tracks: give more tracks, or --no-calibrate")
    return None


# ---------------------------------------------------------------- inspect
def inspect_summary(tracks: Tracks) -> dict[str, Any]:
    """A JSON-able summary: counts, time span, sampling intervals, speeds, extent, frame and QC actions."""
    obs = velocity_observations(tracks, position_error_m=0.0)
    speed = np.linalg.norm(obs.velocity_m_s, axis=1)
    per_track = np.bincount(tracks.track_index)
    start, end = float(tracks.time_s.min()), float(tracks.time_s.max())
    summary: dict[str, Any] = {
        "source": tracks.source, "n_tracks": tracks.n_tracks, "n_fixes": tracks.n_fixes, "dim": tracks.dim,
        "fixes_per_track": {"min": int(per_track.min()), "median": float(np.median(per_track)),
                            "max": int(per_track.max())},
        "time": {"start_s": start, "end_s": end, "span_s": end - start, "absolute": tracks.time_is_absolute},
        "sampling_interval_s": _stats(obs.dt_s, ("median", "min", "max")),
        "speed_m_s": {f"p{q}": float(np.percentile(speed, q)) for q in (5, 25, 50, 75, 95, 99)}
        | {"max": float(speed.max())},
        "extent_m": {axis: [float(tracks.position_m[:, i].min()), float(tracks.position_m[:, i].max())]
                     for i, axis in enumerate("xyz"[: tracks.dim])},
        "frame": tracks.frame.to_dict(),
        "qc": [{"name": a.name, "count": a.count, "level": a.level, "message": a.message} for a in tracks.qc],
        "extra_columns": sorted(tracks.extra),
    }
    shortfall = fit_shortfall(tracks)
    if shortfall:
        summary["fit_warning"] = f"{tracks.source}: {shortfall}"
    if tracks.time_is_absolute:
        summary["time"].update(start_iso=_iso(start), end_iso=_iso(end))
    if tracks.frame.is_geographic:
        lon, lat = tracks.frame.to_lonlat(tracks.position_m[:, :2])
        summary["extent_lonlat_deg"] = {"lon": [float(lon.min()), float(lon.max())],
                                        "lat": [float(lat.min()), float(lat.max())]}
    return summary


def format_summary(summary: dict[str, Any]) -> str:
    """The summary as a few lines of text for a terminal."""
    t, dt, v = summary["time"], summary["sampling_interval_s"], summary["speed_m_s"]
    when = (f"{t['start_iso']} to {t['end_iso']}" if t["absolute"]
            else f"{format_duration(t['start_s'])} to {format_duration(t['end_s'])}")
    fpt = summary["fixes_per_track"]
    lines = [
        f"{summary['source']}: {summary['n_tracks']} track{'s' * (summary['n_tracks'] != 1)}, "
        f"{summary['n_fixes']} fixes, {summary['dim']}-D positions",
        f"  fixes/track  median {fpt['median']:g} (min {fpt['min']}, max {fpt['max']})",
        f"  time         {when} ({format_duration(t['span_s'])})",
        f"  sampling     median {format_duration(dt['median'])} (min {format_duration(dt['min'])}, "
        f"max {format_duration(dt['max'])})",
        f"  speed        p5 {format_speed(v['p5'])}, p50 {format_speed(v['p50'])}, p95 {format_speed(v['p95'])}, "
        f"max {format_speed(v['max'])}",
        "  extent       " + ", ".join(f"{k} {format_length(lo)} … {format_length(hi)} ({format_length(hi - lo)} wide)"
                                     for k, (lo, hi) in summary["extent_m"].items()),
        "  frame        " + _frame_text(summary),
    ]
    if summary["extra_columns"]:
        lines.append("  extra        " + ", ".join(summary["extra_columns"]))
    lines.append("  QC           " + ("none needed" if not summary["qc"] else f"{len(summary['qc'])} actions"))
    lines += [f"    - [{a['level']}] {a['message']}" for a in summary["qc"]]
    if summary.get("fit_warning"):
        lines.append(f"  fit          warning: {summary['fit_warning']}")
    return "\n".join(lines)


def _frame_text(summary: dict[str, Any]) -> str:
    frame = summary["frame"]
    if frame["kind"] != "lonlat":
        return "metric (positions given in metres)"
    box = summary["extent_lonlat_deg"]
    return (f"lon/lat projected to local metres (azimuthal equidistant, WGS 84) centred at "
            f"{_deg(frame['lat0_deg'], 'NS')} {_deg(frame['lon0_deg'], 'EW')}; data lon "
            f"{box['lon'][0]:.4f}…{box['lon'][1]:.4f}, lat {box['lat'][0]:.4f}…{box['lat'][1]:.4f}")


def _deg(value: float, hemispheres: str) -> str:
    return f"{abs(value):.5f}°{hemispheres[0] if value >= 0 else hemispheres[1]}"


def _stats(values: np.ndarray, names: tuple[str, ...]) -> dict[str, float]:
    funcs = {"median": np.median, "min": np.min, "max": np.max}
    return {name: float(funcs[name](values)) for name in names}


def _iso(seconds: float) -> str:
    """Seconds since the Unix epoch → ISO-8601 UTC with a Z (to the second, or finer when needed)."""
    stamp = pd.Timestamp(round(seconds * 1e6), unit="us", tz="UTC")
    text = stamp.strftime("%Y-%m-%dT%H:%M:%S")
    if stamp.microsecond:
        text += f".{stamp.microsecond:06d}".rstrip("0")
    return text + "Z"

def in_model_frame(tracks, frame):
    """``tracks`` with positions in the model's ``frame``.

    Each lon/lat file is projected about its own centre, so held-out tracks read from another
    file must be re-projected (via lon/lat) before they compare metre for metre with the model.
    A metric model frame, or tracks already in it, are returned unchanged; lon/lat tracks
    against a metric model are an InputError.
    """
    mine = getattr(tracks, "frame", None)
    if frame is None or mine is None or mine == frame:
        return tracks
    if getattr(frame, "kind", "metric") != "lonlat" or getattr(mine, "kind", "metric") != "lonlat":
        if getattr(frame, "kind", "metric") == getattr(mine, "kind", "metric") == "metric":
            return tracks
        raise InputError(f"{tracks.source}: the tracks are in a {mine.kind} frame but the model's frame is "
                         f"{frame.kind}; give tracks with the same kind of positions the model was fitted on")
    lon, lat = mine.to_lonlat(tracks.position_m[:, :2])
    xy = np.asarray(frame.from_lonlat(lon, lat), dtype=float)
    position = np.concatenate([xy, tracks.position_m[:, 2:]], axis=1)
    return replace(tracks, position_m=position, frame=frame)
