"""The ``driftwise`` command line: parse, call the library, print.

Exit codes: 0 success, 2 bad input (one line on stderr, no traceback),
1 internal error.  With ``--json`` exactly one JSON object goes to stdout.

Each command is a pair ``_add_<name>(subparsers)`` / ``_run_<name>(args)``; the forecasting
commands (spread, score) live in :mod:`driftwise.app.cmd_forecast`, the shared flags and exit codes in
:mod:`driftwise.app.cliparts`.  No numerics live here.
"""

from __future__ import annotations

import argparse
import os
import shlex
import sys
import traceback
import warnings
from pathlib import Path
from typing import Any, Callable

from .. import devices
from ..data.positionerror import position_error_text
from ..data.tracks import TrackError, TrackWarning, fit_shortfall, format_summary, inspect_summary, read_tracks_from_cli
from ..diagnostics.grid import field_grid
from ..diagnostics.verdict import finer_maps, run_check
from ..dynamics.calibrate import calibrate
from ..dynamics.transitionfit import LIKELIHOOD_HELP, LIKELIHOODS, fit_by_likelihood, fit_report
from ..errors import InputError
from ..files import CAUTION
from ..gp.constituents import CONSTITUENTS, parse_constituents
from ..gp.kernels import BACKGROUND_HELP, BACKGROUNDS, DEFAULT_FAMILY, KERNEL_FAMILIES
from ..gp.modelfile import load_model, save_model
from ..gp.schedule import Checkpoint
from ..gp.training import fit as fit_velocities
from ..gp.training import fit_report as velocity_fit_report
from ..products.plots import plot_physics_maps, save_figure
from ..products.report import complete
from ..products.writers import (
    FIELD_GRID_SUFFIXES,
    write_field_grid,
)
from ..units import format_duration, format_length, format_speed, parse_duration_s, parse_length_m
from ..version import __version__
from .cliparts import EXIT_BAD_INPUT, EXIT_INTERNAL, EXIT_OK, UsageParser, add_json_flag, add_quiet_flag, print_json
from .cmd_backtrack import add_backtrack
from .cmd_connect import add_connect
from .cmd_forecast import add_score, add_spread
from .demo import DemoSettings, run_demo


# ---------------------------------------------------------------- inspect
def _add_inspect(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("inspect", help="summarise a tracks file and its quality-control actions",
                       description="Summarise a tracks file: tracks, fixes, time span, sampling, speeds, frame and QC actions.")
    p.add_argument("tracks", help="CSV, CSV.GZ, Parquet or CF-trajectory NetCDF file of fixes")
    p.add_argument("--max-speed", default="5m/s", help="drop fixes implying a faster speed (bare: m/s; default 5m/s)")
    p.add_argument("--max-gap", default=None,
                   help="split a track at gaps longer than this duration, with its unit (e.g. 6h; default: never)")
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



# ---------------------------------------------------------------- fit
def _add_fit(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("fit", help="fit a flow field with uncertainty to a tracks file",
                       description="Fit a vector-field Gaussian process (sparse variational, matrix-valued kernel) "
                       "to the velocities between consecutive fixes and write the model file. A checkpoint "
                       "MODEL.ckpt.npz is kept while fitting; --resume continues an interrupted fit from it.",
                       epilog=CAUTION)
    p.add_argument("tracks", help="CSV, CSV.GZ, Parquet or CF-trajectory NetCDF file of fixes")
    p.add_argument("--out", required=True, metavar="MODEL", help="model file to write (.npz)")
    p.add_argument("--kernel", default=DEFAULT_FAMILY, choices=list(KERNEL_FAMILIES),
                   help="kernel family: " + "; ".join(f"{name}: {spec.help}" for name, spec in KERNEL_FAMILIES.items())
                   + f" (default {DEFAULT_FAMILY})")
    p.add_argument("--inducing", type=int, default=None, metavar="M",
                   help="number of inducing points (default: min(256, observations/32), at least 16)")
    p.add_argument("--background", default="linear", choices=list(BACKGROUNDS), help=BACKGROUND_HELP)
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")
    p.add_argument("--position-error", default=None, help="standard deviation of one fix per axis, with its unit "
                   "(m, km, cm, mm; default: estimated from the tracks; refused above the typical step between fixes)")
    p.add_argument("--max-speed", default="5m/s", help="drop fixes implying a faster speed (bare: m/s; default 5m/s)")
    p.add_argument("--max-gap", default=None,
                   help="split a track at gaps longer than this duration, with its unit (e.g. 6h; default: never)")
    p.add_argument("--tides", default="none", metavar="LIST",
                   help=f"periodic constituents to model, comma-separated from {','.join(CONSTITUENTS)} (inertial: at "
                   "the latitude of lon/lat tracks), each with its own amplitude fields; or none (default)")
    p.add_argument("--slow-time-scale", default="none", metavar="auto|none|DURATION",
                   help="a slowly changing part of the flow with a Matern-3/2 time scale: auto (learned), a duration "
                   "with its unit (fixed, e.g. 2d) or none (default)")
    p.add_argument("--resume", action="store_true", help="continue from the checkpoint MODEL.ckpt.npz if present")
    p.add_argument("--likelihood", default="auto", choices=list(LIKELIHOODS), help=LIKELIHOOD_HELP)
    p.add_argument("--calibrate", action=argparse.BooleanOptionalAction, default=True,
                   help="after the fit, estimate K and tau from the likelihood of displacements between fixes "
                   "(lags from 2 fixes to a third of the tracks' duration) and store them in the model (default: on)")
    add_quiet_flag(p)
    add_json_flag(p)
    p.set_defaults(run=_run_fit)


def _run_fit(args: argparse.Namespace) -> int:
    position_error = args.position_error and parse_length_m(args.position_error, what="--position-error")
    if args.inducing is not None and args.inducing < 1:
        raise InputError(f"--inducing must be a positive integer, got {args.inducing}")
    if args.seed < 0:
        raise InputError(f"--seed must be a non-negative integer, got {args.seed}")
    tides, slow = parse_constituents(args.tides, what="--tides"), _slow_time_scale(args.slow_time_scale)
    if (tides or slow is not None) and args.likelihood == "transitions":
        raise InputError("--likelihood transitions needs a steady model; drop --tides/--slow-time-scale or use "
                         "--likelihood velocities")
    tracks = read_tracks_from_cli(args)
    shortfall = fit_shortfall(tracks, calibrate=args.calibrate)
    if shortfall:
        raise TrackError(tracks.source, shortfall)
    checkpoint = Checkpoint.beside(args.out, resume=args.resume)
    existed = checkpoint.path.exists()
    try:
        field, choice = _fit_for_cli(args, tracks, tides, slow, position_error, checkpoint)
    except KeyboardInterrupt:
        print(f"driftwise: fit interrupted; continue with --resume (checkpoint {checkpoint.path})", file=sys.stderr)
        raise
    except BaseException:
        if not existed:   # a checkpoint this run wrote is no use after a failure (one given to --resume is kept)
            checkpoint.path.unlink(missing_ok=True)
        raise
    checkpoint.path.unlink(missing_ok=True)   # the fit is complete: nothing to resume, whatever happens next
    calibrated = args.calibrate and not field.is_time_varying
    if calibrated:
        field = calibrate(field, tracks)
    written = save_model(field, args.out)
    report = {**(fit_report(field, choice) if choice is not None else _time_varying_report(field)),
              "model": str(written)}
    if args.calibrate:
        report["calibration"] = field.fit_info.get("calibration") if calibrated else {
            "skipped": "K and tau calibration needs a steady model; the fit's own K and tau are kept"}
    if args.json:
        print_json(report)
    else:
        print(_format_fit(report))
    return EXIT_OK


def _slow_time_scale(text: str):
    """--slow-time-scale: "none" → None, "auto" → "auto", else a duration with its unit → seconds."""
    if text.strip().lower() in ("none", "auto"):
        return None if text.strip().lower() == "none" else "auto"
    return parse_duration_s(text, what="--slow-time-scale")


def _fit_for_cli(args, tracks, tides, slow, position_error, checkpoint):
    """(field, likelihood choice): the steady fit through the likelihood choice, a time-varying one from the
    velocities alone (choice None: the transition likelihood propagates a steady SDE)."""
    quiet = args.quiet or args.json
    if not tides and slow is None:
        return fit_by_likelihood(tracks, args.kernel, args.likelihood, inducing=args.inducing, seed=args.seed,
                                 position_error_m=position_error, checkpoint=checkpoint, quiet=quiet,
                                 background=args.background)
    field = fit_velocities(tracks, args.kernel, inducing=args.inducing, seed=args.seed, position_error_m=position_error,
                           checkpoint=checkpoint, progress=not quiet, background=args.background, tides=tides,
                           slow_time_scale_s=slow)
    return field, None


def _time_varying_report(field) -> dict[str, Any]:
    return {**velocity_fit_report(field), "likelihood": "velocities", "likelihood_requested": "velocities",
            "likelihood_reason": "velocities: a time-varying model is fitted to the velocities between fixes"}


def _format_temporal(temporal: dict[str, Any]) -> list[str]:
    """Text lines for the time-varying components: per constituent its period and scales; the slow part's."""
    if temporal.get("components", ["steady"]) == ["steady"]:
        return []
    lines = [f"  time-varying components: {', '.join(temporal['components'])} (phase of cos/sin(omega t) on the "
             "track file's time axis)"]
    for name, c in temporal["constituents"].items():
        lines.append(f"  {name}: period {format_duration(c['period_s'])}; " + _scales_text(c["hyperparameters"]))
    if "slow" in temporal:
        slow = temporal["slow"]
        how = "learned" if slow["time_scale_learned"] else "fixed"
        lines.append(f"  slow: time scale {format_duration(slow['time_scale_s'])} ({how}); "
                     + _scales_text(slow["hyperparameters"]))
    return lines


def _scales_text(hyper: dict[str, float]) -> str:
    return ", ".join(f"{name} {format_speed(v) if name.endswith('_m_s') else format_length(v)}"
                     for name, v in hyper.items())


def _format_fit(report: dict[str, Any]) -> str:
    hyper = report["hyperparameters"]
    lines = [f"fit: {report['kernel']} kernel, {report['n_observations']} velocity observations from "
             f"{report['n_tracks']} tracks, {report['n_inducing']} inducing points",
             f"  ELBO {report['elbo']:.6g} nats ({report['elbo_per_observation']:.4g} per observation) after "
             f"{report['steps']} steps" + ("" if report["converged"] else " (step limit reached before the plateau)")]
    lines += [f"  {name} = {value:.4g}" for name, value in hyper.items()]
    lines += _format_temporal(report.get("temporal", {}))
    lines.append("  " + position_error_text(report))
    lines += [f"  decorrelation time τ = {report['decorrelation_time_s']:.4g} s "
              f"({report.get('decorrelation_time_source') or 'length scale / RMS speed'})",
              f"  likelihood: {report['likelihood_reason']}"]
    if "calibration_check" in report:
        check = report["calibration_check"]
        lines.append(f"  calibration check: K = {check['diffusivity_m2_s']:.3g} m²/s, τ = {check['decorrelation_time_s']:.3g}"
                     f" s (the transition fit's K = {report['diffusivity_m2_s']:.3g} m²/s is kept)")
    return "\n".join(lines + [f"wrote {report['model']}"])




# ---------------------------------------------------------------- demo
def _add_demo(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="the whole job on the bundled invented bay: fit, check, spread, score, report",
                       description="Run the whole job on the bundled demo data (Mirren Bay, invented): inspect the "
                       "tracks, fit a Helmholtz flow field, check divergence and vorticity, forecast a fuel spill "
                       "and an outfall plume reaching a shellfish bed, score forecasts on held-out tracks, and "
                       "export the gridded field. Writes every product, the figures, summary.json and a "
                       "self-contained report.html into the output folder and prints a short digest.",
                       epilog=CAUTION)
    p.add_argument("--out", default="driftwise-demo", metavar="DIR",
                   help="output folder (default ./driftwise-demo; created if needed, files in it are replaced)")
    p.add_argument("--figures", default=None, metavar="DIR", help="folder for the PNG figures (default DIR/figures)")
    p.add_argument("--fast", action="store_true",
                   help="smaller sizes for a quick smoke run (fewer inducing points and steps; rougher numbers)")
    add_json_flag(p)
    add_quiet_flag(p)
    p.set_defaults(run=_run_demo)


def _run_demo(args: argparse.Namespace) -> int:

    words = ["driftwise", "demo", "--out", args.out] + (["--figures", args.figures] if args.figures else [])
    words += [flag for flag, on in (("--fast", args.fast), ("--json", args.json), ("--quiet", args.quiet)) if on]
    command = " ".join(shlex.quote(w) for w in words)
    settings = DemoSettings.fast() if args.fast else DemoSettings()
    summary = run_demo(args.out, quiet=args.quiet, settings=settings, command=command, figures_dir=args.figures,
                       stream=sys.stderr if args.json else sys.stdout)
    if args.json:
        print_json(summary)
    if not complete(summary):
        failed = [s["name"] for s in summary["job"]["steps"] if s["status"] != "done"]
        print(f"driftwise: demo incomplete: {', '.join(failed)} did not run to the end (see {args.out}/report.html)",
              file=sys.stderr)
        return EXIT_INTERNAL
    return EXIT_OK




# ---------------------------------------------------------------- check and map (physics.py, verdict.py)
def _add_check(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "check", help="is the flow divergence-free? curl-free? kernel-family evidence and calibrated tests",
        description="Fit the four kernel families (helmholtz, divergence-free, curl-free, independent) to the "
        "tracks with identical settings and compare their ELBO and the log likelihood of held-out tracks (whole "
        "tracks are held out). Then test divergence and vorticity on a grid inside the data hull: posterior "
        "z-scores of the Helmholtz model (its hyperparameters from the training tracks, conditioned on all "
        "tracks), Benjamini-Hochberg correction at 5 %. Reports the divergent share of the velocity variance "
        "and a verdict with its reasons.", epilog=CAUTION)
    p.add_argument("tracks", help="CSV, CSV.GZ, Parquet or CF-trajectory NetCDF file of fixes")
    p.add_argument("--model", default=None, metavar="MODEL",
                   help="test this fitted model's posterior instead of the Helmholtz refit (families are still fitted)")
    p.add_argument("--holdout-fraction", type=float, default=0.2, metavar="F",
                   help="share of the tracks held out for the family comparison (default 0.2)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed of the split and fits (default 0)")
    p.add_argument("--inducing", type=int, default=64, metavar="M", help="inducing points per family fit (default 64)")
    p.add_argument("--steps", type=int, default=300, metavar="N", help="optimiser steps per family fit (default 300)")
    p.add_argument("--position-error", default=None, help="standard deviation of one fix per axis, with its unit "
                   "(m, km, cm, mm; default: estimated from the tracks; refused above the typical step between fixes)")
    p.add_argument("--max-speed", default="5m/s", help="drop fixes implying a faster speed (bare: m/s; default 5m/s)")
    p.add_argument("--max-gap", default=None,
                   help="split a track at gaps longer than this duration, with its unit (e.g. 6h; default: never)")
    p.add_argument("--figures", default=None, metavar="DIR", help="write divergence and vorticity maps (PNG) here")
    add_quiet_flag(p)
    add_json_flag(p)
    p.set_defaults(run=_run_check)


def _run_check(args: argparse.Namespace) -> int:
    position_error = args.position_error and parse_length_m(args.position_error, what="--position-error")
    for name, value, low in (("--seed", args.seed, 0), ("--inducing", args.inducing, 1), ("--steps", args.steps, 1)):
        if value < low:
            raise InputError(f"{name} must be an integer ≥ {low}, got {value}")
    model = None
    if args.model is not None:

        model = load_model(args.model)
    tracks = read_tracks_from_cli(args)
    summary, maps = run_check(tracks, model=model, holdout_fraction=args.holdout_fraction, seed=args.seed,
                              inducing=args.inducing, steps=args.steps, position_error_m=position_error,
                              progress=not (args.quiet or args.json))
    if args.figures is not None and tracks.dim == 2:

        figure = plot_physics_maps(finer_maps(maps))
        summary["figures"] = [str(save_figure(figure, Path(args.figures) / "physics_maps.png"))]
    if args.json:
        print_json(summary)
    else:
        print(_format_check(summary))
    return EXIT_OK


def _format_check(s: dict[str, Any]) -> str:
    ev, split, verdict = s["evidence"], s["helmholtz_split"], s["verdict"]
    lines = [f"check: {s['n_tracks']} tracks; {ev['heldout_tracks']} held out ({ev['heldout_observations']} velocity "
             f"observations); tested model: {s['tested_model']}",
             "  " + position_error_text(s),
             f"  {'family':<16} {'ELBO (nats)':>14} {'held-out log lik. (nats)':>26} {'per obs.':>9}"]
    for name, fam in s["families"].items():
        lines.append(f"  {name:<16} {fam['elbo']:>14.1f} {fam['heldout_log_likelihood']:>26.1f} "
                     f"{fam['heldout_log_likelihood_per_observation']:>9.3f}")
    lines += [f"  {ev['reading']}",
              f"  divergent share of the velocity variance: {split['divergent_variance_fraction']:.3f} ± "
              f"{split['std']:.3f} (delta method; 90 % {split['interval_90'][0]:.3f}–{split['interval_90'][1]:.3f})"]
    for name in ("divergence", "vorticity"):
        q = s[name]
        lines.append(f"  {name + ':':<11} significant over {100 * q['significant_area_fraction']:.1f} % of the data hull "
                     f"({q['n_cells']} cells, BH α = {q['alpha']:g}), max |z| = {q['max_abs_z']:.2f}")
    for key, label in (("divergence_free", "divergence-free"), ("curl_free", "curl-free")):
        lines.append(f"  verdict {label}: {verdict['answers'][key].upper()}")
        lines += [f"    - {reason}" for reason in verdict["reasons"][key]]
    lines += [f"  rule: {verdict['rule']}"] + [f"wrote {path}" for path in s.get("figures", [])] + [CAUTION]
    return "\n".join(lines)


def _add_map(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "map", help="export the fitted field on a regular grid (NetCDF with CF attributes, or CSV)",
        description="Sample a 2-D model on a regular grid over its data extent: posterior mean velocity and its "
        "standard deviation (east/north for a lon/lat model), divergence and vorticity with their standard "
        "deviations (exact GP derivatives), and a data-support mask (where the posterior variance stays near "
        "the prior, the data say little). Writes NetCDF-4 with CF-1.8 attributes (.nc) or one CSV row per "
        "grid node (.csv).", epilog=CAUTION)
    p.add_argument("model", help="model file written by `driftwise fit`")
    p.add_argument("--out", required=True, metavar="FIELD.nc", help="output file, .nc (NetCDF) or .csv")
    p.add_argument("--spacing", default=None,
                   help="grid spacing with its unit, e.g. 500m (default: about 80 cells across the extent)")
    add_json_flag(p)
    p.set_defaults(run=_run_map)


def _run_map(args: argparse.Namespace) -> int:

    if Path(args.out).suffix.lower() not in FIELD_GRID_SUFFIXES:
        raise InputError(f"--out {args.out}: unknown gridded-field format; use a name ending in "
                         f"{' or '.join(FIELD_GRID_SUFFIXES)}")
    spacing = parse_length_m(args.spacing, what="--spacing") if args.spacing is not None else None
    grid = field_grid(load_model(args.model), spacing_m=spacing)
    written = write_field_grid(grid, args.out)
    report = {"out": str(written), "shape": list(grid.supported.shape), "spacing_m": float(grid.x_m[1] - grid.x_m[0])
              if grid.x_m.size > 1 else None, "x_range_m": [float(grid.x_m[0]), float(grid.x_m[-1])],
              "y_range_m": [float(grid.y_m[0]), float(grid.y_m[-1])], "components": list(grid.components),
              "supported_fraction": float(grid.supported.mean()), "zero_by_construction": grid.reasons}
    if args.json:
        print_json(report)
    else:
        print(f"map: {report['shape'][1]} × {report['shape'][0]} nodes every {report['spacing_m']:g} m; data support "
              f"over {100 * report['supported_fraction']:.0f} % of the grid\nwrote {written}\n{CAUTION}")
    return EXIT_OK


COMMANDS: list[Callable[[argparse._SubParsersAction], None]] = [
    _add_inspect, add_spread, _add_fit, _add_demo, add_score, _add_check, _add_map, add_connect, add_backtrack]


def build_parser() -> argparse.ArgumentParser:
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
        devices.initialize()      # joins a multi-process run when DRIFTWISE_COORDINATOR is set (README)
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
