"""Is there time structure left in a steady fit's residuals?  Harmonic regression along tracks and its F-tests.

Given residual velocities r_n (n, d) in m/s at times t_n (s) on irregularly sampled tracks (gaps allowed),
each track j (a *block*) is fitted by least squares, separately per velocity component k, with

    r_k(t) = μ_jk + Σ_{c ∈ S} [a_jkc cos ω_c t + b_jkc sin ω_c t] + [slow terms] + e,

per-track coefficients (tidal currents change in space, and so along a drifter's path), where S is a set of
candidate constituents with ω_c = 2π / period_c and t on the data's own time axis.  The *slow* terms are
half-range cosines cos(π m τ), τ = (t − t_start) / span ∈ [0, 1], m = 1 … M_j, with every period 2 span / m at
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
  are significant; each component's final F compares the selected model with and without it.  Under white
  Gaussian residual noise the F-test is exact; serially correlated noise (a smooth misfit of the steady field)
  makes the low-frequency test anti-conservative, so a "slow" verdict on real data is the weaker evidence.
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
from dataclasses import dataclass
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

    def component(self, name: str) -> ComponentTest:
        return next(c for c in self.components if c.name == name)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready evidence, units in the key names."""
        return plain({"chosen": list(self.chosen), "alpha": self.alpha,
                      "correction": f"Bonferroni over {self.n_tests} tests", "n_fixes": self.n_fixes,
                      "n_tracks": self.n_tracks, "typical_track_span_s": self.typical_span_s,
                      "residual_variance_m2_s2": self.residual_variance_m2_s2,
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
    """One track: times (s), its span (s), its residuals (n_j, d) and the square roots of their weights."""

    time_s: np.ndarray
    span_s: float
    residual: np.ndarray
    root_weight: np.ndarray


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


def _fit(block: _Block, terms: Sequence[str | float], slow_min_period_s: float) -> tuple[np.ndarray, float, int]:
    """Weighted least-squares fit of one block on [1, columns of every term]: (coefficients (p, d), weighted
    RSS, rank); rows are scaled by the square roots of their weights."""
    design = np.hstack([np.ones((block.time_s.size, 1))]
                       + [_columns(block, term, slow_min_period_s) for term in terms]) * block.root_weight[:, None]
    target = block.residual * block.root_weight[:, None]
    coef, _, rank, _ = np.linalg.lstsq(design, target, rcond=None)
    return coef, float(np.sum((target - design @ coef) ** 2)), int(rank)


def _rss(blocks: Sequence[_Block], terms: Sequence[str | float], slow_min_period_s: float) -> tuple[float, int]:
    """Residual sum of squares (m²/s², all components) and number of parameters of per-track fits.

    Each block is fitted by ``numpy.linalg.lstsq``; the parameter count is the numerical rank of each block's
    design times the number of velocity components (so a short track that cannot carry a term costs nothing
    and gains nothing).
    """
    rss, n_params = 0.0, 0
    for block in blocks:
        _, rss_j, rank = _fit(block, terms, slow_min_period_s)
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
    the variance whose F-test at that one period has p = ``alpha``: from F = (Δ/q) / ((RSS₀ − Δ)/df₂) = F_α,
    Δ = F_α q RSS₀ / (df₂ + F_α q), over n (no correction for scanning many periods).
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
                          rayleigh: float = 1.0, weights: Any = None) -> TemporalEvidence:
    """Which of the candidate periods (``{name: period_s}``) and the slow part do the residuals support?

    ``residual_m_s`` (n, d) m/s, ``time_s`` (n,) s on the data's own axis, ``track`` (n,) track ids.
    Screening for resolution (Rayleigh constant ``rayleigh``), then backward elimination under F-tests with a
    Bonferroni correction at family-wise level ``alpha`` (module docstring).  ``slow=False`` skips the slow part.
    ``weights`` (n,) ∝ 1 / noise variance of each residual (e.g. 1 / R_n of the fit) make the fits weighted
    least squares, so the F-tests hold for noise of unequal but known relative variance.
    """
    if not 0.0 < alpha < 1.0:
        raise InputError(f"residual spectrum: alpha must lie in (0, 1), got {alpha!r}")
    _check_periods({SLOW + " minimum period": slow_min_period_s, **periods_s})
    blocks = _blocks(residual_m_s, time_s, track, weights)
    n = sum(b.time_s.size for b in blocks)
    n_obs = n * blocks[0].residual.shape[1]
    span = _typical_span(blocks)
    base = _rss(blocks, [], slow_min_period_s)
    alone = {k: (base[0] - _rss(blocks, [p], slow_min_period_s)[0]) / n for k, p in periods_s.items()}
    screen = _screen(periods_s, alone, span, rayleigh)
    terms: dict[str, str | float] = {k: float(periods_s[k]) for k, (status, _) in screen.items()
                                     if status == "tested"}
    if slow:
        terms[SLOW], screen[SLOW] = SLOW, ("tested", "")
    n_tests = sum(status != "unresolved" for status, _ in screen.values())
    active = _eliminate(blocks, terms, n_obs, alpha, n_tests, slow_min_period_s)
    tests = []
    for name, (status, note) in screen.items():
        period = None if name == SLOW else float(periods_s[name])
        if status != "tested":
            tests.append(ComponentTest(name, period, status, alone[name], alone[name] * n / base[0], math.nan,
                                       0, 0, math.nan, math.nan, False, note))
            continue
        with_k = [terms[k] for k in active] + ([] if name in active else [terms[name]])
        without_k = [terms[k] for k in active if k != name]
        small, big = _rss(blocks, without_k, slow_min_period_s), _rss(blocks, with_k, slow_min_period_s)
        f, df1, df2, p = _f_test(small, big, n_obs)
        gain = small[0] - big[0]
        tests.append(ComponentTest(name, period, status, gain / n, gain / base[0] if base[0] > 0 else math.nan,
                                   f, df1, df2, p, min(1.0, p * n_tests), name in active, note))
    chosen = tuple(t.name for t in tests if t.significant)
    return TemporalEvidence(tuple(tests), chosen, float(alpha), int(n_tests), int(n), len(blocks), span,
                            base[0] / n)


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


def _eliminate(blocks: Sequence[_Block], terms: Mapping[str, str | float], n_obs: int, alpha: float,
               n_tests: int, slow_min_period_s: float) -> list[str]:
    """Backward elimination: drop the least significant component until every one left has p·n_tests < alpha."""
    active = list(terms)
    while active:
        full = _rss(blocks, [terms[k] for k in active], slow_min_period_s)
        p_drop = {}
        for name in active:
            small = _rss(blocks, [terms[k] for k in active if k != name], slow_min_period_s)
            p_drop[name] = _f_test(small, full, n_obs)[3]
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
