"""``driftwise check`` (is the flow divergence-free? curl-free?) and ``driftwise map`` (the field on a grid)."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from ..data.positionerror import position_error_text
from ..data.tracks import read_tracks_from_cli
from ..data.utctime import iso_utc, release_time_s
from ..diagnostics.grid import field_grid
from ..diagnostics.verdict import finer_maps, run_check
from ..errors import InputError
from ..files import CAUTION
from ..gp.modelfile import load_model
from ..products.fieldseries import ellipse_figures, field_series, write_field_series
from ..products.plots import plot_physics_maps, save_figure
from ..products.writers import FIELD_GRID_SUFFIXES, write_field_grid
from ..progress import Stopwatch
from ..units import format_duration, format_estimate, format_length, parse_length_m
from .cliparts import (
    EXIT_OK,
    add_json_flag,
    add_profile_flag,
    add_quiet_flag,
    add_track_options,
    position_error_m,
    print_json,
    profile_text,
)


def configure_check(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Fit the four kernel families (helmholtz, divergence-free, curl-free, independent) to the "
        "tracks with identical settings and compare their ELBO and the log likelihood of held-out tracks (whole "
        "tracks are held out). Then test divergence and vorticity on a grid inside the data hull: posterior "
        "z-scores of the Helmholtz model (its hyperparameters from the training tracks, conditioned on all "
        "tracks), Benjamini-Hochberg correction at 5 %. Reports the divergent share of the velocity variance "
        "and a verdict with its reasons. A time-varying --model (tides, slow part) is tested on its divergence "
        "and vorticity averaged over its data's time span (the Helmholtz split then comes from the steady "
        "helmholtz refit).")
    p.epilog = CAUTION
    p.add_argument("tracks", help="CSV, CSV.GZ, Parquet or CF-trajectory NetCDF file of fixes")
    p.add_argument("--model", default=None, metavar="MODEL",
                   help="test this fitted model's posterior instead of the Helmholtz refit (families are still fitted)")
    p.add_argument("--holdout-fraction", type=float, default=0.2, metavar="F",
                   help="share of the tracks held out for the family comparison (default 0.2)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed of the split and fits (default 0)")
    p.add_argument("--inducing", type=int, default=64, metavar="M", help="inducing points per family fit (default 64)")
    p.add_argument("--steps", type=int, default=300, metavar="N", help="optimiser steps per family fit (default 300)")
    add_track_options(p, position_error=True)
    p.add_argument("--figures", default=None, metavar="DIR", help="write divergence and vorticity maps (PNG) here")
    add_quiet_flag(p)
    add_profile_flag(p)
    add_json_flag(p)
    p.set_defaults(run=_run_check)


def _run_check(args: argparse.Namespace) -> int:
    position_error = position_error_m(args)
    for name, value, low in (("--seed", args.seed, 0), ("--inducing", args.inducing, 1), ("--steps", args.steps, 1)):
        if value < low:
            raise InputError(f"{name} must be an integer ≥ {low}, got {value}")
    clock = Stopwatch()
    with clock("read"):
        model = None if args.model is None else load_model(args.model)
        tracks = read_tracks_from_cli(args)
    summary, maps = run_check(tracks, model=model, holdout_fraction=args.holdout_fraction, seed=args.seed,
                              inducing=args.inducing, steps=args.steps, position_error_m=position_error,
                              progress=not (args.quiet or args.json), timing_s=clock.laps)
    if args.figures is not None and tracks.dim == 2:
        with clock("figures"):
            figure = plot_physics_maps(finer_maps(maps))
            summary["figures"] = [str(save_figure(figure, Path(args.figures) / "physics_maps.png"))]
    summary["timing_s"] = clock.laps | {"total": sum(clock.laps.values())}
    if args.json:
        print_json(summary)
    else:
        print(format_check(summary) + ("\n" + profile_text(summary["timing_s"]) if args.profile else ""))
    return EXIT_OK


def format_check(s: dict[str, Any]) -> str:
    """The text ``driftwise check`` prints."""
    ev, split, verdict = s["evidence"], s["helmholtz_split"], s["verdict"]
    lines = [f"check: {s['n_tracks']} tracks; {ev['heldout_tracks']} held out ({ev['heldout_observations']} velocity "
             f"observations); tested model: {s['tested_model']}",
             "  " + position_error_text(s),
             f"  {'family':<16} {'ELBO (nats)':>14} {'held-out log lik. (nats)':>26} {'per obs.':>9}  fit"]
    for name, fam in s["families"].items():
        state = "converged" if fam.get("converged") else f"stopped at {fam.get('steps', '?')} steps, not converged"
        lines.append(f"  {name:<16} {fam['elbo']:>14.1f} {fam['heldout_log_likelihood']:>26.1f} "
                     f"{fam['heldout_log_likelihood_per_observation']:>9.3f}  {state}")
    unconverged = [name for name, fam in s["families"].items() if not fam.get("converged", True)]
    if unconverged:
        lines.append(f"  note: the fit of {', '.join(unconverged)} reached the step limit before its ELBO levelled off; "
                     "its ELBO is a lower bound of what the family can reach (raise --steps)")
    lines += [f"  {ev['reading']}",
              f"  divergent share of the velocity variance: "
              f"{format_estimate(split['divergent_variance_fraction'], split['std'])} (delta method; 90 % "
              f"{format_estimate(split['interval_90'][0], None)}–{format_estimate(split['interval_90'][1], None)})"]
    grid_spacing = (s.get("grid") or {}).get("spacing_m")
    spacing = "" if grid_spacing is None else f" every {format_length(grid_spacing)}"
    for name in ("divergence", "vorticity"):
        q = s[name]
        lines.append(f"  {name + ':':<11} significant over {100 * q['significant_area_fraction']:.1f} % of the data hull "
                     f"({q['n_cells']} cells{spacing}, BH α = {q['alpha']:g}), max |z| = {q['max_abs_z']:.2f}")
    for key, label in (("divergence_free", "divergence-free"), ("curl_free", "curl-free")):
        lines.append(f"  verdict {label}: {verdict['answers'][key].upper()}")
        lines += [f"    - {reason}" for reason in verdict["reasons"][key]]
    lines += [f"  rule: {verdict['rule']}"] + [f"wrote {path}" for path in s.get("figures", [])] + [CAUTION]
    return "\n".join(lines)


def configure_map(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Sample a 2-D model on a regular grid over its data extent: posterior mean velocity and its "
        "standard deviation (east/north for a lon/lat model), divergence and vorticity with their standard "
        "deviations (exact GP derivatives), and a data-support mask (where the posterior variance stays near "
        "the prior, the data say little). Writes NetCDF-4 with CF-1.8 attributes (.nc) or one CSV row per "
        "grid node (.csv). A time-varying model (fitted with tides or a slow part) is mapped at the --times "
        "along a CF time dimension, or without --times as its time mean over the data's time span (one slice "
        "with time bounds and cell_methods 'time: mean'), and per tidal constituent the current ellipse "
        "(semi-major, semi-minor, inclination, phase, each with its posterior s.d.) is added; NetCDF only.")
    p.epilog = CAUTION
    p.add_argument("model", help="model file written by `driftwise fit`")
    p.add_argument("--out", required=True, metavar="FIELD.nc", help="output file, .nc (NetCDF) or .csv")
    p.add_argument("--spacing", default=None,
                   help="grid spacing with its unit, e.g. 500m (default: about 80 cells across the extent)")
    p.add_argument("--times", default=None, metavar="T1,T2,...",
                   help="time-varying models only: map the field at these times, comma-separated; ISO-8601 "
                        "(e.g. 2024-06-03T12:00Z) when the model was fitted to ISO times, else durations on the "
                        "tracks' own clock (e.g. 6h,12h30min; bare numbers are seconds). Default: the time mean "
                        "over the data's time span. A steady model is the same at every time, so --times is refused")
    p.add_argument("--figures", default=None, metavar="DIR",
                   help="time-varying models with tides: write a figure of the tidal current ellipses per "
                        "constituent (PNG) here")
    add_json_flag(p)
    p.set_defaults(run=_run_map)


def _run_map(args: argparse.Namespace) -> int:
    if Path(args.out).suffix.lower() not in FIELD_GRID_SUFFIXES:
        raise InputError(f"--out {args.out}: unknown gridded-field format; use a name ending in "
                         f"{' or '.join(FIELD_GRID_SUFFIXES)}")
    spacing = parse_length_m(args.spacing, what="--spacing") if args.spacing is not None else None
    field = load_model(args.model)
    if field.is_time_varying:
        return _run_time_map(args, field, spacing)
    if args.times is not None:
        raise InputError(f"--times: {args.model} is a steady model (fitted without tides or a slow part), so its "
                         "map is the same at every time; drop --times")
    grid = field_grid(field, spacing_m=spacing)
    written = write_field_grid(grid, args.out)
    report = _grid_report(grid, written)
    if args.json:
        print_json(report)
    else:
        print(_grid_text(report) + f"\nwrote {written}\n{CAUTION}")
    return EXIT_OK


def _grid_report(grid, written) -> dict[str, Any]:
    return {"out": str(written), "shape": list(grid.supported.shape), "spacing_m": float(grid.x_m[1] - grid.x_m[0])
            if grid.x_m.size > 1 else None, "x_range_m": [float(grid.x_m[0]), float(grid.x_m[-1])],
            "y_range_m": [float(grid.y_m[0]), float(grid.y_m[-1])], "components": list(grid.components),
            "supported_fraction": float(grid.supported.mean()), "zero_by_construction": grid.reasons}


def _grid_text(report: dict[str, Any]) -> str:
    return (f"map: {report['shape'][1]} × {report['shape'][0]} nodes every {format_length(report['spacing_m'])}; "
            f"data support over {100 * report['supported_fraction']:.0f} % of the grid")


def _run_time_map(args: argparse.Namespace, field, spacing: float | None) -> int:
    if Path(args.out).suffix.lower() != ".nc":
        raise InputError(f"--out {args.out}: a time-varying model's map (time slices and tidal ellipses) is written "
                         "as NetCDF only; use a name ending in .nc")
    times = None if args.times is None else [release_time_s(field.data_summary, text.strip(), what="--times")
                                             for text in args.times.split(",") if text.strip()]
    if times is not None and not times:
        raise InputError("--times: give at least one time, e.g. --times 6h,12h")
    series = field_series(field, spacing_m=spacing, times_s=times)
    written = write_field_series(series, args.out)
    report = _grid_report(series.grids[0], written) | _time_report(series)
    if args.figures is not None:
        report["figures"] = [str(p) for p in ellipse_figures(series, args.figures)]
    if args.json:
        print_json(report)
        return EXIT_OK
    origin = series.time_origin_utc
    when = (lambda t: iso_utc(origin, t)) if origin else (lambda t: format_duration(t) + " on the tracks' clock")
    if series.time_mean_s is not None:
        slices = (f"no --times: the time mean over the data's span {when(series.time_mean_s[0])} to "
                  f"{when(series.time_mean_s[1])} (one slice with time bounds, cell_methods 'time: mean')")
    else:
        count = len(series.times_s)
        slices = f"{count} time slice{'s' if count != 1 else ''}: " + ", ".join(when(t) for t in series.times_s)
    ellipses = ", ".join(series.ellipses) or "none (no tidal constituents)"
    print(f"{_grid_text(report)}\n  {slices}\n  tidal current ellipses: {ellipses}\nwrote {written}"
          + "".join(f"\nwrote {p}" for p in report.get("figures", [])) + f"\n{CAUTION}")
    return EXIT_OK


def _time_report(series) -> dict[str, Any]:
    origin = series.time_origin_utc
    return {"times_s": [float(t) for t in series.times_s],
            "times_utc": [iso_utc(origin, float(t)) for t in series.times_s] if origin else None,
            "time_mean_over_s": list(series.time_mean_s) if series.time_mean_s is not None else None,
            "constituents": {name: {"period_s": float(series.periods_s[name])} for name in series.ellipses}}
