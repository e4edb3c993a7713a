"""Opening a tracks file safely and turning it into raw tables.

Everything here is about bytes and formats, not about tracks: path checks,
gzip decompression with a size cap, recognising content that is not CSV,
the delimiter, chunked CSV reading and Parquet (CF trajectory NetCDF files are
read by :mod:`driftwise.data.trackcf`).  :mod:`driftwise.data.tracks` turns the tables into Tracks.
"""

from __future__ import annotations

import codecs
import csv
import gzip
import io
import os
import re
import zlib
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO, Iterator

import pandas as pd

from ..errors import InputError

SNIFF_BYTES = 64 * 1024
CSV_CHUNK_ROWS = 200_000
MAX_COLUMNS = 10_000  # a header with more columns is refused from its first bytes (a tracks table has a handful)
MAX_HEADER_BYTES = 4 * 2**20  # the header line is read at most this far; 10,000 names fit with room to spare
MAX_DECOMPRESSED_BYTES = 8 * 2**30  # a .csv.gz that inflates past this is refused (decompression bomb)
PARQUET_SUFFIXES = (".parquet", ".pq")
NETCDF_SUFFIXES = (".nc", ".nc4", ".netcdf", ".cdf")


class TrackError(InputError):
    """A tracks file the user must fix: which file, which row and column, and what is wrong.

    ``row`` counts as a spreadsheet shows the table: the header is row 1 and the
    first data record is row 2 (for Parquet and DataFrames too).  ``where``
    replaces the row where rows mean nothing to the user (a NetCDF file's
    "trajectory index 2, observation index 5").
    """

    def __init__(self, file: str, problem: str, *, row: int | None = None, column: str | None = None,
                 where: str | None = None):
        self.file, self.problem, self.row, self.column, self.where = str(file), problem, row, column, where
        super().__init__(str(self))

    def __str__(self) -> str:
        where = self.file
        if self.where is not None:
            where += f", {self.where}"
        elif self.row is not None:
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
        if not _looks_utf16(head):
            stray = _stray_nul(head, file)
            if stray is not None:
                raise stray
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


_NUL_PROBLEM = ("contains a NUL byte (0x00) in this line; CSV text never holds one (a damaged or partly binary "
                "file?): remove it or export the table again")


def _stray_nul(head: bytes, file: str) -> TrackError | None:
    """A TrackError naming the line (and column) of the first NUL byte when the rest of ``head`` is plain
    UTF-8 text (a NUL in one field of a normal CSV); None when the content looks binary."""
    try:
        text = codecs.getincrementaldecoder("utf-8")().decode(head.replace(b"\x00", b""), final=False)
    except UnicodeDecodeError:
        return None
    if re.search(r"[\x01-\x08\x0b\x0c\x0e-\x1f\x7f]", text):
        return None
    at = head.index(b"\x00")
    line = head.count(b"\n", 0, at) + 1
    return TrackError(file, _NUL_PROBLEM, row=line, column=_column_at(head, at, line))


def _column_at(head: bytes, at: int, line: int) -> str | None:
    """The header name of the field holding byte ``at`` of ``head`` (on ``line`` > 1), if it can be told cheaply."""
    header_end = head.find(b"\n")
    if line == 1 or header_end < 0:
        return None
    header = head[:header_end].rstrip(b"\r").lstrip(b"\xef\xbb\xbf").decode("utf-8", "replace")
    delimiter = _delimiter(header)
    names = next(csv.reader([header], delimiter=delimiter), [])
    start = head.rfind(b"\n", 0, at) + 1
    prefix = re.sub(r'"[^"]*"', "", head[start:at].replace(b"\x00", b"").decode("utf-8", "replace"))
    field = prefix.count(delimiter)
    return names[field] if field < len(names) else None


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
        header = _header_line(head, stream, file, delimiter)
    check_header_names(_header_names(header, delimiter, file), file)
    return delimiter, _chunks(path, file, delimiter)


def _header_line(head: bytes, stream: BinaryIO, file: str, delimiter: str) -> bytes:
    """The first line's bytes (no line end), read at most MAX_HEADER_BYTES far.

    Refuses, before any name is built, a header with more than MAX_COLUMNS
    columns (delimiters outside quotes + 1) or one longer than the byte cap.
    """
    line, end = bytearray(head), head.find(b"\n")
    while end < 0 and len(line) <= MAX_HEADER_BYTES:
        block = stream.read(SNIFF_BYTES)
        if not block:
            break
        end = block.find(b"\n")
        end = end + len(line) if end >= 0 else -1
        line += block
    whole = 0 <= end <= MAX_HEADER_BYTES or (end < 0 and len(line) <= MAX_HEADER_BYTES)
    header = bytes(line[: min(end if end >= 0 else len(line), MAX_HEADER_BYTES)]).rstrip(b"\r")
    outside = re.sub(rb'"[^"]*"', b"", header) if b'"' in header else header
    columns = outside.count(delimiter.encode()) + 1
    if columns > MAX_COLUMNS:
        count = f"{columns:,} columns" if whole else \
            f"at least {columns:,} columns in its first {MAX_HEADER_BYTES / 2**20:.3g} MiB"
        raise TrackError(file, f"the header (line 1) has {count}, more than the {MAX_COLUMNS:,} driftwise reads; "
                         "a tracks table needs an id, a time and two or three positions", row=1)
    if not whole:
        raise TrackError(file, f"the header (line 1) is longer than {MAX_HEADER_BYTES / 2**20:.3g} MiB; is this a "
                         "tracks table?", row=1)
    return header


def _header_names(header: bytes, delimiter: str, file: str) -> list[str]:
    """The column names of the header line, as the CSV reader will see them (a UTF-8 BOM dropped)."""
    try:
        text = header.decode("utf-8").lstrip("\ufeff")
    except UnicodeDecodeError as err:
        raise _not_utf8(file, header, err.start) from None
    return next(csv.reader([text], delimiter=delimiter, quotechar='"'), [])


def check_header_names(names, file: str) -> None:
    """Refuse a column name given twice (empty names, as after a trailing delimiter, are allowed)."""
    seen: dict[str, int] = {}
    for position, name in enumerate(names, start=1):
        name = str(name)
        if name.strip() == "":
            continue
        if name in seen:
            raise TrackError(file, f"the column name {name!r} appears twice in the header (columns {seen[name]} "
                             f"and {position}); rename or remove one", row=1, column=name)
        seen[name] = position


class _NulGuard(io.RawIOBase):
    """Read-only stream that refuses a NUL byte, naming its line (bytes.find and count: memchr speed)."""

    def __init__(self, inner: BinaryIO, *, file: str):
        self._inner, self._file, self._lines = inner, file, 0

    def readable(self) -> bool:
        return True

    def readinto(self, buffer) -> int:
        data = self._inner.read(len(buffer))
        at = data.find(b"\x00")
        if at >= 0:
            raise TrackError(self._file, _NUL_PROBLEM, row=self._lines + data.count(b"\n", 0, at) + 1)
        self._lines += data.count(b"\n")
        buffer[: len(data)] = data
        return len(data)


def _chunks(path: Path, file: str, delimiter: str) -> Iterator[pd.DataFrame]:
    with open_bytes(path) as raw:
        stream = io.BufferedReader(_NulGuard(raw, file=file), buffer_size=1 << 20)
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
