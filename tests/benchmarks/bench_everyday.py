"""Everyday speed of the command line (run by hand):

    PYTHONPATH=src .venv/bin/python tests/benchmarks/bench_everyday.py [--repeats 5] [--heavy-repeats 3]
                                                                       [--parts help,inspect,fit,check,ensemble]

Prints one table of wall times of fresh processes (``python -c 'driftwise.app.cli.main'``, so the import of the
package is part of every time): the first run (cold: jax compiles everything into an empty compile cache) and the
median of the later runs (warm: the compiled programs come from that cache, as on a user's second run), next to
the target of issue 13:

- ``driftwise --help``                                         target < 1 s
- ``driftwise inspect small.csv`` (5 tracks × 20 fixes)        target < 1 s
- ``driftwise fit big.csv --out m.npz`` (50 tracks × 100 fixes = 5,000 fixes)   target < 30 s
- ``driftwise check big.csv``                                  target < 60 s
- ``driftwise spread m.npz --method ensemble`` with 3 releases, ``--horizon 1d`` (default particles and step;
  the model of the fit part, fitted first when that part is not run)   target < 60 s

and the 1-minute load average before and after (the machine is shared: a load above the core count
means the wall times are inflated; the CPU time, user + system of the process, is less affected).  ``--source DIR`` times another copy of the package (e.g. an older
commit unpacked with ``git archive``) to give before/after ratios.

Data: drifters in a Lamb–Oseen vortex (Oseen 1912; Γ = 2·10⁴ m²/s, r_c = 3 km) plus a uniform
0.05 m/s stream, hourly fixes, K = 1 m²/s, 10 m position noise (driftwise.data.synthetic).
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from driftwise.data import synthetic

RUN = "import sys; from driftwise.app.cli import main; sys.exit(main())"   # as the console script runs it
TARGETS_S = {"help": 1.0, "inspect": 1.0, "fit": 30.0, "check": 60.0, "ensemble": 60.0}


class _Sum:
    """The velocity of two fields added (vortex + uniform stream)."""

    def __init__(self, *fields):
        self.fields = fields

    def velocity(self, xy):
        return sum(f.velocity(xy) for f in self.fields)


def write_tracks(path: Path, n_tracks: int, n_fixes: int, seed: int) -> None:
    field = _Sum(synthetic.LambOseenVortex(circulation_m2_s=2e4, core_radius_m=3000.0),
                 synthetic.UniformFlow((0.05, 0.0)))
    starts = np.random.default_rng(seed).uniform(-8000.0, 8000.0, (n_tracks, 2))
    synthetic.simulate_drifters(field, starts, duration_s=3600.0 * (n_fixes - 1), fix_interval_s=3600.0,
                                diffusivity_m2_s=1.0, position_error_m=10.0, seed=seed + 1).to_csv(path, index=False)


def timed(args: list[str], env: dict[str, str], repeats: int) -> tuple[list[float], list[float]]:
    """(wall seconds, CPU seconds user + system) of ``repeats`` fresh processes running ``driftwise args``."""
    walls, cpus = [], []
    for _ in range(repeats):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        done = subprocess.run([sys.executable, "-c", RUN, *args], env=env, capture_output=True, text=True)
        walls.append(time.perf_counter() - t0)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpus.append(after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime)
        if done.returncode != 0:
            raise SystemExit(f"{' '.join(args)} failed ({done.returncode}): {done.stderr[-2000:]}")
    return walls, cpus


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5, help="runs of --help and inspect (median)")
    parser.add_argument("--heavy-repeats", type=int, default=3, help="runs of fit, check and ensemble (median)")
    parser.add_argument("--parts", default="help,inspect,fit,check,ensemble")
    parser.add_argument("--source", default=str(Path(__file__).resolve().parents[2] / "src"),
                        help="the src folder of the driftwise to time (default this checkout's)")
    opts = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        # a compile cache of this run's own: the first run of each command is cold (compiles everything), the
        # later ones find the compiled programs on disk, as a user's second run does
        env = {**os.environ, "PYTHONPATH": opts.source, "JAX_COMPILATION_CACHE_DIR": str(Path(tmp) / "xla")}
        small, big = Path(tmp) / "small.csv", Path(tmp) / "big.csv"
        write_tracks(small, 5, 20, seed=1)
        write_tracks(big, 50, 100, seed=2)
        commands = {"help": ["--help"], "inspect": ["inspect", str(small)],
                    "fit": ["fit", str(big), "--out", str(Path(tmp) / "m.npz"), "--quiet"],
                    "check": ["check", str(big), "--quiet"],
                    "ensemble": ["spread", str(Path(tmp) / "m.npz"), "--method", "ensemble", "--horizon", "1d",
                                 "--every", "1h", "--quiet"] + [a for xy in ("0,0", "2km,2km", "-3km,1km")
                                                                  for a in ("--release", xy)]}
        load_before = os.getloadavg()[0]
        print(f"driftwise from {opts.source}; {os.cpu_count()} cores; load (1 min) {load_before:.2f} at start")
        print(f"{'command':<10} {'cold s':>7} {'warm median s':>14} {'min s':>7} {'max s':>7} {'CPU median s':>13} "
              f"{'runs':>5} {'target s':>9}  cold ok  warm ok")
        parts = opts.parts.split(",")
        if "ensemble" in parts and "fit" not in parts:
            timed(commands["fit"], env, 1)
        for name in parts:
            repeats = opts.repeats if name in ("help", "inspect") else opts.heavy_repeats
            walls, cpus = timed(commands[name], env, repeats + 1)
            cold, median = walls[0], statistics.median(walls[1:])
            target = TARGETS_S[name]
            print(f"{name:<10} {cold:>7.2f} {median:>14.2f} {min(walls[1:]):>7.2f} {max(walls[1:]):>7.2f} "
                  f"{statistics.median(cpus[1:]):>13.2f} {repeats:>5} {target:>9.0f}  "
                  f"{'yes' if cold < target else 'NO':>7}  {'yes' if median < target else 'NO':>7}", flush=True)
        print(f"load (1 min) {os.getloadavg()[0]:.2f} at end")


if __name__ == "__main__":
    main()
