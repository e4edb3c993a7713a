"""Absolute times of a model's time axis: the origin and ISO-8601 UTC text.

A model fitted to tracks with absolute (ISO-8601) times keeps seconds since the Unix epoch
1970-01-01T00:00:00Z on its time axis (``tracks.Tracks.time_is_absolute``); its metadata then
records ``time_origin_utc``.  A model fitted to relative times has no origin, and no absolute
time is ever invented for it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .errors import InputError

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
    """ISO-8601 UTC text (``YYYY-MM-DDThh:mm:ssZ``, milliseconds when needed) of ``origin + seconds``.

    ``seconds``: a number or an array (any shape) of seconds since the origin; returns a str or
    nested lists of str of the same shape.  Rounded to the microsecond (numpy datetime64[us]).
    """
    values = np.asarray(seconds, dtype=np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("iso_utc: times must be finite seconds")
    stamps = origin_datetime64(origin_utc) + np.round(values * 1e6).astype("int64").astype("timedelta64[us]")
    whole = np.all(np.round(values * 1e6) % 1_000_000 == 0)
    text = np.char.add(np.datetime_as_string(stamps, unit="s" if whole else "ms"), "Z")
    return str(text) if text.ndim == 0 else text.tolist()


def cf_time_units(origin_utc: str) -> str:
    """CF time units ``seconds since YYYY-MM-DDThh:mm:ssZ`` for the origin (CF-1.11 §4.4, UDUNITS syntax)."""
    return "seconds since " + iso_utc(origin_utc, 0.0)
