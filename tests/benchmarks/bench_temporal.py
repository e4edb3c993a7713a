"""Benchmark of time-varying fits (run by hand: ``.venv/bin/python tests/benchmarks/bench_temporal.py``).

Prints one table, everything measured in this run (medians):

1. one steady optimiser step (Helmholtz, 2-D, M = 128, all 4,096 observations per step) in a fresh process per
   source tree, alternating ``--before TREE`` (e.g. a checkout of main before time-varying fields) and this tree,
   so that the steady path's speed is compared on the same machine at the same time;
2. fit time (to the plateau) and final ELBO for steady, steady + M2, steady + M2 + slow on about 10⁴ velocity
   observations of drifters in a gyre whose strength follows a + b cos ω_M2 t (driftwise.data.synthetic.PulsingGyre).

3. ``--temporal auto`` (driftwise.dynamics.temporalchoice.fit_temporal) on steady and on tidal gyre tracks (the
   same flow at constant strength; R = 20 km so the tidal excursion is small beside the gyre): what it chose, its
   total time and the share of the residual test, the only cost auto adds to a fit of steady data;
4. (with ``--before``) a SHA-256 of the steady optimiser step's compiled-program text (HLO, source metadata
   stripped) in each tree: equal digests mean the steady step runs the very same program, whatever the load;
5. spread cost per release-step (cubature, moments.propagate_batch, RK4 600 s; ``--releases`` × ``--hours``) on
   fields of the gyre data at the fit's default sizes (q optimal for the initial hyperparameters: the cost does not
   depend on their values): steady (M = 256, F = 512 features) against steady + M2 (M = 48, F = 288) and
   steady + M2 + slow (M = M_s = 48, F = 384), and steady + M2 against steady at the same M = 48 (F = 96), run
   alternately (bench_spread.paired_times), ratio = median of the
   paired ratios (issue target: time-varying ≤ 1.5× steady);
6. (with ``--before``) the steady spread of part 5's size in a fresh process per tree, alternating, as part 1.

``--fit-tracks`` (drifters for parts 2 and 3; 100: about 10⁴ observations) and ``--fit-steps`` shrink parts 2 and 3
on a busy machine.  ``--parts step,fits,auto,hlo,spread,spreadtree`` picks parts (default all); ``--repeats R``
processes per tree for parts 1 and 6 and paired repeats in part 5 (default 3); ``--releases`` and ``--hours`` size
parts 5 and 6.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))   # bench_spread's paired timing

import driftwise
from driftwise.data.synthetic import GaussianGyre, PulsingGyre, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics.temporalchoice import fit_temporal

HERE = Path(__file__).resolve().parents[2]

STEP_CODE = r"""
import json, time, numpy as np
from types import SimpleNamespace
import driftwise
from driftwise.gp import training as F
from driftwise.gp.schedule import Schedule
rng = np.random.default_rng(0)
n = 4096
x = rng.uniform(0.0, 4000.0, (n, 2))
v = np.stack([0.2 * np.sin(x[:, 0] / 600.0), -0.2 * np.cos(x[:, 1] / 700.0)], 1) + 0.02 * rng.standard_normal((n, 2))
obs = SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(n, 1800.0), time_s=np.arange(n) * 60.0,
                      track_index=np.arange(n) // 64, position_error_m=5.0)
def run(steps):
    tic = time.perf_counter()
    F.fit(obs, inducing=128, progress=False, schedule=Schedule(steps=steps, patience=10**6))
    return time.perf_counter() - tic
run(1)
one, many = run(1), run(21)
print(json.dumps({"step_s": (many - one) / 20.0}))
"""


HLO_CODE = r"""
import hashlib, re, numpy as np
from types import SimpleNamespace
from driftwise.gp import training as F
from driftwise.gp.schedule import Schedule
rng = np.random.default_rng(0)
n = 512
obs = SimpleNamespace(position_m=rng.uniform(0.0, 4000.0, (n, 2)), velocity_m_s=0.1 * rng.standard_normal((n, 2)),
                      dt_s=np.full(n, 1800.0), time_s=np.arange(n) * 60.0, track_index=np.arange(n) // 64,
                      position_error_m=5.0)
config = F.check_options("helmholtz", "squared-exponential", 32, 0, Schedule(), 5.0)
data = F.prepare_data(obs, 5.0)
config = F.resolve_rows(config, data.n, fingerprint=data.fingerprint, position_error_m=5.0)
state, zs = F.start_state(data, config, learning_rate=0.1, checkpoint=None)
low = F.optimiser_step.lower(state.params, state.opt_state, data.batch, float(data.n), 1.0, zs,
                             names=F.trainable_names(config.q_update, False), q_update=config.q_update,
                             jitter_multiple=state.jitter_multiple)
text = re.sub(r"^HloModule.*$", "", re.sub(r", metadata=[{][^}]*[}]", "", low.as_text(dialect="hlo")), flags=re.M)
print(hashlib.sha256(text.encode()).hexdigest())
"""


def _run(code: str, tree: Path) -> str:
    env = dict(os.environ, PYTHONPATH=str(tree / "src"))
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    return out.stdout.strip().splitlines()[-1]


def part_hlo(before: Path) -> list[str]:
    mine, old = _run(HLO_CODE, HERE), _run(HLO_CODE, before)
    return [f"| steady step program (HLO sha256), this tree | {mine[:16]}… | |",
            f"| steady step program (HLO sha256), before | {old[:16]}… | {'identical' if mine == old else 'DIFFERENT'} |"]


def step_seconds(tree: Path) -> float:
    return json.loads(_run(STEP_CODE, tree))["step_s"]


def part_step(before: Path | None, repeats: int) -> list[str]:
    trees = [("this tree", HERE)] + ([("before", before)] if before else [])
    times = {name: [] for name, _ in trees}
    for _ in range(repeats):
        for name, tree in trees:
            times[name].append(step_seconds(tree))
    rows = [f"| steady step, {name} | {np.median(t) * 1e3:.1f} ms | {len(t)} processes |" for name, t in times.items()]
    if before:
        ratio = np.median(times["this tree"]) / np.median(times["before"])
        rows.append(f"| steady step, this tree / before | {ratio:.3f} | (≤ 1.05 wanted) |")
    return rows


def gyre_tracks(n_tracks: int, hours: int, *, radius_m: float = 1500.0, tidal: bool = True):
    omega = 2.0 * math.pi / (12.4206012 * 3600.0)
    gyre = GaussianGyre(0.3, radius_m)
    flow = PulsingGyre(gyre, 0.5, -1.0, omega) if tidal else gyre
    starts = np.random.default_rng(1).uniform(-5.0 * radius_m / 3.0, 5.0 * radius_m / 3.0, (n_tracks, 2))
    frame = simulate_drifters(flow, starts, duration_s=hours * 3600.0, fix_interval_s=1800.0, diffusivity_m2_s=0.5,
                              position_error_m=3.0, seed=2, start_times_s=1.7e9)
    return tracks_from_frame(frame)


def part_fits(n_tracks: int = 100, max_steps: int = 1000) -> list[str]:
    from driftwise.gp.schedule import Schedule

    tracks = gyre_tracks(n_tracks, 50)
    rows = []
    for label, options in (("steady", {}), ("steady + M2", {"tides": ("M2",)}),
                           ("steady + M2 + slow", {"tides": ("M2",), "slow_time_scale_s": "auto"})):
        tic = time.perf_counter()
        field = driftwise.fit(tracks, position_error_m=3.0, progress=False, schedule=Schedule(steps=max_steps),
                              **options)
        seconds = time.perf_counter() - tic
        info = field.fit_info
        rows.append(f"| fit {label}, {info.get('hyperparameter_rows')} obs | {seconds:.1f} s | ELBO {info['elbo']:.6g} "
                    f"({info['steps']} steps) |")
    return rows


SPREAD_CODE = r"""
import json, sys, time, numpy as np, jax
from types import SimpleNamespace
import driftwise
from driftwise.dynamics import moments
from driftwise.dynamics.sde import sde_from_field
from driftwise.gp import field as F
releases, hours = int(sys.argv[1]), float(sys.argv[2])
rng = np.random.default_rng(0)
n = 10000
x = rng.uniform(-3000.0, 3000.0, (n, 2))
v = np.stack([0.2 * np.sin(x[:, 1] / 900.0), -0.2 * np.sin(x[:, 0] / 800.0)], 1) + 0.02 * rng.standard_normal((n, 2))
obs = SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(n, 1800.0), time_s=1.7e9 + np.arange(n) * 60.0,
                      track_index=np.arange(n) // 100, position_error_m=3.0)
grid = np.linspace(-3000.0, 3000.0, 16)
z = np.stack(np.meshgrid(grid, grid), -1).reshape(-1, 2)
params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=0.15, length_scale_m=1500.0, diffusivity_m2_s=0.5,
                       noise_floor_m_s=0.02)
field = F.FlowField.from_params(F.optimal_q(params, F.batch_from_observations(obs)), decorrelation_time_s=1800.0)
sde = sde_from_field(field)
means0 = rng.uniform(-2500.0, 2500.0, (releases, 2))
covs0 = np.broadcast_to(100.0 * np.eye(2), (releases, 2, 2))
times = np.arange(0.0, hours + 1e-9, 1.0) * 3600.0
run = lambda: jax.block_until_ready(moments.propagate_batch(sde, means0, covs0, times, integrator=moments.RK4(600.0)))
run()
out = []
for _ in range(3):
    tic = time.perf_counter(); run(); out.append(time.perf_counter() - tic)
print(json.dumps({"us_per_release_step": 1e6 * float(np.median(out)) / (releases * times[-1] / 600.0)}))
"""


def spread_fields(n_tracks: int, hours: int):
    """Steady, steady + M2 and steady + M2 + slow fields of the gyre tracks at the fit's default sizes."""
    from driftwise.gp import field as fld
    from driftwise.gp.initial import initial_hyperparameters, initial_inducing
    from driftwise.gp.temporalfit import TemporalChoice, temporal_start

    tracks = gyre_tracks(n_tracks, hours)
    obs = driftwise.velocity_observations(tracks, position_error_m=3.0)
    batch = fld.batch_from_observations(obs)
    out = {}
    for label, tides, slow, m in (("steady", (), "off", 256), ("steady, M = 48", (), "off", 48),
                                  ("steady + M2", ("M2",), "off", 48),
                                  ("steady + M2 + slow", ("M2",), "auto", 48)):
        z = initial_inducing(np.asarray(obs.position_m), m, seed=0)
        h = initial_hyperparameters(batch, z)
        start = None
        if tides or slow != "off":
            start = temporal_start(TemporalChoice(tides, slow).to_json(), batch, tracks.frame, n_inducing=m,
                                   length_scale_m=h["length_scale_m"], velocity_scale_m_s=h["velocity_scale_m_s"],
                                   seed=0)
        params = fld.init_params("helmholtz", 2, z, velocity_scale_m_s=h["velocity_scale_m_s"],
                                 length_scale_m=h["length_scale_m"], diffusivity_m2_s=h["diffusivity_m2_s"],
                                 noise_floor_m_s=h["noise_floor_m_s"], temporal=start)
        out[label] = fld.FlowField.from_params(fld.optimal_q(params, batch), decorrelation_time_s=1800.0)
    return out, float(np.median(np.asarray(obs.time_s)))


def part_spread(releases: int, hours: float, repeats: int) -> list[str]:
    import jax
    from bench_spread import paired_times

    from driftwise.dynamics import moments
    from driftwise.dynamics.sde import sde_from_field

    fields, start_s = spread_fields(100, 50)
    rng = np.random.default_rng(1)
    means0 = rng.uniform(-2000.0, 2000.0, (releases, 2))
    covs0 = np.broadcast_to(100.0 * np.eye(2), (releases, 2, 2))
    times = np.arange(0.0, hours + 1e-9, 1.0) * 3600.0
    steps = releases * times[-1] / 600.0

    def call(field):
        sde = sde_from_field(field)
        starts = {"start_times_s": np.full(releases, start_s)} if field.is_time_varying else {}
        return lambda: jax.block_until_ready(moments.propagate_batch(sde, means0, covs0, times,
                                                                     integrator=moments.RK4(600.0), **starts))

    rows = []
    for label, reference in (("steady + M2", "steady"), ("steady + M2 + slow", "steady"),
                             ("steady + M2", "steady, M = 48")):
        t_tv, t_steady, ratio = paired_times(call(fields[label]), call(fields[reference]), repeats)
        f_tv, f_steady = (int(fields[name].params.q_mean.shape[0]) for name in (label, reference))
        rows.append(f"| spread cubature, {reference} (F = {f_steady}) | {1e6 * t_steady / steps:.2f} µs/release-step "
                    f"| {releases} releases × {hours:g} h, RK4 600 s |")
        rows.append(f"| spread cubature, {label} (F = {f_tv}) | {1e6 * t_tv / steps:.2f} µs/release-step | "
                    f"ratio to the row above {ratio:.2f} (≤ 1.5 wanted) |")
    return rows


def part_spread_tree(before: Path, releases: int, hours: float, repeats: int) -> list[str]:
    times = {"this tree": [], "before": []}
    for _ in range(repeats):
        for name, tree in (("this tree", HERE), ("before", before)):
            out = _run(SPREAD_CODE.replace("sys.argv[1]", str(releases)).replace("sys.argv[2]", str(hours)), tree)
            times[name].append(json.loads(out)["us_per_release_step"])
    rows = [f"| steady spread (F = 512), {name} | {np.median(t):.2f} µs/release-step | {len(t)} processes |"
            for name, t in times.items()]
    ratio = np.median(times["this tree"]) / np.median(times["before"])
    return rows + [f"| steady spread, this tree / before | {ratio:.3f} | (≤ 1.05 wanted) |"]


def part_auto(n_tracks: int) -> list[str]:
    rows = []
    for label, tidal in (("steady", False), ("tidal (M2)", True)):
        tracks, timing = gyre_tracks(n_tracks, 50, radius_m=20000.0, tidal=tidal), {}
        tic = time.perf_counter()
        field, _, decision = fit_temporal(tracks, "helmholtz", position_error_m=3.0, quiet=True,
                                          likelihood="velocities", timing_s=timing)
        seconds = time.perf_counter() - tic
        rows.append(f"| --temporal auto on {label} data, {field.data_summary.get('n_observations')} obs | "
                    f"{seconds:.1f} s | chose {' + '.join(decision.components)}; residual test "
                    f"{timing['residual_test']:.2f} s = {timing['residual_test'] / seconds:.1%} of the total |")
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--parts", default="step,fits,auto,hlo,spread,spreadtree")
    parser.add_argument("--fit-tracks", type=int, default=100, help="drifters × 50 h at 30-min fixes (100: 10⁴)")
    parser.add_argument("--fit-steps", type=int, default=1000, help="optimiser step cap of each fit")
    parser.add_argument("--releases", type=int, default=200)
    parser.add_argument("--hours", type=float, default=12.0)
    parser.add_argument("--before", type=Path, default=None, help="source tree to compare the steady step with")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    rows = ["| measure | value | note |", "|---|---|---|"]
    if "step" in args.parts:
        rows += part_step(args.before, args.repeats)
    if "fits" in args.parts:
        rows += part_fits(args.fit_tracks, args.fit_steps)
    if "auto" in args.parts:
        rows += part_auto(args.fit_tracks)
    if "hlo" in args.parts and args.before:
        rows += part_hlo(args.before)
    if "spread" in args.parts.split(","):
        rows += part_spread(args.releases, args.hours, args.repeats)
    if "spreadtree" in args.parts and args.before:
        rows += part_spread_tree(args.before, args.releases, args.hours, args.repeats)
    print("\n".join(rows))


if __name__ == "__main__":
    main()
