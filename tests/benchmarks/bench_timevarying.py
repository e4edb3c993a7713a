"""Spread cost per release-step: steady SDE vs the same SDE with a time term (issue target: ≤ 1.5×).

Run by hand (not collected by pytest):

    .venv/bin/python tests/benchmarks/bench_timevarying.py            # 200 releases × 12 h, 5 repeats
    .venv/bin/python tests/benchmarks/bench_timevarying.py --quick    # a smoke run
    .venv/bin/python tests/benchmarks/bench_timevarying.py --steady-only   # the steady rows only (also runs on
                                                                           # code from before time-dependent SDEs)

Cases, each once steady and once with a tidal factor (1 + ½ cos ωt, ω of M2) on the same field:
* "field": a fitted 2-D Helmholtz FlowField (M = 256, as in bench_spread.py); steady through
  sde.sde_from_field (PointPosterior), time-varying through a wrapper exposing the time-varying field
  contract (mean_at(x, t_s=t), cov_between(x, x, t_x_s=t, t_y_s=t)) around the same posterior, so the
  two differ only by the time handling (the real time-varying GP costs more per evaluation: that is
  the field's cost, not the propagator's);
* "analytic": a cheap closed-form gyre, where the time term's own cost (two cosines per stage at
  t ≈ 1.7e9 s) is a large part of a step;
* "carry": the same gyre as a time SDE whose functions ignore t: what carrying t costs the propagators.
Methods: cubature (moments.propagate_batch, RK4 600 s) and the Euler–Maruyama ensemble (60 s steps).
Timings are medians over repeats, steady and time-varying run alternately (bench_spread.paired_times);
the ratio is the median of the paired ratios.
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass, field

import jax
import jax.numpy as jnp
import numpy as np
from bench_spread import build_field, median_time, paired_times

import driftwise  # noqa: F401  (float64)
from driftwise.dynamics import ensemble, moments
from driftwise.dynamics.sde import SDE, PointPosterior, sde_from_field

Partial = jax.tree_util.Partial
OMEGA = 2.0 * np.pi / (12.4206012 * 3600.0)


def _tidal(t_s):
    return 1.0 + 0.5 * jnp.cos(OMEGA * t_s)


@jax.tree_util.register_dataclass
@dataclass(frozen=True)
class TidalPosterior:
    """A FlowField posterior times a tidal factor, with the time-varying field contract (benchmark only:
    cov_between is evaluated on the diagonal x = y, t_x = t_y only, as the SDE does)."""

    posterior: PointPosterior
    diffusivity_m2_s: float = field(default=1.0, metadata=dict(static=True))
    decorrelation_time_s: float = field(default=1800.0, metadata=dict(static=True))
    is_time_varying = True

    def mean_at(self, x, part=None, *, t_s=None):
        return self.posterior.mean_at(x) * _tidal(t_s)

    def cov_between(self, x, y, part_x=None, part_y=None, *, t_x_s=None, t_y_s=None):
        return self.posterior.cov_at(x) * _tidal(t_x_s) * _tidal(t_y_s)


def _gyre(x):
    r2 = jnp.sum(x**2) / 4e7
    return jnp.array([-x[1], x[0]]) * 2e-5 / (1.0 + r2)


def _gyre_steady(x):
    return _gyre(x)


def _gyre_tidal(x, t_s):
    return _gyre(x) * _tidal(t_s)


def _aged(x, age_s):
    return 2.0 * (1.0 + 1800.0 * 1e-4 * (-jnp.expm1(-age_s / 1800.0))) * jnp.eye(2)


def _aged_tidal(x, t_s, age_s):
    return _aged(x, age_s) * _tidal(t_s)


def _gyre_untimed(x, t_s):
    return _gyre(x)


def _aged_untimed(x, t_s, age_s):
    return _aged(x, age_s)


def sdes(kind: str, steady_only: bool):
    """(steady SDE, time-varying SDE or None) of a case."""
    if kind == "field":
        flow = build_field()
        steady = sde_from_field(flow)
        if steady_only:
            return steady, None
        tidal = TidalPosterior(PointPosterior.from_field(flow), float(flow.diffusivity_m2_s), 1800.0)
        return steady, sde_from_field(tidal)
    steady = SDE(_gyre_steady, _aged, with_age=True)
    if kind == "carry":
        return steady, None if steady_only else SDE(_gyre_untimed, _aged_untimed, with_age=True, with_time=True)
    return steady, None if steady_only else SDE(_gyre_tidal, _aged_tidal, with_age=True, with_time=True)


def _start(name: str, value):
    """The start-time keyword, left out in --steady-only runs (code from before it existed has none)."""
    return {} if value is None else {name: value}


def cubature_call(sde, releases: int, times: np.ndarray, start):
    rng = np.random.default_rng(1)
    means0 = rng.uniform(-8000.0, 8000.0, size=(releases, 2))
    covs0 = np.broadcast_to(100.0 * np.eye(2), (releases, 2, 2))
    starts = _start("start_times_s", None if start is None else np.full(releases, start))
    return lambda: moments.propagate_batch(sde, means0, covs0, times, integrator=moments.RK4(600.0), **starts)


def ensemble_call(sde, particles: int, times: np.ndarray, start):
    method = ensemble.EulerMaruyama(particles, 60.0, min(particles, 4096))
    return lambda: ensemble.simulate(sde, np.array([1000.0, -2000.0]), np.zeros((2, 2)), times, method=method,
                                     key=jax.random.key(0), **_start("start_time_s", start)).mean


def rows(kind: str, args) -> list[str]:
    steady, tidal = sdes(kind, args.steady_only)
    times, short = (np.arange(0.0, hours + 1e-9, 1.0) * 3600.0 for hours in (args.hours, args.ensemble_hours))
    start = None if args.steady_only else 1717416000.0
    out = []
    cases = (("cubature", args.releases * (times[-1] / 600.0),
              lambda sde: cubature_call(sde, args.releases, times, start)),
             ("ensemble", args.particles * (short[-1] / 60.0),
              lambda sde: ensemble_call(sde, args.particles, short, start)))
    for method, steps, make in cases:
        if tidal is None:
            t_steady = median_time(make(steady), args.repeats)
            out.append(f"| {kind:8s} | {method:8s} | {1e6 * t_steady / steps:10.3f} | {'—':>10s} | {'—':>6s} |")
            continue
        t_tidal, t_steady, ratio = paired_times(make(tidal), make(steady), args.repeats)   # ratio: with time / steady
        out.append(f"| {kind:8s} | {method:8s} | {1e6 * t_steady / steps:10.3f} | {1e6 * t_tidal / steps:10.3f} | "
                   f"{ratio:6.2f} |")
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="50 releases × 3 h, 500 particles × 1 h, 3 repeats")
    parser.add_argument("--steady-only", action="store_true", help="time the steady SDEs only")
    parser.add_argument("--cases", default="field,analytic,carry", help="comma-separated cases (default all)")
    args = parser.parse_args()
    args.releases, args.hours, args.particles, args.ensemble_hours, args.repeats = (
        (50, 3, 500, 1, 3) if args.quick else (200, 12, 1000, 2, 5))
    print(f"spread cost per release-step (µs; cubature: per release per RK4 step of 600 s, {args.releases} releases "
          f"× {args.hours} h; ensemble: per particle per 60 s step, {args.particles} particles × {args.ensemble_hours} "
          f"h), median of {args.repeats} paired repeats, start 2024-06-03T12Z (t = 1.7e9 s), jax {jax.__version__} "
          f"on {jax.devices()[0].platform}")
    print("| case     | method   | steady     | with time  | ratio  |")
    print("|----------|----------|------------|------------|--------|")
    for kind in args.cases.split(","):
        print("\n".join(rows(kind, args)), flush=True)


if __name__ == "__main__":
    main()
