"""Commands on data they were not designed around: printed answers at tank scale (a 1 m tank, finds known to mm)
keep units that fit their size and are not rounded to 0; finds outside the data, grids coarser than a find, tides
longer than the tracks and forecasts far beyond a slow part's data are said, not silently answered.

The model: a GP with fixed hyperparameters and closed-form optimal q on noisy velocities of Taylor–Green cells
(synthetic.TaylorGreen: 0.2 m cells at 5 mm/s) in a 1 m square — a stand-in for a fitted tank model.
"""

from __future__ import annotations

import dataclasses
import json
import re
import types
import warnings

import numpy as np
import pytest

import driftwise  # noqa: F401  (float64)
from driftwise.app.cmd_fit import format_fit
from driftwise.data import synthetic
from driftwise.data.frame import Frame
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics.supportcheck import SupportWarning, warn_beyond_time_span
from driftwise.dynamics.temporalchoice import TemporalWarning, _warn_unresolved_tides
from driftwise.gp import field as F
from driftwise.gp.modelfile import save_model


@pytest.fixture(scope="module")
def tank_model(tmp_path_factory):
    rng = np.random.default_rng(3)
    x = rng.uniform(0.0, 1.0, (300, 2))
    v = synthetic.TaylorGreen(velocity_scale_m_s=5e-3, length_scale_m=0.2).velocity(x) + rng.normal(0, 5e-4, x.shape)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(300, 0.5), position_error_m=5e-4)
    z = np.stack(np.meshgrid(*[np.linspace(0.0, 1.0, 6)] * 2), -1).reshape(-1, 2)
    params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=5e-3, length_scale_m=0.2,
                           diffusivity_m2_s=1e-5, noise_floor_m_s=5e-4)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    summary = {"extent_m": {"min": x.min(axis=0).tolist(), "max": x.max(axis=0).tolist()}, "time_span_s": [0.0, 120.0]}
    path = tmp_path_factory.mktemp("tank") / "tank.npz"
    return save_model(F.FlowField.from_params(params, frame=Frame(), data_summary=summary, position_error_m=5e-4),
                      path)


def test_backtrack_text_at_tank_scale_keeps_mm_and_cm2(tank_model, run_cli):
    """Before: 'most probable release: (1, 0) m' for a point at (0.515, 0.316) m and '50 % region 9.1e-09 km²'.
    The printed point must equal the --json one to a tenth of a grid cell and the areas (cm², SI prefixes, BIPM
    SI Brochure 2019, table 7) must equal the --json area_m2 to the 3 printed figures."""
    argv = ["backtrack", tank_model, "--found", "0.5,0.3", "--at", "100s", "--sd", "2mm", "--window", "30s",
            "--every", "10s", "--step", "1s", "--quiet"]
    code, out, err = run_cli(*argv)
    assert code == 0, err
    code, js, err = run_cli(*argv, "--json")
    assert code == 0, err
    data = json.loads(js)
    x, y = (float(v) for v in re.search(r"most probable release: \(([-\d.]+), ([-\d.]+)\) m", out).groups())
    cell_m = min(data["grid"]["spacing_m"])
    assert np.allclose([x, y], data["most_probable"]["position_m"], atol=0.1 * cell_m), out
    assert 0.3 < x < 0.7 and 0.1 < y < 0.5, out          # near the find (0.5, 0.3) m, not rounded to (1, 0)
    for share in ("50", "90"):
        value, unit = re.search(rf"{share} % region ([\d.]+) ([^\s,]+)", out).groups()
        assert unit == "cm²", out
        assert float(value) * 1e-4 == pytest.approx(data[f"region_{share}"]["area_m2"], rel=5e-3)


def test_backtrack_warns_when_the_grid_is_coarser_than_the_find(tank_model, run_cli):
    """A find known to 2 mm on the default grid (about 2 cm cells): before, no word, and the release at the find's
    time got 0.01 against 0.08 for the others (the Gaussian of sd 2 mm sampled at cell centres 2 cm apart).
    With the --spacing the warning suggests, a release at the find's time weighs as much as one 5 s earlier
    (within 25 %: the flow is nearly area-preserving, so under a uniform prior each candidate time's evidence
    is nearly the same — Liouville's theorem for a divergence-free flow)."""
    base = ["backtrack", tank_model, "--found", "0.5,0.3", "--at", "100s", "--sd", "2mm", "--window", "5s",
            "--every", "5s", "--step", "1s", "--quiet", "--json"]
    with pytest.warns(UserWarning, match=r"--sd 2 mm is below half the candidate spacing .* use --spacing 4 mm or "
                                         r"less \(with a smaller --region\)"):
        code, _, err = run_cli(*base)
    assert code == 0, err
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code, out, err = run_cli(*base, "--spacing", "4mm", "--region", "0.45,0.25,0.55,0.35")
    assert code == 0, err
    assert not [w for w in caught if "below half" in str(w.message)]
    by_time = [item["probability"] for item in json.loads(out)["probability_by_time"]]
    assert by_time[-1] == pytest.approx(by_time[0], rel=0.25), by_time


def test_backtrack_warns_when_the_find_is_outside_the_data(tank_model, run_cli):
    """A find 5 m from a 1 m tank: before, an answer with exit 0 and no word that it rests on the prior's flow."""
    with pytest.warns(SupportWarning, match=r"find 1 at \(5 m, 5 m\) is outside the model's data support \(\S+ m "
                                            r"from the nearest data; the data leave 100 % of the prior"):
        code, _, err = run_cli("backtrack", tank_model, "--found", "5,5", "--at", "100s", "--sd", "5cm",
                               "--window", "5s", "--every", "5s", "--step", "1s", "--quiet", "--json")
    assert code == 0, err


def test_tides_on_tracks_shorter_than_their_period_warn():
    """`fit --tides M2` on 2 min of tank tracks fitted M2 amplitude fields of 2.3 mm/s with no word that a 12.4 h
    constituent cannot be told from the steady flow in 2 min (Rayleigh criterion against frequency 0; the M2
    period 12.42 h, Doodson 1921, from memory).  Tracks of 5 d (geo scale) resolve it: no warning."""
    flow = synthetic.TaylorGreen(velocity_scale_m_s=5e-3, length_scale_m=0.2)
    short = tracks_from_frame(synthetic.simulate_drifters(flow, [[0.3, 0.3], [0.6, 0.5]], duration_s=120.0,
                                                          fix_interval_s=0.5, diffusivity_m2_s=1e-5,
                                                          position_error_m=5e-4, seed=1))
    with pytest.warns(TemporalWarning, match=r"^tides M2: the tracks span 2 min, less than the M2 period 12.4 h, so "
                                             r"M2 cannot be told from the steady flow"):
        _warn_unresolved_tides(short, ("M2",))
    long = dataclasses.replace(short, time_s=short.time_s * 3600.0)      # the same fixes 5 d apart in all
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _warn_unresolved_tides(long, ("M2",))


def test_score_log_score_names_its_area_unit(tank_model, run_cli, tmp_path):
    """At tank scale the log score is a log density per m² of sharp (mm) forecasts: positive and large (here about
    +6 nats), so the table must say per what area it is (before: 'mean Gaussian log density, nats').  Scale: a 2-D
    Gaussian of s.d. σ per axis has peak density 1/(2πσ²) (standard normal density, from memory): ln ≈ 7.4 at
    σ = 10 mm, ≈ −3.7 at σ = 1 m, so forecasts a few mm to cm wide score between 0 and 15 nats."""
    flow = synthetic.TaylorGreen(velocity_scale_m_s=5e-3, length_scale_m=0.2)
    holdout = synthetic.simulate_drifters(flow, [[0.3, 0.3], [0.6, 0.5]], duration_s=30.0, fix_interval_s=0.5,
                                          diffusivity_m2_s=1e-5, position_error_m=5e-4, seed=4)
    holdout.to_csv(tmp_path / "holdout.csv", index=False)
    code, out, err = run_cli("score", tank_model, tmp_path / "holdout.csv", "--horizons", "5s", "--max-starts", "8",
                             "--quiet")
    assert code == 0, err
    assert "log score: mean Gaussian log density of the observed position per m², nats" in out, out
    row = next(line for line in out.splitlines() if line.strip().startswith("5 s"))
    assert 0.0 < float(row.split()[-1]) < 15.0, row      # mm-sharp densities per m²: positive log densities


def test_forecast_beyond_the_slow_parts_data_warns():
    """A model with a slow part of time scale 24 h fitted to 5 d of tracks, forecast 23 d after the last fix (a
    lon/lat spread from 2024-07-01): before, no word that the slow part there is the prior's.  Inside the span,
    or less than one time scale beyond it (the default start at the last fix with a 12 h horizon), no warning."""
    kernel = types.SimpleNamespace(has_slow=True, log_slow_time_scale_s=np.log(86400.0))
    field = types.SimpleNamespace(params=types.SimpleNamespace(kernel=kernel),
                                  data_summary={"time_span_s": [0.0, 5 * 86400.0]})
    with pytest.warns(SupportWarning, match=r"^the forecast reaches 23 d after the data's last fix, more than the slow "
                                            r"part's time scale 24 h"):
        warn_beyond_time_span(field, 27 * 86400.0, 28 * 86400.0)
    with pytest.warns(SupportWarning, match=r"^the forecast reaches 2 d before the data's first fix"):
        warn_beyond_time_span(field, -2 * 86400.0, 86400.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warn_beyond_time_span(field, 5 * 86400.0, 5.5 * 86400.0)
        warn_beyond_time_span(field, 86400.0, 3 * 86400.0)
        steady = types.SimpleNamespace(params=types.SimpleNamespace(kernel=types.SimpleNamespace(has_slow=False)),
                                       data_summary=field.data_summary)
        warn_beyond_time_span(steady, 27 * 86400.0, 28 * 86400.0)


def test_fit_text_says_when_a_calibrated_value_sits_on_its_bound():
    """τ calibrated to 30 d on 2 min of tank tracks was printed like an estimate: the search had stopped at the
    upper edge of its data-derived range (calibrate.at_bound).  The fit text now says it is a bound."""
    report = {"kernel": "helmholtz", "n_observations": 240, "n_tracks": 2, "n_inducing": 16, "elbo": 1.0,
              "elbo_per_observation": 0.004, "steps": 40, "converged": True, "hyperparameters": {},
              "position_error_m": 5e-4, "position_error_source": "given", "decorrelation_time_s": 30 * 86400.0,
              "decorrelation_time_source": "calibrated", "likelihood_reason": "velocities", "model": "m.npz",
              "calibration": {"at_bound": {"diffusivity_m2_s": False, "decorrelation_time_s": True}}}
    text = format_fit(report)
    assert "decorrelation time τ = 30 d (calibrated)" in text
    assert "  calibration: τ ended on the edge of the range the data's scales allow" in text
    report["calibration"]["at_bound"] = {"diffusivity_m2_s": True, "decorrelation_time_s": True}
    assert "  calibration: K and τ ended on the edge" in format_fit(report)
    report["calibration"] = {"skipped": "time-varying model"}
    assert "ended on the edge" not in format_fit(report)
