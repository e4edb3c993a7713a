"""``driftwise inspect``: summarise a tracks file.  Imports only the data layer (no jax), so it starts fast."""

from __future__ import annotations

import argparse
import warnings

from ..data.tracks import TrackWarning, format_summary, inspect_summary, read_tracks_from_cli
from .cliparts import EXIT_OK, add_json_flag, add_track_options, print_json


def configure_inspect(p: argparse.ArgumentParser) -> None:
    p.description = "Summarise a tracks file: tracks, fixes, time span, sampling, speeds, frame and QC actions."
    p.add_argument("tracks", help="CSV, CSV.GZ, Parquet or CF-trajectory NetCDF file of fixes")
    add_track_options(p)
    add_json_flag(p)
    p.set_defaults(run=_run_inspect)


def _run_inspect(args: argparse.Namespace) -> int:
    tracks = read_tracks_from_cli(args)
    summary = inspect_summary(tracks)
    if summary.get("fit_warning"):
        warnings.warn(summary["fit_warning"], TrackWarning, stacklevel=1)
    if args.json:
        print_json(summary)
    else:
        print(format_summary(summary))
    return EXIT_OK
