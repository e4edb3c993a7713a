"""``driftwise connect``: the connectivity matrix between sites (parse, check memory, call the library, print)."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

import numpy as np

from ..data.utctime import iso_utc, release_time_s
from ..data.windows import output_times_from_text
from ..dynamics.connectivity import DEFAULT_THRESHOLD, connect_from_field, connect_memory_bytes
from ..dynamics.methods import DEFAULT_METHOD, METHODS, default_ensemble_step_s
from ..dynamics.sites import read_sites
from ..dynamics.tabulate import posterior_choice
from ..errors import InputError
from ..files import CAUTION
from ..gp.modelfile import load_model
from ..products.connectfiles import CONNECT_SUFFIXES, connect_to_dict, write_connect
from ..products.plotconnect import plot_connect_map, plot_connect_matrix
from ..products.plots import save_figure
from ..units import format_duration, parse_duration_s
from .cliparts import EXIT_OK, add_exact_flag, add_json_flag, add_quiet_flag, check_step, print_json
from .resources import bar, check_memory, say

DEFAULT_MOMENT_STEP = "1h"
DEFAULT_ENSEMBLE_STEP = "10min"


def configure_connect(p: argparse.ArgumentParser) -> None:
    p.description = (
        "For every source site, seed releases over its area (scrambled Sobol points, each carrying "
        "its share of the area as covariance A/(12 N) per axis), propagate them through the fitted flow (Gaussian "
        "moments, or Euler-Maruyama particles with --method ensemble) and report P[source, destination, time], "
        "the probability that material released uniformly in the source is inside the destination, the first "
        "time each reaches --threshold, and the share outside the model's data support. SITES: GeoJSON polygons "
        "(lon/lat; a lon/lat model) or a CSV with columns site, x_m, y_m (vertices in metres, local frame, in "
        "order along each site's boundary).")
    p.epilog = CAUTION
    p.add_argument("model", help="model file written by `driftwise fit`")
    p.add_argument("--sites", required=True, metavar="SITES", help="GeoJSON (lon/lat polygons with a 'name' "
                   "property) or CSV (columns site, x_m, y_m)")
    p.add_argument("--horizon", default="30d", help="forecast length with its unit (default 30d)")
    p.add_argument("--every", default="1d", help="output interval with its unit (default 1d)")
    p.add_argument("--per-site", type=int, default=64, metavar="N", help="releases per source site (default 64)")
    p.add_argument("--start", metavar="TIME", help="release time: ISO-8601 or seconds on the model's time axis "
                   "(default: its last observation when the tracks had absolute times, else 0)")
    p.add_argument("--method", choices=list(METHODS), default=DEFAULT_METHOD,
                   help=f"moment method, or ensemble for the Monte Carlo cross-check (default {DEFAULT_METHOD})")
    p.add_argument("--particles", type=int, default=10_000, help="ensemble particles per site (default 10000)")
    p.add_argument("--step", default=None, help=f"integration step with its unit (default {DEFAULT_MOMENT_STEP} for "
                   f"moments, {DEFAULT_ENSEMBLE_STEP} for the ensemble, or a quarter (ensemble: a 20th) of the "
                   "flow's time scale, length scale / RMS speed, or for moments RK4's stability bound for the "
                   "field, when shorter; a longer RK4 step is warned)")
    p.add_argument("--threshold", type=float, default=DEFAULT_THRESHOLD,
                   help=f"probability whose first reaching is reported (default {DEFAULT_THRESHOLD})")
    p.add_argument("--seed", type=int, default=0, help="seed of the release points and the ensemble (default 0)")
    p.add_argument("--out", action="append", default=[], metavar="FILE",
                   help="write the matrix: .nc (CF NetCDF), .csv or .json; repeatable")
    p.add_argument("--figures", metavar="DIR", help="write connect_matrix.png and connect_map.png here")
    add_exact_flag(p)
    add_json_flag(p)
    add_quiet_flag(p)
    p.set_defaults(run=run_connect)


def _times(args: argparse.Namespace) -> np.ndarray:
    return output_times_from_text(args.horizon, args.every)


def _check(args: argparse.Namespace) -> float:
    if args.per_site < 1:
        raise InputError(f"--per-site must be a positive integer, got {args.per_site}")
    if args.particles < 2:
        raise InputError(f"--particles must be at least 2, got {args.particles}")
    if not 0.0 < args.threshold <= 1.0:
        raise InputError(f"--threshold must be a probability in (0, 1], got {args.threshold}")
    if args.seed < 0:
        raise InputError(f"--seed must be a non-negative integer, got {args.seed}")
    bad = [out for out in args.out if Path(out).suffix.lower() not in CONNECT_SUFFIXES]
    if bad:
        raise InputError(f"--out {bad[0]}: unknown format; use a name ending in {', '.join(CONNECT_SUFFIXES)}")
    return check_step(args.step)


def run_connect(args: argparse.Namespace) -> int:
    step = _check(args)
    times = _times(args)
    model = load_model(args.model)
    ensemble = METHODS[args.method].ensemble
    if step is None and ensemble:
        step = default_ensemble_step_s(model, parse_duration_s(DEFAULT_ENSEMBLE_STEP))
    sites = read_sites(args.sites, frame=model.frame)
    per_site = args.particles if ensemble else args.per_site
    need = connect_memory_bytes(len(sites), len(times), per_site, max(len(s.polygon_m) for s in sites),
                                ensemble=ensemble)
    check_memory(need, f"connect ({len(sites)} sites × {per_site} per site × {len(times)} output times)",
                 "use fewer sites, output times (--every) or releases per site")
    quiet = args.quiet or args.json
    say(f"connect: {len(sites)} sites × {per_site} {'particles' if ensemble else 'releases'} × {len(times)} output "
        f"times; memory about {need / 2**20:.3g} MiB", quiet)
    progress = bar(len(sites) * per_site, quiet, "driftwise connect", "release")
    try:
        result = connect_from_field(model, sites, times, method=args.method, per_site=args.per_site,
                                    particles=args.particles, step_s=step, seed=args.seed, threshold=args.threshold,
                                    start_time_s=release_time_s(model.data_summary, args.start),
                                    posterior=posterior_choice(args.exact), progress=progress.update,
                                    longest_step_s=parse_duration_s(DEFAULT_MOMENT_STEP))
    finally:
        progress.close()
    written = [str(write_connect(result, out)) for out in args.out]
    if args.figures:
        written += [str(save_figure(plot_connect_matrix(result), Path(args.figures) / "connect_matrix.png")),
                    str(save_figure(plot_connect_map(result), Path(args.figures) / "connect_map.png"))]
    if args.json:
        print_json({**connect_to_dict(result), "outputs": written, "caution": CAUTION})
    else:
        print(_format(result, written))
    return EXIT_OK


def _format(result: Any, written: list[str]) -> str:
    start = (f" from {iso_utc(result.time_origin_utc, result.start_time_s)}" if result.time_origin_utc else "")
    lines = [f"connect: {len(result.sites)} sites, method {result.method}, {result.per_site} per site, step "
             f"{format_duration(result.step_s)}, {len(result.times_s)} output times to "
             f"{format_duration(result.times_s[-1])}{start}",
             "  peak probability over the horizon [row: source, column: destination]; first time ≥ "
             f"{result.threshold:g} in brackets"]
    width = max(len(n) for n in result.names)
    peak = result.probability.max(-1)
    for i, name in enumerate(result.names):
        cells = []
        for j in range(len(result.names)):
            first = result.first_passage_s[i, j]
            cells.append(f"{peak[i, j]:.3f}" + ("" if np.isnan(first) else f" ({format_duration(first)})"))
        lines.append(f"  {name:<{width}}  " + "  ".join(cells))
    if result.outside_support is not None:
        i, t = np.unravel_index(int(np.argmax(result.outside_support)), result.outside_support.shape)
        lines.append(f"  largest share outside the data support: {100 * result.outside_support[i, t]:.0f} % "
                     f"(source {result.names[i]}, at {format_duration(result.times_s[t])})")
    return "\n".join(lines + [f"wrote {path}" for path in written] + [CAUTION])
