"""What every command of the ``driftwise`` command line shares: exit codes, the one-line usage error,
the ``--json``, ``--quiet`` and ``--profile`` flags and the JSON printer."""

from __future__ import annotations

import argparse
import json
from typing import Any

from ..errors import InputError
from ..files import plain
from ..units import format_duration, parse_duration_s, parse_length_m

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2


class UsageParser(argparse.ArgumentParser):
    """argparse that reports a usage error as bad input (exit 2) in one line."""

    def error(self, message: str) -> None:  # pragma: no cover - exercised via main()
        raise InputError(f"{self.prog}: {message}")


def print_json(payload: dict[str, Any]) -> None:
    """Write one JSON object on stdout (NaN/inf become null)."""
    print(json.dumps(plain(payload), allow_nan=False))


def add_json_flag(parser: argparse.ArgumentParser) -> None:
    """``--json``: one JSON object on stdout and nothing else."""
    parser.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else")


def add_exact_flag(parser: argparse.ArgumentParser) -> None:
    """``--exact``: the exact posterior at every point instead of the automatic table (dynamics.tabulate)."""
    parser.add_argument("--exact", action="store_true", help="evaluate the exact posterior at every point; by "
                        "default many releases x steps use a table of it on a grid (interpolation error <= 5 %% of "
                        "the posterior s.d.; releases leaving the grid are recomputed exactly)")


def add_track_options(parser: argparse.ArgumentParser, *, position_error: bool = False, gap: bool = True) -> None:
    """The options of reading a tracks file (data.tracks.read_tracks_from_cli): ``--max-speed``, ``--max-gap``
    (``gap``) and ``--position-error`` (``position_error``)."""
    if position_error:
        parser.add_argument("--position-error", default=None, help="standard deviation of one fix per axis, with its "
                            "unit (m, km, cm, mm; default: estimated from the tracks, and fitted with the field when "
                            "it is fitted through the transitions; refused above the typical step between fixes)")
    parser.add_argument("--max-speed", default="5m/s",
                        help="drop fixes implying a faster speed (bare: m/s; default 5m/s)")
    parser.add_argument("--spike-limit", type=float, default=None, metavar="FACTOR",
                        help="drop an isolated spike: a fix further off the line through its two neighbours than "
                        "FACTOR times the file's robust spread of that distance (default 10, "
                        "data.trackqc.SPIKE_LIMIT; at least 3, or 0 to keep every fix)")
    if gap:
        parser.add_argument("--max-gap", default=None,
                            help="split a track at gaps longer than this duration, with its unit "
                            "(e.g. 6h; default: never)")


def check_step(text: str | None) -> float | None:
    """``--step`` in seconds, None when not given (the command then takes the field's default); InputError unless > 0."""
    step = parse_duration_s(text, what="--step") if text else None
    if step is not None and not step > 0:
        raise InputError(f"--step must be positive, got {text!r}")
    return step


def add_quiet_flag(parser: argparse.ArgumentParser) -> None:
    """``--quiet``: no progress output."""
    parser.add_argument("--quiet", action="store_true", help="no progress bars or progress lines")



def add_profile_flag(parser: argparse.ArgumentParser) -> None:
    """``--profile``: print where the time went (the ``timing_s`` table of the JSON output)."""
    parser.add_argument("--profile", action="store_true",
                        help="print the wall time of each stage (always in the --json output as timing_s)")


def profile_text(timing_s: dict[str, float]) -> str:
    """The ``timing_s`` table as text, one stage a line with its share of the total."""
    total = timing_s.get("total") or sum(timing_s.values())
    lines = ["time (wall):"] + [f"  {name:<24} {format_duration(seconds):>9}  {100 * seconds / total:5.1f} %"
                                for name, seconds in timing_s.items() if name != "total"]
    return "\n".join(lines + [f"  {'total':<24} {format_duration(total):>9}"])


def position_error_m(args: argparse.Namespace) -> float | None:
    """``--position-error`` in metres (None when not given); InputError naming the option when it is negative."""
    if not args.position_error:
        return None
    value = parse_length_m(args.position_error, what="--position-error")
    if not value >= 0:
        raise InputError(f"--position-error must be ≥ 0 (the standard deviation of one fix), got {args.position_error}")
    return value
