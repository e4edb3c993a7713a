"""What every command of the ``driftwise`` command line shares: exit codes, the one-line usage error,
the ``--json`` and ``--quiet`` flags and the JSON printer."""

from __future__ import annotations

import argparse
import json
from typing import Any

from ..errors import InputError
from ..files import plain

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


def add_quiet_flag(parser: argparse.ArgumentParser) -> None:
    """``--quiet``: no progress output."""
    parser.add_argument("--quiet", action="store_true", help="no progress bars")

