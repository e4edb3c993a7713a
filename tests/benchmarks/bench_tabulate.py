"""Tabulated against exact posterior: release-steps per second of a spread, on 1, 2 and 4 devices.

Run by hand (not collected by pytest):

    .venv/bin/python tests/benchmarks/bench_tabulate.py            # the issue's sizes (about 15 min loaded)
    .venv/bin/python tests/benchmarks/bench_tabulate.py --quick    # a smoke run

Field: the 2-D Helmholtz field of bench_spread.py (M = 256 inducing points over the ±10 km invented bay,
q optimal for 4,000 noisy velocities).  A release-step is one RK4 step (600 s) of one release with
SphericalCubature: 4 stages × 4 cubature points, each an evaluation of μ (d,) and Σ (d, d); an hourly
output is 6 release-steps.  Measured, all in this run:

* the table: build time over [−12.5, 12.5] km², nodes, and its error measured on random off-grid points
  (mean: posterior s.d.; covariance: relative Frobenius), tolerance 0.05;
* release-steps/s, exact (sde.PointPosterior at every point; 10⁴ releases, one hour) and tabulated
  (10⁴ releases × 12 h and 10⁵ × 2 h; the ratio is taken against the exact rate), each in a
  fresh process with 1, 2 and 4 forced host devices (XLA_FLAGS=--xla_force_host_platform_device_count);
  compiled ahead of time, median of the timed repetitions;
* the float64 matmul rate of the machine (2048² GEMM) and the tabulated run's flop rate, with the flops
  per release-step counted by XLA's cost analysis of one batched moment-rate evaluation × 4 stages;
* the break-even size of the automatic choice (tabulate.TABLE_RELEASE_STEPS): build time × exact rate.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def child(args: argparse.Namespace) -> dict:
    """One fresh process with ``args.devices`` forced devices: rates for every (posterior, releases) asked."""
    os.environ["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={args.devices}"
    import jax
    import numpy as np

    sys.path.insert(0, str(HERE))
    from bench_spread import build_field, matmul_rate_gflops

    from driftwise import devices
    from driftwise.dynamics import moments, tabulate
    from driftwise.dynamics.sde import sde_from_field, split_for_jit

    field = build_field()
    exact_sde = sde_from_field(field)
    start = time.perf_counter()
    table = tabulate.tabulate_field(field, [-12_500.0] * 2, [12_500.0] * 2, tolerance=0.05)
    build_s = time.perf_counter() - start
    table_sde = tabulate.on_table(exact_sde, table)
    over = devices.mesh()
    out = {"devices": jax.device_count(), "build_s": build_s, "nodes": list(table.shape),
           "mean_error": float(table.mean_error), "cov_error": float(table.cov_error), "runs": []}
    method, integrator = moments.SphericalCubature(), moments.RK4(step_s=600.0)
    for name, sde in (("exact", exact_sde), ("table", table_sde)):
        for releases, hours in _sizes(args, name):
            rng = np.random.default_rng(6)
            means0 = rng.uniform(-6000.0, 6000.0, size=(releases, 2))
            covs0 = np.broadcast_to(np.eye(2) * 50.0**2, (releases, 2, 2)).copy()
            times = np.arange(0.0, hours * 3600.0 + 1.0, 3600.0)
            dynamic, static = split_for_jit(sde)
            m, n = devices.shard_rows(means0, over)
            c, _ = devices.shard_rows(covs0, over)
            dyn, integ, t = devices.replicate((dynamic, integrator, times), over)
            compiled = moments.propagate_batch_jit.lower(dyn, static, method, integ, 256, m, c, t, mesh=over).compile()
            walls = []
            for _ in range(args.repeat if name == "table" else 1):
                start = time.perf_counter()
                jax.block_until_ready(compiled(dyn, integ, m, c, t))
                walls.append(time.perf_counter() - start)
            steps = releases * hours * 6
            out["runs"].append({"posterior": name, "releases": releases, "hours": hours, "wall_s": float(np.median(walls)),
                                "rate": steps / float(np.median(walls))})
    out["flop_per_step"] = _flop_per_step(table_sde, method, jax, np)
    out["matmul_gflops"] = matmul_rate_gflops(3)
    return out


def _flop_per_step(sde, method, jax, np) -> float:
    """XLA's flop count of one moment-rate evaluation per release (1000 releases batched) × 4 RK4 stages."""
    from driftwise.dynamics import moments

    means = jax.numpy.asarray(np.random.default_rng(0).uniform(-5000.0, 5000.0, size=(1000, 2)))
    covs = jax.numpy.broadcast_to(jax.numpy.eye(2) * 1e4, (1000, 2, 2))
    rates = jax.jit(jax.vmap(lambda m, p: moments.moment_rates(method, sde, m, p, 3600.0)))
    cost = rates.lower(means, covs).compile().cost_analysis()
    cost = cost[0] if isinstance(cost, list) else cost
    return 4.0 * float(cost["flops"]) / 1000.0


def _sizes(args: argparse.Namespace, posterior: str) -> list[tuple[int, int]]:
    """(releases, hours) per run; the exact path runs 10⁴ releases for one hour (6 release-steps each): its
    cost per release-step does not depend on R or the horizon, and 10⁵ would take most of an hour."""
    if args.quick:
        return [(1000, 2)] if posterior == "exact" else [(1000, 12), (10_000, 12)]
    return [(10_000, 1)] if posterior == "exact" else [(10_000, 12), (100_000, 2)]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--devices", type=int, default=0, help="(internal) run one child with this many devices")
    parser.add_argument("--counts", default="1,2,4", help="forced device counts (default 1,2,4)")
    parser.add_argument("--repeat", type=int, default=3, help="timed repetitions of each tabulated run")
    args = parser.parse_args()
    if args.devices:
        print(json.dumps(child(args)))
        return
    load = os.getloadavg()
    results = []
    for count in (int(c) for c in args.counts.split(",")):
        cmd = [sys.executable, __file__, "--devices", str(count), "--repeat", str(args.repeat)] + (["--quick"] if args.quick else [])
        run = subprocess.run(cmd, capture_output=True, text=True, check=True)
        results.append(json.loads(run.stdout.strip().splitlines()[-1]))
    report(results, load, os.getloadavg())


def report(results: list[dict], load_before, load_after) -> None:
    first = results[0]
    print(f"bench_tabulate  (load average before {load_before[0]:.1f}, after {load_after[0]:.1f}; 2 cores)")
    print(f"table: {first['nodes'][0]}×{first['nodes'][1]} nodes over 25 km × 25 km, built in {first['build_s']:.1f} s; "
          f"measured error: mean {first['mean_error']:.2g} posterior s.d., covariance {first['cov_error']:.2g} relative")
    print(f"flop per release-step (XLA cost analysis, tabulated): {first['flop_per_step']:.0f}")
    print(f"{'devices':>7} {'posterior':>9} {'releases':>9} {'hours':>5} {'wall s':>8} {'release-steps/s':>16} "
          f"{'vs exact':>9} {'GFLOP/s':>8} {'of matmul':>9}")
    for res in results:
        exact = {r["releases"]: r["rate"] for r in res["runs"] if r["posterior"] == "exact"}
        for r in res["runs"]:
            ratio = r["rate"] / max(exact.values()) if r["posterior"] == "table" else None
            gflops = r["rate"] * res["flop_per_step"] / 1e9 if r["posterior"] == "table" else None
            ratio_text = "" if ratio is None else f"{ratio:.0f}×"
            flop_text = "" if gflops is None else f"{gflops:.2f}"
            share_text = "" if gflops is None else f"{100 * gflops / res['matmul_gflops']:.1f} %"
            print(f"{res['devices']:>7} {r['posterior']:>9} {r['releases']:>9} {r['hours']:>5} {r['wall_s']:>8.2f} "
                  f"{r['rate']:>16.3g} {ratio_text:>9} {flop_text:>8} {share_text:>9}")
        print(f"{'':>7} matmul {res['matmul_gflops']:.1f} GFLOP/s; table built in {res['build_s']:.1f} s → break-even "
              f"{res['build_s'] * max(exact.values()):.3g} release-steps")


if __name__ == "__main__":
    main()
