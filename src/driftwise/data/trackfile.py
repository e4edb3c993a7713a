"""Opening a tracks file safely and turning it into raw tables.

Everything here is about bytes and formats, not about tracks: path checks,
gzip decompression with a size cap, recognising content that is not CSV,
the delimiter, chunked CSV reading, Parquet, and NetCDF files that follow the
CF discrete-sampling-geometry conventions for trajectories (CF Conventions
1.8+, appendix H.4: contiguous ragged arrays and the orthogonal/incomplete
multidimensional forms).  :mod:`driftwise.data.tracks` turns the tables into Tracks.
"""

from __future__ import annotations

import codecs
import gzip
import io
import os
import re
import zlib
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO, Iterator

import numpy as np
import pandas as pd

from ..errors import InputError

SNIFF_BYTES = 64 * 1024
CSV_CHUNK_ROWS = 200_000
MAX_DECOMPRESSED_BYTES = 8 * 2**30  # a .csv.gz that inflates past this is refused (decompression bomb)
PARQUET_SUFFIXES = (".parquet", ".pq")
NETCDF_SUFFIXES = (".nc", ".nc4", ".netcdf", ".cdf")


class TrackError(InputError):
    """A tracks file the user must fix: which file, which row and column, and what is wrong.

    ``row`` counts as a spreadsheet shows the table: the header is row 1 and the
    first data record is row 2 (for Parquet, NetCDF and DataFrames too).
    """

    def __init__(self, file: str, problem: str, *, row: int | None = None, column: str | None = None):
        self.file, self.problem, self.row, self.column = str(file), problem, row, column
        super().__init__(str(self))

    def __str__(self) -> str:
        where = self.file
        if self.row is not None:
            where += f", row {self.row}"
        if self.column is not None:
            where += f", column {self.column!r}"
        return f"{where}: {self.problem}"


def check_path(path: str | os.PathLike) -> Path:
    """The path as a Path, or a TrackError if it is missing, a folder or unreadable."""
    p = Path(path)
    if p.is_dir():
        raise TrackError(str(p), "is a folder, not a tracks file")
    if not p.exists():
        raise TrackError(str(p), "no such file")
    if not os.access(p, os.R_OK):
        raise TrackError(str(p), "cannot be read (permission denied)")
    return p


def file_format(path: Path) -> str:
    """``"parquet"``, ``"netcdf"`` or ``"text"``, by name first and then by the first bytes."""
    name = path.name.lower()
    if name.endswith(PARQUET_SUFFIXES):
        return "parquet"
    if name.endswith(NETCDF_SUFFIXES):
        return "netcdf"
    if name.endswith((".csv", ".csv.gz", ".tsv", ".tsv.gz")):
        return "text"
    with open(path, "rb") as handle:
        head = handle.read(8)
    if head.startswith(b"PAR1"):
        return "parquet"
    if head.startswith((b"CDF\x01", b"CDF\x02", b"\x89HDF")):
        return "netcdf"
    return "text"


# ---------------------------------------------------------------- gzip with a cap
class _CappedStream(io.RawIOBase):
    """Read-only stream over a decompressor that refuses to inflate past ``limit`` bytes.

    gzip's declared size (the ISIZE trailer) is never used to allocate anything;
    bytes are produced in small blocks and counted as they come.
    """

    def __init__(self, inner: BinaryIO, *, file: str, limit: int):
        self._inner, self._file, self._limit, self._count = inner, file, limit, 0

    def readable(self) -> bool:
        return True

    def readinto(self, buffer) -> int:
        try:
            data = self._inner.read(len(buffer))
        except (gzip.BadGzipFile, EOFError, zlib.error, OSError) as err:
            raise TrackError(self._file, f"is a corrupt or truncated gzip file ({err})") from None
        self._count += len(data)
        if self._count > self._limit:
            raise TrackError(self._file, f"inflates to more than {self._limit / 2**30:.1f} GiB; refusing to "
                             "decompress it (is it a decompression bomb?)")
        buffer[: len(data)] = data
        return len(data)


@contextmanager
def open_bytes(path: Path) -> Iterator[BinaryIO]:
    """The file's bytes, transparently decompressed when it starts with the gzip magic number."""
    raw = open(path, "rb")
    try:
        if raw.read(2) == b"\x1f\x8b":
            raw.seek(0)
            capped = _CappedStream(gzip.GzipFile(fileobj=raw, mode="rb"), file=str(path), limit=MAX_DECOMPRESSED_BYTES)
            yield io.BufferedReader(capped, buffer_size=1 << 16)
        else:
            raw.seek(0)
            yield raw
    finally:
        raw.close()


# ---------------------------------------------------------------- sniffing
_MAGIC = (
    ((b"PK\x03\x04", b"PK\x05\x06"), "a ZIP archive (an .xlsx workbook is one); unzip it or export the sheet as CSV"),
    ((b"\xff\xfe\x00\x00", b"\x00\x00\xfe\xff"), "UTF-32 text; save it as UTF-8"),
    ((b"\xff\xfe", b"\xfe\xff"), "UTF-16 text; save it as UTF-8"),
    ((b"PAR1",), "a Parquet file; give it a .parquet name"),
    ((b"CDF\x01", b"CDF\x02", b"\x89HDF\r\n\x1a\n"), "a NetCDF/HDF5 file; give it a .nc name"),
    ((b"%PDF",), "a PDF document, not a table"),
    ((b"\x1f\x8b",), "gzip data inside gzip; decompress it once more"),
)


def sniff_text(head: bytes, file: str) -> str:
    """Check that ``head`` (the first bytes) is UTF-8 delimited text; return the delimiter.

    Raises TrackError naming what the content looks like otherwise.
    """
    if not head.lstrip(b"\xef\xbb\xbf \t\r\n"):
        raise TrackError(file, "the file is empty")
    for magics, looks_like in _MAGIC:
        if head.startswith(magics):
            raise TrackError(file, f"this is not CSV text: it looks like {looks_like}")
    if b"\x00" in head:
        raise TrackError(file, "this is not CSV text: it looks like "
                         + ("UTF-16 text; save it as UTF-8" if _looks_utf16(head) else "binary data"))
    text = _decode_head(head, file)
    body = text.lstrip("\ufeff \t\r\n")
    if body[:1] in "{[":
        raise TrackError(file, "this is not CSV text: it looks like JSON")
    if body[:1] == "<":
        kind = "an HTML page (perhaps a web server's error page instead of the data)" \
            if re.match(r"<(!doctype\s+html|html|head|body)", body.lower()) else "XML or HTML markup"
        raise TrackError(file, f"this is not CSV text: it looks like {kind}")
    control = re.search(r"[\x01-\x08\x0b\x0c\x0e-\x1f\x7f]", text)
    if control:
        row = text.count("\n", 0, control.start()) + 1
        raise TrackError(file, f"contains the control character {ord(control.group()):#04x}; it looks like binary "
                         "data, not CSV text", row=row)
    return _delimiter(body.split("\n", 1)[0])


def _looks_utf16(head: bytes) -> bool:
    even, odd = head[0::2], head[1::2]
    return max(even.count(0), odd.count(0)) > 0.4 * len(odd) and min(even.count(0), odd.count(0)) < 0.05 * len(odd)


def _decode_head(head: bytes, file: str) -> str:
    try:
        return codecs.getincrementaldecoder("utf-8")().decode(head, final=False)
    except UnicodeDecodeError as err:
        raise _not_utf8(file, head, err.start) from None


def _not_utf8(file: str, data: bytes, offset: int, *, lines_before: int = 0) -> TrackError:
    row = lines_before + data.count(b"\n", 0, offset) + 1
    return TrackError(file, f"is not UTF-8 text (byte {data[offset]:#04x} cannot be decoded); "
                      "save the file with UTF-8 encoding", row=row)


def locate_bad_utf8(path: Path, file: str) -> TrackError:
    """Stream through the file to find the first byte that is not UTF-8 and name its line."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    lines = 0
    with open_bytes(path) as stream:
        while block := stream.read(1 << 20):
            try:
                decoder.decode(block)
            except UnicodeDecodeError as err:
                return _not_utf8(file, block, max(err.start, 0), lines_before=lines)
            lines += block.count(b"\n")
    return TrackError(file, "is not UTF-8 text; save the file with UTF-8 encoding")


def _delimiter(header_line: str) -> str:
    """The most frequent of comma, semicolon and tab outside quotes in the header line."""
    outside = re.sub(r'"[^"]*"', "", header_line)
    counts = {d: outside.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


# ---------------------------------------------------------------- CSV
_FIELDS = re.compile(r"Expected (\d+) fields in line (\d+), saw (\d+)")


def read_csv_chunks(path: Path, file: str) -> tuple[str, Iterator[pd.DataFrame]]:
    """Sniff the text and return ``(delimiter, chunks)``: DataFrames of strings, CSV_CHUNK_ROWS rows each.

    Every field is kept as text ("" when empty; nothing becomes NaN or is
    evaluated), so the caller converts columns and can name the bad row.
    """
    with open_bytes(path) as stream:
        head = stream.read(SNIFF_BYTES)
    delimiter = sniff_text(head, file)
    return delimiter, _chunks(path, file, delimiter)


def _chunks(path: Path, file: str, delimiter: str) -> Iterator[pd.DataFrame]:
    with open_bytes(path) as stream:
        try:
            yield from pd.read_csv(stream, sep=delimiter, dtype=str, keep_default_na=False, na_values=[],
                                   skip_blank_lines=False, index_col=False, encoding="utf-8-sig", quotechar='"',
                                   chunksize=CSV_CHUNK_ROWS, engine="c")
        except pd.errors.ParserError as err:
            match = _FIELDS.search(str(err))
            if match:
                want, line, got = match.groups()
                raise TrackError(file, f"has {got} fields where the header has {want}", row=int(line)) from None
            raise TrackError(file, f"cannot be read as CSV ({str(err).strip()})") from None
        except UnicodeDecodeError:
            raise locate_bad_utf8(path, file) from None
        except pd.errors.EmptyDataError:
            raise TrackError(file, "the file is empty") from None


# ---------------------------------------------------------------- Parquet
def read_parquet_frame(path: Path, file: str) -> pd.DataFrame:
    """The Parquet table as a DataFrame (timestamps stay timestamps)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        return pq.read_table(path).to_pandas()
    except (pa.ArrowException, OSError, ValueError) as err:
        raise TrackError(file, f"is not a readable Parquet file ({err})") from None


# ---------------------------------------------------------------- NetCDF (CF trajectories)
def read_netcdf_frame(path: Path, file: str) -> pd.DataFrame:
    """A CF trajectory file (featureType = trajectory) as one row per fix.

    Handles the contiguous ragged array (a count variable whose
    ``sample_dimension`` attribute names the obs dimension) and the
    orthogonal/incomplete multidimensional forms (variables on (trajectory, obs),
    time on (obs) or (trajectory, obs); padding rows are dropped).
    """
    import xarray as xr

    try:
        ds = xr.open_dataset(path, decode_timedelta=False)
    except Exception as err:  # xarray raises many types for unreadable files
        raise TrackError(file, f"is not a readable NetCDF file ({type(err).__name__}: {err})") from None
    with ds:
        feature = str(ds.attrs.get("featureType", "trajectory"))
        if feature.lower() != "trajectory":
            raise TrackError(file, f"has featureType {feature!r}; driftwise reads CF trajectory files")
        ragged = [name for name, v in ds.variables.items() if "sample_dimension" in v.attrs]
        table = _ragged_table(ds, ragged[0], file) if ragged else _multidim_table(ds, file)
    return table


def _cf_variables(ds) -> dict[str, str]:
    """Map roles (track_id, time, lon, lat, x, y, z) to variable names by CF attributes, then by name."""
    roles: dict[str, str] = {}
    by_standard = {"time": "time", "longitude": "lon", "latitude": "lat", "projection_x_coordinate": "x",
                   "projection_y_coordinate": "y", "altitude": "z", "height": "z"}
    for name, var in ds.variables.items():
        if var.attrs.get("cf_role") == "trajectory_id":
            roles.setdefault("track_id", name)
        role = by_standard.get(str(var.attrs.get("standard_name", "")))
        if role:
            roles.setdefault(role, name)
    for role, names in {"time": ("time",), "lon": ("lon", "longitude"), "lat": ("lat", "latitude"),
                        "x": ("x", "x_m"), "y": ("y", "y_m"), "z": ("z", "z_m")}.items():
        for name in names:
            if role not in roles and name in ds.variables:
                roles[role] = name
    return roles


def _trajectory_ids(ds, roles: dict[str, str], n: int) -> np.ndarray:
    if "track_id" not in roles:
        return np.array([str(i) for i in range(n)], dtype=object)
    values = ds[roles["track_id"]].values
    if values.dtype.kind == "S":
        values = np.char.decode(values, "utf-8")
    if values.ndim == 2 and values.dtype.kind in "SU":  # a char array (trajectory, strlen)
        values = np.array(["".join(map(str, row)) for row in values])
    return np.array([str(v).strip() for v in values], dtype=object)


def _ragged_table(ds, count_name: str, file: str) -> pd.DataFrame:
    roles, count_var = _cf_variables(ds), ds[count_name]
    obs_dim = count_var.attrs["sample_dimension"]
    counts = np.asarray(count_var.values, dtype=np.int64)
    if counts.sum() != ds.sizes.get(obs_dim, -1):
        raise TrackError(file, f"the row sizes in {count_name!r} add up to {counts.sum()} fixes but dimension "
                         f"{obs_dim!r} has {ds.sizes.get(obs_dim)}")
    columns = {"track_id": np.repeat(_trajectory_ids(ds, roles, counts.size), counts)}
    for name, var in ds.variables.items():
        if var.dims == (obs_dim,) and name != count_name:
            columns[_role_name(roles, name)] = var.values
    return pd.DataFrame(columns)


def _multidim_table(ds, file: str) -> pd.DataFrame:
    roles = _cf_variables(ds)
    position = [roles[r] for r in ("lon", "lat", "x", "y") if r in roles]
    if not position or ds[position[0]].ndim != 2:
        raise TrackError(file, "is not a CF trajectory file driftwise understands: no count variable with "
                         "'sample_dimension' and no two-dimensional (trajectory, obs) positions")
    shape = ds[position[0]].shape
    traj_dim, obs_dim = ds[position[0]].dims
    columns = {"track_id": np.repeat(_trajectory_ids(ds, roles, shape[0]), shape[1])}
    for name, var in ds.variables.items():
        if var.dims == (traj_dim, obs_dim) or (name == roles.get("time") and var.dims == (obs_dim,)):
            columns[_role_name(roles, name)] = np.broadcast_to(var.values, shape).reshape(-1)
    table = pd.DataFrame(columns)
    padding = table[[_role_name(roles, p) for p in position]].isna().all(axis=1)
    return table.loc[~padding.to_numpy()].reset_index(drop=True)


def _role_name(roles: dict[str, str], name: str) -> str:
    """The table column for a NetCDF variable: its role if it has one, else its own name."""
    for role, var_name in roles.items():
        if var_name == name and role != "track_id":
            return role
    return name
