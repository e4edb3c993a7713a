"""Time-varying field: release-steps per second, exact posterior against the TimedTable (one device).

Run by hand (not collected by pytest):

    PYTHONPATH=src .venv/bin/python tests/benchmarks/bench_timetable.py [--releases 2000] [--hours 6]

(the defaults took more than 25 min at load average 22 on 2 cores; --releases 200 --hours 2 is a quick run)

Field: the tidal Helmholtz field of tests/dynamics/test_timetable.py (M = 16 inducing points, steady + M2 + K1,
q optimal for 300 velocities over 3 days).  A release-step is one RK4 step (600 s) of one release with
SphericalCubature; releases start at random times over one day.  Printed, all in this run: the table's build
time, nodes and measured errors (tolerance 0.05), then one table of release-steps/s (median of 3 timed runs after
one compiling run) for the exact posterior and the table, with their ratio.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "dynamics"))
from test_timetable import HI, LO, T0, tidal_field  # noqa: E402

from driftwise.dynamics import tabulate  # noqa: E402
from driftwise.dynamics.moments import RK4, SphericalCubature, propagate_batch  # noqa: E402
from driftwise.dynamics.sde import sde_from_field  # noqa: E402


def rate(sde, means0, covs0, times, starts) -> float:
    kw = {"method": SphericalCubature(), "integrator": RK4(step_s=600.0), "start_times_s": starts}
    np.asarray(propagate_batch(sde, means0, covs0, times, **kw)[0])          # compile
    runs = []
    for _ in range(3):
        t = time.perf_counter()
        np.asarray(propagate_batch(sde, means0, covs0, times, **kw)[0])
        runs.append(time.perf_counter() - t)
    return tabulate.release_steps(len(means0), times, 600.0) / statistics.median(runs)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--releases", type=int, default=2000)
    parser.add_argument("--hours", type=int, default=6)
    args = parser.parse_args()
    field = tidal_field()
    sde = sde_from_field(field)
    t = time.perf_counter()
    table = tabulate.tabulate_timed_field(field, LO, HI, T0, T0 + 2 * 86400.0)
    build_s = time.perf_counter() - t
    print(f"table: {table.grid.shape} nodes, build {build_s:.1f} s (incl. compile), measured max mean error "
          f"{float(table.grid.mean_error):.3g} s.d., cov error {float(table.grid.cov_error):.3g} (tolerance 0.05)", flush=True)
    rng = np.random.default_rng(0)
    means0 = rng.uniform(3000.0, 7000.0, (args.releases, 2))
    covs0 = np.broadcast_to(np.eye(2) * 100.0**2, (args.releases, 2, 2)).copy()
    starts, times = T0 + rng.uniform(0.0, 86400.0, args.releases), np.arange(0.0, args.hours + 1) * 3600.0
    exact, tab = rate(sde, means0, covs0, times, starts), rate(tabulate.on_table(sde, table), means0, covs0, times,
                                                              starts)
    print("| posterior | releases | hours | release-steps/s | ratio |\n|---|---|---|---|---|")
    print(f"| exact | {args.releases} | {args.hours} | {exact:.3g} | 1 |")
    print(f"| TimedTable | {args.releases} | {args.hours} | {tab:.3g} | {tab / exact:.2f} |")


if __name__ == "__main__":
    main()
