"""``driftwise backtrack``: where and when was a found object released? (parse, check memory, call, print)."""

from __future__ import annotations

import argparse
import math
import re
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from ..data.utctime import iso_utc, release_time_s
from ..data.windows import output_times_from_text
from ..dynamics.backtrack import Finds, backtrack_from_field, backtrack_memory_bytes, candidate_grid, needed_ages
from ..dynamics.methods import DEFAULT_METHOD, METHODS
from ..dynamics.supportcheck import warn_unsupported_finds
from ..dynamics.tabulate import posterior_choice
from ..errors import InputError
from ..files import CAUTION
from ..gp.modelfile import load_model
from ..products.backtrackfiles import BACKTRACK_SUFFIXES, backtrack_to_dict, write_backtrack
from ..products.plotconnect import plot_backtrack
from ..products.plots import save_figure
from ..units import format_area, format_duration, format_length, parse_duration_s, parse_length_m
from .cliparts import EXIT_OK, add_exact_flag, add_json_flag, add_quiet_flag, check_step, print_json
from .resources import bar, check_memory, say

DEFAULT_CELLS = 4096
DEFAULT_STEP = "1h"      # RK4 step, or shorter as the field needs (stepcheck.moment_step_s)
REGION_PAD = 0.1


def configure_backtrack(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Propagate point releases forward from a grid of candidate release points over --region and "
        "candidate release times over --window before the (earliest) find, score each by the likelihood of the "
        "find(s) N(found | m, P + sd² I) (several finds of the same release multiply), and normalise under a "
        "uniform prior: a probability map per candidate time and summed, the 50 %/90 % highest-probability "
        "regions and the most probable release point and time.")
    p.epilog = CAUTION
    p._negative_number_matcher = re.compile(r"^-\d+$|^-\d*\.\d+$|^-\d*\.?\d*(?:[eE][-+]?\d+)?[a-z]*,")
    p.add_argument("model", help="model file written by `driftwise fit`")
    p.add_argument("--found", action="append", required=True, metavar="X,Y",
                   help="where it was found: metres in the model's frame (units allowed) or LON,LAT degrees for a "
                   "lon/lat model; repeat for several finds of the same release (pieces of debris)")
    p.add_argument("--at", action="append", required=True, metavar="TIME",
                   help="when it was found: ISO-8601 or seconds on the model's time axis; one per --found, or one "
                   "for all")
    p.add_argument("--sd", action="append", default=None, metavar="LENGTH",
                   help="position standard deviation of a find, with its unit (default 200m); one per --found or one")
    p.add_argument("--window", default="3d", help="how long before the earliest find the release may have been "
                   "(default 3d)")
    p.add_argument("--every", default=None, help="candidate release-time spacing (default: window / 12)")
    p.add_argument("--region", metavar="X0,Y0,X1,Y1", help="candidate release area: two opposite corners (metres, "
                   "or LON,LAT degrees for a lon/lat model); default: the model's data extent and the finds, +10 %%")
    p.add_argument("--spacing", default=None, help=f"candidate grid spacing with its unit (default: about "
                   f"{DEFAULT_CELLS} cells over the region)")
    p.add_argument("--method", choices=[n for n, s in METHODS.items() if not s.ensemble], default=DEFAULT_METHOD,
                   help=f"moment method (default {DEFAULT_METHOD})")
    p.add_argument("--step", default=None, help=f"RK4 step with its unit (default {DEFAULT_STEP}, or a quarter of the "
                   "flow's time scale, length scale / RMS speed, or RK4's stability bound for the field, when "
                   "shorter; a longer step is warned)")
    p.add_argument("--out", action="append", default=[], metavar="FILE",
                   help="write the result: .nc (CF maps), .geojson (regions; lon/lat models) or .json; repeatable")
    p.add_argument("--figures", metavar="DIR", help="write backtrack_map.png here")
    add_exact_flag(p)
    add_json_flag(p)
    add_quiet_flag(p)
    p.set_defaults(run=run_backtrack)


def _point(text: str, frame: Any, option: str) -> np.ndarray:
    """(2,) metres from 'X,Y' (lengths, bare = m) or 'LON,LAT' degrees for a lon/lat model."""
    parts = [part.strip() for part in str(text).split(",")]
    if len(parts) != 2 or not all(parts):
        raise InputError(f"{option} {text!r}: give two coordinates separated by a comma")
    if getattr(frame, "kind", "metric") != "lonlat":
        return np.array([parse_length_m(v, what=f"{option} {text!r}", bare_unit="m") for v in parts])
    try:
        lon, lat = float(parts[0]), float(parts[1])
    except ValueError:
        raise InputError(f"{option} {text!r}: this model was fitted on lon/lat tracks; give LON,LAT degrees") from None
    if not (abs(lon) <= 360 and abs(lat) <= 90):
        raise InputError(f"{option} {text!r}: ({lon}, {lat}) is not a longitude, latitude in degrees")
    return np.asarray(frame.from_lonlat([lon], [lat])[0], float)


def _per_find(values: list[str], n: int, option: str) -> list[str]:
    if len(values) not in (1, n):
        raise InputError(f"{option}: give one value for all finds or one per --found ({n}), got {len(values)}")
    return values * n if len(values) == 1 else values


def _finds(args: argparse.Namespace, model: Any) -> Finds:
    n = len(args.found)
    positions = [_point(text, model.frame, "--found") for text in args.found]
    times = [release_time_s(model.data_summary, t, what="--at") for t in _per_find(args.at, n, "--at")]
    sds = [parse_length_m(s, what="--sd") for s in _per_find(args.sd or ["200m"], n, "--sd")]
    return Finds(np.stack(positions), np.array(times), np.array(sds))


def _region(args: argparse.Namespace, model: Any, finds: Finds) -> tuple[float, float, float, float]:
    if args.region:
        parts = args.region.split(",")
        if len(parts) != 4:
            raise InputError(f"--region {args.region!r}: give X0,Y0,X1,Y1 (two opposite corners)")
        corners = np.stack([_point(",".join(parts[:2]), model.frame, "--region"),
                            _point(",".join(parts[2:]), model.frame, "--region")])
    else:
        extent = (model.data_summary or {}).get("extent_m") or {}
        corners = np.vstack([finds.position_m] + ([extent["min"][:2], extent["max"][:2]] if extent else []))
    lo, hi = corners.min(0), corners.max(0)
    pad = REGION_PAD * np.maximum(hi - lo, 10 * finds.sd_m.max()) if not args.region else 0.0
    lo, hi = lo - pad, hi + pad
    if not np.all(hi > lo):
        raise InputError(f"--region {args.region!r}: the corners enclose no area")
    return float(lo[0]), float(lo[1]), float(hi[0]), float(hi[1])


def _warn_coarse_grid(sd_m: float, spacing_m: float) -> None:
    """The likelihood N(found | m, P + sd² I) is sampled at cell centres; for a release at a find's time (P = 0)
    the sum over a grid of spacing h misses its normalisation by about 2 exp(−2π² sd²/h²) per axis (Poisson
    summation), 1.4 % at sd = h/2 and 29 % at sd = h/4: below h/2 that time's probability can be badly off."""
    if sd_m < 0.5 * spacing_m:
        warnings.warn(f"--sd {format_length(sd_m)} is below half the candidate spacing {format_length(spacing_m)}: "
                      "cell centres sample the likelihood of releases near the find's time (spread about --sd) too "
                      f"coarsely and their probability can be badly off; use --spacing {format_length(2 * sd_m)} or "
                      "less (with a smaller --region)", UserWarning, stacklevel=2)


def _release_times(args: argparse.Namespace, finds: Finds) -> np.ndarray:
    every = args.every or f"{parse_duration_s(args.window, what='--window') / 12.0!r}s"
    offsets = output_times_from_text(args.window, every, names=("--window", "--every"), limit=10_000)
    return np.sort(finds.time_s.min() - offsets)


def run_backtrack(args: argparse.Namespace) -> int:
    bad = [out for out in args.out if Path(out).suffix.lower() not in BACKTRACK_SUFFIXES]
    if bad:
        raise InputError(f"--out {bad[0]}: unknown format; use a name ending in {', '.join(BACKTRACK_SUFFIXES)}")
    step = check_step(args.step)
    model = load_model(args.model)
    if any(Path(o).suffix.lower() == ".geojson" for o in args.out) and model.frame.kind != "lonlat":
        raise InputError("--out .geojson: GeoJSON holds lon/lat only, but this model was fitted in a local metric "
                         "frame; write .json or .nc instead")
    finds = _finds(args, model)
    warn_unsupported_finds(model, finds.position_m, finds.time_s)
    region = _region(args, model, finds)
    area = (region[2] - region[0]) * (region[3] - region[1])
    spacing = parse_length_m(args.spacing, what="--spacing") if args.spacing else float(np.sqrt(area / DEFAULT_CELLS))
    if not spacing > 0:
        raise InputError(f"--spacing must be positive, got {args.spacing!r}")
    _warn_coarse_grid(float(finds.sd_m.min()), spacing)
    lags = _release_times(args, finds)
    n_cells = int(np.ceil((region[2] - region[0]) / spacing)) * int(np.ceil((region[3] - region[1]) / spacing))
    n_ages = len(needed_ages(finds, lags))
    need = backtrack_memory_bytes(n_cells, n_ages, len(lags))
    check_memory(need, f"backtrack ({n_cells} candidate points × {len(lags)} candidate times)",
                 "use a coarser --spacing, a smaller --region or fewer candidate times (--every)")
    quiet = args.quiet or args.json
    say(f"backtrack: {n_cells} candidate points every {format_length(spacing)} × {len(lags)} candidate times; "
        f"memory about {need / 2**20:.3g} MiB", quiet)
    x, y = candidate_grid(region, spacing)
    runs = len(lags) if model.is_time_varying else 1     # a time-varying field: one propagation per candidate time
    progress = bar(len(x) * len(y) * runs, quiet, "driftwise backtrack", "candidate")
    try:
        result = backtrack_from_field(model, finds, region, spacing, lags, method=args.method, step_s=step,
                                      posterior=posterior_choice(args.exact),
                                      longest_step_s=parse_duration_s(DEFAULT_STEP),
                                      progress=progress.update)
    finally:
        progress.close()
    written = [str(write_backtrack(result, out)) for out in args.out]
    if args.figures:
        written.append(str(save_figure(plot_backtrack(result), Path(args.figures) / "backtrack_map.png")))
    summary = backtrack_to_dict(result)
    if args.json:
        print_json({**summary, "outputs": written, "caution": CAUTION})
    else:
        print(_format(result, summary, written))
    return EXIT_OK


def _format(result: Any, summary: dict, written: list[str]) -> str:
    best = summary["most_probable"]
    when = best.get("time_utc") or f"{best['time_s']:.6g} s"
    decimals = max(0, 1 - math.floor(math.log10(min(summary["grid"]["spacing_m"]))))   # a tenth of a cell
    where = ("lon/lat ({:.5f}, {:.5f})".format(*best["position_lonlat"]) if "position_lonlat" in best
             else "({:.{d}f}, {:.{d}f}) m".format(*best["position_m"], d=decimals))
    lines = [f"backtrack: {len(result.x_m) * len(result.y_m)} candidate points × {len(result.release_times_s)} "
             f"candidate times, {len(result.finds.time_s)} find(s), method {result.method}, RK4 step "
             f"{format_duration(result.step_s)}",
             f"  most probable release: {where} at {when}",
             f"  50 % region {format_area(summary['region_50']['area_m2'])}, 90 % region "
             f"{format_area(summary['region_90']['area_m2'])}",
             "  probability by release time: " + ", ".join(
                 f"{format_duration(result.finds.time_s.min() - item['release_time_s'])} before: "
                 f"{item['probability']:.2f}" for item in summary["probability_by_time"])]
    if result.time_origin_utc is not None:
        first = iso_utc(result.time_origin_utc, result.finds.time_s.min())
        lines.append(f"  (times before the earliest find, {first})")
    return "\n".join(lines + [f"wrote {path}" for path in written] + [CAUTION])
