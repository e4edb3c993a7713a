"""The ``driftwise`` command line: parse, call the library, print.

Exit codes: 0 success, 2 bad input (one line on stderr, no traceback),
1 internal error.  With ``--json`` exactly one JSON object goes to stdout.

Each command is a pair ``_add_<name>(subparsers)`` / ``_run_<name>(args)``;
no numerics live here.
"""

from __future__ import annotations

import argparse
import json
import sys
import warnings
from typing import Any, Callable

from . import __version__
from .errors import InputError

CAUTION = (
    "Caution: driftwise is a research tool. Forecasts that may guide spill response, "
    "search or other decisions affecting people or the environment must be validated "
    "locally and defer to the responsible authorities, local codes and licensed practice."
)

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as bad input (exit 2) in one line."""

    def error(self, message: str) -> None:  # pragma: no cover - exercised via main()
        raise InputError(f"{self.prog}: {message}")


def print_json(payload: dict[str, Any]) -> None:
    """Write one JSON object on stdout (NaN/inf become null)."""
    print(json.dumps(_jsonable(payload), allow_nan=False))


def _jsonable(value: Any) -> Any:
    import math

    import numpy as np

    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.bool_,)):
        return bool(value)
    return value


def _add_json_flag(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else")


def _add_quiet_flag(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


# ---------------------------------------------------------------- inspect
def _add_inspect(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("inspect", help="summarise a tracks file and its quality-control actions",
                       description="Summarise a tracks file: tracks, fixes, time span, sampling, speeds, frame and QC actions.")
    p.add_argument("tracks", help="CSV, CSV.GZ, Parquet or CF-trajectory NetCDF file of fixes")
    p.add_argument("--max-speed", default="5m/s", help="drop fixes implying a faster speed (default 5m/s)")
    p.add_argument("--max-gap", default=None, help="split a track at gaps longer than this (e.g. 6h; default: never)")
    _add_json_flag(p)
    p.set_defaults(run=_run_inspect)


def _run_inspect(args: argparse.Namespace) -> int:
    from .tracks import inspect_summary, read_tracks_from_cli

    tracks = read_tracks_from_cli(args)
    summary = inspect_summary(tracks)
    if args.json:
        print_json(summary)
    else:
        from .tracks import format_summary

        print(format_summary(summary))
    return EXIT_OK


COMMANDS: list[Callable[[argparse._SubParsersAction], None]] = [_add_inspect]


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="driftwise",
        description="Flow fields with uncertainty from particle trajectories; spread forecasts; "
        "physical-constraint checks; forecast skill. Units are SI (m, s, m/s, m²/s); "
        "options accept units such as 10m, 6h, 2d.",
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"driftwise {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for add in COMMANDS:
        add(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the console script; returns the exit code."""
    warnings.simplefilter("default")
    warnings.formatwarning = lambda message, category, *a, **k: f"driftwise: warning: {message}\n"
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        return int(args.run(args) or EXIT_OK)
    except InputError as err:
        print(f"driftwise: error: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("driftwise: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return EXIT_OK
    except Exception as err:  # internal error: one line, exit 1; DRIFTWISE_DEBUG=1 shows the traceback
        import os
        import traceback

        if os.environ.get("DRIFTWISE_DEBUG"):
            traceback.print_exc()
        print(f"driftwise: internal error: {type(err).__name__}: {err} "
              "(set DRIFTWISE_DEBUG=1 for a traceback; please report it)", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
