"""Columns of a tracks table → typed arrays, with every value checked.

A table arrives whole (a DataFrame, Parquet, NetCDF) or in chunks of text (CSV).
:class:`TableParser` finds the columns by name, converts each chunk as it comes
(so a large CSV is never held as text and as numbers at once) and names the
first bad value by file, row and column.  Rows count as a spreadsheet shows
them: the header is row 1, the first record row 2.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from .trackfile import TrackError, check_header_names
from .trackqc import QCAction, plural

ROLE_NAMES = {
    "track_id": ("track_id", "trackid", "track", "trajectory_id", "trajectory", "traj", "drifter_id", "drifter",
                 "particle_id", "particle", "buoy_id", "buoy", "float_id", "platform_id", "id"),
    "time": ("time_s", "time", "t_s", "t", "timestamp", "datetime", "date_time", "time_utc"),
    "x": ("x_m", "x"), "y": ("y_m", "y"), "z": ("z_m", "z"),
    "lon": ("lon", "longitude", "lon_deg", "long", "lng"), "lat": ("lat", "latitude", "lat_deg"),
}
# a time of day followed by a zone designator: 10:00Z, 10:00:00.5+01:00, T100000-0500
_ZONE = r"(?:\d{2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?|T\d{2,6}(?:[.,]\d+)?)\s*(?:Z|z|[+-]\d{2}(?::?\d{2})?)$"
_PLAIN_NUMBER = r"^\s*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\s*$"  # pandas reads "3600" as a year
_NON_FINITE = {"nan", "+nan", "-nan", "inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"}


@dataclass(frozen=True)
class Layout:
    """Which column plays which role; ``coords`` is (lon, lat) or (x, y), ``z`` optional."""

    track_id: str
    time: str
    coords: tuple[str, str]
    z: str | None
    lonlat: bool
    extras: tuple[str, ...]
    notices: tuple[QCAction, ...] = ()


def _key(name: object) -> str:
    return re.sub(r"[\s\-]+", "_", str(name).strip().lstrip("\ufeff").lower())


def detect_layout(columns, file: str) -> Layout:
    """Find the role columns by (case-insensitive) name; a missing role is a TrackError naming what was sought.

    A name given twice, or two spellings of one role name (``x`` and ``X``), is a TrackError naming both.
    """
    found: dict[str, str] = {}
    check_header_names(columns, file)
    keyed = _role_keys(columns, file)
    for role, names in ROLE_NAMES.items():
        match = next((keyed[n] for n in names if n in keyed), None)
        if match is not None:
            found[role] = match
    has_lonlat, has_xy = {"lon", "lat"} <= found.keys(), {"x", "y"} <= found.keys()
    for role in ("track_id", "time"):
        if role not in found:
            raise _missing(file, role, columns)
    if not (has_lonlat or has_xy):
        raise _missing(file, "lon" if ("lon" in found or "lat" in found) else "x", columns)
    notices = ()
    if has_lonlat and has_xy:
        notices = (QCAction("lonlat_and_xy", 0, f"{file}: has both lon/lat and x/y columns; using lon/lat and "
                            "keeping x/y as extra columns"),)
    coords = (found["lon"], found["lat"]) if has_lonlat else (found["x"], found["y"])
    used = {found["track_id"], found["time"], *coords, found.get("z")}
    extras = tuple(str(c) for c in columns if c not in used)
    return Layout(found["track_id"], found["time"], coords, found.get("z"), has_lonlat, extras, notices)


_ROLE_KEYS = frozenset(name for names in ROLE_NAMES.values() for name in names)


def _role_keys(columns, file: str) -> dict[str, str]:
    """Normalised name → column; refuses two columns that normalise to the same role name."""
    keyed: dict[str, tuple[int, str]] = {}
    for position, column in enumerate(columns, start=1):
        key = _key(column)
        if key in keyed and key in _ROLE_KEYS:
            first, name = keyed[key]
            raise TrackError(file, f"the columns {name!r} (column {first}) and {str(column)!r} (column {position}) "
                             f"both name the {key!r} column; rename or remove one", row=1, column=str(column))
        keyed.setdefault(key, (position, column))
    return {key: column for key, (_, column) in keyed.items()}


def _missing(file: str, role: str, columns) -> TrackError:
    what = {"track_id": "track id", "time": "time", "lon": "lon/lat", "x": "position (x, y or lon, lat)"}[role]
    sought = ", ".join(ROLE_NAMES[role][:6])
    have = ", ".join(repr(str(c)) for c in columns) or "none"
    return TrackError(file, f"has no {what} column (looked for {sought}, …); the columns are {have}",
                      row=1, column=role)


@dataclass
class ParsedTable:
    """The typed arrays of a whole table, in file order; ``labels[codes]`` are the track ids."""

    codes: np.ndarray
    labels: list[str]
    time_s: np.ndarray
    coords: np.ndarray  # (n, 2): lon, lat in degrees, or x, y in metres
    z: np.ndarray | None
    rows: np.ndarray
    extras: dict[str, np.ndarray]
    time_is_absolute: bool
    lonlat: bool
    notices: tuple[QCAction, ...]


@dataclass
class TableParser:
    """Accumulates checked, typed columns chunk by chunk (see the module docstring)."""

    file: str
    layout: Layout
    decimal_comma: bool = False
    naive_is_utc: bool = False  # CF (NetCDF) times without a zone are UTC by convention
    _labels: dict[str, int] = field(default_factory=dict)
    _parts: list[dict] = field(default_factory=list)
    _time_kind: tuple[str, int] | None = None  # ("seconds" | "absolute", first row)
    _naive: list[int] = field(default_factory=list)  # [count, first row]
    _aware_row: int | None = None
    _negative: int = 0
    _z_rows: dict[str, int] = field(default_factory=dict)  # first row with a z value / without one

    def add(self, chunk: pd.DataFrame, first_row: int) -> None:
        """Convert one chunk whose first record is spreadsheet row ``first_row``."""
        rows = first_row + np.arange(len(chunk), dtype=np.int64)
        blank = _blank_rows(chunk)
        if blank is not None and blank.any():
            chunk, rows = chunk.loc[~blank], rows[~blank]
        if len(chunk) == 0:
            return
        lay = self.layout
        part = {"rows": rows, "codes": self._codes(chunk[lay.track_id], rows),
                "time": self._time(chunk[lay.time], rows)}
        part["coords"] = np.column_stack([self._number(chunk[c], rows, c) for c in lay.coords])
        if lay.lonlat:
            _check_range(part["coords"][:, 0], rows, -180.0, 360.0, self.file, lay.coords[0], "longitude")
            _check_range(part["coords"][:, 1], rows, -90.0, 90.0, self.file, lay.coords[1], "latitude")
        if lay.z is not None:
            part["z"] = self._z(chunk[lay.z], rows)
        part["extras"] = {name: _extra_chunk(chunk[name].reset_index(drop=True)) for name in lay.extras}
        self._parts.append(part)

    def finish(self) -> ParsedTable:
        """The whole table; a TrackError if it holds no data rows or mixes 2-D and 3-D fixes."""
        if not self._parts:
            raise TrackError(self.file, "has a header row but no data rows")
        parts = self._parts
        cat = lambda key: np.concatenate([p.pop(key) for p in parts])  # noqa: E731  (frees each part's copy)
        z = self._finish_z(cat)
        extras = {name: _join_extra([p["extras"].pop(name) for p in parts]) for name in self.layout.extras}
        table = ParsedTable(cat("codes"), list(self._labels), cat("time"), cat("coords"), z, cat("rows"), extras,
                            self._time_kind[0] == "absolute", self.layout.lonlat, self._notices())
        self._parts = []
        return table

    # -------------------------------------------------------- columns
    def _codes(self, series: pd.Series, rows: np.ndarray) -> np.ndarray:
        text = _id_text(series)
        empty = text.isna().to_numpy() | (text == "").to_numpy()
        if empty.any():
            raise TrackError(self.file, "the track id is empty", row=int(rows[np.argmax(empty)]),
                             column=self.layout.track_id)
        local, uniques = pd.factorize(text)
        lookup = np.array([self._labels.setdefault(str(u), len(self._labels)) for u in uniques], dtype=np.int64)
        return lookup[local]

    def _number(self, series: pd.Series, rows: np.ndarray, column: str, *, allow_empty: bool = False,
                parsed: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
        """Finite float64 values of ``series`` (NaN for empty fields when ``allow_empty``), else a TrackError."""
        values, empty = parsed or _to_float(series, decimal_comma=self.decimal_comma)
        bad = ~np.isfinite(values)
        if allow_empty:
            bad &= ~empty
        if bad.any():
            i = int(np.argmax(bad))
            raw = series.iloc[i]
            raise TrackError(self.file, _number_problem(raw), row=int(rows[i]), column=column)
        return values

    def _z(self, series: pd.Series, rows: np.ndarray) -> np.ndarray:
        values = self._number(series, rows, self.layout.z, allow_empty=True)
        present = np.isfinite(values)
        for key, mask in (("value", present), ("empty", ~present)):
            if mask.any() and key not in self._z_rows:
                self._z_rows[key] = int(rows[np.argmax(mask)])
        return values

    def _finish_z(self, cat) -> np.ndarray | None:
        if self.layout.z is None or "value" not in self._z_rows:
            return None
        if "empty" in self._z_rows:
            raise TrackError(self.file, f"mixes 2-D and 3-D fixes: row {self._z_rows['value']} has a z value "
                             "but this row has none; give z for every fix or for none",
                             row=self._z_rows["empty"], column=self.layout.z)
        return cat("z")

    # -------------------------------------------------------- time
    def _time(self, series: pd.Series, rows: np.ndarray) -> np.ndarray:
        column = self.layout.time
        if isinstance(series.dtype, pd.DatetimeTZDtype) or series.dtype.kind == "M":
            return self._datetimes(series, rows, from_text=None)
        if series.dtype.kind in "iuf":
            self._set_kind("seconds", int(rows[0]), column)
            seconds = self._number(series, rows, column)
            self._negative += int(np.count_nonzero(seconds < 0))
            return seconds
        text = _as_text(series).str.strip()
        empty = (text == "").to_numpy()
        if empty.any():
            raise TrackError(self.file, "the time is empty", row=int(rows[np.argmax(empty)]), column=column)
        first = text.iloc[0].replace(",", ".") if self.decimal_comma else text.iloc[0]
        kind = self._time_kind[0] if self._time_kind else ("seconds" if _is_number(first) else "absolute")
        self._set_kind(kind, int(rows[0]), column)
        if kind == "absolute":
            return self._datetimes(text, rows, from_text=text)
        parsed = _to_float(text, decimal_comma=self.decimal_comma)
        unread = np.isnan(parsed[0])
        if unread.any():
            unread &= ~text.str.lower().isin(_NON_FINITE).to_numpy()
        if unread.any():
            self._mixed_or_unreadable(text, rows, int(np.argmax(unread)), kind)
        seconds = self._number(text, rows, column, parsed=parsed)
        self._negative += int(np.count_nonzero(seconds < 0))
        return seconds

    def _datetimes(self, series: pd.Series, rows: np.ndarray, *, from_text: pd.Series | None) -> np.ndarray:
        column = self.layout.time
        self._set_kind("absolute", int(rows[0]), column)
        if from_text is not None:
            numeric = pc.match_substring_regex(pa.array(from_text), _PLAIN_NUMBER).to_numpy(zero_copy_only=False)
            if numeric.any():
                self._mixed_or_unreadable(from_text, rows, int(np.argmax(numeric)), "absolute")
        stamps = pd.to_datetime(series, format="ISO8601", utc=True, errors="coerce") if from_text is not None \
            else (series.dt.tz_convert("UTC") if isinstance(series.dtype, pd.DatetimeTZDtype)
                  else series.dt.tz_localize("UTC"))
        bad = stamps.isna().to_numpy()
        if bad.any():
            i = int(np.argmax(bad))
            problem = f"cannot read {_show(series.iloc[i])} as an ISO-8601 time" if from_text is not None \
                else "the time is missing (NaT)"
            raise TrackError(self.file, problem, row=int(rows[i]), column=column)
        if from_text is not None:
            zoned = pc.match_substring_regex(pa.array(from_text), _ZONE).to_numpy(zero_copy_only=False)
            self._note_zones(zoned, rows)
        elif not isinstance(series.dtype, pd.DatetimeTZDtype) and not self.naive_is_utc:
            self._note_zones(np.zeros(len(series), bool), rows)
        micro = stamps.dt.as_unit("us").astype("int64").to_numpy()
        return (micro // 1_000_000).astype(np.float64) + (micro % 1_000_000) / 1e6

    def _note_zones(self, zoned, rows: np.ndarray) -> None:
        zoned = np.asarray(zoned, dtype=bool)
        if zoned.any() and self._aware_row is None:
            self._aware_row = int(rows[np.argmax(zoned)])
        if (~zoned).any():
            if not self._naive:
                self._naive = [0, int(rows[np.argmax(~zoned)])]
            self._naive[0] += int(np.count_nonzero(~zoned))
        if self._naive and self._aware_row is not None:
            naive_row, aware_row = self._naive[1], self._aware_row
            raise TrackError(self.file, f"mixes time formats: row {aware_row} has a time zone and row {naive_row} "
                             "has none; give every time with a zone (e.g. Z for UTC) or none",
                             row=max(naive_row, aware_row), column=self.layout.time)

    def _set_kind(self, kind: str, row: int, column: str) -> None:
        if self._time_kind is None:
            self._time_kind = (kind, row)
        elif self._time_kind[0] != kind:
            raise TrackError(self.file, _mixed_message(self._time_kind, kind), row=row, column=column)

    def _mixed_or_unreadable(self, text: pd.Series, rows: np.ndarray, i: int, kind: str) -> None:
        """Raise for the unreadable time at position ``i``: mixed formats if it reads as the other kind."""
        raw, row, column = text.iloc[i], int(rows[i]), self.layout.time
        other = "absolute" if kind == "seconds" else "seconds"
        readable = _is_iso(raw) if other == "absolute" else _is_number(raw)
        if readable:
            raise TrackError(self.file, _mixed_message(self._time_kind, other), row=row, column=column)
        raise TrackError(self.file, f"cannot read {_show(raw)} as a time (seconds or ISO-8601)", row=row, column=column)

    def _notices(self) -> tuple[QCAction, ...]:
        out = list(self.layout.notices)
        if self._negative:
            out.append(QCAction("negative_times", self._negative, f"{self.file}: {plural(self._negative, 'fix')} "
                                "with negative times; they are read as seconds before the time origin"))
        if self._naive:
            out.append(QCAction("naive_times", self._naive[0], f"{self.file}: {plural(self._naive[0], 'time')} "
                                f"without a time zone (first at row {self._naive[1]}); taken as UTC"))
        return tuple(out)


# ---------------------------------------------------------------- helpers
def _blank_rows(chunk: pd.DataFrame) -> np.ndarray | None:
    """Rows whose every field is empty text (blank lines in a CSV); None for typed tables."""
    if not all(dtype == "str" or dtype == object for dtype in chunk.dtypes):
        return None
    return chunk.eq("").all(axis=1).to_numpy()


def _id_text(series: pd.Series) -> pd.Series:
    """Track ids as text: integers (and integral floats) without a decimal point; surrounding blanks removed."""
    if series.dtype.kind in "iu":
        return series.astype("str")
    if series.dtype.kind == "f":
        values = series.to_numpy()
        finite = np.isfinite(values)
        integral = finite & (values == np.round(values))
        text = np.where(integral, np.char.mod("%d", np.where(integral, values, 0).astype(np.int64)),
                        np.asarray([repr(float(v)) for v in values]))
        return pd.Series(np.where(finite, text, ""), dtype="str")
    return _as_text(series).str.strip()


def _to_float(series: pd.Series, *, decimal_comma: bool) -> tuple[np.ndarray, np.ndarray]:
    """Float64 values (NaN where empty or unreadable) and the (n,) mask of empty fields.

    Text goes through Arrow's exact (correctly rounded) string-to-float cast
    first, without Python objects; only a column with an unreadable value
    falls back to pandas, which marks it NaN so the caller can name the row.
    """
    if series.dtype.kind in "iuf":
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
        return values, np.isnan(values)
    text = _as_text(series)
    if decimal_comma:
        text = text.str.replace(",", ".", regex=False)
    arrow = pa.array(text)
    empty = pc.equal(pc.utf8_trim_whitespace(arrow), "")
    try:
        values = pc.cast(pc.if_else(empty, pa.scalar(None, arrow.type), arrow), pa.float64())
        values = values.to_numpy(zero_copy_only=False)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        values = pd.to_numeric(text, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    return values, empty.to_numpy(zero_copy_only=False)


def _is_number(raw: object) -> bool:
    try:
        float(str(raw).strip())
        return True
    except ValueError:
        return False


def _is_iso(raw: object) -> bool:
    return not pd.isna(pd.to_datetime(pd.Series([str(raw)]), format="ISO8601", errors="coerce", utc=True)[0])


def _number_problem(raw: object) -> str:
    if raw is None or pd.isna(raw):
        return "the value is missing (NaN); a finite number is needed"
    if str(raw).strip() == "":
        return "the value is empty; a number is needed"
    if str(raw).strip().lower() in _NON_FINITE or isinstance(raw, (float, np.floating)):
        return f"{_show(raw)} is not a finite number"
    return f"{_show(raw)} is not a number"


def _check_range(values: np.ndarray, rows: np.ndarray, low: float, high: float, file: str, column: str,
                 what: str) -> None:
    bad = (values < low) | (values > high)
    if bad.any():
        i = int(np.argmax(bad))
        raise TrackError(file, f"{what} {values[i]:g} is outside {low:g}…{high:g} degrees", row=int(rows[i]),
                         column=column)


def _mixed_message(first: tuple[str, int], other: str) -> str:
    name = {"seconds": "numeric seconds", "absolute": "an ISO-8601 date-time"}
    return (f"mixes time formats: row {first[1]} has {name[first[0]]} but this row has {name[other]}; "
            "use one format for the whole column")


def _extra_chunk(series: pd.Series) -> np.ndarray | pd.Series:
    """One chunk of an extra column: float64 (NaN when empty) if every value is a number, else its text."""
    if series.dtype.kind in "iufbM":
        return series.to_numpy()
    text = _as_text(series)
    arrow = pa.array(text)
    empty = pc.equal(pc.utf8_trim_whitespace(arrow), "")
    try:
        return pc.cast(pc.if_else(empty, pa.scalar(None, arrow.type), arrow), pa.float64()).to_numpy(
            zero_copy_only=False)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return text


def _join_extra(pieces: list) -> np.ndarray:
    """The chunks of an extra column joined: numbers if every chunk was numeric, else text (object array)."""
    if all(isinstance(p, np.ndarray) for p in pieces):
        return np.concatenate(pieces)
    texts = [p if isinstance(p, pd.Series) else pd.Series([_number_text(v) for v in p.tolist()], dtype="str")
             for p in pieces]
    return pd.concat(texts, ignore_index=True).to_numpy(dtype=object)


def _number_text(value: float) -> str:
    """A number from a numeric chunk of a text column, written back as plain text ("" when it was empty)."""
    return "" if value != value else np.format_float_positional(value, trim="-")


def _as_text(series: pd.Series) -> pd.Series:
    """The column as text, with missing values as empty strings."""
    if series.dtype == "str" and not series.hasnans:
        return series
    return series.astype("str").where(series.notna(), "")


def _show(raw: object) -> str:
    text = str(raw)
    return repr(text if len(text) <= 40 else text[:37] + "...")
