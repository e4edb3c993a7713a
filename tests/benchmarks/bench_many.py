"""Many releases: table against exact posterior, connectivity, back-tracking and the ensemble against diffrax.

Run by hand (not collected by pytest), one table at the end:

    .venv/bin/python tests/benchmarks/bench_many.py                 # the sizes below (about 25 min under load 20)
    .venv/bin/python tests/benchmarks/bench_many.py --quick         # a smoke run

Field: the 2-D Helmholtz field of bench_spread.py (M = 256 over the ±10 km invented bay), its posterior tabulated
over [−12.5, 12.5] km² (tolerance 0.05).  A release-step is one RK4 step of one release with SphericalCubature
(4 stages × 4 points), whatever its length.  Measured in this run, side by side:

1. release-steps/s (RK4 600 s) in this process (one device), exact posterior (``--exact`` releases × 1 h) and
   tabulated (10⁴ × 12 h, 10⁵ × 2 h); the machine's float64 matmul rate (2048² GEMM) and the share of it the
   tabulated run reaches, with the flop per release-step counted by XLA's cost analysis
   (bench_tabulate._flop_per_step);
2. in fresh processes with 1, 2 and 4 forced host devices (XLA_FLAGS=--xla_force_host_platform_device_count=N;
   the machine has 2 cores): the table's release-steps/s (10⁵ × 2 h); connectivity between 20 square sites
   (1 km side, a 5 × 4 lattice over ±6 km), ``--per-site`` releases each over ``--days`` days with the command's
   defaults (RK4 1 h, daily outputs) and the data-support share (supporttable): wall time of
   ``connectivity.connect`` (tables built before the clock starts; releases that leave the table are rerun on
   the wider tables the commands build, tabulate.WiderTable over ±30 and ±90 km, then exactly), the process's
   peak resident memory (resource.getrusage ru_maxrss), and the time of 10⁶ releases × 720 hourly steps
   extrapolated linearly in releases × steps from the second of two identical runs, plus the first run's extra
   (compilation, paid once); back-tracking of a ``--candidates`` grid × 72 hourly candidate release times for
   one find 72 h after the first (RK4 1 h, the command's default), extrapolated linearly to 10⁵ candidates,
   with the most probable release point's distance and the map's L1 difference against RK4 600 s (the step's
   own error);
3. the Euler–Maruyama ensemble (ensemble.simulate) against diffrax (Euler on an Itô SDE with a
   ControlTerm, the same drift, the same L = psd_cholesky(D), UnsafeBrownianPath, vmapped over particles)
   on the same tabulated SDE, the same step (60 s), particle count and horizon; also the moment release
   (cubature, RK4 600 s) for the same release, so both ratios are quoted against diffrax.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from functools import partial
from pathlib import Path

HERE = Path(__file__).resolve().parent
REGION_M = 12_500.0
DATA_M = 10_000.0         # the data's box (±): the first table's before its 25 % margin
CLI_STEP_S = 3600.0      # the RK4 step of `driftwise connect` and `driftwise backtrack` by default


def setup(devices: int = 0):
    """(jax, np, field, exact SDE, table SDE, table, build seconds) with ``devices`` forced host devices."""
    if devices:
        os.environ["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={devices}"
    import jax
    import numpy as np

    jax.config.update("jax_enable_x64", True)
    sys.path.insert(0, str(HERE))
    from bench_spread import build_field

    from driftwise.dynamics import tabulate
    from driftwise.dynamics.sde import sde_from_field

    field = build_field()
    exact = sde_from_field(field)
    start = time.perf_counter()
    table = tabulate.tabulate_field(field, [-REGION_M] * 2, [REGION_M] * 2, tolerance=0.05)
    return jax, np, field, exact, tabulate.on_table(exact, table), table, time.perf_counter() - start


def timed(fn, repeat: int = 1) -> float:
    """Median wall time (s) of ``fn()`` after one untimed call (compilation)."""
    import jax
    import numpy as np

    jax.block_until_ready(fn())
    walls = []
    for _ in range(repeat):
        start = time.perf_counter()
        jax.block_until_ready(fn())
        walls.append(time.perf_counter() - start)
    return float(np.median(walls))


def rates(args, jax, np, exact, table_sde) -> dict:
    """Release-steps/s, exact and tabulated, with the flop count and the matmul rate."""
    from bench_spread import matmul_rate_gflops
    from bench_tabulate import _flop_per_step

    from driftwise.dynamics import moments

    rng = np.random.default_rng(6)
    out = []
    sizes = [("exact", exact, args.exact, 1)] + [("table", table_sde, r, h) for r, h in args.table_sizes]
    for name, sde, releases, hours in sizes:
        means0 = rng.uniform(-6000.0, 6000.0, size=(releases, 2))
        covs0 = np.broadcast_to(np.eye(2) * 50.0**2, (releases, 2, 2)).copy()
        times = np.arange(0.0, hours * 3600.0 + 1.0, 3600.0)
        call = partial(moments.propagate_batch, sde, means0, covs0, times)
        wall = timed(call, 1 if name == "exact" else 2)
        out.append({"posterior": name, "releases": releases, "hours": hours, "wall_s": wall,
                    "rate": releases * hours * 6 / wall})
    return {"runs": out, "flop_per_step": _flop_per_step(table_sde, moments.SphericalCubature(), jax, np),
            "matmul_gflops": matmul_rate_gflops(3)}


def twenty_sites():
    import numpy as np

    from driftwise.dynamics.sites import Site

    square = np.array([[-500.0, -500.0], [500.0, -500.0], [500.0, 500.0], [-500.0, 500.0]])
    centres = [(x, y) for y in (-4500.0, -1500.0, 1500.0, 4500.0) for x in (-6000.0, -3000.0, 0.0, 3000.0, 6000.0)]
    return tuple(Site(f"site{i:02d}", square + np.asarray(c)) for i, c in enumerate(centres))


def connect_child(args) -> dict:
    """One fresh process on ``args.devices`` forced devices: the table's release-steps/s (10⁵ × 2 h), connectivity
    of 20 sites (the command's defaults: RK4 1 h, daily outputs, data-support share from supporttable) and
    back-tracking; wall times and peak memory."""
    jax, np, field, exact, table_sde, _, build_s = setup(args.devices)
    from driftwise.dynamics import connectivity, moments, tabulate
    from driftwise.dynamics.supporttable import support_table

    rate = table_rate(np, table_sde, 100_000, 2)
    sites = twenty_sites()
    times = np.arange(0.0, args.days * 86400.0 + 1.0, 86400.0)
    support = support_table(field, [-REGION_M] * 2, [REGION_M] * 2)
    box = np.array([-DATA_M] * 2), np.array([DATA_M] * 2)
    stages = [tabulate.WiderTable(field, exact, *box, widen=widen) for widen, _ in tabulate.WIDER_STAGES]
    start = time.perf_counter()
    for stage in stages:     # the commands build them on first use; a 10⁶-release run needs both
        stage()
    wider_s = time.perf_counter() - start
    run = partial(connectivity.connect, table_sde, sites, times, integrator=moments.RK4(CLI_STEP_S), support=support,
                  fallback_sde=(*stages, exact))
    run(per_site=26)                                                   # compile the table's batch program
    walls = []
    for _ in range(1 if args.single else 2):   # the first run also compiles the padded sizes of the reruns
        start = time.perf_counter()
        result = run(per_site=args.per_site)
        walls.append(time.perf_counter() - start)
    cold, wall = walls[0], walls[-1]
    return {"devices": jax.device_count(), "wall_s": wall, "cold_s": cold, "build_s": build_s, "wider_s": wider_s,
            "table_rate": rate,
            "backtrack": backtrack_run(args, np, exact, table_sde, (*stages, exact)),
            "maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
            "retained_max": float(np.max(np.diagonal(result.probability[..., -1])))}


def table_rate(np, table_sde, releases: int, hours: int) -> dict:
    """Release-steps/s of ``releases`` through the table for ``hours`` h (RK4 600 s, cubature)."""
    from driftwise.dynamics import moments

    rng = np.random.default_rng(6)
    means0 = rng.uniform(-6000.0, 6000.0, size=(releases, 2))
    covs0 = np.broadcast_to(np.eye(2) * 50.0**2, (releases, 2, 2)).copy()
    times = np.arange(0.0, hours * 3600.0 + 1.0, 3600.0)
    wall = timed(partial(moments.propagate_batch, table_sde, means0, covs0, times), 2)
    return {"releases": releases, "hours": hours, "wall_s": wall, "rate": releases * hours * 6 / wall}


def backtrack_run(args, np, exact, table_sde, fallback) -> dict:
    """A ``--candidates`` grid × 72 hourly release times for one find 72 h after the first (the command's RK4 1 h)."""
    from driftwise.dynamics import backtrack

    side = round(float(np.sqrt(args.candidates)))
    x = y = np.linspace(-6000.0, 6000.0, side)
    release_times = np.arange(0.0, 72 * 3600.0, 3600.0)
    finds = backtrack.Finds(np.array([[1000.0, 500.0]]), np.array([72 * 3600.0]), np.array([200.0]))
    run = partial(backtrack.backtrack, table_sde, finds, step_s=CLI_STEP_S, fallback_sde=fallback)
    run(x[:40], y[:40], release_times)                                  # compile the batch
    start = time.perf_counter()
    result = run(x, y, release_times)
    wall = time.perf_counter() - start
    fine = run(x, y, release_times, step_s=600.0)                       # the step's own error, against 10 min
    return {"candidates": side * side, "times": len(release_times), "wall_s": wall,
            "most_probable": [float(v) for v in result.most_probable],
            "step_error_m": float(np.hypot(*(np.array(result.most_probable[:2]) - fine.most_probable[:2]))),
            "step_error_l1": float(np.abs(result.probability - fine.probability).sum())}


def ensemble_vs_diffrax(args, jax, np, table_sde) -> dict:
    """Wall times of the same release: our ensemble, diffrax's Euler–Maruyama, and the moment method."""
    import diffrax

    from driftwise.dynamics import ensemble, moments

    mean0, cov0 = np.array([0.0, 0.0]), np.eye(2) * 50.0**2
    times = np.arange(0.0, args.ens_hours * 3600.0 + 1.0, 3600.0)
    step, n = 60.0, args.particles
    ours = ensemble.EulerMaruyama(particles=n, step_s=step, chunk=min(n, 4096))
    key = jax.random.key(1)
    ours_s = timed(lambda: ensemble.simulate(table_sde, mean0, cov0, times, method=ours, key=key).mean)

    def drift(t, y, _):
        return table_sde.drift_at(y)

    def noise(t, y, _):                                 # age = t: the release starts at t = 0
        return moments.psd_cholesky(table_sde.rate(y, t))

    def one(x0, k):
        terms = diffrax.MultiTerm(diffrax.ODETerm(drift),
                                  diffrax.ControlTerm(noise, diffrax.UnsafeBrownianPath(shape=(2,), key=k)))
        sol = diffrax.diffeqsolve(terms, diffrax.Euler(), 0.0, float(times[-1]), step, x0,
                                  saveat=diffrax.SaveAt(ts=times), max_steps=int(times[-1] / step) + 8,
                                  adjoint=diffrax.ForwardMode())
        return sol.ys

    @jax.jit
    def reference(k):
        k0, k1 = jax.random.split(k)
        x0 = mean0 + jax.random.normal(k0, (n, 2)) @ np.linalg.cholesky(cov0).T
        ys = jax.vmap(one)(x0, jax.random.split(k1, n))
        return ys[:, -1].mean(0), jax.numpy.cov(ys[:, -1].T)

    diffrax_s = timed(lambda: reference(key))
    ref_mean, ref_cov = (np.asarray(a) for a in reference(key))
    ens = ensemble.simulate(table_sde, mean0, cov0, times, method=ours, key=key)
    moment_s = timed(lambda: moments.propagate(table_sde, mean0, cov0, times), 3)
    m, p = moments.propagate(table_sde, mean0, cov0, times)
    return {"particles": n, "hours": args.ens_hours, "ours_s": ours_s, "diffrax_s": diffrax_s, "moment_s": moment_s,
            "mean_m": {"ours": np.asarray(ens.mean[-1]).tolist(), "diffrax": ref_mean.tolist(),
                       "moment": np.asarray(m[-1]).tolist()},
            "sd_m": {"ours": np.sqrt(np.diag(np.asarray(ens.cov[-1]))).tolist(),
                     "diffrax": np.sqrt(np.diag(ref_cov)).tolist(), "moment": np.sqrt(np.diag(np.asarray(p[-1]))).tolist()}}


def children(args) -> list[dict]:
    out = []
    for count in (int(c) for c in args.counts.split(",")):
        cmd = [sys.executable, __file__, "--connect-child", "--devices", str(count), "--per-site", str(args.per_site),
               "--days", str(args.days), "--candidates", str(args.candidates)]
        run = subprocess.run(cmd, capture_output=True, text=True, check=True)
        out.append(json.loads(run.stdout.strip().splitlines()[-1]))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--connect-child", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--devices", type=int, default=1)
    parser.add_argument("--single", action="store_true", help="with --connect-child: one timed connectivity run "
                        "(e.g. the full 10⁶ releases: --per-site 50000), compilation included")
    parser.add_argument("--counts", default="1,2,4", help="forced device counts of the connectivity runs")
    parser.add_argument("--per-site", type=int, default=500, help="connectivity releases per site (20 sites)")
    parser.add_argument("--days", type=int, default=30, help="connectivity horizon (daily outputs, RK4 1 h)")
    parser.add_argument("--exact", type=int, default=2000, help="releases of the exact-posterior rate (1 h)")
    parser.add_argument("--candidates", type=int, default=10_000, help="back-tracking candidates (a square grid)")
    parser.add_argument("--particles", type=int, default=10_000, help="ensemble particles (ours and diffrax)")
    parser.add_argument("--ens-hours", type=int, default=6, help="ensemble horizon (h), Euler–Maruyama step 60 s")
    args = parser.parse_args()
    if args.quick:
        args.per_site, args.days, args.exact, args.candidates, args.particles = 30, 2, 200, 400, 1000
    args.table_sizes = [(1000, 2), (10_000, 2)] if args.quick else [(10_000, 12), (100_000, 2)]
    if args.connect_child:
        print(json.dumps(connect_child(args)))
        return
    uptime = subprocess.run(["uptime"], check=False, capture_output=True, text=True).stdout.strip()
    jax, np, _, exact, table_sde, table, build_s = setup()
    res = {"uptime_before": uptime, "build_s": build_s, "nodes": list(table.shape),
           "errors": [float(table.mean_error), float(table.cov_error)]}
    res["rates"] = rates(args, jax, np, exact, table_sde)
    res["ensemble"] = ensemble_vs_diffrax(args, jax, np, table_sde)
    res["connect"] = children(args)
    res["uptime_after"] = subprocess.run(["uptime"], check=False, capture_output=True, text=True).stdout.strip()
    Path(os.environ.get("BENCH_MANY_JSON", "/tmp/bench_many.json")).write_text(json.dumps(res, indent=1))
    report(res, args)


def report(res: dict, args) -> None:
    r = res["rates"]
    exact = next(x["rate"] for x in r["runs"] if x["posterior"] == "exact")
    print(f"bench_many  {res['uptime_before']}  →  {res['uptime_after']}  (2 cores)")
    print(f"table {res['nodes'][0]}×{res['nodes'][1]} nodes over 25 km², built in {res['build_s']:.1f} s, measured "
          f"error {res['errors'][0]:.2g} s.d. (mean), {res['errors'][1]:.2g} (covariance, relative)")
    print(f"matmul (float64 2048²) {r['matmul_gflops']:.2f} GFLOP/s; {r['flop_per_step']:.0f} flop per table release-step")
    print(f"{'posterior':>9} {'releases':>9} {'hours':>5} {'wall s':>8} {'release-steps/s':>15} {'vs exact':>9} "
          f"{'GFLOP/s':>8} {'of matmul':>9}")
    for x in r["runs"]:
        table = x["posterior"] == "table"
        gf = x["rate"] * r["flop_per_step"] / 1e9
        ratio = f"{x['rate'] / exact:.0f}×" if table else ""
        flops = f"{gf:.3f}" if table else ""
        share = f"{100 * gf / r['matmul_gflops']:.1f} %" if table else ""
        print(f"{x['posterior']:>9} {x['releases']:>9} {x['hours']:>5} {x['wall_s']:>8.2f} {x['rate']:>15.3g} "
              f"{ratio:>9} {flops:>8} {share:>9}")
    steps = 20 * args.per_site * args.days * 24
    print(f"connectivity 20 sites × {args.per_site} releases × {args.days} d (RK4 1 h, daily outputs; {steps:.3g} "
          "release-steps; table), back-tracking, and the table's rate, per forced device count:")
    base = res["connect"][0]
    print(f"  (the wider tables of releases leaving the first, ±30 and ±90 km: built in {base['wider_s']:.1f} s before "
          "the clock)")
    for c in res["connect"]:
        full = c["wall_s"] * (1e6 * 720) / steps + (c["cold_s"] - c["wall_s"])      # compilation once
        b = c["backtrack"]
        print(f"  {c['devices']} device(s): connect {c['wall_s']:.1f} s (first run {c['cold_s']:.1f} s) ({steps / c['wall_s']:.3g} release-steps/s, "
              f"speed-up {base['wall_s'] / c['wall_s']:.2f}×, efficiency {base['wall_s'] / c['wall_s'] / c['devices']:.2f}), "
              f"10⁶ releases × 720 h extrapolated {full / 60:.1f} min (target ≤ 15); peak memory {c['maxrss_mb']:.0f} MB; "
              f"table {c['table_rate']['rate']:.3g} release-steps/s (10⁵ × 2 h; target ≥ 10⁶)")
        print(f"      backtrack {b['candidates']} candidates × {b['times']} times: {b['wall_s']:.1f} s, 10⁵ "
              f"extrapolated {b['wall_s'] * 1e5 / b['candidates']:.0f} s (target ≤ 120); most probable "
              f"{b['most_probable']}; against RK4 600 s: {b['step_error_m']:.1f} m, map L1 {b['step_error_l1']:.2g}")
    e = res["ensemble"]
    print(f"ensemble {e['particles']} particles × {e['hours']} h, Euler–Maruyama 60 s: ours {e['ours_s']:.2f} s, "
          f"diffrax {e['diffrax_s']:.2f} s → diffrax/ours {e['diffrax_s'] / e['ours_s']:.2f}×; moment release (cubature, "
          f"RK4 600 s) {1e3 * e['moment_s']:.1f} ms → diffrax/moment {e['diffrax_s'] / e['moment_s']:.0f}×")
    print(f"  final mean (m) ours {e['mean_m']['ours']}, diffrax {e['mean_m']['diffrax']}, moment {e['mean_m']['moment']}")
    print(f"  final s.d. (m) ours {e['sd_m']['ours']}, diffrax {e['sd_m']['diffrax']}, moment {e['sd_m']['moment']}")


if __name__ == "__main__":
    main()
