"""Benchmark of the fit through the transition density (run by hand:
``.venv/bin/python tests/benchmarks/bench_transitions.py [--parts step,rmse] [--method cubature]``).

Prints, everything measured in this run (medians of timed repeats after one compiling call):

1. ``step``: the cost of one optimiser step of the transition objective against one step of the velocity
   ELBO at the same batch b and the same M, timed in alternating rounds (:func:`_paired`) (Helmholtz kernel, 2-D, M = 64, b = 256, 3-h fixes, RK4 step from
   the field, :func:`driftwise.dynamics.transitionfit.step_for_field`, and the old fixed 900 s = 12 substeps):
   seconds per step and the ratio (target of the issue: ≤ 8×);
3. ``plateau``: wall time of ``fit_transitions`` to its plateau on 10⁴ transitions (target < 5 min on 2 cores).

The 1-minute load average is printed with every table: the machine is shared.  Run with
``OPENBLAS_NUM_THREADS=1``: the LAPACK calls (Cholesky, triangular solves) of both steps otherwise start
OpenBLAS threads that fight XLA's for the two cores (measured: a 128 × 128 triangular solve 0.3 ms single-
threaded, 8–32 ms threaded under load).
2. ``rmse``: the velocity RMSE against the Lamb–Oseen formula (Oseen 1912; Lamb 1932) near the data (grid
   points within 500 m of a fix) for the velocity fit and the transition fit, fix interval 30 min to 6 h,
   one table, with the fitted K against the truth 1 m²/s (``--figure PATH``: the same as a PNG figure).

Data: 30 drifters for 24 h in a Lamb–Oseen vortex of core radius 2 km and peak swirl 0.4 m/s
(tests/test_transitionfit.py), K = 1 m²/s, σ_pos = 10 m.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import statistics
import sys
import time
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

import driftwise
from driftwise.dynamics import transitionfit as TF
from driftwise.dynamics.transitions import transition_set
from driftwise.gp import field as fld
from driftwise.gp import training as F
from driftwise.gp.schedule import Schedule

sys.path[:0] = [str(Path(__file__).resolve().parents[1]), str(Path(__file__).resolve().parents[1] / "dynamics")]
from test_transitionfit import SIGMA_M, rmse_near_data, vortex_tracks

BATCH, M = 256, 64


def _once(fn) -> float:
    start = time.perf_counter()
    jax.block_until_ready(fn())
    return time.perf_counter() - start


def _paired(fns: dict, repeats: int = 15) -> dict:
    """Median seconds of each function, timed in turn (one call of each per round, after one compiling call
    each), so that the machine's slow spells fall on all of them alike; the ratios are medians of the
    per-round ratios to the first function."""
    for fn in fns.values():
        jax.block_until_ready(fn())
    rounds = [{name: _once(fn) for name, fn in fns.items()} for _ in range(repeats)]
    first = next(iter(fns))
    return {name: (statistics.median(r[name] for r in rounds),
                   statistics.median(r[name] / r[first] for r in rounds)) for name in fns}


def _load() -> str:
    return f"load {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores"


def step_cost(method: str) -> None:
    tracks = vortex_tracks(3 * 3600.0, n=40, hours=24.0)
    warm = F.fit(tracks, inducing=M, position_error_m=SIGMA_M, schedule=Schedule(steps=20, optimiser="adam"), progress=False)
    trans = transition_set(tracks, position_error_m=SIGMA_M)
    b = min(BATCH, trans.n)
    rows = TF._rows(trans, jnp.arange(b))
    params = warm.params
    opt = TF._optimizer().init({name: getattr(params, name) for name in TF._TRAINABLE})
    obs = driftwise.velocity_observations(tracks, position_error_m=SIGMA_M)
    batch = fld.batch_from_observations(obs, idx=list(range(b)))
    names = F.trainable_names("adam", False)
    vopt = F.optimizer().init(F.split_trainable(params, names, 1.0))
    fns = {"velocities": lambda: F.optimiser_step(params, vopt, batch, float(obs.n), 1.0, 1.0, names=names,
                                                  q_update="adam", jitter_multiple=warm.jitter_multiple)[2]}
    for label, step_s in (("field step", TF.step_for_field(warm, trans)), ("900 s step", 900.0)):
        prop = TF._propagation(method, trans, step_s, 32)
        fns[f"transitions, {label}, {prop.integrator.substeps} RK4 substeps"] = lambda prop=prop: TF._step(
            params, {}, opt, rows, float(trans.n), 3000.0, SIGMA_M**2, prop=prop, jitter_multiple=warm.jitter_multiple)[3]
    print(f"step cost, M = {params.n_inducing}, batch {b}, {method}, {_load()}; medians of 15 rounds, each "
          "function once per round; ratio = median of the per-round ratios to the velocity step")
    for name, (seconds, ratio) in _paired(fns).items():
        print(f"  {name}: {seconds * 1e3:.1f} ms, ratio {ratio:.1f}x")
    print(f"  (after the rounds: {_load()})")


def plateau_time(method: str) -> None:
    tracks = vortex_tracks(3 * 3600.0, n=1250, hours=24.0)          # 1250 drifters × 8 transitions = 10⁴
    start = time.perf_counter()
    vel = F.fit(tracks, inducing=M, position_error_m=SIGMA_M, progress=False)
    t_vel = time.perf_counter() - start
    tr = TF.fit_transitions(tracks, vel, position_error_m=SIGMA_M, method=method, progress=False)
    t_tr = time.perf_counter() - start - t_vel
    print(f"fit on {tr.fit_info['n_transitions']} transitions, M = {M}, {method}, {_load()}: velocity fit {t_vel:.0f} s, "
          f"transition fit {t_tr:.0f} s ({tr.fit_info['transition_steps']} steps, converged "
          f"{tr.fit_info['transition_converged']}), K {tr.diffusivity_m2_s:.3g} m²/s (truth 1), RMSE "
          f"{rmse_near_data(vel, tracks):.4f} → {rmse_near_data(tr, tracks):.4f} m/s; RK4 steps "
          + ", ".join(f"{s['substeps']} × {s['step_s']:.0f} s from step {s['from_step']}"
                      for s in tr.fit_info["transition_rk4_steps"]))


def rmse_table(method: str, steps: int, hours_list: tuple[float, ...], figure: str | None = None) -> None:
    print(f"RMSE near the data against the Lamb–Oseen formula, K truth 1 m²/s, {method}, {_load()}")
    print("fix interval | velocity fit RMSE m/s, K | transition fit RMSE m/s, K | steps, time s | RK4 substeps")
    rows = []
    for hours in hours_list:
        tracks = vortex_tracks(hours * 3600.0, n=30, hours=24.0)
        vel = F.fit(tracks, inducing=36, position_error_m=SIGMA_M, schedule=Schedule(steps=200, optimiser="adam"), progress=False)
        start = time.perf_counter()
        schedule = dataclasses.replace(TF.TRANSITION_SCHEDULE, steps=steps)     # the fit's own schedule
        tr = TF.fit_transitions(tracks, vel, position_error_m=SIGMA_M, schedule=schedule, method=method,
                                progress=False)
        rows.append((hours, rmse_near_data(vel, tracks), rmse_near_data(tr, tracks)))
        print(f"{hours:>5.1f} h | {rows[-1][1]:.4f}, {vel.diffusivity_m2_s:.3g} | "
              f"{rows[-1][2]:.4f}, {tr.diffusivity_m2_s:.3g} | "
              f"{tr.fit_info['transition_steps']}, {time.perf_counter() - start:.0f} | substeps "
              + " → ".join(str(s["substeps"]) for s in tr.fit_info["transition_rk4_steps"]), flush=True)
    if figure:
        print(f"figure: {_rmse_figure(rows, figure)}")


def _rmse_figure(rows: list, path: str) -> Path:
    """RMSE near the data (m/s) against the fix interval (h), both likelihoods, as a PNG at ``path``."""
    from matplotlib.figure import Figure

    from driftwise.products.plots import save_figure

    hours, vel, tr = (np.asarray(col) for col in zip(*rows))
    fig = Figure(figsize=(5.5, 3.8))
    ax = fig.add_subplot()
    ax.plot(hours, vel, "o-", label="fit to finite-difference velocities")
    ax.plot(hours, tr, "s-", label="fit through the transition density")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xticks(hours, [f"{h:g}" for h in hours])
    ax.tick_params(axis="x", which="minor", labelbottom=False)
    ax.set_xlabel("fix interval (h)")
    ax.set_ylabel("velocity RMSE near the data (m/s)")
    ax.set_title("Lamb–Oseen vortex, core 2 km, peak swirl 0.4 m/s", fontsize=9)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return save_figure(fig, path)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--parts", default="step,rmse,plateau")
    parser.add_argument("--method", default="cubature")
    parser.add_argument("--steps", type=int, default=300)
    parser.add_argument("--hours", default="0.5,1,2,3,6", help="fix intervals (h) of the RMSE table")
    parser.add_argument("--figure", help="write the RMSE table as a PNG figure here")
    args = parser.parse_args()
    parts = args.parts.split(",")
    if "step" in parts:
        step_cost(args.method)
    if "rmse" in parts:
        rmse_table(args.method, args.steps, tuple(float(h) for h in args.hours.split(",")), args.figure)
    if "plateau" in parts:
        plateau_time(args.method)


if __name__ == "__main__":
    main()
