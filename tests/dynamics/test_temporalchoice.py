"""``--temporal auto|steady``: fit steady, test the residuals along the tracks, refit with the tide they hold.

Truth: a divergence-free Gaussian gyre (R = 20 km, peak speed 0.3 m/s) whose strength follows a + b cos ω t,
a = 0.5, b = −1, ω the M2 frequency, simulated by driftwise.data.synthetic (the same flow family as
tests/gp/test_temporal_fit.py, made wide so that the tidal excursion, 0.3 m/s × 12.42 h / π ≈ 4 km, is small
beside the gyre, as for coastal tides; a drifter then sees the M2 period itself).  Steady data: the same gyre at
constant strength.  Outside references: constituent periods M2 12.4206012 h, S2 12 h, N2 12.65834751 h,
K1 23.93447213 h, O1 25.81933871 h (Doodson 1921 / common practice, from memory); inertial period
2π / (2Ω sin φ) = 16.92 h at 45° with Ω = 7.2921159e-5 rad/s; Rayleigh criterion T ≥ 1/|f₁ − f₂| (common
practice, from memory): M2–S2 14.77 d, K1–O1 13.66 d, M2–N2 27.55 d; the F distribution's upper quantile from
scipy.stats.f.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

import driftwise
from driftwise.app.cli import main
from driftwise.data.frame import frame_for
from driftwise.data.synthetic import GaussianGyre, PulsingGyre, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics.temporalchoice import (
    PRINCIPAL_ORDER,
    TemporalWarning,
    candidate_periods_s,
    fit_temporal,
)
from driftwise.errors import InputError
from driftwise.gp.constituents import TIDAL_PERIODS_H
from driftwise.gp.schedule import Schedule

HOUR_S, DAY_S = 3600.0, 86400.0
M2_S = 12.4206012 * HOUR_S
OMEGA_M2 = 2.0 * math.pi / M2_S
T_START = 1.7e9


def _table(tidal: bool, seed: int = 1):
    gyre = GaussianGyre(0.3, 20000.0)
    flow = PulsingGyre(gyre, 0.5, -1.0, OMEGA_M2) if tidal else gyre
    starts = np.random.default_rng(seed).uniform(-25000.0, 25000.0, (8, 2))
    return simulate_drifters(flow, starts, duration_s=48 * HOUR_S, fix_interval_s=HOUR_S, diffusivity_m2_s=0.5,
                             position_error_m=3.0, seed=seed + 1, start_times_s=T_START)


def test_candidates_are_the_published_periods_thinned_by_resolution():
    assert set(PRINCIPAL_ORDER) == set(TIDAL_PERIODS_H)
    every = candidate_periods_s(None)
    expected_h = {"M2": 12.4206012, "K1": 23.93447213, "S2": 12.0, "O1": 25.81933871, "N2": 12.65834751}
    assert list(every) == list(expected_h)
    np.testing.assert_allclose([every[k] for k in expected_h], [v * HOUR_S for v in expected_h.values()], rtol=1e-12)
    # two-day tracks separate M2 from K1 only (Rayleigh: S2 needs 14.77 d, O1 13.66 d, N2 27.55 d)
    assert list(candidate_periods_s(None, 2 * DAY_S)) == ["M2", "K1"]
    assert list(candidate_periods_s(None, 14.0 * DAY_S)) == ["M2", "K1", "O1"]     # 14 d ≥ 13.66 d, < 14.77 d
    assert list(candidate_periods_s(None, 15.0 * DAY_S)) == ["M2", "K1", "S2", "O1"]
    # lon/lat tracks at 45° add the inertial period 2π / (2Ω sin 45°) = 16.92 h
    frame, _ = frame_for(np.array([10.0, 10.1]), np.array([45.0, 45.0]), source="test")
    inertial = candidate_periods_s(frame)["inertial"]
    assert inertial == pytest.approx(2 * math.pi / (2 * 7.2921159e-5 * math.sin(math.radians(45.0))), rel=1e-3)
    assert inertial / HOUR_S == pytest.approx(16.92, abs=0.01)


def test_steady_data_keep_the_steady_model():
    tracks = tracks_from_frame(_table(tidal=False))
    field, choice, decision = fit_temporal(tracks, "helmholtz", inducing=12, position_error_m=3.0, quiet=True,
                                           likelihood="velocities", schedule=Schedule(steps=120))
    assert decision.mode == "auto" and decision.components == ["steady"] and decision.warning is None
    assert not field.is_time_varying and choice is not None
    tested = [c for c in decision.evidence.components if c.status == "tested"]
    assert {c.name for c in tested} == {"M2", "K1", "slow"}
    assert all(not c.significant and c.p_adjusted >= 0.01 for c in tested)
    assert field.fit_info["temporal_choice"]["components"] == ["steady"]
    assert "no time structure" in decision.reason


def test_steady_with_given_tides_is_refused_before_fitting():
    tracks = tracks_from_frame(_table(tidal=False))
    with pytest.raises(InputError, match="--temporal steady contradicts"):
        fit_temporal(tracks, "helmholtz", temporal="steady", tides=("M2",))
    with pytest.raises(InputError, match="temporal: use one of auto, steady"):
        fit_temporal(tracks, "helmholtz", temporal="tidal")


def _run(argv, capsys):
    code = main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


def test_tidal_data_choose_m2_and_the_json_says_why(tmp_path, capsys):
    csv, out = tmp_path / "tidal.csv", tmp_path / "model.npz"
    _table(tidal=True).to_csv(csv, index=False)
    code, stdout, _ = _run(["fit", str(csv), "--out", str(out), "--inducing", "12", "--position-error", "3m",
                            "--json"], capsys)
    assert code == 0
    report = json.loads(stdout)
    temporal = report["temporal"]
    assert temporal["mode"] == "auto" and temporal["components"] == ["steady", "M2"]
    np.testing.assert_allclose(temporal["periods_s"]["M2"], M2_S, rtol=1e-12)
    scales = temporal["constituents"]["M2"]["hyperparameters"]
    assert all(v > 0 for v in scales.values()) and any(k.endswith("length_scale_m") for k in scales)
    evidence = temporal["evidence"]
    m2 = evidence["components"]["M2"]
    assert evidence["alpha"] == 0.01 and m2["significant"] and m2["p_adjusted"] < evidence["alpha"]
    # its p-value is the F(df1, df2) upper tail at its F (scipy.stats.f), Bonferroni over the 3 tests (M2, K1, slow)
    assert m2["p_value"] == pytest.approx(stats.f.sf(m2["f_statistic"], m2["df_numerator"], m2["df_denominator"]),
                                          rel=1e-6)
    assert m2["p_adjusted"] == pytest.approx(3 * m2["p_value"], rel=1e-12)
    assert m2["f_statistic"] > stats.f.isf(0.01 / 3, m2["df_numerator"], m2["df_denominator"])
    assert m2["variance_explained_fraction"] > 0.5          # the tide is most of the steady fit's misfit
    assert not evidence["components"]["K1"]["significant"] and not evidence["components"]["slow"]["significant"]
    assert "M2" in temporal["reason"] and "S2" in temporal["reason"]     # S2, N2 stood for by M2 in 2-day tracks
    assert report["likelihood"] == "velocities" and "skipped" in report["calibration"]
    field = driftwise.load(out)
    assert field.is_time_varying and list(field.constituents) == ["M2"]
    assert field.fit_info["temporal_choice"]["components"] == ["steady", "M2"]
    assert not (tmp_path / "model.ckpt.temporal.npz").exists() and not (tmp_path / "model.ckpt.npz").exists()


def test_forced_steady_on_tidal_data_warns_naming_m2(tmp_path, capsys):
    csv, out = tmp_path / "tidal.csv", tmp_path / "steady.npz"
    _table(tidal=True).to_csv(csv, index=False)
    with pytest.warns(TemporalWarning) as caught:     # the command line prints it as "driftwise: warning: ..."
        code, stdout, _ = _run(["fit", str(csv), "--out", str(out), "--inducing", "12", "--position-error", "3m",
                                "--temporal", "steady", "--no-calibrate"], capsys)
    assert code == 0
    assert len(caught) == 1
    message = str(caught[0].message)
    assert "\n" not in message and "12.4 h periodicity (M2)" in message and "--tides M2" in message
    assert "temporal (steady): steady; steady asked for" in stdout
    field = driftwise.load(out)
    assert not field.is_time_varying and field.fit_info["temporal_choice"]["warning"] == message
