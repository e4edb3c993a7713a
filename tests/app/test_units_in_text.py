"""Numbers printed for people in the unit that fits their size, at tank scale and at ocean scale.

The same cellular flow (Taylor & Green 1937, Proc. R. Soc. A 158, 499: u = U sin kx cos ky, v = −U cos kx sin ky)
at two scales, tracks by driftwise.data.synthetic.simulate_drifters (Euler–Maruyama, Kloeden & Platen 1992):

- tank: cells of 0.25 m in a 1 m box, U = 2 mm/s, fixes at 2 Hz for 1 min, K = 1e-6 m²/s, 0.5 mm fix noise;
- ocean: cells of 5 km, U = 0.2 m/s, hourly fixes for 2 days, K = 1 m²/s, 10 m fix noise.

Every text the command line prints (inspect, fit, spread, score, check) is read for zeros that hide a small
value ("0.00 km", "(0, 0, 0) m", "0 m x 0 m", "0.000556 h") and for the unit that fits: mm and s in the tank,
km and h in the ocean.  JSON keeps SI numbers.  The unit choice itself is tested in tests/test_units.py
(SI prefixes, BIPM SI Brochure 2019, table 7).
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from driftwise.data import synthetic

pytestmark = pytest.mark.slow   # fits at two scales and a tank check: minutes on a shared 2-core machine

# a printed value that hides a small number behind zeros, in any unit
HIDDEN_ZERO = re.compile(r"(?<![\d.])0\.0+ (?:km|h|m)\b|\((?:0, )+0\) m|(?<![\d.])0 m x 0 m|0\.000\d+ h")

SCALES = {
    "tank": dict(field=synthetic.TaylorGreen(velocity_scale_m_s=2e-3, length_scale_m=0.25 / np.pi), box_m=1.0,
                 fix_interval_s=0.5, duration_s=60.0, diffusivity_m2_s=1e-6, position_error_m=5e-4,
                 release="0.5,0.5", horizon="20s", every="5s", length="mm", duration=" s"),
    "ocean": dict(field=synthetic.TaylorGreen(velocity_scale_m_s=0.2, length_scale_m=5000.0 / np.pi), box_m=20000.0,
                  fix_interval_s=3600.0, duration_s=48 * 3600.0, diffusivity_m2_s=1.0, position_error_m=10.0,
                  release="10km,10km", horizon="12h", every="1h", length="km", duration=" h"),
}


def _write_tracks(s: dict, folder) -> None:
    for name, seed, n in (("fit.csv", 1, 12), ("holdout.csv", 2, 4)):
        starts = np.random.default_rng(seed).uniform(0.1 * s["box_m"], 0.9 * s["box_m"], (n, 2))
        synthetic.simulate_drifters(s["field"], starts, duration_s=s["duration_s"], fix_interval_s=s["fix_interval_s"],
                                    diffusivity_m2_s=s["diffusivity_m2_s"], position_error_m=s["position_error_m"],
                                    seed=seed + 10).to_csv(folder / name, index=False)


@pytest.fixture(scope="module", params=list(SCALES))
def scale(request, tmp_path_factory):
    """(name, settings, folder with fit.csv, holdout.csv) for one scale."""
    folder = tmp_path_factory.mktemp(request.param)
    _write_tracks(SCALES[request.param], folder)
    return request.param, SCALES[request.param], folder


@pytest.fixture(scope="module")
def fitted(scale):
    """The model file of a small fit (independent kernel, 16 inducing points, no calibration) via the CLI."""
    from driftwise.app.cli import main

    name, s, folder = scale
    assert main(["fit", str(folder / "fit.csv"), "--out", str(folder / "m.npz"), "--kernel", "independent",
                 "--inducing", "16", "--no-calibrate", "--quiet", "--json"]) == 0
    return name, s, folder


def _no_hidden_zeros(text: str) -> None:
    assert HIDDEN_ZERO.findall(text) == [], text


def test_inspect_prints_extent_and_sampling_in_fitting_units(run_cli, scale):
    name, s, folder = scale
    code, out, _ = run_cli("inspect", folder / "fit.csv")
    assert code == 0
    _no_hidden_zeros(out)
    extent = next(line for line in out.splitlines() if line.strip().startswith("extent"))
    sampling = next(line for line in out.splitlines() if line.strip().startswith("sampling"))
    assert ("mm" in extent or " m " in extent) if name == "tank" else "km" in extent
    assert sampling.split()[2:4] == (["500", "ms"] if name == "tank" else ["1", "h"])
    code, out, _ = run_cli("inspect", folder / "fit.csv", "--json")
    assert json.loads(out)["sampling_interval_s"]["median"] == s["fix_interval_s"]     # SI in JSON


def test_fit_text_prints_lengths_and_speeds_that_fit(run_cli, fitted, tmp_path):
    name, s, folder = fitted
    code, out, _ = run_cli("fit", folder / "fit.csv", "--out", tmp_path / "m.npz", "--kernel", "independent",
                           "--inducing", "16", "--no-calibrate", "--quiet", "--profile")
    assert code == 0
    _no_hidden_zeros(out)
    length = next(line for line in out.splitlines() if "length_scale_m" in line)
    speed = next(line for line in out.splitlines() if "velocity_scale_m_s" in line)
    assert length.strip().endswith(" mm" if name == "tank" else " km"), length
    assert speed.strip().endswith(" mm/s" if name == "tank" else "m/s"), speed
    assert "time (wall):" in out and re.search(r"optimise +\d", out) and "total" in out


def test_spread_text_prints_the_end_mean_ellipse_and_horizon_that_fit(run_cli, fitted):
    name, s, folder = fitted
    code, out, _ = run_cli("spread", folder / "m.npz", "--release", s["release"], "--horizon", s["horizon"],
                           "--every", s["every"])
    assert code == 0
    _no_hidden_zeros(out)
    assert f"output times to {s['horizon'][:-1]}{s['duration']}" in out
    release = next(line for line in out.splitlines() if "end mean" in line)
    assert release.count(" m)") + release.count(" mm") + release.count(" km") >= 3, release
    ellipse = release.split("95 % ellipse ")[1]
    assert re.match(r"[\d.]+ (mm|m) x [\d.]+ (mm|m)" if name == "tank" else r"[\d.]+ (km|m) x [\d.]+ (km|m)",
                    ellipse), ellipse


def test_score_table_prints_separations_and_horizons_that_fit(run_cli, fitted):
    name, s, folder = fitted
    code, out, _ = run_cli("score", folder / "m.npz", folder / "holdout.csv")
    assert code == 0
    _no_hidden_zeros(out)
    rows = [line for line in out.splitlines() if "driftwise" in line and re.match(r"\s*[\d.]+ \w+ ", line)]
    assert rows, out
    for row in rows:
        horizon_unit = row.split()[1]
        assert horizon_unit in (("s",) if name == "tank" else ("h",)), row
        assert (" mm " in row or " m " in row) if name == "tank" else " km " in row or " m " in row, row
    code, out, _ = run_cli("score", folder / "m.npz", folder / "holdout.csv", "--json")
    assert all(h > 0 for h in json.loads(out)["horizons_s"])       # SI seconds in JSON


def test_check_text_prints_the_grid_and_position_error_that_fit_in_the_tank(run_cli, tmp_path):
    """Tank scale only: check fits four kernel families, minutes on a shared machine at two scales."""
    name = "tank"
    _write_tracks(SCALES[name], tmp_path)
    code, out, _ = run_cli("check", tmp_path / "fit.csv", "--steps", "20", "--inducing", "16", "--quiet", "--profile")
    assert code == 0
    _no_hidden_zeros(out)
    sigma = next(line for line in out.splitlines() if "position error σ" in line)
    assert re.search(r"σ = [\d.]+ mm" if name == "tank" else r"σ = [\d.]+ m ", sigma), sigma
    grid = next(line for line in out.splitlines() if line.strip().startswith("divergence:"))
    assert re.search(r"cells every [\d.]+ (mm|m)\b" if name == "tank" else r"cells every [\d.]+ (m|km)\b", grid), grid
    assert re.search(r"fit_families +[\d.]+ (s|min)", out)
    rows = [line for line in out.splitlines() if line.strip().split(" ")[0] in
            ("helmholtz", "divergence-free", "curl-free", "independent")]
    assert len(rows) == 4 and all(row.endswith("converged") for row in rows), rows
    stopped = [row for row in rows if row.endswith("not converged")]
    assert bool(stopped) == ("reached the step limit before its ELBO levelled off" in out), out
