"""Every bad or awkward tracks file of issue 2 point 5: one test each.

Errors must name the problem, the row (as a spreadsheet shows it: header row 1,
first data row 2) and the column, and the command line must print them as one
line with exit code 2.  Accepted oddities are checked for their warning, notice
or silence and for the values read.
"""

from __future__ import annotations

import gc
import gzip
import json
import struct
import time
import tracemalloc
import warnings
import zipfile

import numpy as np
import pandas as pd
import pytest

from driftwise.data import trackfile
from driftwise.data.tracks import TrackError, TrackNotice, TrackWarning, read_tracks, tracks_from_frame
from driftwise.files import csv_safe_text

H = "track_id,time,x,y\n"


def expect_error(path, run_cli, *, words, row, column, **options):
    """read_tracks raises TrackError(row, column) mentioning ``words``; the CLI prints it in one line, exit 2."""
    with pytest.raises(TrackError) as info:
        read_tracks(path, **options)
    err = info.value
    assert (err.file, err.row, err.column) == (str(path), row, column)
    message = str(err)
    for word in words:
        assert word in message, message
    if row is not None:
        assert f"row {row}" in message
    if column is not None:
        assert repr(column) in message
    code, out, stderr = run_cli("inspect", path)
    assert code == 2
    assert out == ""
    assert stderr.strip().splitlines()[-1] == f"driftwise: error: {message}"
    assert "Traceback" not in stderr and "\n" not in message
    return err


# ---------------------------------------------------------------- errors in CSV text
CASES = {
    "empty_file": ("", ["empty"], None, None),
    "header_only": (H, ["header row but no data rows"], None, None),
    "missing_time_column": ("track_id,x,y\nA,1,2\n", ["no time column", "'track_id', 'x', 'y'"], 1, "time"),
    "missing_position_columns": ("track_id,time,depth\nA,0,2\n", ["no position"], 1, "x"),
    "missing_id_column": ("time,x,y\n0,1,2\n", ["no track id column"], 1, "track_id"),
    "non_numeric_position": (H + "A,0,1,2\nA,60,abc,3\n", ["'abc' is not a number"], 3, "x"),
    "nan_position": (H + "A,0,1,2\nA,60,1,nan\n", ["'nan' is not a finite number"], 3, "y"),
    "inf_position": (H + "A,0,1,2\nA,60,-inf,2\n", ["'-inf' is not a finite number"], 3, "x"),
    "empty_position": (H + "A,0,1,2\nA,60,,2\n", ["empty"], 3, "x"),
    "empty_track_id": (H + "A,0,1,2\n,60,1,2\n", ["track id is empty"], 3, "track_id"),
    "empty_time": (H + "A,0,1,2\nA,,1,2\n", ["time is empty"], 3, "time"),
    "unparseable_iso_time": (H + "A,2024-06-03T06:00:00Z,1,2\nA,yesterday,1,2\n",
                             ["cannot read 'yesterday' as an ISO-8601 time"], 3, "time"),
    "unparseable_numeric_time": (H + "A,0,1,2\nA,soon,1,2\n", ["cannot read 'soon' as a time"], 3, "time"),
    "mixed_seconds_then_iso": (H + "A,0,1,2\nA,2024-06-03T06:00:00Z,1,2\n",
                               ["mixes time formats", "row 2 has numeric seconds"], 3, "time"),
    "mixed_iso_then_seconds": (H + "A,2024-06-03T06:00:00Z,1,2\nA,3600,1,2\n",
                               ["mixes time formats", "an ISO-8601"], 3, "time"),
    "mixed_zone_and_naive": (H + "A,2024-06-03T06:00:00Z,1,2\nA,2024-06-03T07:00:00,1,2\n",
                             ["mixes time formats", "row 2 has a time zone and row 3 has none"], 3, "time"),
    "duplicated_track_time": (H + "A,0,1,2\nB,0,5,5\nA,60,2,2\nA,0,1,3\n",
                              ["track 'A' has two fixes at the same time 0 s", "rows 2 and 5"], 5, "time"),
    "longitude_out_of_range": ("id,time,lon,lat\nA,0,10,40\nA,60,400,40\n",
                               ["longitude 400 is outside -180…360"], 3, "lon"),
    "latitude_out_of_range": ("id,time,lon,lat\nA,0,10,40\nA,60,10,-95.5\n",
                              ["latitude -95.5 is outside -90…90"], 3, "lat"),
    "mix_of_2d_and_3d": ("track_id,time,x,y,z\nA,0,1,2,-3\nA,60,1,2,\n", ["mixes 2-D and 3-D", "row 2 has a z"],
                         3, "z"),
    "wrong_field_count": (H + "A,0,1,2\nA,60,1,2,9\n", ["has 5 fields where the header has 4"], 3, None),
    "json_under_csv_name": ('[{"track_id": "A", "time": 0}]', ["looks like JSON"], None, None),
    "html_error_page": ("<!DOCTYPE html>\n<html><body>404 Not Found</body></html>\n",
                        ["looks like an HTML page"], None, None),
    "control_characters": (H + "A,0,1,2\nA,60\x07,1,2\n", ["control character 0x07", "binary"], 3, None),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_csv_is_one_clear_error(name, write_file, run_cli):
    content, words, row, column = CASES[name]
    expect_error(write_file(f"{name}.csv", content), run_cli, words=words, row=row, column=column)


def test_first_data_row_is_row_2(write_file, run_cli):
    expect_error(write_file("t.csv", H + "A,0,x1,2\n"), run_cli, words=["'x1' is not a number"], row=2, column="x")


def test_rows_count_records_not_blank_lines_or_quoted_newlines(write_file, run_cli):
    content = H + '"A\nB",0,1,2\n\n"A\nB",60,1,oops\n'  # record 1 spans two lines; a blank record follows
    expect_error(write_file("t.csv", content), run_cli, words=["'oops'"], row=4, column="y")


def test_all_tracks_single_fix_is_an_error(write_file, run_cli):
    path = write_file("t.csv", H + "A,0,1,2\nB,0,1,2\n")
    expect_error(path, run_cli, words=["no track has two or more usable fixes", "dropped 2 tracks with a single fix"],
                 row=None, column=None)


# ---------------------------------------------------------------- not text / not UTF-8
def test_non_utf8_text(write_file, run_cli):
    path = write_file("latin1.csv", (H + "A,0,1,2\nBéa,60,1,2\n").encode("latin-1"))
    expect_error(path, run_cli, words=["not UTF-8", "0xe9", "save the file with UTF-8"], row=3, column=None)


def test_non_utf8_far_into_a_large_file(write_file, run_cli):
    rows = "".join(f"A,{60 * i},{i},0\n" for i in range(6000))  # > 64 KiB, beyond the sniffed head
    path = write_file("late.csv", (H + rows + "Béa,0,1,2\n").encode("latin-1"))
    expect_error(path, run_cli, words=["not UTF-8", "0xe9"], row=6002, column=None)


def test_binary_content(write_file, run_cli):
    blob = bytes(np.random.default_rng(1).integers(0, 256, 4096, dtype=np.uint8)) + b"\x00\x00"
    expect_error(write_file("noise.csv", b"\x00\x01" + blob), run_cli, words=["binary data"], row=None, column=None)


def test_zip_under_csv_name(tmp_path, run_cli):
    path = tmp_path / "tracks.csv"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("tracks.csv", H + "A,0,1,2\n")
    expect_error(path, run_cli, words=["looks like a ZIP archive"], row=None, column=None)


def test_utf16_with_bom(write_file, run_cli):
    path = write_file("utf16.csv", (H + "A,0,1,2\nA,60,1,2\n").encode("utf-16"))
    expect_error(path, run_cli, words=["UTF-16", "save it as UTF-8"], row=None, column=None)


def test_utf16_without_bom(write_file, run_cli):
    path = write_file("utf16le.csv", (H + "A,0,1,2\nA,60,1,2\n").encode("utf-16-le"))
    expect_error(path, run_cli, words=["UTF-16"], row=None, column=None)


def test_parquet_bytes_under_csv_name(tmp_path, run_cli):
    path = tmp_path / "tracks.csv"
    pd.DataFrame({"track_id": ["A", "A"], "time": [0.0, 60.0], "x": [0.0, 1.0], "y": [0.0, 1.0]}).to_parquet(path)
    expect_error(path, run_cli, words=["looks like a Parquet file"], row=None, column=None)


def test_corrupt_parquet(write_file, run_cli):
    expect_error(write_file("t.parquet", b"PAR1 this is not really parquet"), run_cli,
                 words=["not a readable Parquet file"], row=None, column=None)


def test_corrupt_netcdf(write_file, run_cli):
    expect_error(write_file("t.nc", b"CDF\x01 not really netcdf"), run_cli, words=["not a readable NetCDF file"],
                 row=None, column=None)


# ---------------------------------------------------------------- paths
def test_directory(tmp_path, run_cli):
    expect_error(tmp_path, run_cli, words=["is a folder"], row=None, column=None)


def test_missing_path(tmp_path, run_cli):
    expect_error(tmp_path / "nope.csv", run_cli, words=["no such file"], row=None, column=None)


# ---------------------------------------------------------------- gzip
GOOD_ROWS = H + "".join(f"A,{60 * i},{i},0\n" for i in range(2000))


def test_truncated_gzip(write_file, run_cli):
    blob = gzip.compress(GOOD_ROWS.encode())
    expect_error(write_file("t.csv.gz", blob[: len(blob) // 2]), run_cli, words=["corrupt or truncated gzip"],
                 row=None, column=None)


def test_gzip_lying_about_its_size(write_file, run_cli):
    blob = gzip.compress(GOOD_ROWS.encode())
    lying = blob[:-4] + struct.pack("<I", 0xFFFFFFF0)  # ISIZE trailer claims ~4 GiB
    expect_error(write_file("t.csv.gz", lying), run_cli, words=["corrupt or truncated gzip"], row=None, column=None)


def test_gzip_bomb_hits_the_size_cap(write_file, run_cli, monkeypatch):
    monkeypatch.setattr(trackfile, "MAX_DECOMPRESSED_BYTES", 20_000)
    path = write_file("bomb.csv.gz", gzip.compress((H + "A,0,0,0\n" * 50_000).encode()))
    expect_error(path, run_cli, words=["inflates to more than", "decompression bomb"], row=None, column=None)


def test_gzip_read_transparently(write_file):
    plain = read_tracks(write_file("t.csv", GOOD_ROWS))
    packed = read_tracks(write_file("t.csv.gz", gzip.compress(GOOD_ROWS.encode())))
    np.testing.assert_array_equal(packed.position_m, plain.position_m)  # exact: same text
    np.testing.assert_array_equal(packed.time_s, plain.time_s)


# ---------------------------------------------------------------- accepted with a warning and a count
def test_unsorted_times_are_sorted_with_a_warning(write_file):
    path = write_file("t.csv", H + "A,120,2,0\nA,0,0,0\nA,60,1,0\nB,60,1,1\nB,0,0,1\n")
    with pytest.warns(TrackWarning, match=r"sorted the fixes of 2 tracks by time \(2 fixes out of order\)"):
        tracks = read_tracks(path)
    np.testing.assert_array_equal(tracks.time_s, [0, 60, 120, 0, 60])
    np.testing.assert_array_equal(tracks.position_m[:, 0], [0, 1, 2, 0, 1])
    assert [(a.name, a.count) for a in tracks.qc] == [("unsorted_times", 2)]


def test_single_fix_tracks_are_dropped(write_file):
    path = write_file("t.csv", H + "A,0,0,0\nA,60,1,0\nLONE,0,5,5\n")
    with pytest.warns(TrackWarning, match="dropped 1 track with a single fix"):
        tracks = read_tracks(path)
    assert tracks.unique_ids.tolist() == ["A"]
    assert tracks.qc[-1].count == 1


def test_impossible_speed_fix_is_dropped(write_file):
    # 0.5 m/s along x, one fix 3 km off at t=120 s (25 m/s), one bad first fix on track B
    path = write_file("t.csv", H + "A,0,0,0\nA,60,30,0\nA,120,3000,0\nA,180,90,0\nA,240,120,0\n"
                      "B,0,9000,0\nB,60,0,0\nB,120,30,0\nB,180,60,0\n")
    with pytest.warns(TrackWarning, match=r"dropped 2 fixes implying speeds above 5 m/s \(fastest 150 m/s\)"):
        tracks = read_tracks(path)
    np.testing.assert_array_equal(tracks.time_s, [0, 60, 180, 240, 60, 120, 180])
    assert tracks.qc[0].count == 2
    relaxed = read_tracks(path, max_speed_m_s=None)
    assert relaxed.n_fixes == 9


def test_long_gaps_split_tracks(write_file):
    path = write_file("t.csv", H + "A,0,0,0\nA,60,1,0\nA,90000,2,0\nA,90060,3,0\nB,0,0,0\nB,60,0,1\n")
    with pytest.warns(TrackWarning, match="split 1 track at 1 gap longer than 21600 s"):
        tracks = read_tracks(path, max_gap_s=6 * 3600)
    assert tracks.unique_ids.tolist() == ["A", "A#2", "B"]
    assert read_tracks(path).n_tracks == 2


def test_cli_max_speed_and_max_gap_options(write_file, run_cli):
    path = write_file("t.csv", H + "A,0,0,0\nA,60,1,0\nA,90000,2,0\nA,90060,3,0\n")
    with pytest.warns(TrackWarning, match="split 1 track"):
        code, out, _ = run_cli("inspect", path, "--max-gap", "6h", "--max-speed", "2m/s", "--json")
    assert code == 0
    import json

    assert json.loads(out)["n_tracks"] == 2
    code, _, err = run_cli("inspect", path, "--max-speed", "fast")
    assert code == 2 and "--max-speed" in err and len(err.strip().splitlines()) == 1


# ---------------------------------------------------------------- accepted silently
def _read_silently(path, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return read_tracks(path, **options)


REFERENCE = H + "A,0,0,0\nA,60,1.5,0\nB,0,0,1\nB,60,2,1\n"


def test_utf8_bom_is_silent(write_file):
    tracks = _read_silently(write_file("t.csv", "\ufeff" + REFERENCE))
    np.testing.assert_array_equal(tracks.position_m, _read_silently(write_file("r.csv", REFERENCE)).position_m)


def test_crlf_line_endings_are_silent(write_file):
    tracks = _read_silently(write_file("t.csv", REFERENCE.replace("\n", "\r\n")))
    np.testing.assert_array_equal(tracks.position_m[:, 0], [0, 1.5, 0, 2])
    assert tracks.unique_ids.tolist() == ["A", "B"]


def test_quoted_fields_are_silent(write_file):
    tracks = _read_silently(write_file("t.csv", '"track_id","time","x","y"\n"A, the first",0,"1.5",0\n'
                                                '"A, the first",60,"2.5","0"\n'))
    assert tracks.unique_ids.tolist() == ["A, the first"]
    np.testing.assert_array_equal(tracks.position_m[:, 0], [1.5, 2.5])


def test_interleaved_tracks_are_silent(write_file):
    tracks = _read_silently(write_file("t.csv", H + "A,0,0,0\nB,0,0,1\nA,60,1.5,0\nB,60,2,1\n"))
    np.testing.assert_array_equal(tracks.position_m, _read_silently(write_file("r.csv", REFERENCE)).position_m)


def test_longitudes_0_to_360_and_crossing_the_meridian(write_file):
    east = "id,time,lon,lat\nA,0,359.998,50\nA,600,0.002,50\nA,1200,0.006,50\n"
    west = "id,time,lon,lat\nA,0,-0.002,50\nA,600,0.002,50\nA,1200,0.006,50\n"
    a, b = _read_silently(write_file("e.csv", east)), _read_silently(write_file("w.csv", west))
    assert a.n_fixes == 3  # no fix dropped as an impossible jump
    np.testing.assert_allclose(a.position_m, b.position_m, rtol=0, atol=1e-6)
    assert abs(a.frame.lon0_deg - 0.002) < 1e-9
    step = np.linalg.norm(np.diff(a.position_m, axis=0), axis=1)
    np.testing.assert_allclose(step, [286.9, 286.9], rtol=2e-3)  # 0.004° × 111.3 km × cos 50° (from memory)


# ---------------------------------------------------------------- accepted with a notice
def test_semicolon_delimiter_with_decimal_commas(write_file):
    path = write_file("t.csv", "track_id;time;x;y\nA;0;1,5;0\nA;60;2,25;-0,5\n")
    with pytest.warns(TrackNotice, match="semicolon-delimited; a decimal comma"):
        tracks = read_tracks(path)
    np.testing.assert_array_equal(tracks.position_m, [[1.5, 0.0], [2.25, -0.5]])


def test_negative_times_notice(write_file):
    with pytest.warns(TrackNotice, match="2 fixes with negative times"):
        tracks = read_tracks(write_file("t.csv", H + "A,-120,0,0\nA,-60,1,0\nA,0,2,0\n"))
    np.testing.assert_array_equal(tracks.time_s, [-120, -60, 0])
    assert not tracks.time_is_absolute


def test_naive_iso_times_are_utc_with_a_notice(write_file):
    path = write_file("t.csv", H + "A,2024-06-03T06:00:00,0,0\nA,2024-06-03 07:00:00.5,1,0\n")
    with pytest.warns(TrackNotice, match=r"2 times without a time zone \(first at row 2\); taken as UTC"):
        tracks = read_tracks(path)
    # 2024-06-03T06:00:00Z is 1 717 394 400 s after the epoch (datetime.timestamp, Python standard library)
    import datetime

    epoch = datetime.datetime(2024, 6, 3, 6, tzinfo=datetime.timezone.utc).timestamp()
    np.testing.assert_array_equal(tracks.time_s, [epoch, epoch + 3600.5])
    assert tracks.time_is_absolute


def test_time_zone_offsets_are_converted_to_utc(write_file):
    tracks = _read_silently(write_file("t.csv", H + "A,2024-06-03T08:00:00+02:00,0,0\nA,2024-06-03T06:30:00Z,1,0\n"
                                                    "A,2024-06-03T01:30:00-0515,2,0\n"))
    np.testing.assert_array_equal(np.diff(tracks.time_s), [1800.0, 900.0])


def test_formula_text_in_an_id_stays_text(write_file):
    tracks = _read_silently(write_file("t.csv", H + '=cmd|\' /C calc\'!A0,0,0,0\n=cmd|\' /C calc\'!A0,60,1,0\n'
                                                    '@SUM(1+1),0,0,0\n@SUM(1+1),60,1,0\n'))
    assert sorted(tracks.unique_ids.tolist()) == ["=cmd|' /C calc'!A0", "@SUM(1+1)"]
    assert csv_safe_text("=cmd|' /C calc'!A0") == "'=cmd|' /C calc'!A0"
    assert csv_safe_text("@SUM(1+1)") == "'@SUM(1+1)"
    assert csv_safe_text("-3.5") == "-3.5" and csv_safe_text("MB-001") == "MB-001"


def test_lonlat_and_xy_both_present_uses_lonlat(write_file):
    path = write_file("t.csv", "id,time,lon,lat,x,y\nA,0,10,40,5,5\nA,60,10.001,40,6,5\n")
    with pytest.warns(TrackNotice, match="both lon/lat and x/y"):
        tracks = read_tracks(path)
    assert tracks.frame.kind == "lonlat" and sorted(tracks.extra) == ["x", "y"]
    np.testing.assert_array_equal(tracks.extra["x"], [5.0, 6.0])


def test_unknown_extra_columns_are_kept(write_file):
    tracks = _read_silently(write_file("t.csv", "track_id,time,x,y,temp_c,note\nA,0,0,0,,ok\n"
                                                "A,60,1,0,15.5,late\n"))
    np.testing.assert_array_equal(tracks.extra["temp_c"], [np.nan, 15.5])
    assert tracks.extra["note"].tolist() == ["ok", "late"]


# ---------------------------------------------------------------- issue 13: refused fast, in bounded memory
# Ceilings: wall time generous for a shared 2-core machine; traced memory (tracemalloc: Python and NumPy
# allocations) 3-5x the peak measured when the refusal was written (numbers beside each test).
def bounded(call, *, seconds: float, mebibytes: float):
    """Run ``call()``; assert its wall time and tracemalloc peak stay under the ceilings; return its
    result, or the TrackError it raised."""
    gc.collect()
    tracemalloc.start()
    start = time.perf_counter()
    try:
        outcome = call()
    except TrackError as err:
        outcome = err
    finally:
        elapsed = time.perf_counter() - start
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    print(f"{elapsed * 1e3:.1f} ms, peak {peak / 2**20:.3f} MiB")
    assert elapsed < seconds, f"took {elapsed:.3f} s (ceiling {seconds} s)"
    assert peak < mebibytes * 2**20, f"traced peak {peak / 2**20:.1f} MiB (ceiling {mebibytes} MiB)"
    return outcome


def _wide_csv(path, n_columns: int):
    names = ["track_id", "time", "x", "y"] + [f"c{i}" for i in range(n_columns - 4)]
    with open(path, "w") as out:
        out.write(",".join(names) + "\n")
        out.writelines(f"A,{t},1,2" + ",0" * (n_columns - 4) + "\n" for t in (0, 60))
    return path


def test_million_column_header_is_refused_from_line_1(tmp_path, run_cli):
    path = _wide_csv(tmp_path / "wide.csv", 1_000_000)   # 13.9 MB; was 28 min and 5.6 GB in inspect
    err = bounded(lambda: read_tracks(path), seconds=1.0, mebibytes=48)   # measured 3.4 ms, 12.7 MiB
    head = path.read_bytes()[: trackfile.MAX_HEADER_BYTES]
    counted = head.count(b",") + 1   # commas in the first 4 MiB of the header, + 1
    assert 500_000 < counted < 1_000_000
    assert (err.row, err.column) == (1, None)
    assert f"the header (line 1) has at least {counted:,} columns in its first 4 MiB, more than the 10,000" in str(err)
    code, out, stderr = run_cli("inspect", path)
    assert (code, out) == (2, "") and stderr.strip() == f"driftwise: error: {err}"


def test_columns_limit_is_exact_and_counted_before_names(tmp_path):
    trackfile.read_csv_chunks(_wide_csv(tmp_path / "ok.csv", 10_000), "ok.csv")   # accepted (chunks not read)
    with pytest.raises(TrackError, match=r"row 1: the header \(line 1\) has 10,001 columns, more than the 10,000"):
        trackfile.read_csv_chunks(_wide_csv(tmp_path / "over.csv", 10_001), "over.csv")
    # a quoted delimiter is part of a name, not a separator
    names = ",".join(["track_id", "time", "x", "y"] + [f'"c,{i}"' for i in range(9_996)])
    (tmp_path / "quoted.csv").write_text(names + "\nA,0,1,2" + ",0" * 9_996 + "\n")
    trackfile.read_csv_chunks(tmp_path / "quoted.csv", "quoted.csv")


def test_endless_header_line_is_refused_at_the_byte_cap(write_file, run_cli, monkeypatch):
    monkeypatch.setattr(trackfile, "MAX_HEADER_BYTES", 200_000)
    path = write_file("long.csv", "track_id,time,x," + "y" * 300_000 + "\nA,0,1,2\n")
    expect_error(path, run_cli, words=["the header (line 1) is longer than 0.191 MiB"], row=1, column=None)


def test_duplicate_column_name_is_refused_naming_both_positions(write_file, run_cli):
    path = write_file("dup.csv", "track_id,time,x,y,x\nA,0,1,2,5\nA,60,2,2,6\n")
    expect_error(path, run_cli, words=["column name 'x' appears twice in the header (columns 3 and 5)"],
                 row=1, column="x")
    bounded(lambda: read_tracks(path), seconds=0.5, mebibytes=0.3)   # measured 0.1 ms, 0.07 MiB


def test_two_spellings_of_a_role_column_are_refused(write_file, run_cli):
    path = write_file("dup.csv", "track_id,Time,x,y,time\nA,0,1,2,5\nA,60,2,2,6\n")
    expect_error(path, run_cli, words=["'Time' (column 2) and 'time' (column 5) both name the 'time' column"],
                 row=1, column="time")


def test_duplicate_column_in_a_dataframe_is_refused():
    frame = pd.DataFrame([["A", 0, 1, 2, 5], ["A", 60, 2, 2, 6]], columns=["track_id", "time", "x", "y", "y"])
    with pytest.raises(TrackError, match=r"<dataframe>, row 1, column 'y': the column name 'y' appears twice"):
        tracks_from_frame(frame)


def test_empty_header_names_are_not_duplicates(write_file):
    tracks = read_tracks(write_file("t.csv", H.strip() + ",,\nA,0,1,2,,\nA,60,2,2,,\n"))
    np.testing.assert_array_equal(tracks.position_m, [[1.0, 2.0], [2.0, 2.0]])


def test_nul_byte_in_a_field_names_line_and_column(write_file, run_cli):
    path = write_file("nul.csv", H + "A,0,1,2\nA,60,1\x00,2\n")
    expect_error(path, run_cli, words=["contains a NUL byte (0x00)"], row=3, column="x")
    bounded(lambda: read_tracks(path), seconds=0.5, mebibytes=0.3)   # measured 0.1 ms, 0.07 MiB


def test_nul_byte_beyond_the_sniffed_head_names_its_line(write_file, run_cli):
    rows = "".join(f"A,{60 * i},{i},0\n" for i in range(20_000))   # 330 kB, beyond the 64 KiB head
    path = write_file("late.csv", H + rows + "B\x00,0,1,2\nB,60,1,2\n")   # pandas alone would read 'B'
    expect_error(path, run_cli, words=["contains a NUL byte (0x00)"], row=20_002, column=None)
    bounded(lambda: read_tracks(path), seconds=0.5, mebibytes=8)   # measured 1.5 ms, 1.8 MiB


def test_two_fixes_inspect_warns_and_fit_refuses_with_the_minimum(write_file, tmp_path, run_cli):
    path = write_file("two.csv", H + "A,0,0,0\nA,600,100,20\n")
    import driftwise.app.cmd_fit  # noqa: F401  (the fit command and its numerical stack imported outside the timed call)

    expected = (f"{path}: 2 fixes in 1 track give 1 velocity observation (a track of m fixes gives m - 1); fit "
                "needs at least 3 to learn its hyperparameters, e.g. one track of 4 fixes or 3 tracks of 2")
    with pytest.warns(TrackWarning) as caught:
        code, out, _ = bounded(lambda: run_cli("inspect", path, "--json"), seconds=1.0, mebibytes=8)  # 17 ms, 1.6 MiB
    assert code == 0 and json.loads(out)["fit_warning"] == expected
    assert [str(w.message) for w in caught] == [expected]
    code, out, err = bounded(lambda: run_cli("fit", path, "--out", tmp_path / "m.npz"), seconds=1.0,
                             mebibytes=8)   # measured 15 ms, 1.6 MiB
    assert (code, out) == (2, "") and err.strip().splitlines()[-1] == f"driftwise: error: {expected}"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["two.csv"]   # no model, no checkpoint


def test_one_track_is_refused_by_the_calibrated_fit(write_file, tmp_path, run_cli):
    path = write_file("one.csv", H + "A,0,0,0\nA,600,100,20\nA,1200,180,50\nA,1800,260,90\n")
    code, _, err = run_cli("fit", path, "--out", tmp_path / "m.npz")
    assert code == 2
    assert "give 3 velocity observations" in err and "needs at least 2 tracks" in err and "--no-calibrate" in err
