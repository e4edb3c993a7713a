"""End to end at tank scale: `driftwise fit` with no options on 3-D ABC-flow tracks.

Run by hand:  .venv/bin/python tests/benchmarks/bench_tank_abc.py [--tracks 20] [--fixes 121] [--speed 10]
              [--sigma-tracks 200] [--sigma-fixes 481] [--out DIR]

Truth: the Arnold–Beltrami–Childress flow (Dombre et al. 1986, J. Fluid Mech. 167, 353;
A = √3, B = √2, C = 1) with period 1 m, seen in a 1 m periodic box (synthetic.in_periodic_box: a particle
leaving through a face re-enters through the opposite one as a new track), U = 10 mm/s by default (RMS speed
√6 U ≈ 24 mm/s), particles released uniformly in the box, fixes at 2 Hz for 1 min, eddy diffusivity
K = 1e-5 m²/s, position noise σ = 0.5 mm per axis (driftwise.synthetic.simulate_drifters,
Euler–Maruyama with 10 substeps).  Writes tracks.csv, runs `driftwise fit tracks.csv --out
model.npz --json` in this process, and prints the estimated σ and the calibrated K against the
truth, and the RMS error of the posterior mean velocity at the observation midpoints relative
to the RMS true speed there ("near the data"), with wall times.  The position error needs far more
fixes than a quick fit (its SE ∝ (2Kh + 2σ²)/σ²/√N, driftwise.data.positionerror), so it is also estimated
alone on ``--sigma-tracks`` particles of ``--sigma-fixes`` fixes (≈ 1e5 fixes by default), without a fit.

Measured (loaded 2-core machine, load 20–28): see tests/app/test_tank_abc.py for the table of designs.
The first design (U = 2 mm/s, 20 drifters, 1 min, not folded) gave velocity RMSE 26.1 %, K ratio 0.99, σ 54 % off
in 138 s; an oracle smoother (exact GP per component, true noise, best length scale chosen against the truth)
reaches 26.8 % on those data, so that was the design's information limit, not the fit's.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import tempfile
import time
from pathlib import Path

import numpy as np

from driftwise.app.cli import main as cli
from driftwise.data import synthetic
from driftwise.data.positionerror import estimate_position_error
from driftwise.data.tracks import read_tracks, velocity_observations
from driftwise.gp.modelfile import load_model

SIGMA_M = 5e-4
K_M2_S = 1e-5


def simulate(n_tracks: int, n_fixes: int, speed_m_s: float, path: Path, seed: int = 0) -> None:
    starts = np.random.default_rng(seed).uniform(0.0, 1.0, (n_tracks, 3))
    table = synthetic.simulate_drifters(synthetic.ABCFlow(speed_m_s=speed_m_s, box_m=1.0), starts,
                                        duration_s=0.5 * (n_fixes - 1), fix_interval_s=0.5,
                                        diffusivity_m2_s=K_M2_S, position_error_m=SIGMA_M, seed=seed + 1)
    synthetic.in_periodic_box(table, 1.0).to_csv(path, index=False)


def velocity_error(model_path: Path, csv_path: Path, speed_m_s: float) -> tuple[float, float]:
    """(RMS |mean − truth|, RMS |truth|) in m/s at the midpoints of consecutive fixes."""
    field = load_model(model_path)
    obs = velocity_observations(read_tracks(csv_path), position_error_m=0.0)
    points = obs.position_m[:: max(1, obs.n // 5000)]
    mean, _ = field.predict(points)
    truth = synthetic.ABCFlow(speed_m_s=speed_m_s, box_m=1.0).velocity(points)
    return float(np.sqrt(np.mean(np.sum((mean - truth) ** 2, 1)))), float(np.sqrt(np.mean(np.sum(truth**2, 1))))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tracks", type=int, default=20)
    parser.add_argument("--fixes", type=int, default=121)
    parser.add_argument("--speed", type=float, default=10.0, help="U of the ABC flow in mm/s")
    parser.add_argument("--sigma-tracks", type=int, default=200)
    parser.add_argument("--sigma-fixes", type=int, default=481)
    parser.add_argument("--out", default=None, help="folder for tracks.csv and model.npz (default: a temp dir)")
    args = parser.parse_args()
    folder = Path(args.out or tempfile.mkdtemp(prefix="tank_abc_"))
    folder.mkdir(parents=True, exist_ok=True)
    csv, model = folder / "tracks.csv", folder / "model.npz"
    big = folder / "sigma_tracks.csv"
    speed = args.speed * 1e-3
    simulate(args.sigma_tracks, args.sigma_fixes, speed, big, seed=10)
    alone = estimate_position_error(read_tracks(big))
    print(f"position error alone on {args.sigma_tracks} particles x {args.sigma_fixes} fixes: {alone.value_m * 1e3:.4f} ± "
          f"{alone.standard_error_m * 1e3:.4f} mm (truth 0.5), identified {alone.identified}")
    start = time.perf_counter()
    simulate(args.tracks, args.fixes, speed, csv)
    print(f"{args.tracks} tracks x {args.fixes} fixes -> {csv} ({time.perf_counter() - start:.1f} s)")
    start = time.perf_counter()
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        code = cli(["fit", str(csv), "--out", str(model), "--json"])
    fit_s = time.perf_counter() - start
    report = json.loads(buffer.getvalue()) if code == 0 else {}
    print(f"driftwise fit: exit {code} in {fit_s:.0f} s")
    if code != 0:
        print(buffer.getvalue())
        return
    est = report["position_error_estimate"] or {}
    rmse, rms = velocity_error(model, csv, speed)
    print(json.dumps({"position_error_m": report["position_error_m"], "source": report["position_error_source"],
                      "position_error_se_m": est.get("standard_error_m"), "identified": est.get("identified"),
                      "sigma_true_m": SIGMA_M, "diffusivity_m2_s": report["diffusivity_m2_s"],
                      "k_true_m2_s": K_M2_S, "velocity_rmse_m_s": rmse, "rms_speed_m_s": rms,
                      "relative_rmse": rmse / rms, "fit_wall_s": fit_s,
                      "calibration_lags_s": (report.get("calibration") or {}).get("lags_s")}, indent=1))
    print(f"sigma {report['position_error_m'] * 1e3:.3f} mm (truth 0.5), K {report['diffusivity_m2_s']:.3g} "
          f"(truth 1e-5, ratio {report['diffusivity_m2_s'] / K_M2_S:.2f}), velocity RMSE {100 * rmse / rms:.1f} % "
          f"of the RMS speed; |sigma - truth| / truth = {abs(report['position_error_m'] - SIGMA_M) / SIGMA_M:.2f}"
          )


if __name__ == "__main__":
    main()
