"""Absolute times of a model's time axis: the origin and ISO-8601 UTC text.

A model fitted to tracks with absolute (ISO-8601) times keeps seconds since the Unix epoch
1970-01-01T00:00:00Z on its time axis (``tracks.Tracks.time_is_absolute``); its metadata then
records ``time_origin_utc``.  A model fitted to relative times has no origin, and no absolute
time is ever invented for it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import InputError
from ..units import parse_duration_s

UNIX_EPOCH_UTC = "1970-01-01T00:00:00Z"


def origin_datetime64(origin_utc: str) -> np.datetime64:
    """The origin as numpy datetime64[us] (UTC); ``origin_utc`` is ISO-8601 ending in Z."""
    text = str(origin_utc)
    try:
        if not text.endswith("Z"):
            raise ValueError("no Z")
        return np.datetime64(text[:-1], "us")
    except ValueError:
        raise InputError(f"time origin {origin_utc!r}: expected an ISO-8601 UTC time ending in Z, "
                         "e.g. 1970-01-01T00:00:00Z") from None


def iso_utc(origin_utc: str, seconds: Any) -> Any:
    """ISO-8601 UTC text (``YYYY-MM-DDThh:mm:ssZ``; with milliseconds when not whole seconds) of ``origin + seconds``.

    ``seconds``: a number or an array (any shape) of seconds since the origin; returns a str or
    nested lists of str of the same shape.  Rounded to the microsecond (numpy datetime64[us]).
    """
    values = np.asarray(seconds, dtype=np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("iso_utc: times must be finite seconds")
    micro = np.round(values * 1e6).astype("int64")
    stamps = origin_datetime64(origin_utc) + micro.astype("timedelta64[us]")
    text = np.where(micro % 1_000_000 == 0, np.datetime_as_string(stamps, unit="s"),
                    np.datetime_as_string(stamps, unit="ms"))
    text = np.char.add(text.astype(str), "Z")
    return str(text) if text.ndim == 0 else text.tolist()


def cf_time_units(origin_utc: str) -> str:
    """CF time units ``seconds since YYYY-MM-DDThh:mm:ssZ`` for the origin (CF-1.11 §4.4, UDUNITS syntax)."""
    return "seconds since " + iso_utc(origin_utc, 0.0)


def default_start_time_s(data_summary: dict | None) -> float:
    """Release time for releases given without one: the model's last velocity observation (the midpoint of
    its last track segment, ``time_span_s[1]``) when the model knows its time origin, so that a forecast
    starts where the data end; 0 on a relative time axis (and for model files without the record)."""
    summary = data_summary or {}
    span = summary.get("time_span_s")
    if summary.get("time_origin_utc") is None or not span:
        return 0.0
    return float(span[1])


def seconds_since_origin(origin_utc: str, text: str) -> float | None:
    """Seconds from the origin to the ISO-8601 time ``text`` (a zone offset is converted; no zone = UTC),
    or None when ``text`` is not an ISO-8601 time."""
    import pandas as pd

    stamp = pd.to_datetime(pd.Series([str(text)]), format="ISO8601", utc=True, errors="coerce")[0]
    if pd.isna(stamp):
        return None
    delta = stamp.as_unit("us") - pd.Timestamp(origin_datetime64(origin_utc), tz="UTC").as_unit("us")
    return delta // pd.Timedelta(microseconds=1) / 1e6


def release_time_s(data_summary: dict | None, text: str | None, *, what: str = "--start") -> float:
    """A release time given as ``text`` → seconds on the model's time axis; None → :func:`default_start_time_s`.

    On an absolute axis (the model knows its time origin): an ISO-8601 time (a zone offset is converted; no
    zone = UTC) or a bare number of seconds on the axis, refused when it lies more than a year from the data
    (``--start 6`` would otherwise mean 1970-01-01T00:00:06Z).  On a relative axis: a duration with its unit on the
    tracks' own axis (``36h``, ``90min``; a bare number is seconds).  Bad text: InputError naming ``what``."""
    summary = data_summary or {}
    if text is None:
        return default_start_time_s(summary)
    origin = summary.get("time_origin_utc")
    if origin is None:
        try:
            return parse_duration_s(text, what=what, bare_unit="s")
        except InputError:
            raise InputError(f"{what} {text!r}: this model was fitted on relative times (no calendar date), so give "
                             "the release time on its time axis as a duration with a unit, e.g. 36h or 5400s") from None
    try:
        bare = float(text)
    except ValueError:
        bare = None
    if bare is not None:
        return _bare_seconds(summary, bare, text, what)
    seconds = seconds_since_origin(origin, text)
    if seconds is None:
        raise InputError(f"{what} {text!r}: this model's time axis is absolute (UTC), so give an ISO-8601 time, "
                         "e.g. 2024-06-03T12:00Z (or seconds since 1970-01-01T00:00Z)")
    return seconds


BARE_SECONDS_REACH_S = 366 * 86400.0   # a bare number on an absolute axis must lie this close to the data


def _bare_seconds(summary: dict, seconds: float, text: str, what: str) -> float:
    """A bare number of seconds on an absolute axis, or InputError when it is far from the data's time span (a
    bare "6" or "36" meant as hours would silently become a 1970 date)."""
    import math

    import pandas as pd

    if not math.isfinite(seconds):
        raise InputError(f"{what} {text!r} is not a finite time")
    span = summary.get("time_span_s")
    if not span or float(span[0]) - BARE_SECONDS_REACH_S <= seconds <= float(span[1]) + BARE_SECONDS_REACH_S:
        return seconds
    lo, hi = float(span[0]), float(span[1])

    def iso(s: float) -> str:
        return pd.Timestamp(s, unit="s", tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ")
    meant = iso(seconds) if abs(seconds) < 1e11 else "a date out of range"
    raise InputError(f"{what} {text!r}: a bare number on this model's absolute time axis is seconds since "
                     f"1970-01-01T00:00Z ({meant}), more than a year from the data ({iso(lo)} to {iso(hi)}); "
                     f"give an ISO-8601 time such as {iso(hi)}")
