"""Time structure in residuals: harmonic regression along tracks, its F-tests, the auto choice of components.

Outside references: numpy.linalg.lstsq and scipy.signal.lombscargle (floating-mean generalised Lomb–Scargle,
Zechmeister & Kürster 2009) on the same irregular times; the binomial standard error √(α(1 − α)/N) of a
false-positive rate over N independent seeds; Rayleigh criterion T ≥ 1/|f₁ − f₂| (common practice in tidal
analysis; from memory) for M2/S2: 1/(1/12 h − 1/12.4206012 h) = 14.77 d; constituent periods as in issue 14
(Doodson 1921 / common practice).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.signal import lombscargle

from driftwise.data.residualspectrum import (
    SLOW,
    detect_time_structure,
    harmonic_coefficients,
    residual_periodogram,
    steady_warning,
    typical_span_s,
)
from driftwise.errors import InputError

HOUR_S = 3600.0
DAY_S = 86400.0
M2_S = 12.4206012 * HOUR_S
PERIODS_S = {"M2": M2_S, "S2": 12.0 * HOUR_S, "N2": 12.65834751 * HOUR_S, "K1": 23.93447213 * HOUR_S,
             "O1": 25.81933871 * HOUR_S}
NOISE_M_S = 0.05      # residual velocity noise per component: turbulence sqrt(2K/Δt) with K ≈ 5 m²/s, Δt = 1 h


def _tracks(seed: int, *, tide_m_s: float = 0.0, trend_m_s_per_day: float = 0.0, n_tracks: int = 20,
            days: float = 3.0, periods_s: tuple[float, ...] = (M2_S,), noise_m_s: float = NOISE_M_S):
    """Irregularly sampled tracks (40–80 fixes over ``days``, random start) with white noise, a rotating
    tidal residual of amplitude about ``tide_m_s`` per component at each period, random phase per track, and a
    linear trend."""
    rng = np.random.default_rng(seed)
    residual, time, track = [], [], []
    for j in range(n_tracks):
        n = int(rng.integers(40, 80) * days / 3.0)
        start = rng.uniform(0.0, DAY_S)
        t = np.sort(start + rng.uniform(0.0, days * DAY_S, n))
        r = rng.normal(0.0, noise_m_s, (n, 2)) + trend_m_s_per_day * ((t - start) / DAY_S)[:, None]
        for period in periods_s:
            omega, phase = 2 * np.pi / period, rng.uniform(0.0, 2 * np.pi, 2)
            amp = tide_m_s * rng.uniform(0.5, 1.5)
            r += amp * np.stack([np.cos(omega * t + phase[0]), np.sin(omega * t + phase[1])], axis=1)
        residual.append(r)
        time.append(t)
        track.append(np.full(n, f"drifter-{j}"))
    return np.vstack(residual), np.concatenate(time), np.concatenate(track)


def _unequal_noise_tracks(seed: int, tide_m_s: float):
    """As ``_tracks``, with noise s.d. 0.02 or 0.10 m/s per fix at random; returns the weights 1/σ² too."""
    residual, time, track = _tracks(seed, tide_m_s=tide_m_s, noise_m_s=0.0)
    rng = np.random.default_rng(seed + 1_000_000)
    sd = np.where(rng.random(time.size) < 0.5, 0.02, 0.10)
    return residual + sd[:, None] * rng.standard_normal(residual.shape), time, track, 1.0 / sd**2


def _ou_noise_tracks(seed: int, *, time_scale_s: float, tide_m_s: float = 0.0, white_m_s: float = 0.0):
    """As ``_tracks`` with Ornstein–Uhlenbeck noise (s.d. 0.05 m/s, correlation exp(−Δt/τ)) plus white noise,
    sampled exactly on the irregular times by x_i = a x_{i−1} + √(1 − a²) ξ_i, a = exp(−Δt/τ) (Gillespie 1996,
    "Exact numerical simulation of the Ornstein–Uhlenbeck process and its integral", Phys. Rev. E 54:2084)."""
    residual, time, track = _tracks(seed, tide_m_s=tide_m_s, noise_m_s=white_m_s)
    rng = np.random.default_rng(seed + 2_000_000)
    noise = np.empty_like(residual)
    for name in np.unique(track):
        idx = np.flatnonzero(track == name)
        x = rng.normal(0.0, NOISE_M_S, 2)
        for m, i in enumerate(idx):
            if m:
                a = math.exp(-(time[i] - time[idx[m - 1]]) / time_scale_s)
                x = a * x + math.sqrt(1.0 - a * a) * rng.normal(0.0, NOISE_M_S, 2)
            noise[i] = x
    return residual + noise, time, track


def test_one_sinusoid_amplitude_and_phase_match_lstsq_and_lombscargle():
    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0.0, 5 * DAY_S, 300))
    omega = 2 * np.pi / M2_S
    a_true, b_true = 0.10, 0.05
    y = 0.3 + a_true * np.cos(omega * t) + b_true * np.sin(omega * t) + rng.normal(0.0, 0.02, t.size)
    ids, mu, a, b = harmonic_coefficients(y[:, None], t, np.zeros(t.size), M2_S)
    assert ids.shape == (1,) and a.shape == (1, 1)
    # numpy.linalg.lstsq on the same design [1, cos ωt, sin ωt]
    design = np.stack([np.ones_like(t), np.cos(omega * t), np.sin(omega * t)], axis=1)
    ref = np.linalg.lstsq(design, y, rcond=None)[0]
    np.testing.assert_allclose([mu[0, 0], a[0, 0], b[0, 0]], ref, rtol=1e-10, atol=1e-14)
    # scipy.signal.lombscargle, floating mean, normalize="amplitude": the complex amplitude a + i b
    z = complex(np.ravel(lombscargle(t, y, np.array([omega]), floating_mean=True, normalize="amplitude"))[0])
    np.testing.assert_allclose([a[0, 0], b[0, 0]], [z.real, z.imag], rtol=1e-8, atol=1e-12)
    # amplitude and phase against the truth, within 4 standard errors σ √(2/n) of a least-squares harmonic
    se = 0.02 * math.sqrt(2.0 / t.size)
    assert abs(math.hypot(a[0, 0], b[0, 0]) - math.hypot(a_true, b_true)) < 4 * se
    assert abs(math.atan2(b[0, 0], a[0, 0]) - math.atan2(b_true, a_true)) < 4 * se / math.hypot(a_true, b_true)


def test_periodogram_is_scipy_power_pooled_over_tracks():
    """scipy's unnormalised floating-mean power is half the reduction in the sum of squares (Lomb 1976:
    P = ½ × the fitted sinusoid's sum of squares); pooled over tracks, the reductions add."""
    residual, time, track = _tracks(5, tide_m_s=0.03, n_tracks=3)
    periods = np.array([8.0, 12.0, M2_S / HOUR_S, 24.0, 30.0]) * HOUR_S
    gram = residual_periodogram(residual, time, track, periods)
    ours = gram.variance_m2_s2
    ref = np.zeros(periods.size)
    for name in np.unique(track):
        sel = track == name
        for k in range(2):
            ref += 2.0 * lombscargle(time[sel], residual[sel, k], 2 * np.pi / periods, floating_mean=True)
    np.testing.assert_allclose(ours * time.size, ref, rtol=1e-8)
    assert np.argmax(ours) == 2
    # M2 above its 1 % threshold (and 12 h, which 3-day tracks cannot tell from M2); 8 h, 24 h, 30 h below
    assert np.all(ours[[0, 3, 4]] < gram.threshold_m2_s2[[0, 3, 4]]) and ours[2] > gram.threshold_m2_s2[2]
    json.dumps(gram.to_dict(), allow_nan=False)


def test_periodogram_threshold_holds_its_level():
    """White noise exceeds the one-period 5 % threshold in 5 % of 400 seeds, within 3 binomial s.e. (0.033)."""
    alpha, trials = 0.05, 400
    hits = 0
    for s in range(trials):
        gram = residual_periodogram(*_tracks(300 + s, n_tracks=5), [M2_S], alpha=alpha)
        hits += bool(gram.variance_m2_s2[0] > gram.threshold_m2_s2[0])
    assert abs(hits / trials - alpha) <= 3 * math.sqrt(alpha * (1 - alpha) / trials), hits


@pytest.mark.slow
def test_white_residuals_rarely_choose_a_component():
    """False-positive rate over 200 seeds at α = 0.01 must stay within α + 3 binomial s.e. = 0.031
    (measured 2026-12-03: 0 of 200; with the noise taken as white, 2 of 200)."""
    trials, alpha = 200, 0.01
    false = sum(bool(detect_time_structure(*_tracks(100 + s), PERIODS_S, alpha=alpha).chosen)
                for s in range(trials))
    bound = alpha + 3 * math.sqrt(alpha * (1 - alpha) / trials)   # binomial standard error
    assert false / trials <= bound, f"{false} of {trials} white-noise seeds chose a component"


@pytest.mark.slow
def test_m2_at_drifter_noise_is_detected():
    """M2 amplitude 0.03 m/s per component (×0.5–1.5 per track) under 0.05 m/s noise, 20 three-day tracks:
    M2 chosen in at least 95 of 100 seeds, and never more than one of the unseparable M2, S2, N2 (where noise
    makes S2 or N2 explain more, that one stands for the semidiurnal band and M2 is reported ambiguous)."""
    found, band, several = 0, 0, 0
    for s in range(100):
        evidence = detect_time_structure(*_tracks(1000 + s, tide_m_s=0.03), PERIODS_S)
        found += "M2" in evidence.chosen
        band += bool({"M2", "S2", "N2"} & set(evidence.chosen))
        several += len({"M2", "S2", "N2"} & set(evidence.chosen)) > 1
    assert found >= 95, f"M2 detected in {found} of 100 seeds"      # measured: 96
    assert band >= 99, f"semidiurnal band detected in {band} of 100 seeds"    # measured: 100
    assert several == 0


def test_weights_scaled_to_mean_one_and_weighted_lstsq():
    residual, time, track = _tracks(21, tide_m_s=0.03, n_tracks=4)
    plain_fit = detect_time_structure(residual, time, track, PERIODS_S)
    same = detect_time_structure(residual, time, track, PERIODS_S, weights=np.full(time.size, 7.0))
    assert same.to_dict() == plain_fit.to_dict()            # constant weights change nothing (scaled to mean 1)
    w = np.random.default_rng(0).uniform(0.2, 5.0, time.size)
    ids, mu, a, b = harmonic_coefficients(residual, time, track, M2_S, weights=w)
    sel = track == ids[1]
    omega = 2 * np.pi / M2_S
    design = np.stack([np.ones(sel.sum()), np.cos(omega * time[sel]), np.sin(omega * time[sel])], axis=1)
    root = np.sqrt(w[sel])[:, None]
    ref = np.linalg.lstsq(design * root, residual[sel] * root, rcond=None)[0]     # weighted least squares
    np.testing.assert_allclose(np.stack([mu[1], a[1], b[1]]), ref, rtol=1e-10, atol=1e-14)


@pytest.mark.slow
def test_weighted_tests_hold_their_level_under_unequal_noise():
    """Noise s.d. 0.02 or 0.10 m/s per fix (as short and long Δt give), weights 1/σ²: false-positive rate over 200
    seeds within α + 3 binomial s.e.; and an M2 of 0.02 m/s is found in at least 95 of 100 seeds."""
    false = 0
    for s in range(200):
        residual, time, track, weights = _unequal_noise_tracks(3000 + s, 0.0)
        false += bool(detect_time_structure(residual, time, track, PERIODS_S, weights=weights).chosen)
    found = 0
    for s in range(100):
        residual, time, track, weights = _unequal_noise_tracks(4000 + s, 0.02)
        found += "M2" in detect_time_structure(residual, time, track, PERIODS_S, weights=weights).chosen
    assert found >= 95, found
    assert false / 200 <= 0.01 + 3 * math.sqrt(0.01 * 0.99 / 200), false


def test_correlated_noise_needs_its_time_scale():
    """Ornstein–Uhlenbeck residual noise with τ = 6 h (a drifter's Lagrangian time): taken as white it fakes
    components in most seeds; with the noise model estimated (REML) τ is recovered within one grid step
    (factor 1.58) and no component is chosen."""
    faked, estimated = 0, []
    for s in range(6):
        data = _ou_noise_tracks(5000 + s, time_scale_s=6 * HOUR_S)
        faked += bool(detect_time_structure(*data, PERIODS_S, noise_time_scale_s=None).chosen)
        evidence = detect_time_structure(*data, PERIODS_S)
        assert evidence.chosen == (), evidence.to_dict()
        estimated.append(evidence.noise_time_scale_s)
    assert faked >= 5
    assert np.all(np.abs(np.log(np.array(estimated) / (6 * HOUR_S))) < math.log(1.58)), estimated


@pytest.mark.slow
def test_correlated_plus_white_noise_rarely_chooses_a_component():
    """OU (τ = 6 h) plus white noise of equal variance: false-positive rate over 60 seeds within α + 3 binomial
    s.e. = 0.049; an M2 of 0.05 m/s per component on top is still found in at least 9 of 10 seeds."""
    false = sum(bool(detect_time_structure(*_ou_noise_tracks(6000 + s, time_scale_s=6 * HOUR_S, white_m_s=0.05),
                                           PERIODS_S).chosen) for s in range(60))
    assert false / 60 <= 0.01 + 3 * math.sqrt(0.01 * 0.99 / 60), false       # measured: 0 of 60
    found = sum("M2" in detect_time_structure(*_ou_noise_tracks(7000 + s, time_scale_s=6 * HOUR_S, white_m_s=0.05,
                                                                tide_m_s=0.05), PERIODS_S).chosen for s in range(10))
    assert found >= 9, found


def test_steady_plus_trend_chooses_slow():
    for s in range(10):
        evidence = detect_time_structure(*_tracks(2000 + s, trend_m_s_per_day=0.03), PERIODS_S)
        assert evidence.chosen == (SLOW,), evidence.to_dict()
        assert evidence.component(SLOW).variance_fraction > 0.05


def test_three_day_record_cannot_separate_m2_from_s2():
    evidence = detect_time_structure(*_tracks(7, tide_m_s=0.05), PERIODS_S)
    assert evidence.chosen == ("M2",)
    s2 = evidence.component("S2")
    assert s2.status == "ambiguous" and not s2.significant
    # Rayleigh: 1/|1/12 h − 1/12.4206012 h| = 14.77 d, printed as "14.8 d"
    assert "M2" in s2.note and "14.8 d" in s2.note
    assert 2.5 * DAY_S < evidence.typical_span_s < 3.0 * DAY_S


def test_long_record_separates_m2_and_s2():
    """Twenty-day tracks exceed the 14.8 d Rayleigh limit: both constituents present, both chosen."""
    data = _tracks(8, tide_m_s=0.05, n_tracks=6, days=20.0, periods_s=(M2_S, 12.0 * HOUR_S))
    evidence = detect_time_structure(*data, PERIODS_S)
    assert set(evidence.chosen) == {"M2", "S2"}
    assert evidence.component("N2").status == "ambiguous"     # M2/N2 need 27.6 d


def test_period_longer_than_tracks_is_unresolved():
    residual, time, track = _tracks(9, tide_m_s=0.05, days=0.8)
    evidence = detect_time_structure(residual, time, track, {"M2": M2_S, "K1": PERIODS_S["K1"]})
    assert evidence.component("K1").status == "unresolved"
    assert "exceeds the typical track span" in evidence.component("K1").note
    assert evidence.n_tests == 2                  # M2 and slow; the unresolved K1 is not counted
    assert typical_span_s(time, track) == pytest.approx(evidence.typical_span_s)


def test_warning_names_period_share_and_option():
    evidence = detect_time_structure(*_tracks(11, tide_m_s=0.05), PERIODS_S)
    text = steady_warning(evidence)
    share = 100 * evidence.component("M2").variance_fraction
    assert "12.4 h" in text and "(M2)" in text and "--tides M2" in text and f"{share:.3g} %" in text
    assert steady_warning(detect_time_structure(*_tracks(100), PERIODS_S)) is None


def test_evidence_is_json_with_units_in_keys():
    evidence = detect_time_structure(*_tracks(12, tide_m_s=0.05), PERIODS_S)
    out = json.loads(json.dumps(evidence.to_dict(), allow_nan=False))
    assert out["chosen"] == ["M2"]
    m2 = out["components"]["M2"]
    assert m2["period_s"] == pytest.approx(M2_S) and m2["significant"] is True
    assert 0 < m2["variance_explained_m2_s2"] < out["residual_variance_m2_s2"]
    assert out["components"]["S2"]["p_value"] is None          # ambiguous: not tested
    assert out["correction"] == "Bonferroni over 6 tests"      # 5 constituents (2 ambiguous) + slow
    assert out["noise_time_scale_s"] >= 0 and 0 <= out["noise_nugget_fraction"] < 1


@pytest.mark.parametrize("bad, match", [
    ({"time_s": np.zeros(3)}, "must be"),
    ({"residual_m_s": np.full((5, 2), np.nan)}, "finite"),
    ({"periods_s": {"M2": -1.0}}, "period of M2"),
    ({"alpha": 1.5}, "alpha"),
])
def test_bad_input_is_refused_by_name(bad, match):
    args = {"residual_m_s": np.zeros((5, 2)), "time_s": np.arange(5.0), "track": np.zeros(5), "periods_s": {"M2": M2_S}}
    args.update(bad)
    with pytest.raises(InputError, match=match):
        detect_time_structure(args.pop("residual_m_s"), args.pop("time_s"), args.pop("track"),
                              args.pop("periods_s"), **args)
