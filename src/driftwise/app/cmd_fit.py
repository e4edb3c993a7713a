"""``driftwise fit``: fit a flow field with uncertainty to a tracks file and write the model file."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ..data.positionerror import position_error_text
from ..data.tracks import TrackError, fit_shortfall, read_tracks_from_cli
from ..dynamics.calibrate import calibrate
from ..dynamics.temporalchoice import TEMPORAL_MODES, fit_temporal, temporal_fit_report
from ..dynamics.transitionfit import LIKELIHOOD_HELP, LIKELIHOODS, fit_report
from ..errors import InputError
from ..files import CAUTION
from ..gp.constituents import CONSTITUENTS, parse_constituents
from ..gp.kernels import BACKGROUND_HELP, BACKGROUNDS, DEFAULT_FAMILY, KERNEL_FAMILIES
from ..gp.modelfile import save_model
from ..gp.schedule import Checkpoint
from ..gp.training import fit_report as velocity_fit_report
from ..progress import Stopwatch
from ..units import (
    format_diffusivity,
    format_duration,
    format_length,
    format_named,
    format_speed,
    parse_duration_s,
)
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


def configure_fit(p: argparse.ArgumentParser) -> None:
    p.description = ("Fit a vector-field Gaussian process (sparse variational, matrix-valued kernel) to the velocities "
                     "between consecutive fixes and write the model file. A checkpoint MODEL.ckpt.npz is kept while "
                     "fitting; --resume continues an interrupted fit from it.")
    p.epilog = CAUTION
    p.add_argument("tracks", help="CSV, CSV.GZ, Parquet or CF-trajectory NetCDF file of fixes")
    p.add_argument("--out", required=True, metavar="MODEL", help="model file to write (.npz)")
    p.add_argument("--kernel", default=DEFAULT_FAMILY, choices=list(KERNEL_FAMILIES),
                   help="kernel family: " + "; ".join(f"{name}: {spec.help}" for name, spec in KERNEL_FAMILIES.items())
                   + f" (default {DEFAULT_FAMILY})")
    p.add_argument("--inducing", type=int, default=None, metavar="M",
                   help="number of inducing points (default: min(256, observations/32), at least 16)")
    p.add_argument("--background", default="linear", choices=list(BACKGROUNDS), help=BACKGROUND_HELP)
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")
    add_track_options(p, position_error=True)
    p.add_argument("--tides", default="none", metavar="LIST",
                   help=f"periodic constituents to model, comma-separated from {','.join(CONSTITUENTS)} (inertial: at "
                   "the latitude of lon/lat tracks), each with its own amplitude fields; or none (default)")
    p.add_argument("--slow-time-scale", default="none", metavar="auto|none|DURATION",
                   help="a slowly changing part of the flow with a Matern-3/2 time scale: auto (learned), a duration "
                   "with its unit (fixed, e.g. 2d) or none (default)")
    p.add_argument("--temporal", default=None, choices=list(TEMPORAL_MODES),
                   help="time-varying components when --tides/--slow-time-scale are not given: "
                   + "; ".join(f"{name}: {text}" for name, text in TEMPORAL_MODES.items())
                   + ". Candidates: the tides M2, K1, S2, O1, N2 that the tracks' span can separate, inertial for "
                   "lon/lat tracks, and slow change (F-tests at family-wise level 0.01). Giving --tides or "
                   "--slow-time-scale fits exactly those components")
    p.add_argument("--resume", action="store_true", help="continue from the checkpoint MODEL.ckpt.npz if present")
    p.add_argument("--likelihood", default="auto", choices=list(LIKELIHOODS), help=LIKELIHOOD_HELP)
    p.add_argument("--calibrate", action=argparse.BooleanOptionalAction, default=True,
                   help="after the fit, estimate K and tau from the likelihood of displacements between fixes "
                   "(lags from 2 fixes to a third of the tracks' duration) and store them in the model (default: on)")
    add_quiet_flag(p)
    add_profile_flag(p)
    add_json_flag(p)
    p.set_defaults(run=_run_fit)


def _run_fit(args: argparse.Namespace) -> int:
    position_error = position_error_m(args)
    if args.inducing is not None and args.inducing < 1:
        raise InputError(f"--inducing must be a positive integer, got {args.inducing}")
    if args.seed < 0:
        raise InputError(f"--seed must be a non-negative integer, got {args.seed}")
    tides, slow = parse_constituents(args.tides, what="--tides"), _slow_time_scale(args.slow_time_scale)
    if (tides or slow is not None) and args.likelihood == "transitions":
        raise InputError("--likelihood transitions needs a steady model; drop --tides/--slow-time-scale or use "
                         "--likelihood velocities")
    clock = Stopwatch()
    with clock("read"):
        tracks = read_tracks_from_cli(args)
    shortfall = fit_shortfall(tracks, calibrate=args.calibrate)
    if shortfall:
        raise TrackError(tracks.source, shortfall)
    checkpoint = Checkpoint.beside(args.out, resume=args.resume)
    existed = checkpoint.path.exists()
    try:
        field, choice, decision = _fit_for_cli(args, tracks, tides, slow, position_error, checkpoint, clock.laps)
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
        with clock("calibrate"):
            field = calibrate(field, tracks)
    with clock("save"):
        written = save_model(field, args.out)
    report = {**(fit_report(field, choice) if choice is not None else _time_varying_report(field)),
              "model": str(written), "temporal": temporal_fit_report(field, decision)}
    if args.calibrate:
        report["calibration"] = field.fit_info.get("calibration") if calibrated else {
            "skipped": "K and tau calibration needs a steady model; the fit's own K and tau are kept"}
    report["timing_s"] = clock.laps | {"total": sum(clock.laps.values())}
    if args.json:
        print_json(report)
    else:
        print(format_fit(report) + ("\n" + profile_text(report["timing_s"]) if args.profile else ""))
    return EXIT_OK


def _slow_time_scale(text: str):
    """--slow-time-scale: "none" → None, "auto" → "auto", else a duration with its unit → seconds."""
    if text.strip().lower() in ("none", "auto"):
        return None if text.strip().lower() == "none" else "auto"
    return parse_duration_s(text, what="--slow-time-scale")


def _fit_for_cli(args, tracks, tides, slow, position_error, checkpoint, timing_s):
    """(field, likelihood choice or None, temporal decision) of :func:`driftwise.dynamics.temporalchoice.fit_temporal`:
    --temporal (default auto) unless --tides/--slow-time-scale give the components."""
    return fit_temporal(tracks, args.kernel, temporal=args.temporal or "auto", tides=tides, slow_time_scale_s=slow,
                        likelihood=args.likelihood, inducing=args.inducing, seed=args.seed,
                        position_error_m=position_error, checkpoint=checkpoint, quiet=args.quiet or args.json,
                        background=args.background, timing_s=timing_s)


def _time_varying_report(field) -> dict[str, Any]:
    return {**velocity_fit_report(field), "likelihood": "velocities", "likelihood_requested": "velocities",
            "likelihood_reason": "velocities: a time-varying model is fitted to the velocities between fixes"}


def _format_temporal(temporal: dict[str, Any]) -> list[str]:
    """Text lines for the time-varying components: how they were chosen, per constituent its period and scales;
    the slow part's."""
    lines = [f"  temporal ({temporal['mode']}): {' + '.join(temporal['components'])}; {temporal['reason']}"] \
        if "mode" in temporal else []
    if temporal.get("components", ["steady"]) == ["steady"]:
        return lines
    lines += [f"  time-varying components: {', '.join(temporal['components'])} (phase of cos/sin(omega t) on the "
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


_CALIBRATED = {"diffusivity_m2_s": "K", "decorrelation_time_s": "τ"}


def _bound_lines(calibration: dict[str, Any]) -> list[str]:
    """A line naming the calibrated parameters that ended on the edge of the range the data's scales allow
    (:mod:`driftwise.data.datascales`): there the likelihood still rose, so the value is a bound, not an estimate."""
    hit = [symbol for name, symbol in _CALIBRATED.items() if (calibration.get("at_bound") or {}).get(name)]
    if not hit:
        return []
    return [f"  calibration: {' and '.join(hit)} ended on the edge of the range the data's scales allow; these tracks "
            "do not pin it down, so read it as a bound, not an estimate"]


def _left_out_text(count: int, report: dict[str, Any]) -> str:
    if not count:
        return ""
    return (f"; {count} pairs of fixes more than {format_duration(report['transition_longest_dt_s'])} apart left out "
            "(too long to integrate stably)")


def format_fit(report: dict[str, Any]) -> str:
    """The text ``driftwise fit`` prints: every length, duration, speed and diffusivity in the unit that fits."""
    lines = [f"fit: {report['kernel']} kernel, {report['n_observations']} velocity observations from "
             f"{report['n_tracks']} tracks, {report['n_inducing']} inducing points",
             f"  ELBO {report['elbo']:.6g} nats ({report['elbo_per_observation']:.4g} per observation) after "
             f"{report['steps']} steps" + ("" if report["converged"] else " (step limit reached before the plateau)")]
    lines += [f"  {name} = {format_named(name, value)}" for name, value in report["hyperparameters"].items()]
    lines += _format_temporal(report.get("temporal", {}))
    lines.append("  " + position_error_text(report))
    lines += [f"  decorrelation time τ = {format_duration(report['decorrelation_time_s'])} "
              f"({report.get('decorrelation_time_source') or 'length scale / RMS speed'})",
              f"  likelihood: {report['likelihood_reason']}"]
    if "n_transitions" in report:
        lines.append(f"  transition fit: {report['n_transitions']} transitions, {report['transition_method']}, RK4 step "
                     f"{format_duration(report['transition_step_s'])} (at most {report['transition_substeps']} per "
                     f"transition); the fitted field turns by a median {report['coarseness_fitted']:.3g} rad between "
                     f"fixes (10th percentile {report['turn_p10_fitted']:.3g} rad)" + _left_out_text(report.get("transitions_left_out_too_long", 0), report))
    lines += _bound_lines(report.get("calibration") or {})
    if "calibration_check" in report:
        check = report["calibration_check"]
        lines.append(f"  calibration check: K = {format_diffusivity(check['diffusivity_m2_s'])}, τ = "
                     f"{format_duration(check['decorrelation_time_s'])} (the transition fit's K = "
                     f"{format_diffusivity(report['diffusivity_m2_s'])} is kept)")
    return "\n".join(lines + [f"wrote {report['model']}"])
