"""Forecast skill against held-out tracks: separation, Liu–Weisberg skill, coverage, log score.

Every fix of a held-out track that has a fix before it is a possible *start*.  From each
start a forecast runs to a grid of lead times; the observed position at a lead time is the
held-out track interpolated linearly in time, used only where the track covers that time.

Scores per horizon h, over all (track, start) pairs whose track reaches t_start + h:

* separation d = |x_forecast − x_observed| (m): median and 90th percentile;
* Liu–Weisberg skill (Liu & Weisberg 2011, J. Geophys. Res. 116, C09013, eqs. 4–5):
  s = Σ_i d_i / Σ_i l_oi over the output times t_i ≤ h, where l_oi is the length of the
  observed track from the start to t_i, and ss = 1 − s/n if s ≤ n else 0, tolerance n = 1;
  the pair scores are averaged;
* coverage of the 50 % and 95 % ellipses: the fraction of observed points with Mahalanobis²
  (x_obs − m)ᵀ C⁻¹ (x_obs − m) ≤ χ²_d(level), C = forecast covariance + observation error;
* Gaussian log score: the mean of log N(x_obs | m, C) in nats (higher is better).

Baselines (same keys):

* persistence — the velocity from the two fixes before the start, carried forward;
* no motion — the particle stays at the start fix.

Deterministic baselines carry no spread of their own.  For coverage and log score they get
an isotropic Gaussian whose variance at each horizon is the baseline's mean squared error per
component measured on the *fit* tracks (``fit_tracks``), a climatological error bar that never
looks at the held-out data.  Without ``fit_tracks`` their coverage and log score are NaN
(undefined), and the result says so in ``notes``.
"""

from __future__ import annotations

import dataclasses
import warnings
from typing import Any

import numpy as np
from scipy.stats import chi2

from ..data.tracks import in_model_frame
from ..data.windows import Windows, forecast_windows
from ..dynamics.methods import make_method
from ..dynamics.moments import diverged, propagate_batch
from ..dynamics.sde import sde_from_field
from ..dynamics.stepcheck import moment_step_s
from ..dynamics.supportcheck import SUPPORT_VARIANCE_FRACTION, SupportWarning, path_support
from ..units import format_length
from ..errors import InputError

DEFAULT_HORIZONS_S = (6 * 3600.0, 12 * 3600.0, 24 * 3600.0)
COVERAGE_LEVELS = (0.50, 0.95)
SPREAD_KEYS = ("coverage_50", "coverage_95", "log_score", "coverage_50_se", "coverage_95_se")  # need a covariance
SCORE_KEYS = ("n_pairs", "separation_m", "separation_p90_m", "skill") + SPREAD_KEYS


# ------------------------------------------------------------------ scores on arrays
def liu_weisberg_skill(separation_m: np.ndarray, observed_length_m: np.ndarray, *,
                       tolerance: float = 1.0) -> np.ndarray:
    """Liu–Weisberg skill score ss over the last axis (Liu & Weisberg 2011, eqs. 4–5).

    ``separation_m`` (..., n) are the separations d_i at the output times, ``observed_length_m``
    (..., n) the cumulative observed track lengths l_oi from the start to those times (m).
    s = Σ d_i / Σ l_oi, ss = 1 − s/n for s ≤ n, else 0.  NaN where Σ l_oi = 0 (no motion
    observed: the index is undefined).  Returns (...,).
    """
    d = np.asarray(separation_m, dtype=float)
    length = np.asarray(observed_length_m, dtype=float)
    total = length.sum(axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = d.sum(axis=-1) / total
    ss = np.where(s <= tolerance, 1.0 - s / tolerance, 0.0)
    return np.where(total > 0, ss, np.nan)


def cumulative_liu_weisberg(separation_m: np.ndarray, observed_length_m: np.ndarray, *,
                            tolerance: float = 1.0) -> np.ndarray:
    """Skill at every output time k using the times 0..k: (R, T) → (R, T); NaN where undefined."""
    d = np.cumsum(np.nan_to_num(separation_m), axis=-1)
    length = np.cumsum(np.nan_to_num(observed_length_m), axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = d / length
    ss = np.where(s <= tolerance, 1.0 - s / tolerance, 0.0)
    return np.where(length > 0, ss, np.nan)


def gaussian_scores(mean_m: np.ndarray, cov_m2: np.ndarray, observed_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mahalanobis² and log density (nats) of observed points under N(mean, cov).

    ``mean_m`` (R, d), ``cov_m2`` (R, d, d), ``observed_m`` (R, d) → two arrays (R,).
    log N(x | m, C) = −½ [(x − m)ᵀ C⁻¹ (x − m) + log det(2π C)].
    """
    r = np.asarray(observed_m, float) - np.asarray(mean_m, float)
    chol = np.linalg.cholesky(np.asarray(cov_m2, float))
    z = np.linalg.solve(chol, r[..., None])[..., 0]
    maha2 = np.sum(z * z, axis=-1)
    half_logdet = np.sum(np.log(np.diagonal(chol, axis1=-2, axis2=-1)), axis=-1)
    d = r.shape[-1]
    log_density = -0.5 * maha2 - half_logdet - 0.5 * d * np.log(2.0 * np.pi)
    return maha2, log_density


def coverage(maha2: np.ndarray, level: float, dim: int) -> float:
    """Fraction of points inside the ``level`` ellipse: Mahalanobis² ≤ χ²_dim quantile."""
    inside = inside_ellipse(maha2, level, dim)
    return float(np.mean(inside)) if inside.size else float("nan")


def inside_ellipse(maha2: np.ndarray, level: float, dim: int) -> np.ndarray:
    """Which points lie inside the ``level`` ellipse: Mahalanobis² ≤ χ²_dim quantile (bool array)."""
    return np.asarray(maha2, float) <= chi2.ppf(level, dim)


def clustered_coverage_se(inside: np.ndarray, cluster: np.ndarray) -> float:
    """Standard error of a pooled coverage fraction whose pairs come in correlated clusters (tracks).

    Starts on one track share most of their future path, so their hits are far from
    independent and the binomial √(p(1−p)/n) is much too small.  With clusters t = 1..T
    holding n_t pairs and h_t hits, p = Σh_t / Σn_t and the linearised (ratio-estimator)
    variance is  T/(T−1) · Σ_t (h_t − p n_t)² / (Σ_t n_t)²  (Cochran 1977, Sampling
    Techniques, ch. 6, ratio estimators, from memory; for equal n_t it is the squared standard
    error of the mean of the per-cluster fractions).  NaN with fewer than two clusters.
    """
    inside = np.asarray(inside, bool)
    labels, index = np.unique(np.asarray(cluster), return_inverse=True)
    if labels.size < 2 or inside.size == 0:
        return float("nan")
    n_t = np.bincount(index, minlength=labels.size).astype(float)
    h_t = np.bincount(index, weights=inside.astype(float), minlength=labels.size)
    p = h_t.sum() / n_t.sum()
    t = labels.size
    return float(np.sqrt(t / (t - 1) * np.sum((h_t - p * n_t) ** 2)) / n_t.sum())


# ------------------------------------------------------------------ baselines
def persistence_forecast(win: Windows) -> np.ndarray:
    """x(t) = x_start + v_prev t: (R, T, d)."""
    return win.start_m[:, None, :] + win.previous_velocity_m_s[:, None, :] * win.times_s[None, :, None]


def no_motion_forecast(win: Windows) -> np.ndarray:
    """x(t) = x_start: (R, T, d)."""
    return np.broadcast_to(win.start_m[:, None, :], win.observed_m.shape).copy()


BASELINES = {"persistence": persistence_forecast, "no_motion": no_motion_forecast}


def baseline_error_variance_m2(fit_tracks, horizons_s, *, max_starts: int | None = 2000) -> dict[str, np.ndarray]:
    """Per baseline and horizon, the mean squared error per component on ``fit_tracks`` (m²).

    This is the isotropic variance σ_b²(h) given to a deterministic baseline for its coverage
    and log score: E|x_b(h) − x_obs(h)|² / d over the fit set's (track, start) pairs.
    """
    horizons = np.asarray(horizons_s, float)
    win = forecast_windows(fit_tracks, horizons, step_s=horizons.min(), max_starts=max_starts)
    out = {}
    for name, forecast in BASELINES.items():
        err2 = np.sum((forecast(win) - win.observed_m) ** 2, axis=-1)
        k = np.searchsorted(win.times_s, horizons)
        out[name] = np.array([np.mean(err2[win.valid[:, j], j]) for j in k]) / win.start_m.shape[1]
    return out


# ------------------------------------------------------------------ the result
@dataclasses.dataclass(frozen=True)
class ScoreResult:
    """What :func:`score` measured: the model's scores and each baseline's, per horizon.

    ``scores`` and ``baselines[name]`` map every key of :data:`SCORE_KEYS` to a list with one value per
    horizon (``horizons_s``, s); ``n_starts`` forecasts from ``n_tracks`` tracks; ``output_step_s`` the
    spacing of the Liu–Weisberg sums; the model's σ_pos (m), K (m²/s) and τ (s) used; ``notes`` for readers.
    """

    horizons_s: tuple[float, ...]
    method: str
    scores: dict[str, list]
    baselines: dict[str, dict[str, list]]
    n_starts: int
    n_tracks: int
    output_step_s: float
    position_error_m: float
    diffusivity_m2_s: float
    decorrelation_time_s: float | None
    notes: tuple[str, ...]
    outside_support_fraction: tuple[float, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """The ``driftwise score --json`` object: the score keys at the top level, ``baselines`` beside them."""
        return {"horizons_s": list(self.horizons_s), "method": self.method, **self.scores,
                "baselines": self.baselines, "n_starts": self.n_starts, "n_tracks": self.n_tracks,
                "output_step_s": self.output_step_s, "position_error_m": self.position_error_m,
                "diffusivity_m2_s": self.diffusivity_m2_s, "decorrelation_time_s": self.decorrelation_time_s,
                "outside_support_fraction": list(self.outside_support_fraction), "notes": list(self.notes)}


# ------------------------------------------------------------------ summaries
def summarise(win: Windows, mean_m: np.ndarray, horizons_s, cov_m2: np.ndarray | None) -> dict[str, list]:
    """Scores per horizon for forecasts ``mean_m`` (R, T, d) with total covariance ``cov_m2``.

    ``cov_m2`` (R, T, d, d) must already include the observation error; None gives NaN
    coverage and log score (a forecast without a spread).
    """
    horizons = np.asarray(horizons_s, float)
    sep = np.linalg.norm(mean_m - win.observed_m, axis=-1)
    lw = cumulative_liu_weisberg(np.where(win.valid, sep, 0.0), np.where(win.valid, win.length_m, 0.0))
    dim = win.start_m.shape[1]
    out: dict[str, list] = {key: [] for key in SCORE_KEYS}
    for k in np.searchsorted(win.times_s, horizons):
        v = win.valid[:, k]
        out["n_pairs"].append(int(v.sum()))
        d = sep[v, k]
        out["separation_m"].append(float(np.median(d)) if d.size else float("nan"))
        out["separation_p90_m"].append(float(np.percentile(d, 90)) if d.size else float("nan"))
        skill = lw[v, k]
        out["skill"].append(float(np.mean(skill[np.isfinite(skill)])) if np.isfinite(skill).any() else float("nan"))
        if cov_m2 is None or d.size == 0:
            for key in SPREAD_KEYS:
                out[key].append(float("nan"))
            continue
        maha2, logp = gaussian_scores(mean_m[v, k], cov_m2[v, k], win.observed_m[v, k])
        for level in COVERAGE_LEVELS:
            key = f"coverage_{round(100 * level)}"
            inside = inside_ellipse(maha2, level, dim)
            out[key].append(float(np.mean(inside)))
            out[f"{key}_se"].append(clustered_coverage_se(inside, win.track_index[v]))
        out["log_score"].append(float(np.mean(logp)))
    return out


def observation_covariance_m2(win: Windows, position_error_m: float) -> np.ndarray:
    """Error covariance of the interpolated observed points: σ² ((1 − w)² + w²) I, (R, T, d, d)."""
    dim = win.start_m.shape[1]
    var = position_error_m ** 2 * win.obs_var_factor + 1e-12
    return var[..., None, None] * np.eye(dim)


def baseline_scores(win: Windows, horizons_s, variance_m2: dict[str, np.ndarray] | None) -> dict[str, dict]:
    """Scores of every baseline; with ``variance_m2`` (from :func:`baseline_error_variance_m2`) for spread."""
    horizons = np.asarray(horizons_s, float)
    out = {}
    for name, forecast in BASELINES.items():
        mean = forecast(win)
        cov = None
        if variance_m2 is not None:
            var_t = np.interp(win.times_s, horizons, variance_m2[name])
            cov = np.broadcast_to(var_t[None, :, None, None] * np.eye(mean.shape[-1]),
                                  mean.shape + (mean.shape[-1],))
        out[name] = summarise(win, mean, horizons, cov)
    return out


# ------------------------------------------------------------------ the door

def forecast_moments(field, win: Windows, *, method: str = "cubature", position_error_m: float,
                     step_s: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Forecast means (R, T, d) and covariances (R, T, d, d) from every start in ONE batched call.

    Each start is the fix itself with the fix's error as release uncertainty, N(x_start, σ² I),
    released at the fix's own time (``win.start_time_s``: a time-varying field is integrated from there);
    the SDE is the field's (μ = posterior mean, D = 2(K I + τ(1 − e^{−a/τ}) Σ)), propagated by
    ``moments.propagate_batch`` with the named moment ``method`` and RK4 steps of at most ``step_s`` (s; default
    :func:`driftwise.dynamics.stepcheck.moment_step_s`: 30 min, ample for flows whose Lagrangian time scale is
    hours, or a quarter of the flow's time scale or RK4's stability bound for the field when shorter).
    """

    if method == "ensemble":
        raise InputError("score: use a moment method (cubature, unscented, gauss-hermite, linearize); "
                         "the ensemble is the speed baseline, not a scoring method")
    sde = sde_from_field(field)
    starts = [0.0] if win.start_time_s is None else np.atleast_1d(win.start_time_s)
    step_s = moment_step_s(field, sde, step_s, longest_s=1800.0, start_times_s=starts, horizon_s=win.times_s[-1])
    obj, integrator = make_method(method, step_s=step_s)
    dim = win.start_m.shape[1]
    covs0 = np.broadcast_to(position_error_m**2 * np.eye(dim), (win.start_m.shape[0], dim, dim))
    times = np.concatenate([[0.0], win.times_s])
    means, covs = propagate_batch(sde, win.start_m, covs0, times, method=obj, integrator=integrator,
                                  start_times_s=win.start_time_s)
    means, covs = np.asarray(means)[:, 1:], np.asarray(covs)[:, 1:]
    if diverged(means, covs):
        raise InputError(f"score: the {method} forecast produced non-finite numbers or a covariance that is not "
                         "positive semi-definite (the integration diverged); use a smaller step")
    return means, covs


def score(field, holdout_tracks, *, horizons_s=DEFAULT_HORIZONS_S, method: str = "cubature",
          max_starts: int | None = 2000, fit_tracks=None, position_error_m: float | None = None,
          step_s: float | None = None, integration_step_s: float | None = None) -> "ScoreResult":
    """Score a fitted field's forecasts against tracks it did not see, next to two baselines.

    Every fix of ``holdout_tracks`` after a track's first is a start (at most ``max_starts``,
    evenly spaced); all starts are forecast in one batched propagation.  ``horizons_s`` are
    lead times (s).  ``fit_tracks`` (the tracks the model was fitted on) give the baselines'
    error variance for their coverage and log score; without them those are NaN.
    ``position_error_m`` defaults to the model's; ``step_s`` is the output spacing of the
    Liu–Weisberg sums (default: the median fix interval), ``integration_step_s`` the RK4 step (default as in
    :func:`forecast_moments`).
    Returns a :class:`ScoreResult`; its ``to_dict()`` has ``horizons_s`` and, per horizon, ``n_pairs``, ``separation_m``
    (median), ``separation_p90_m``, ``skill`` (Liu–Weisberg), ``coverage_50``, ``coverage_95``,
    ``log_score`` (nats), ``coverage_50_se``/``coverage_95_se`` (standard errors with the starts
    clustered by track, :func:`clustered_coverage_se`), plus ``baselines`` {``persistence``,
    ``no_motion``} with the same keys, and ``method``, ``n_starts``, ``n_tracks``, K, τ and ``notes``.
    """
    horizons = np.sort(np.asarray(horizons_s, dtype=float))
    sigma = field.position_error_m if position_error_m is None else float(position_error_m)
    if sigma is None or not np.isfinite(sigma) or sigma < 0:
        raise InputError("score: the model records no position error; give position_error_m (m)")
    frame = getattr(field, "frame", None)
    holdout_tracks = in_model_frame(holdout_tracks, frame)
    fit_tracks = None if fit_tracks is None else in_model_frame(fit_tracks, frame)
    win = forecast_windows(holdout_tracks, horizons, step_s=step_s, max_starts=max_starts)
    _warn_unsupported_starts(field, win)
    means, covs = forecast_moments(field, win, method=method, position_error_m=sigma, step_s=integration_step_s)
    outside = _outside_support_fraction(field, win, means, horizons)
    variance = None if fit_tracks is None else baseline_error_variance_m2(fit_tracks, horizons, max_starts=max_starts)
    tau = field.decorrelation_time_s
    return ScoreResult(
        horizons_s=tuple(horizons.tolist()), method=method,
        scores=summarise(win, means, horizons, covs + observation_covariance_m2(win, sigma)),
        baselines=baseline_scores(win, horizons, variance), n_starts=int(win.start_m.shape[0]),
        n_tracks=int(np.unique(win.track_index).size), output_step_s=float(win.times_s[0]),
        position_error_m=float(sigma), diffusivity_m2_s=float(field.diffusivity_m2_s),
        decorrelation_time_s=None if tau is None else float(tau), notes=tuple(_notes(variance is not None)),
        outside_support_fraction=outside)


def _warn_unsupported_starts(field, win: Windows) -> None:
    """Before any forecast runs: a SupportWarning when forecast starts lie outside the model's data support
    (a time-varying field's support at the starts' own times)."""
    start_m = win.start_m
    ratio = field.local_variance_ratio(start_m, win.start_time_s)     # a steady field ignores the times
    distance = field.distance_to_data_m(start_m)
    outside = ratio > SUPPORT_VARIANCE_FRACTION
    if outside.any():
        warnings.warn(f"score: {int(outside.sum())} of {outside.size} forecast starts lie outside the model's data "
                      f"support, up to {format_length(float(distance[outside].max()))} from the nearest data (the "
                      f"data leave over {100 * SUPPORT_VARIANCE_FRACTION:.0f} % of the prior velocity variance "
                      "there): their forecasts extrapolate the prior; outside_support_fraction gives their share "
                      "per horizon", SupportWarning, stacklevel=3)


def _outside_support_fraction(field, win: Windows, means: np.ndarray, horizons: np.ndarray) -> tuple[float, ...]:
    """Per horizon, the share of scored pairs whose forecast mean left the data support by then
    (:func:`driftwise.dynamics.supportcheck.path_support`, start included)."""
    path = np.concatenate([win.start_m[:, None], means], axis=1)
    times = (win.start_time_s[:, None] + np.concatenate([[0.0], win.times_s])[None, :]
             if getattr(field, "is_time_varying", False) else None)      # absolute times along each path
    outside = path_support(field, path, times).outside_support[:, 1:]
    shares = []
    for k in np.searchsorted(win.times_s, horizons):
        valid = win.valid[:, k]
        shares.append(float(outside[valid, k].mean()) if valid.any() else float("nan"))
    return tuple(shares)


def _notes(baseline_spread: bool) -> list[str]:
    if baseline_spread:
        return ["Baseline coverage/log score use an isotropic Gaussian whose variance is the baseline's own mean "
                "squared error per component at that horizon on the fit tracks."]
    return ["Baseline coverage and log score are undefined (—): persistence and no motion have no spread "
            "unless the fit tracks are given to measure their error."]
