"""``driftwise demo``: the whole job on the bundled invented bay (:mod:`driftwise.app.demo`)."""

from __future__ import annotations

import argparse
import shlex
import sys

from ..files import CAUTION
from ..products.report import complete
from .cliparts import EXIT_INTERNAL, EXIT_OK, add_json_flag, add_quiet_flag, print_json
from .demo import DemoSettings, run_demo


def configure_demo(p: argparse.ArgumentParser) -> None:
    p.description = ("Run the whole job on the bundled demo data (Mirren Bay, invented): inspect the "
                     "tracks, fit a Helmholtz flow field, check divergence and vorticity, forecast a fuel spill "
                     "and an outfall plume reaching a shellfish bed, score forecasts on held-out tracks, and "
                     "export the gridded field. Writes every product, the figures, summary.json and a "
                     "self-contained report.html into the output folder and prints a short digest.")
    p.epilog = CAUTION
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
