"""The ``driftwise`` command line: parse, call the library, print.

Exit codes: 0 success, 2 bad input (one line on stderr, no traceback),
1 internal error.  With ``--json`` exactly one JSON object goes to stdout.

:data:`COMMANDS` is the registry of commands: name, one-line help and the module that configures and runs
it (``configure_<name>(parser)`` sets the description and options and ``run``).  Only the module of the
command being run is imported, by name at dispatch, so ``driftwise --help`` and ``driftwise inspect`` do
not load jax, matplotlib or xarray.  The shared flags and exit codes are in :mod:`driftwise.app.cliparts`.
No numerics live here.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import traceback
import warnings
from dataclasses import dataclass

from ..errors import InputError
from ..files import CAUTION
from ..version import __version__
from .cliparts import EXIT_BAD_INPUT, EXIT_INTERNAL, EXIT_OK, UsageParser


@dataclass(frozen=True)
class Command:
    """One subcommand: its one-line help and the module (``driftwise.app.<module>``) holding ``configure_<name>``."""

    help: str
    module: str


COMMANDS: dict[str, Command] = {
    "inspect": Command("summarise a tracks file and its quality-control actions", "cmd_inspect"),
    "spread": Command("forecast where releases go: mean paths, covariance ellipses, probability of reaching an area",
                      "cmd_forecast"),
    "fit": Command("fit a flow field with uncertainty to a tracks file", "cmd_fit"),
    "demo": Command("the whole job on the bundled invented bay: fit, check, spread, score, report", "cmd_demo"),
    "score": Command("score forecasts on held-out tracks: separation, skill, ellipse coverage, baselines",
                     "cmd_forecast"),
    "check": Command("is the flow divergence-free? curl-free? kernel-family evidence and calibrated tests",
                     "cmd_check"),
    "map": Command("export the fitted field on a regular grid (NetCDF with CF attributes, or CSV)", "cmd_check"),
    "connect": Command("connectivity between sites: the share of each site's material inside each other site",
                       "cmd_connect"),
    "backtrack": Command("where and when was something released, given where it was found?", "cmd_backtrack"),
}


def _configure(name: str, parser: argparse.ArgumentParser) -> None:
    """Give ``parser`` the options of command ``name``, importing its module now (by name: see the docstring)."""
    module = importlib.import_module(f"{__package__}.{COMMANDS[name].module}")
    getattr(module, f"configure_{name}")(parser)


def _command_word(argv: list[str] | None) -> str | None:
    """The command named on the command line (the first word not starting with '-'), or None."""
    words = sys.argv[1:] if argv is None else argv
    return next((word for word in words if not word.startswith("-")), None)


def build_parser(argv: list[str] | None = None, *, every: bool = True) -> argparse.ArgumentParser:
    """The parser.  ``every``: configure all commands (imports every command module); otherwise only the one
    ``argv`` names, the others listed with their help line (enough for ``driftwise --help``)."""
    parser = UsageParser(
        prog="driftwise",
        description="Flow fields with uncertainty from particle trajectories; spread forecasts; "
        "physical-constraint checks; forecast skill. Units are SI (m, s, m/s, m²/s); "
        "options accept units such as 10m, 6h, 2d. A length or duration needs its unit (48 could be seconds or "
        "hours) unless the option's help says what a bare number means.",
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"driftwise {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=UsageParser)
    sub.required = True
    chosen = _command_word(argv)
    for name, command in COMMANDS.items():
        p = sub.add_parser(name, help=command.help, description=command.help)
        if every or name == chosen:
            _configure(name, p)
    return parser


# XLA runs the heavy work on its own threads; the LAPACK calls jax makes (Cholesky, triangular solves, through
# scipy's OpenBLAS, loaded at the first such call) otherwise start OpenBLAS threads that fight XLA's for the cores.
# One BLAS thread made `fit` on 5,000 fixes 21 % faster on 2 cores (DEVELOPERS.md, "Benchmark record").
BLAS_THREADS_VARIABLE = "OPENBLAS_NUM_THREADS"


# jax keeps compiled programs on disk between runs when JAX_COMPILATION_CACHE_DIR is set (read when jax is first
# imported): a second `fit` on data of the same size skips ≈ 5 s of compiling (DEVELOPERS.md, "Benchmark record").
# The command line sets it to a folder of the user's cache unless the environment says otherwise;
# DRIFTWISE_COMPILE_CACHE=off turns it off.
COMPILE_CACHE_OFF = "DRIFTWISE_COMPILE_CACHE"
COMPILE_CACHE_MIN_SECONDS = "0.1"     # programs that took less to compile are not kept
COMPILE_CACHE_LIMIT_BYTES = 2**30     # beyond this the oldest entries are deleted at the next start


def compile_cache_folder() -> str:
    """$XDG_CACHE_HOME/driftwise/xla, or ~/.cache/driftwise/xla."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "driftwise", "xla")


def prune_compile_cache(folder: str, limit_bytes: int = COMPILE_CACHE_LIMIT_BYTES) -> None:
    """Delete the least recently written files of ``folder`` until the rest fit in ``limit_bytes``."""
    try:
        entries = [(e.stat().st_mtime, e.stat().st_size, e.path) for e in os.scandir(folder) if e.is_file()]
    except OSError:
        return
    total = sum(size for _, size, _ in entries)
    for _, size, path in sorted(entries):
        if total <= limit_bytes:
            break
        try:
            os.remove(path)
            total -= size
        except OSError:
            pass


# glibc (2.35+) may back malloc's large blocks by transparent huge pages (a tunable read at process start).  XLA's
# CPU runtime allocates its working buffers afresh on every call of a compiled program, and touching them page by
# page cost the 5,000-fix fit 7 s of system time; with 2 MiB pages 3.9 s (optimise 13.3 → 11.7 s; DEVELOPERS.md,
# "Benchmark record").  So the command line restarts itself once with the tunable set, before anything heavy is
# imported, unless the environment already names it, DRIFTWISE_HUGE_PAGES=off, or the system is not Linux.
HUGE_PAGES_TUNABLE = "glibc.malloc.hugetlb=1"
HUGE_PAGES_OFF = "DRIFTWISE_HUGE_PAGES"
LIGHT_COMMANDS = ("inspect", "-h", "--help", "--version")


def _restart_with_huge_pages(argv: list[str]) -> None:
    """Re-execute this process with ``GLIBC_TUNABLES`` holding :data:`HUGE_PAGES_TUNABLE` (returns when it does not
    apply: another system, the option already set or refused, a light command, no original command line)."""
    tunables = os.environ.get("GLIBC_TUNABLES", "")
    if (not sys.platform.startswith("linux") or "glibc.malloc.hugetlb" in tunables
            or os.environ.get(HUGE_PAGES_OFF, "").lower() in ("off", "0", "no", "false")
            or not argv or argv[0] in LIGHT_COMMANDS or not getattr(sys, "orig_argv", None)):
        return
    env = dict(os.environ, GLIBC_TUNABLES=":".join(filter(None, (tunables, HUGE_PAGES_TUNABLE))))
    try:
        sys.stdout.flush()
        sys.stderr.flush()
        os.execve(sys.executable, sys.orig_argv, env)
    except OSError:   # cannot restart (e.g. a frozen interpreter): go on as we are
        return


SHARDED_COMMANDS = ("connect", "backtrack")   # run as the program: one CPU device per core (one_device_per_core)


def _set_up_environment() -> None:
    """One BLAS thread and the on-disk compile cache, each unless the environment already decides."""
    os.environ.setdefault(BLAS_THREADS_VARIABLE, "1")
    if os.environ.get(COMPILE_CACHE_OFF, "").lower() in ("off", "0", "no", "false"):
        return
    if "JAX_COMPILATION_CACHE_DIR" not in os.environ:
        os.environ["JAX_COMPILATION_CACHE_DIR"] = compile_cache_folder()
        prune_compile_cache(os.environ["JAX_COMPILATION_CACHE_DIR"])
    os.environ.setdefault("JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS", COMPILE_CACHE_MIN_SECONDS)


def one_device_per_core(environ: dict) -> None:
    """One XLA CPU device per core this process may use (``--xla_force_host_platform_device_count`` added to
    ``XLA_FLAGS`` in ``environ``, unless a device count is already set), so that a many-release command splits
    its releases over every core (driftwise.devices; 2 cores: the table's release-steps/s 7.5·10⁵ → 1.7·10⁶).
    jax reads the flag when it creates its CPU backend, at the command's first computation, after this."""
    flags = environ.get("XLA_FLAGS", "")
    if "device_count" not in flags:
        cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
        environ["XLA_FLAGS"] = f"{flags} --xla_force_host_platform_device_count={max(1, cores)}".strip()


def main(argv: list[str] | None = None) -> int:
    """Entry point of the console script; returns the exit code.  Sets ``OPENBLAS_NUM_THREADS=1`` and the
    on-disk compile cache unless the environment already decides them (they take effect when scipy's BLAS and
    jax are loaded after this, as in a command-line run).  Run as the program (``argv`` None) it first restarts
    itself once with huge pages for malloc (:func:`_restart_with_huge_pages`)."""
    if argv is None:
        _restart_with_huge_pages(sys.argv[1:])
    _set_up_environment()
    warnings.simplefilter("default")
    warnings.formatwarning = lambda message, category, *a, **k: f"driftwise: warning: {message}\n"
    try:
        parser = build_parser(argv, every=False)
        args = parser.parse_args(argv)
        if os.environ.get("DRIFTWISE_COORDINATOR"):   # devices.ENV_COORDINATOR: join a multi-process run (README)
            importlib.import_module("driftwise.devices").initialize()     # before any jax work; imports jax
        elif argv is None and args.command in SHARDED_COMMANDS:
            one_device_per_core(os.environ)
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
        if os.environ.get("DRIFTWISE_DEBUG"):
            traceback.print_exc()
        print(f"driftwise: internal error: {type(err).__name__}: {err} "
              "(set DRIFTWISE_DEBUG=1 for a traceback; please report it)", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
