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
   stripped) in each tree: equal digests mean the steady step runs the very same program, whatever the load.

``--parts step,fits,auto,hlo`` picks parts (default all); ``--repeats R`` processes per tree for part 1 (default 3);
``--tracks N`` drifters for parts 2 and 3 (default 100, about 10⁴ observations).
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


def part_fits(n_tracks: int) -> list[str]:
    tracks = gyre_tracks(n_tracks, 50)
    rows = []
    for label, options in (("steady", {}), ("steady + M2", {"tides": ("M2",)}),
                           ("steady + M2 + slow", {"tides": ("M2",), "slow_time_scale_s": "auto"})):
        tic = time.perf_counter()
        field = driftwise.fit(tracks, position_error_m=3.0, progress=False, **options)
        seconds = time.perf_counter() - tic
        info = field.fit_info
        rows.append(f"| fit {label}, {info.get('hyperparameter_rows')} obs | {seconds:.1f} s | ELBO {info['elbo']:.6g} "
                    f"({info['steps']} steps) |")
    return rows


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
    parser.add_argument("--parts", default="step,fits,auto,hlo")
    parser.add_argument("--tracks", type=int, default=100)
    parser.add_argument("--before", type=Path, default=None, help="source tree to compare the steady step with")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    rows = ["| measure | value | note |", "|---|---|---|"]
    if "step" in args.parts:
        rows += part_step(args.before, args.repeats)
    if "fits" in args.parts:
        rows += part_fits(args.tracks)
    if "auto" in args.parts:
        rows += part_auto(args.tracks)
    if "hlo" in args.parts and args.before:
        rows += part_hlo(args.before)
    print("\n".join(rows))


if __name__ == "__main__":
    main()
