"""The forecasting commands of the command line: ``driftwise spread`` (releases through the fitted field)
and ``driftwise score`` (forecasts against held-out tracks).  Parse, call the library, print; no numerics."""

from __future__ import annotations

import argparse
import re
from pathlib import Path
from typing import Any

import numpy as np

from ..data.datascales import check_horizons_s, resolve_horizons
from ..data.tracks import read_tracks_from_cli
from ..data.utctime import release_time_s
from ..data.windows import output_times_from_text
from ..diagnostics.skill import score
from ..dynamics.methods import DEFAULT_METHOD, DEFAULT_PARTICLES, METHODS
from ..dynamics.spread import Release, as_releases, read_polygon, read_releases, spread_from_field
from ..dynamics.tabulate import posterior_choice
from ..errors import InputError
from ..files import CAUTION
from ..gp.modelfile import load_model
from ..products.plots import plot_skill
from ..products.writers import (
    SPREAD_SUFFIXES,
    format_score_table,
    monte_carlo_error,
    spread_to_dict,
    write_score_csv,
    write_spread,
)
from ..units import (
    format_diffusivity,
    format_duration,
    format_length,
    parse_diffusivity_m2_s,
    parse_duration_s,
    parse_durations_s,
    parse_length_m,
)
from .cliparts import EXIT_OK, add_exact_flag, add_json_flag, add_quiet_flag, add_track_options, check_step, print_json

# ---------------------------------------------------------------- spread


def configure_spread(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Forecast releases through the fitted flow (Itô SDE: drift = posterior mean, diffusion = "
        "2(K I + tau (1 - exp(-age/tau)) Sigma)) by Gaussian moment matching or an Euler-Maruyama ensemble. Outputs "
        "the mean path and covariance (metres, local frame; also lon/lat for a lon/lat model) at times since each "
        "release, the 50/90/95 % ellipses, and with --polygon the probability of being inside it and the first time "
        "it reaches --threshold.")
    p.epilog = CAUTION
    # A western longitude such as "-3.97,47.2" is a value, not an option: widen argparse's
    # negative-number test to comma-separated coordinates (`--release=-3.97,47.2` works anyway).
    p._negative_number_matcher = re.compile(r"^-\d+$|^-\d*\.\d+$|^-\d*\.?\d*(?:[eE][-+]?\d+)?[a-z]*,")
    p.add_argument("model", help="model file written by `driftwise fit`")
    p.add_argument("--release", action="append", default=[], metavar="X,Y[,Z]",
                   help="a release point: metres in the model's local frame (a bare number is metres; units "
                   "allowed, e.g. 1.2km,-300m), or "
                   "LON,LAT degrees for a model fitted on lon/lat tracks; repeat for more releases")
    p.add_argument("--releases", metavar="FILE", help="CSV of releases: columns x,y[,z] (metres) or lon,lat "
                   "(degrees), optional start_time (seconds or ISO-8601), name, sd_m (release uncertainty, metres)")
    p.add_argument("--start", metavar="TIME", help="release time of the --release points: ISO-8601 for a model "
                   "fitted on absolute times, else a duration on the tracks' own time axis, e.g. 36h (a bare number is seconds) "
                   "(default: the last observation when the tracks had absolute times, else 0); a time-varying "
                   "model is integrated from there")
    p.add_argument("--horizon", default="2d", help="forecast length with its unit (s, min, h, d; default 2d)")
    p.add_argument("--every", default="1h", help="output interval with its unit (default 1h)")
    p.add_argument("--method", choices=list(METHODS), default=DEFAULT_METHOD,
                   help="; ".join(f"{name}: {spec.help}" for name, spec in METHODS.items())
                   + f" (default {DEFAULT_METHOD})")
    p.add_argument("--particles", type=int, default=DEFAULT_PARTICLES,
                   help=f"ensemble particles (default {DEFAULT_PARTICLES}; the Monte Carlo error is reported)")
    p.add_argument("--step", default=None,
                   help="integration step with its unit (default 10min for moments, 5min for the ensemble, or a "
                   "quarter (ensemble: a 20th) of the flow's time scale, length scale / RMS speed, when shorter)")
    p.add_argument("--diffusivity", default=None,
                   help="eddy diffusivity K, e.g. 5m2/s (bare number: m²/s; default: the model's)")
    p.add_argument("--decorrelation-time", default=None,
                   help="velocity decorrelation time tau with its unit, e.g. 6h (default: the model's)")
    p.add_argument("--seed", type=int, default=0, help="random seed of the ensemble (default 0)")
    add_exact_flag(p)
    p.add_argument("--polygon", metavar="FILE", help="area of interest: GeoJSON Polygon (lon/lat) or CSV of "
                   "vertices (x,y metres or lon,lat degrees)")
    p.add_argument("--threshold", type=float, default=0.5,
                   help="probability whose first reaching is reported as the arrival time (default 0.5)")
    p.add_argument("--out", action="append", default=[], metavar="FILE",
                   help="write the forecast: .json, .csv, .nc (CF NetCDF) or .geojson (lon/lat models); repeatable")
    add_json_flag(p)
    add_quiet_flag(p)
    p.set_defaults(run=_run_spread)


def _output_times_s(args: argparse.Namespace):
    return output_times_from_text(args.horizon, args.every)


def _parse_release(text: str, frame, dim: int):

    parts = [part.strip() for part in str(text).split(",")]
    lonlat = frame.kind == "lonlat"
    shape = ("LON,LAT" if lonlat else "X,Y") + (",Z" if dim == 3 else "")
    if len(parts) not in (2, 3) or not all(parts):
        raise InputError(f"--release {text!r}: give {shape} separated by commas")
    if len(parts) != dim:
        raise InputError(f"--release {text!r}: the model is {dim}-D, so give {shape}")
    z = [parse_length_m(parts[2], what=f"--release {text!r}", bare_unit="m")] if dim == 3 else []
    if not lonlat:
        return [parse_length_m(part, what=f"--release {text!r}", bare_unit="m") for part in parts[:2]] + z
    try:
        lon, lat = float(parts[0]), float(parts[1])
    except ValueError:
        raise InputError(f"--release {text!r}: this model was fitted on lon/lat tracks; give LON,LAT in degrees") from None
    if not (abs(lon) <= 360 and abs(lat) <= 90):
        raise InputError(f"--release {text!r}: ({lon}, {lat}) is not a longitude, latitude in degrees")
    return list(frame.from_lonlat([lon], [lat])[0]) + z


def _spread_releases(args: argparse.Namespace, frame, dim: int, start_s: float = 0.0):

    releases = [Release(_parse_release(text, frame, dim), start_time_s=start_s) for text in args.release]
    if args.releases:
        releases += list(read_releases(args.releases, frame=frame, dim=dim))
    if not releases:
        raise InputError("spread: give at least one --release X,Y or a --releases FILE")
    return as_releases(releases)


def _spread_options(args: argparse.Namespace, frame) -> dict[str, Any]:

    if args.particles < 2:
        raise InputError(f"--particles must be at least 2, got {args.particles}")
    if not 0.0 < args.threshold <= 1.0:
        raise InputError(f"--threshold must be a probability in (0, 1], got {args.threshold}")
    step = check_step(args.step)
    polygon = read_polygon(args.polygon, frame=frame) if args.polygon else None
    return dict(method=args.method, particles=args.particles, step_s=step, seed=args.seed, polygon_m=polygon,
                posterior=posterior_choice(args.exact),
                threshold=args.threshold if polygon is not None else None,
                diffusivity_m2_s=parse_diffusivity_m2_s(args.diffusivity, what="--diffusivity")
                if args.diffusivity else None,
                decorrelation_time_s=parse_duration_s(args.decorrelation_time, what="--decorrelation-time")
                if args.decorrelation_time else None)


def _run_spread(args: argparse.Namespace) -> int:


    bad = [out for out in args.out if Path(out).suffix.lower() not in SPREAD_SUFFIXES]
    if bad:
        raise InputError(f"--out {bad[0]}: unknown format; use a name ending in {', '.join(SPREAD_SUFFIXES)}")
    model = load_model(args.model)
    if any(Path(out).suffix.lower() == ".geojson" for out in args.out) and model.frame.kind != "lonlat":
        raise InputError("--out .geojson: GeoJSON (RFC 7946) holds lon/lat only, but this model was fitted in a local "
                         "metric frame; write .json, .csv or .nc instead")
    times = _output_times_s(args)
    check_horizons_s([times[-1]], model.data_summary.get("median_dt_s"), option="--horizon")
    releases = _spread_releases(args, model.frame, model.dim, release_time_s(model.data_summary, args.start))
    forecast = spread_from_field(model, releases, times, **_spread_options(args, model.frame))
    written = [str(write_spread(forecast, out)) for out in args.out]
    if args.json:
        print_json({**spread_to_dict(forecast), "outputs": written, "caution": CAUTION})
    else:
        print(_format_spread(forecast, written))
    return EXIT_OK


def _format_spread(forecast, written: list[str]) -> str:
    """A short human summary: per release the final mean, 95 % ellipse and polygon probability, every length and
    duration in the unit that fits its size."""
    lines = [f"spread: {len(forecast.releases)} release(s), method {forecast.method}, "
             f"{len(forecast.times_s)} output times to {format_duration(forecast.times_s[-1])}"]
    for r, rel in enumerate(forecast.releases):
        end = forecast.means[r, -1]
        major, minor = forecast.semi_axes_m[r, -1, forecast.levels.index(0.95)]
        text = f"  {rel.name}: end mean ({', '.join(format_length(v) for v in end)})"
        if forecast.mean_lonlat is not None:
            text += " = lon/lat ({:.5f}, {:.5f})".format(*forecast.mean_lonlat[r, -1])
        text += f"; 95 % ellipse {format_length(major)} x {format_length(minor)}"
        error = monte_carlo_error(forecast, r)
        if error is not None:
            text += (f"; Monte Carlo error ({forecast.particles} particles, 1 SE at the end): mean ± "
                     f"{format_length(error['mean_se_m'])}, variance ± {100 * (error['variance_relative_se'] or 0):.2g} %")
        if forecast.probability is not None:
            arrival = forecast.first_arrival_s[r]
            text += f"; P(inside) max {forecast.probability[r].max():.3f}, reaches {forecast.threshold:g} " + (
                "never" if arrival is None else f"at {format_duration(arrival)}")
        lines.append(text)
    lines += [f"wrote {path}" for path in written] + [CAUTION]
    return "\n".join(lines)

# ---------------------------------------------------------------- score
def configure_score(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Forecast from every fix of tracks the model never saw and compare with where they went, per "
        "horizon: median and 90th-percentile separation, Liu-Weisberg (2011) skill (1 perfect, 0 none), the "
        "fraction of observed positions inside the forecast's 50 % and 95 % ellipses (calibration) and the "
        "Gaussian log score, next to persistence and no-motion baselines.")
    p.epilog = CAUTION
    p.add_argument("model", help="model file written by `driftwise fit`")
    p.add_argument("holdout", help="tracks file NOT used in the fit (CSV, CSV.GZ, Parquet or CF-trajectory NetCDF)")
    p.add_argument("--horizons", default=None,
                   help="comma-separated forecast horizons with units, e.g. 6h,12h,24h (default: D/12, D/6, D/3 "
                   "for the held-out tracks' median duration D; refused below the sampling interval)")
    p.add_argument("--method", choices=[name for name, spec in METHODS.items() if not spec.ensemble],
                   default=DEFAULT_METHOD, help=f"moment method of the forecasts (default {DEFAULT_METHOD})")
    p.add_argument("--fit-tracks", default=None, metavar="TRACKS",
                   help="the tracks the model was fitted on: gives the baselines an error variance, so their coverage "
                   "and log score are defined (otherwise shown as —)")
    p.add_argument("--max-starts", type=int, default=2000, help="at most this many forecast starts (default 2000)")
    add_track_options(p, gap=False)
    p.add_argument("--out", default=None, metavar="TABLE.csv", help="write the table as CSV")
    p.add_argument("--figures", default=None, metavar="DIR", help="write skill.png (skill and coverage vs horizon)")
    add_json_flag(p)
    add_quiet_flag(p)
    p.set_defaults(run=_run_score)


def _read_named_tracks(path: str, max_speed: str):

    return read_tracks_from_cli(argparse.Namespace(tracks=path, max_speed=max_speed, max_gap=None))


def _run_score(args: argparse.Namespace) -> int:

    horizons = args.horizons and parse_durations_s(args.horizons, what="--horizons")
    if args.max_starts < 1:
        raise InputError(f"--max-starts must be a positive integer, got {args.max_starts}")
    model = load_model(args.model)
    holdout = _read_named_tracks(args.holdout, args.max_speed)
    horizons = resolve_horizons(horizons, holdout, option="--horizons")
    fit_tracks = _read_named_tracks(args.fit_tracks, args.max_speed) if args.fit_tracks else None
    result = score(model, holdout, horizons_s=horizons, method=args.method, max_starts=args.max_starts,
                   fit_tracks=fit_tracks).to_dict()
    written = []
    if args.out:
        write_score_csv(result, args.out)
        written.append(str(args.out))
    if args.figures:

        written.append(str(plot_skill(result, Path(args.figures) / "skill.png")))
    if args.json:
        print_json({**result, "outputs": written, "caution": CAUTION})
    else:
        print(f"score: {result['n_starts']} forecasts from {result['n_tracks']} held-out tracks, method "
              f"{result['method']}, K = {format_diffusivity(result['diffusivity_m2_s'])}, tau = "
              + format_duration(result["decorrelation_time_s"]))
        print(format_score_table(result))
        print("\n".join([f"wrote {path}" for path in written] + [CAUTION]))
    return EXIT_OK
