"""Is there time structure left in a steady fit's residuals?  Harmonic regression along tracks and its F-tests.

Given residual velocities r_n (n, d) in m/s at times t_n (s) on irregularly sampled tracks (gaps allowed),
each track j (a *block*) is fitted by least squares, separately per velocity component k, with

    r_k(t) = μ_jk + Σ_{c ∈ S} [a_jkc cos ω_c t + b_jkc sin ω_c t] + [slow terms] + e,

per-track coefficients (tidal currents change in space, and so along a drifter's path), where S is a set of
candidate constituents with ω_c = 2π / period_c and t on the data's own time axis.  The *slow* terms are
half-range cosines cos(π m s), s = (t − t_start) / span ∈ [0, 1], m = 1 … M_j, with every period 2 span / m at
least ``slow_min_period_s`` (2 d by default; at least the m = 1 term, i.e. a smooth trend per track, always).

* **Spectrum.**  The variance a single harmonic explains, (RSS_mean − RSS_mean+c) / n in m²/s² (summed over
  the d components), is the least-squares (floating-mean) periodogram of Lomb (1976, "Least-squares frequency
  analysis of unequally spaced data", Astrophys. Space Sci. 39:447) and Scargle (1982, "Studies in
  astronomical time series analysis II", ApJ 263:835), pooled over tracks: :func:`residual_periodogram`.
* **Tests.**  A component is judged by the F-test of nested linear regressions (e.g. Seber 1977, Linear
  Regression Analysis, §4.5; from memory): F = [(RSS₀ − RSS₁) / q] / [RSS₁ / (N − p₁)], with q extra
  parameters (2 per velocity component and track for a constituent), N = n·d scalar observations and p₁ the
  parameters of the larger model; p-value from ``scipy.stats.f``.  The family of tests is corrected by
  Bonferroni (p × m, m the number of components examined, ambiguous ones included).  Selection is backward
  elimination from the model with every examined component: the least significant is dropped until all left
  are significant; each component's final F compares the selected model with and without it.
* **Correlated noise.**  Drifter velocities decorrelate over a Lagrangian time τ of hours, and a steady fit's
  misfit is smooth along a track; treated as white, such noise makes every low-frequency test wildly
  anti-conservative.  The tests therefore use generalised least squares under the noise correlation
  (1 − η) exp(−|Δt|/τ) + η δ: an Ornstein–Uhlenbeck part (Uhlenbeck & Ornstein 1930, Phys. Rev. 36:823)
  plus a white share η (position error, the random walk).  Each track is whitened by the Cholesky factor of that
  correlation on its own times (in chunks of ``CHUNK`` fixes), and (τ, η) come from restricted maximum
  likelihood on a grid under the largest model; white noise (τ = 0) is one of the candidates.  The low-frequency
  tests are sensitive to τ (the OU spectrum there grows with τ) and REML's τ scatters by tens of per cent, so
  a component counts only when significant under the best model *and* the ends of the 95 % likelihood
  interval of τ (its p-value is the largest of the three).  With the noise model known the F-tests are exact;
  estimated, they are approximate (their level is measured in the tests).  Variances explained are reported
  from the plain least-squares fits, in m²/s².  The periodogram's threshold assumes white noise.
* **Weights.**  With ``weights`` w_n ∝ 1/σ_n² (finite-difference velocities are noisier over short Δt) every
  fit is weighted least squares and RSS a weighted sum; the weights are scaled to mean 1, so RSS/n and the
  variances reported stay in m²/s².
* **Resolution.**  A track of span T cannot resolve a period longer than T, nor separate two frequencies closer
  than 1/T (the Rayleigh criterion, T ≥ R / |f₁ − f₂| with R = 1; common practice in tidal analysis: M2 and S2
  need 14.8 d).  T here is the typical track span, the median over fixes of their track's span.  Constituents
  with a longer period are not tested; of an unseparable group only the one explaining the most variance on
  its own is tested, and the others are reported as ambiguous with it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy import stats

from ..errors import InputError
from ..files import plain
from ..units import format_duration

__all__ = [
    "SLOW",
    "ComponentTest",
    "Periodogram",
    "TemporalEvidence",
    "detect_time_structure",
    "harmonic_coefficients",
    "residual_periodogram",
    "steady_warning",
    "typical_span_s",
]

SLOW = "slow"
MAX_SLOW_TERMS = 6
CHUNK = 64                         # fixes per whitening chunk (correlation across chunk ends is neglected)
NUGGETS = (0.0, 0.25, 0.5, 0.75)   # white share η of the residual noise variance tried by "auto"


@dataclass(frozen=True)
class ComponentTest:
    """One candidate component's evidence (SI units; ``period_s`` is None for the slow part).

    ``status``: "tested", "unresolved" (period longer than the typical track) or "ambiguous" (not separable
    from a stronger constituent, named in ``note``).  For tested components, ``variance_m2_s2`` is the
    residual variance (summed over velocity components) the component explains beside the other selected
    components, ``variance_fraction`` the same over the residual variance about the track means.
    """

    name: str
    period_s: float | None
    status: str
    variance_m2_s2: float
    variance_fraction: float
    f_statistic: float
    df_numerator: int
    df_denominator: int
    p_value: float
    p_adjusted: float
    significant: bool
    note: str

    def to_dict(self) -> dict[str, Any]:
        return plain({"period_s": self.period_s, "status": self.status,
                      "variance_explained_m2_s2": self.variance_m2_s2,
                      "variance_explained_fraction": self.variance_fraction, "f_statistic": self.f_statistic,
                      "df_numerator": self.df_numerator, "df_denominator": self.df_denominator,
                      "p_value": self.p_value, "p_adjusted": self.p_adjusted, "significant": self.significant,
                      "note": self.note})


@dataclass(frozen=True)
class TemporalEvidence:
    """The verdict of :func:`detect_time_structure`: every candidate's test, and the components chosen."""

    components: tuple[ComponentTest, ...]
    chosen: tuple[str, ...]
    alpha: float
    n_tests: int
    n_fixes: int
    n_tracks: int
    typical_span_s: float
    residual_variance_m2_s2: float
    noise_time_scale_s: float
    noise_nugget_fraction: float

    def component(self, name: str) -> ComponentTest:
        return next(c for c in self.components if c.name == name)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready evidence, units in the key names."""
        return plain({"chosen": list(self.chosen), "alpha": self.alpha,
                      "correction": f"Bonferroni over {self.n_tests} tests", "n_fixes": self.n_fixes,
                      "n_tracks": self.n_tracks, "typical_track_span_s": self.typical_span_s,
                      "residual_variance_m2_s2": self.residual_variance_m2_s2,
                      "noise_time_scale_s": self.noise_time_scale_s,
                      "noise_nugget_fraction": self.noise_nugget_fraction,
                      "components": {c.name: c.to_dict() for c in self.components}})


@dataclass(frozen=True)
class Periodogram:
    """:func:`residual_periodogram`: per period (k,) the variance one harmonic explains and the variance it
    would need to be significant at ``alpha`` at that one period (m²/s², summed over velocity components)."""

    periods_s: np.ndarray
    variance_m2_s2: np.ndarray
    threshold_m2_s2: np.ndarray
    residual_variance_m2_s2: float
    alpha: float

    def to_dict(self) -> dict[str, Any]:
        return plain({"periods_s": self.periods_s, "variance_explained_m2_s2": self.variance_m2_s2,
                      "threshold_m2_s2": self.threshold_m2_s2, "alpha": self.alpha,
                      "residual_variance_m2_s2": self.residual_variance_m2_s2})


@dataclass(frozen=True)
class _Block:
    """One track: times (s), its span (s), its residuals (n_j, d), the square roots of their weights, and the
    whitening matrices L⁻¹ (L the Cholesky factor of the noise correlation), one per chunk of at most CHUNK
    fixes (None: white noise), with log det of that correlation."""

    time_s: np.ndarray
    span_s: float
    residual: np.ndarray
    root_weight: np.ndarray
    whiteners: tuple[np.ndarray, ...] | None = None
    log_det_corr: float = 0.0


# ----------------------------------------------------------------------------- regression machinery
def _blocks(residual_m_s: Any, time_s: Any, track: Any, weights: Any = None) -> list[_Block]:
    """Split the residuals by track, after checking shapes and finiteness; weights scaled to mean 1."""
    r = np.asarray(residual_m_s, dtype=float)
    t = np.asarray(time_s, dtype=float)
    ids = np.asarray(track)
    if r.ndim == 1:
        r = r[:, None]
    if r.ndim != 2 or t.shape != (r.shape[0],) or ids.shape != (r.shape[0],):
        raise InputError(f"residual spectrum: residuals {r.shape}, times {t.shape} and track ids {ids.shape} "
                         "must be (n, d), (n,) and (n,)")
    if not (np.all(np.isfinite(r)) and np.all(np.isfinite(t))):
        raise InputError("residual spectrum: residuals and times must be finite")
    if r.shape[0] == 0:
        raise InputError("residual spectrum: no residuals given")
    w = np.ones(r.shape[0]) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != (r.shape[0],) or not np.all(np.isfinite(w) & (w > 0)):
        raise InputError(f"residual spectrum: weights must be {r.shape[0]} positive finite numbers "
                         f"(one per residual), got shape {w.shape}")
    root = np.sqrt(w / np.mean(w))
    _, inverse = np.unique(ids, return_inverse=True)
    blocks = []
    for j in range(int(inverse.max()) + 1):
        sel = inverse == j
        tj = t[sel]
        blocks.append(_Block(tj, float(tj.max() - tj.min()), r[sel], root[sel]))
    return blocks


def _slow_terms(span_s: float, slow_min_period_s: float) -> int:
    """Half-range cosines with period 2·span/m ≥ slow_min_period_s; at least one (a trend), at most six."""
    return int(min(MAX_SLOW_TERMS, max(1, math.floor(2.0 * span_s / slow_min_period_s))))


def _columns(block: _Block, term: str | float, slow_min_period_s: float) -> np.ndarray:
    """Regressors of one term on one block: (n_j, 2) cos/sin for a period (s), (n_j, M_j) for "slow"."""
    t = block.time_s
    if term == SLOW:
        tau = (t - t.min()) / block.span_s if block.span_s > 0 else np.zeros_like(t)
        m = np.arange(1, _slow_terms(block.span_s, slow_min_period_s) + 1)
        return np.cos(np.pi * tau[:, None] * m[None, :])
    omega = 2.0 * np.pi / float(term)
    return np.stack([np.cos(omega * t), np.sin(omega * t)], axis=1)


def _fit(block: _Block, terms: Sequence[str | float], slow_min_period_s: float) -> tuple[np.ndarray, float, int, float]:
    """Weighted (and whitened) least-squares fit of one block on [1, columns of every term]: coefficients (p, d),
    RSS, rank and log det of the design's Gram matrix XᵀX over its kept singular values (for REML)."""
    design = np.hstack([np.ones((block.time_s.size, 1))] + [_columns(block, term, slow_min_period_s) for term in terms])
    design = _whiten(block, design) * block.root_weight[:, None]
    target = _whiten(block, block.residual) * block.root_weight[:, None]
    coef, _, rank, singular = np.linalg.lstsq(design, target, rcond=None)
    log_gram_det = 2.0 * float(np.sum(np.log(singular[:rank])))
    return coef, float(np.sum((target - design @ coef) ** 2)), int(rank), log_gram_det


def _whiten(block: _Block, x: np.ndarray) -> np.ndarray:
    """L⁻¹ x per chunk, L the Cholesky factor of the noise correlation: independent unit-variance innovations."""
    if block.whiteners is None:
        return x
    out, start = [], 0
    for whitener in block.whiteners:
        stop = start + whitener.shape[0]
        out.append(whitener @ x[start:stop])
        start = stop
    return np.vstack(out)


def _with_noise(blocks: Sequence[_Block], time_scale_s: float, nugget: float) -> list[_Block]:
    """The blocks with whitening for the correlation (1 − η) exp(−|Δt|/τ) + η δ (τ = 0: white noise)."""
    if time_scale_s <= 0:
        return [replace(b, whiteners=None, log_det_corr=0.0) for b in blocks]
    out = []
    for block in blocks:
        whiteners, log_det = [], 0.0
        for start in range(0, block.time_s.size, CHUNK):
            t = block.time_s[start:start + CHUNK]
            corr = (1.0 - nugget) * np.exp(-np.abs(t[:, None] - t[None, :]) / time_scale_s)
            factor = np.linalg.cholesky(corr + (nugget + 1e-9) * np.eye(t.size))
            whiteners.append(np.linalg.inv(factor))
            log_det += 2.0 * float(np.sum(np.log(np.diag(factor))))
        out.append(replace(block, whiteners=tuple(whiteners), log_det_corr=log_det))
    return out


def _restricted_log_likelihood(blocks: Sequence[_Block], terms: Sequence[str | float],
                               slow_min_period_s: float) -> float:
    """Restricted (REML) log-likelihood of the noise model, σ² profiled out, up to a constant:

        −((N − p)/2) log RSS − (d/2) log det R − (d/2) Σ_tracks log det(X_wᵀ X_w)

    with R the noise correlation and X_w the whitened design (Patterson & Thompson 1971, "Recovery of
    inter-block information when block sizes are unequal", Biometrika 58:545; from memory).  Unlike the plain
    likelihood it is not biased towards short τ by the many per-track coefficients, which soak up
    low-frequency noise.
    """
    d = blocks[0].residual.shape[1]
    rss, n_params, log_det = 0.0, 0, 0.0
    for block in blocks:
        _, rss_j, rank, log_gram = _fit(block, terms, slow_min_period_s)
        rss, n_params = rss + rss_j, n_params + rank * d
        log_det += log_gram + block.log_det_corr
    n_obs = d * sum(b.time_s.size for b in blocks)
    return -0.5 * (n_obs - n_params) * math.log(max(rss, 1e-300)) - 0.5 * d * log_det


def _noise_models(choice: float | str | None, blocks: Sequence[_Block], terms: Sequence[str | float],
                  slow_min_period_s: float) -> list[tuple[float, float]]:
    """Noise models (τ s, nugget η) to test under, the best first: white [(0, 0)] for None; [(τ, 0)] for a
    given τ; for "auto" the restricted maximum-likelihood pair on a grid (white, and 16 τ from 0.1 to 100
    median sampling intervals × η ∈ {0, 0.25, 0.5, 0.75}, τ then refined to a factor 1.17) under the model
    with ``terms``, followed by the grid's pairs of least and greatest τ whose restricted log-likelihood lies
    within χ²₁(0.95)/2 = 1.92 of the best (the ends of a 95 % likelihood interval; Wilks 1938)."""
    if choice is None:
        return [(0.0, 0.0)]
    if choice != "auto":
        if not (isinstance(choice, (int, float)) and math.isfinite(choice) and choice >= 0):
            raise InputError(f"residual spectrum: the noise time scale must be 'auto', None or seconds ≥ 0, "
                             f"got {choice!r}")
        return [(float(choice), 0.0)]
    steps = np.concatenate([np.diff(b.time_s) for b in blocks])
    steps = steps[steps > 0]
    if steps.size == 0:
        return [(0.0, 0.0)]

    def score(tau: float, eta: float) -> float:
        return _restricted_log_likelihood(_with_noise(blocks, tau, eta), terms, slow_min_period_s)

    grid = [(0.0, 0.0)] + [(float(tau), eta) for tau in np.median(steps) * np.geomspace(0.1, 100.0, 16)
                           for eta in NUGGETS]
    scores = [score(tau, eta) for tau, eta in grid]
    best_tau, best_eta = grid[int(np.argmax(scores))]
    if best_tau > 0:
        finer = [(best_tau * 10.0 ** (k / 45.0), best_eta) for k in (-2, -1, 1, 2)]
        grid, scores = grid + finer, scores + [score(tau, eta) for tau, eta in finer]
    best = int(np.argmax(scores))
    plausible = [g for g, sc in zip(grid, scores) if sc >= scores[best] - 0.5 * float(stats.chi2.ppf(0.95, 1))]
    ends = [min(plausible), max(plausible)]
    return [grid[best]] + [m for m in dict.fromkeys(ends) if m != grid[best]]


def _rss(blocks: Sequence[_Block], terms: Sequence[str | float], slow_min_period_s: float) -> tuple[float, int]:
    """Residual sum of squares (m²/s², all components) and number of parameters of per-track fits.

    Each block is fitted by ``numpy.linalg.lstsq``; the parameter count is the numerical rank of each block's
    design times the number of velocity components (so a short track that cannot carry a term costs nothing
    and gains nothing).
    """
    rss, n_params = 0.0, 0
    for block in blocks:
        _, rss_j, rank, _ = _fit(block, terms, slow_min_period_s)
        rss += rss_j
        n_params += rank * block.residual.shape[1]
    return rss, n_params


def harmonic_coefficients(residual_m_s: Any, time_s: Any, track: Any, period_s: float, *,
                          weights: Any = None) -> tuple[np.ndarray, ...]:
    """Per-track least-squares fit r(t) = μ + a cos ωt + b sin ωt, ω = 2π/period_s (t on the data's axis).

    Returns (track ids (J,), μ (J, d), a (J, d), b (J, d)) in m/s, tracks in sorted id order; the amplitude is
    √(a² + b²) and the phase lag atan2(b, a), so that a cos ωt + b sin ωt = A cos(ωt − phase).
    """
    _check_periods({"period_s": period_s})
    blocks = _blocks(residual_m_s, time_s, track, weights)
    coefs = np.stack([_fit(block, [float(period_s)], 1.0)[0] for block in blocks])
    return np.unique(np.asarray(track)), coefs[:, 0], coefs[:, 1], coefs[:, 2]


def _f_test(small: tuple[float, int], big: tuple[float, int], n_obs: int) -> tuple[float, int, int, float]:
    """F statistic, its degrees of freedom and p-value for the nested pair (RSS, p) small ⊂ big."""
    (rss0, p0), (rss1, p1) = small, big
    df1, df2 = p1 - p0, n_obs - p1
    if df1 <= 0 or df2 <= 0:
        return math.nan, max(df1, 0), max(df2, 0), 1.0
    if rss1 <= 0.0:
        return math.inf, df1, df2, 0.0
    f = ((rss0 - rss1) / df1) / (rss1 / df2)
    return float(f), df1, df2, float(stats.f.sf(f, df1, df2))


def typical_span_s(time_s: Any, track: Any) -> float:
    """The span (s) of the track a typical fix belongs to: the median over fixes of their track's span."""
    blocks = _blocks(np.zeros((np.size(time_s), 1)), time_s, track)
    return _typical_span(blocks)


def _typical_span(blocks: Sequence[_Block]) -> float:
    spans = np.concatenate([np.full(b.time_s.size, b.span_s) for b in blocks])
    return float(np.median(spans))


def residual_periodogram(residual_m_s: Any, time_s: Any, track: Any, periods_s: Any, *,
                         alpha: float = 0.01, weights: Any = None) -> Periodogram:
    """Variance (m²/s², summed over components) one harmonic at each of the (k,) periods explains.

    (RSS_mean − RSS_mean+harmonic) / n with per-track means and per-track harmonic coefficients: the
    floating-mean least-squares periodogram (Lomb 1976; Scargle 1982) pooled over tracks.  The threshold is
    the variance whose F-test at that one period, under white noise, has p = ``alpha``: from
    F = (Δ/q) / ((RSS₀ − Δ)/df₂) = F_α, Δ = F_α q RSS₀ / (df₂ + F_α q), over n (no correction for scanning
    many periods).
    """
    if not 0.0 < alpha < 1.0:
        raise InputError(f"residual spectrum: alpha must lie in (0, 1), got {alpha!r}")
    blocks = _blocks(residual_m_s, time_s, track, weights)
    periods = np.atleast_1d(np.asarray(periods_s, dtype=float))
    _check_periods({f"period {i}": p for i, p in enumerate(periods)})
    n = sum(b.time_s.size for b in blocks)
    n_obs = n * blocks[0].residual.shape[1]
    rss0, p0 = _rss(blocks, [], 1.0)
    variance, threshold = np.empty(periods.size), np.full(periods.size, np.nan)
    for k, period in enumerate(periods):
        rss1, p1 = _rss(blocks, [period], 1.0)
        variance[k] = (rss0 - rss1) / n
        q, df2 = p1 - p0, n_obs - p1
        if q > 0 and df2 > 0:
            f_alpha = float(stats.f.isf(alpha, q, df2))
            threshold[k] = f_alpha * q * rss0 / (df2 + f_alpha * q) / n
    return Periodogram(periods, variance, threshold, rss0 / n, float(alpha))


def _check_periods(periods_s: Mapping[str, float]) -> None:
    for name, period in periods_s.items():
        if not (np.isfinite(period) and period > 0):
            raise InputError(f"residual spectrum: the period of {name} must be a positive number of seconds, "
                             f"got {period!r}")


# ----------------------------------------------------------------------------- the decision
def detect_time_structure(residual_m_s: Any, time_s: Any, track: Any, periods_s: Mapping[str, float], *,
                          alpha: float = 0.01, slow: bool = True, slow_min_period_s: float = 2 * 86400.0,
                          rayleigh: float = 1.0, weights: Any = None,
                          noise_time_scale_s: float | str | None = "auto") -> TemporalEvidence:
    """Which of the candidate periods (``{name: period_s}``) and the slow part do the residuals support?

    ``residual_m_s`` (n, d) m/s, ``time_s`` (n,) s on the data's own axis, ``track`` (n,) track ids.
    Screening for resolution (Rayleigh constant ``rayleigh``), then backward elimination under F-tests with a
    Bonferroni correction at family-wise level ``alpha`` (module docstring).  ``slow=False`` skips the slow part.
    ``weights`` (n,) ∝ 1 / noise variance of each residual (e.g. 1 / R_n of the fit) make the fits weighted
    least squares.  ``noise_time_scale_s``: the residual noise's correlation time τ for the tests ("auto":
    estimated; None: white; or seconds, e.g. the fit's decorrelation time).
    """
    if not 0.0 < alpha < 1.0:
        raise InputError(f"residual spectrum: alpha must lie in (0, 1), got {alpha!r}")
    _check_periods({SLOW + " minimum period": slow_min_period_s, **periods_s})
    blocks = _blocks(residual_m_s, time_s, track, weights)
    n = sum(b.time_s.size for b in blocks)
    span = _typical_span(blocks)
    base = _rss(blocks, [], slow_min_period_s)[0]
    alone = {k: (base - _rss(blocks, [p], slow_min_period_s)[0]) / n for k, p in periods_s.items()}
    screen = _screen(periods_s, alone, span, rayleigh)
    terms: dict[str, str | float] = {k: float(periods_s[k]) for k, (status, _) in screen.items()
                                     if status == "tested"}
    if slow:
        terms[SLOW], screen[SLOW] = SLOW, ("tested", "")
    n_tests = sum(status != "unresolved" for status, _ in screen.values())
    models = _noise_models(noise_time_scale_s, blocks, list(terms.values()), slow_min_period_s)
    whitened = [_with_noise(blocks, tau, eta) for tau, eta in models]
    active = _eliminate(whitened, terms, n * blocks[0].residual.shape[1], alpha, n_tests, slow_min_period_s)
    tests = []
    for name, (status, note) in screen.items():
        period = None if name == SLOW else float(periods_s[name])
        if status == "tested":
            tests.append(_component_test(name, period, note, (blocks, whitened), terms, active, n_tests,
                                         slow_min_period_s))
        else:
            tests.append(ComponentTest(name, period, status, alone[name], alone[name] * n / base, math.nan,
                                       0, 0, math.nan, math.nan, False, note))
    chosen = tuple(t.name for t in tests if t.significant)
    return TemporalEvidence(tuple(tests), chosen, float(alpha), int(n_tests), int(n), len(blocks), span,
                            base / n, *models[0])


def _component_test(name: str, period: float | None, note: str,
                    blocks: tuple[list[_Block], list[list[_Block]]], terms: Mapping[str, str | float],
                    active: Sequence[str], n_tests: int, slow_min_period_s: float) -> ComponentTest:
    """The selected model with and without ``name``: variance explained from the plain fits, the F-test from
    the whitened ones (the largest p over the noise models)."""
    raw, whitened = blocks
    with_k = [terms[k] for k in active] + ([] if name in active else [terms[name]])
    without_k = [terms[k] for k in active if k != name]
    n = sum(b.time_s.size for b in raw)
    n_obs = n * raw[0].residual.shape[1]
    f, df1, df2, p = max((_f_test(_rss(w, without_k, slow_min_period_s), _rss(w, with_k, slow_min_period_s), n_obs)
                          for w in whitened), key=lambda test: test[3])
    gain = _rss(raw, without_k, slow_min_period_s)[0] - _rss(raw, with_k, slow_min_period_s)[0]
    base = _rss(raw, [], slow_min_period_s)[0]
    return ComponentTest(name, period, "tested", gain / n, gain / base if base > 0 else math.nan, f, df1, df2, p,
                         min(1.0, p * n_tests), name in active, note)


def _screen(periods_s: Mapping[str, float], alone: Mapping[str, float], span_s: float,
            rayleigh: float) -> dict[str, tuple[str, str]]:
    """(status, note) per constituent: unresolved if its period exceeds ``span_s``; ambiguous if a constituent
    explaining more on its own lies within the Rayleigh frequency distance rayleigh / span_s."""
    screen: dict[str, tuple[str, str]] = {}
    kept: list[str] = []
    for name in sorted(periods_s, key=lambda k: -alone[k]):
        period = float(periods_s[name])
        if period > span_s:
            screen[name] = ("unresolved", (f"its period {format_duration(period)} exceeds the typical track span "
                                          f"{format_duration(span_s)}"))
            continue
        need = {k: rayleigh / max(abs(1.0 / period - 1.0 / float(periods_s[k])), 1e-300) for k in kept}
        clash = next((k for k in kept if need[k] > span_s), None)
        if clash is None:
            kept.append(name)
            screen[name] = ("tested", "")
        else:
            screen[name] = ("ambiguous", (f"not separable from {clash} in tracks of {format_duration(span_s)}: "
                                         f"that needs {format_duration(need[clash])} (Rayleigh criterion); "
                                         f"{clash} explains more of the variance and stands for both"))
    return {k: screen[k] for k in periods_s}


def _eliminate(whitened: Sequence[Sequence[_Block]], terms: Mapping[str, str | float], n_obs: int, alpha: float,
               n_tests: int, slow_min_period_s: float) -> list[str]:
    """Backward elimination: drop the least significant component until every one left has p·n_tests < alpha,
    p the largest over the noise models."""
    active = list(terms)
    while active:
        p_drop = dict.fromkeys(active, 0.0)
        for blocks in whitened:
            full = _rss(blocks, [terms[k] for k in active], slow_min_period_s)
            for name in active:
                small = _rss(blocks, [terms[k] for k in active if k != name], slow_min_period_s)
                p_drop[name] = max(p_drop[name], _f_test(small, full, n_obs)[3])
        worst = max(active, key=lambda k: p_drop[k])
        if p_drop[worst] * n_tests < alpha:
            break
        active.remove(worst)
    return active


def steady_warning(evidence: TemporalEvidence) -> str | None:
    """For a fit forced steady: the time structure its residuals hold and the options that model it, or None."""
    found = [c for c in evidence.components if c.significant]
    if not found:
        return None
    parts = [("slow changes over days" if c.name == SLOW else
              f"a {format_duration(c.period_s)} periodicity ({c.name})")
             + f" explaining {100 * c.variance_fraction:.3g} % of their variance" for c in found]
    options = []
    tides = [c.name for c in found if c.name != SLOW]
    if tides:
        options.append("--tides " + ",".join(tides))
    if any(c.name == SLOW for c in found):
        options.append("--slow-time-scale auto")
    p_max = max(c.p_adjusted for c in found)
    return (f"the steady model's residuals hold {' and '.join(parts)} (F-test, adjusted p ≤ {p_max:.2g}); "
            f"fit with {' '.join(options)} (or --temporal auto) to model it")
