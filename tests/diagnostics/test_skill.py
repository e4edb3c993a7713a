"""Forecast scores on hand-computable cases (skill.py).

References: Liu, Y. & Weisberg, R. H. (2011), Evaluation of trajectory modeling in different
dynamic regions using normalized cumulative Lagrangian separation, J. Geophys. Res. 116,
C09013 — eq. 4: s = Σ_{i=1}^{N} d_i / Σ_{i=1}^{N} l_oi; eq. 5: ss = 1 − s/n if s ≤ n, else 0.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.stats import multivariate_normal

from driftwise.diagnostics import skill


def _tracks(rows):
    """A minimal track table: rows of (track id, time s, x m, y m), sorted by track then time."""
    ids = np.array([r[0] for r in rows], dtype=object)
    return SimpleNamespace(track_id=ids, time_s=np.array([r[1] for r in rows], float),
                           position_m=np.array([[r[2], r[3]] for r in rows], float), source="test")


# ------------------------------------------------------------------ Liu–Weisberg
def test_forecast_equal_to_observation_scores_one():
    # Liu & Weisberg (2011) eq. 4–5: d_i = 0 for all i gives s = 0 and ss = 1.
    length = np.array([400.0, 900.0, 1500.0])
    assert skill.liu_weisberg_skill(np.zeros(3), length) == pytest.approx(1.0, abs=1e-15)


def test_separation_equal_to_track_length_scores_zero():
    # Σ d_i = Σ l_oi gives s = 1 = n, so ss = 1 − 1/1 = 0 (Liu & Weisberg 2011, eq. 5);
    # s > n is clipped to 0 as well.
    length = np.array([400.0, 900.0, 1500.0])
    assert skill.liu_weisberg_skill(np.array([100.0, 1200.0, 1500.0]), length) == pytest.approx(0.0, abs=1e-15)
    assert skill.liu_weisberg_skill(3.0 * length, length) == pytest.approx(0.0, abs=1e-15)


def test_worked_example():
    # Liu & Weisberg (2011) definitions, arithmetic written out:
    # observed cumulative lengths l_o1..l_o3 = 1000, 2000, 3000 m  → Σ l_oi = 6000 m
    # separations             d_1..d_3   =  100,  300,  500 m  → Σ d_i  =  900 m
    # s = 900 / 6000 = 0.15;  ss = 1 − 0.15 / 1 = 0.85
    # with tolerance n = 0.1: s = 0.15 > n, so ss = 0.
    d = np.array([100.0, 300.0, 500.0])
    length = np.array([1000.0, 2000.0, 3000.0])
    assert skill.liu_weisberg_skill(d, length) == pytest.approx(0.85, abs=1e-14)
    assert skill.liu_weisberg_skill(d, length, tolerance=0.1) == pytest.approx(0.0, abs=1e-15)
    # cumulative form: after t_1 s = 0.1 (ss 0.9), after t_2 s = 400/3000 (ss 0.8667), after t_3 0.85
    cum = skill.cumulative_liu_weisberg(d[None], length[None])[0]
    np.testing.assert_allclose(cum, [0.9, 1 - 400 / 3000, 0.85], rtol=0, atol=1e-14)


def test_no_observed_motion_is_undefined():
    assert np.isnan(skill.liu_weisberg_skill(np.ones(2), np.zeros(2)))


# ------------------------------------------------------------------ Gaussian scores
def test_gaussian_log_density_matches_scipy():
    # reference: scipy.stats.multivariate_normal.logpdf
    rng = np.random.default_rng(0)
    a = rng.normal(size=(5, 2, 2))
    cov = a @ np.swapaxes(a, 1, 2) + 0.5 * np.eye(2)
    mean, x = rng.normal(size=(5, 2)), rng.normal(size=(5, 2))
    maha2, logp = skill.gaussian_scores(mean, cov, x)
    ref = [multivariate_normal(mean[i], cov[i]).logpdf(x[i]) for i in range(5)]
    np.testing.assert_allclose(logp, ref, rtol=1e-12, atol=1e-12)
    ref_m = [(x[i] - mean[i]) @ np.linalg.solve(cov[i], x[i] - mean[i]) for i in range(5)]
    np.testing.assert_allclose(maha2, ref_m, rtol=1e-12, atol=1e-12)


def test_coverage_threshold_and_monte_carlo():
    # In 2-D the χ² quantile is closed form: χ²_2(p) = −2 ln(1 − p) (exponential law of |z|²).
    from scipy.stats import chi2

    assert chi2.ppf(0.95, 2) == pytest.approx(-2 * np.log(0.05), rel=1e-12)
    rng = np.random.default_rng(1)
    n = 20000
    cov = np.array([[4.0, 1.5], [1.5, 1.0]])
    x = rng.multivariate_normal([3.0, -1.0], cov, size=n)
    maha2, _ = skill.gaussian_scores(np.tile([3.0, -1.0], (n, 1)), np.tile(cov, (n, 1, 1)), x)
    for level in (0.5, 0.95):
        se = np.sqrt(level * (1 - level) / n)  # binomial standard error
        assert skill.coverage(maha2, level, 2) == pytest.approx(level, abs=4 * se)


# ------------------------------------------------------------------ windows and baselines
def _kinked_track():
    # one track: east at 0.1 m/s for 2 h, then north at 0.1 m/s; fixes hourly
    rows = [("a", 0.0, 0.0, 0.0), ("a", 3600.0, 360.0, 0.0), ("a", 7200.0, 720.0, 0.0),
            ("a", 10800.0, 720.0, 360.0), ("a", 14400.0, 720.0, 720.0)]
    return _tracks(rows)


def test_windows_interpolate_and_measure_length():
    win = skill.forecast_windows(_kinked_track(), [3600.0, 7200.0], step_s=1800.0)
    np.testing.assert_allclose(win.times_s, [1800.0, 3600.0, 5400.0, 7200.0], rtol=0, atol=1e-9)
    # starts: fixes 1 (t=3600) and 2 (t=7200) reach the 1 h horizon; fix 3 (t=10800) too
    np.testing.assert_allclose(win.start_m, [[360, 0], [720, 0], [720, 360]], rtol=0, atol=1e-12)
    # from fix 1: at +1.5 h the track is half way up the northward leg after the corner
    np.testing.assert_allclose(win.observed_m[0, 2], [720.0, 180.0], rtol=0, atol=1e-9)
    np.testing.assert_allclose(win.length_m[0], [180.0, 360.0, 540.0, 720.0], rtol=0, atol=1e-9)
    assert win.valid[2].tolist() == [True, True, False, False]
    np.testing.assert_allclose(win.obs_var_factor[0], [0.5, 1.0, 0.5, 1.0], rtol=0, atol=1e-12)
    np.testing.assert_allclose(win.previous_velocity_m_s[2], [0.0, 0.1], rtol=0, atol=1e-12)


def test_baselines_on_hand_track():
    win = skill.forecast_windows(_kinked_track(), [7200.0], step_s=3600.0)
    pers = skill.persistence_forecast(win)
    # from fix 1 persistence keeps going east: at +2 h it is at (1080, 0); the truth is (720, 360)
    np.testing.assert_allclose(pers[0, 1], [1080.0, 0.0], rtol=0, atol=1e-9)
    scores = skill.baseline_scores(win, [7200.0], None)
    # pairs reaching +2 h: starts 1 and 2.  persistence separations: start 1: |(1080,0)−(720,360)| = 509.1;
    # start 2: from (720,0) moving east (v = 0.1, 0) → (1440, 0) vs (720, 720): 1018.2
    p = scores["persistence"]
    assert p["n_pairs"] == [2]
    assert p["separation_m"][0] == pytest.approx((360 * np.sqrt(2) + 720 * np.sqrt(2)) / 2, rel=1e-12)
    # LW for start 1: d = (|(720,0)−(720,0)|, 509.1) at +1 h, +2 h; l = 360, 720 → ss = 1 − 509.1/1080
    # start 2: d = (|(1080,0)−(720,360)|, 1018.2) = (509.1, 1018.2), l = (360, 720) → s = 1527.4/1080 > 1 → 0
    assert p["skill"][0] == pytest.approx(((1 - 360 * np.sqrt(2) / 1080) + 0.0) / 2, rel=1e-12)
    assert np.isnan(p["coverage_95"][0]) and np.isnan(p["log_score"][0])
    # no motion from start 1: d = (360, 509.1), l = (360, 720): s = 869.1/1080 → ss = 0.1953;
    # from start 2: d = (360, 720), l = (360, 720): s = 1080/1080 = 1 → ss = 0
    n = scores["no_motion"]
    s1 = (360 + 360 * np.sqrt(2)) / 1080
    assert n["skill"][0] == pytest.approx(((1 - s1) + 0.0) / 2, rel=1e-12)


def test_short_tracks_are_a_clear_error():
    from driftwise.errors import InputError

    with pytest.raises(InputError, match="long enough"):
        skill.forecast_windows(_kinked_track(), [10 * 86400.0])


def test_baseline_variance_from_fit_tracks():
    # a track moving at constant velocity: persistence is exact (variance 0), no motion errs by v h
    rows = [("b", 3600.0 * k, 100.0 * k, 50.0 * k) for k in range(10)]
    var = skill.baseline_error_variance_m2(_tracks(rows), [3600.0, 7200.0])
    np.testing.assert_allclose(var["persistence"], [0.0, 0.0], rtol=0, atol=1e-18)
    np.testing.assert_allclose(var["no_motion"], [(100**2 + 50**2) / 2, 4 * (100**2 + 50**2) / 2], rtol=1e-12, atol=0)


# ------------------------------------------------------------------ coverage precision
def test_clustered_coverage_se_equal_clusters_is_se_of_cluster_means():
    # For equal cluster sizes the ratio-estimator variance (Cochran 1977, Sampling Techniques,
    # ch. 6, from memory) reduces to the textbook s²/T of the T per-cluster fractions (numpy).
    rng = np.random.default_rng(3)
    inside = rng.uniform(size=(7, 12)) < rng.uniform(0.5, 1.0, (7, 1))
    cluster = np.repeat(np.arange(7), 12)
    expected = np.std(inside.mean(axis=1), ddof=1) / np.sqrt(7)
    assert skill.clustered_coverage_se(inside.ravel(), cluster) == pytest.approx(expected, rel=1e-12)


def test_clustered_coverage_se_unequal_clusters_by_hand():
    # Clusters (n, h) = (2, 2), (4, 1): p = 3/6 = 0.5; residuals h − p n = 1, −1;
    # variance = 2/1 · (1 + 1) / 6² = 4/36, so SE = 1/3 (arithmetic written out).
    inside = np.array([1, 1, 1, 0, 0, 0], bool)
    cluster = np.array(["a", "a", "b", "b", "b", "b"])
    assert skill.clustered_coverage_se(inside, cluster) == pytest.approx(1.0 / 3.0, rel=1e-12)
    assert np.isnan(skill.clustered_coverage_se(inside, np.zeros(6)))  # one track: undefined
