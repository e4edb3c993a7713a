"""The position error σ of the fixes, estimated from the tracks themselves.

Model (per component): a fix is x_i = X(t_i) + e_i with white noise e_i ~ N(0, σ²), and the
particle moves as dX = u(X, t) dt + √(2K) dW (Einstein 1905: the random walk adds 2KΔt to the
variance of a displacement over Δt).  Velocities between fixes are v_i = (x_i − x_{i−1})/h_i,
h_i = t_i − t_{i−1}.  The noise makes successive velocities anticorrelated,
Cov(v_i, v_{i+1}) = −σ²/(h_i h_{i+1}), but a smooth flow makes them strongly positively
correlated, so σ is read from the second divided differences (accelerations)

    a_j = 2 (v_{j+1} − v_j) / (h_j + h_{j+1})                                        (1)

which remove u to first order.  In a window of consecutive a_j the lag-m products
P_m = Σ_components a_j · a_{j+m} (m = 0 … 3) have the expectation

    E P_m = d (σ² N_m + K R_m) + F_m,                                                (2)

with N_m, R_m exact functions of the h's (Σ of products of the difference weights; for equal
steps h: N = (6, −4, 1, 0)/h⁴, R = (4, −2, 0, 0)/h³ — the "6σ²" of the second difference
x_{i+1} − 2x_i + x_{i−1} is h⁴ N_0) and F_m the flow's own term, |a_flow|² to leading order,
with a correction ∝ (t_{j+m} − t_j)² where the acceleration turns within the window.  Per
window, weights α (one per lag) with α·N = 1, α·R = 0 and α·F = 0 give an unbiased σ²:

* "local-constant" (lags 0–2): F_m = A, the flow's acceleration constant over the window;
  for equal steps σ² = −(P_0 + 2P_1 − 3P_2)/(5d) · h⁴.
* "local-quadratic" (lags 0–3): F_m = A + B τ_m², τ_m the time between the centres, for flows
  that turn within a window (solid-body rotation at ωh: the first has bias ≈ −|a|²h⁴(ωh)²).

The window estimates are pooled with weights 1/(|α|² v²), v the expected variance of one
acceleration from a first unweighted pass; the standard error comes from a bootstrap over
tracks (or over blocks of 64 windows when there are fewer than 20 tracks), seeded.  The
local-constant estimator is used unless it differs from the local-quadratic one by more than
twice the bootstrap standard error of the difference (then the quadratic one, whose
variance is about 1.7 times larger).  σ is √σ², its SE by the delta method SE(σ²)/(2σ).

Precision: with equal steps the local-constant σ² is −c₁ + 1.6 c₂ − 0.6 c₃ in the lag-m
autocovariances c_m of the displacements, so SE(σ²) ≈ 2 (2Kh + 2σ²)/√N for N windows ×
components — the pure lag-one estimate −c₁ would give half that but is biased by any flow.
At ocean sampling (σ = 10 m, h = 30 min, K = 5 m²/s: 2Kh/σ² = 180) a 20 % σ needs millions
of fixes; at 2 Hz in a tank (σ = 0.5 mm, K = 1e-5 m²/s: 2Kh/σ² = 40) about a hundred
thousand.  Limit: a flow turning by more than about 0.1 rad between fixes (ωh > 0.1) biases
even the local-quadratic form (in the tests' rotation at ωh = 0.2: −21 % in σ² with regular,
−46 % with irregular steps; at ωh = 0.1 within 6 %).

Not identifiable (σ² not above 2 SE, or fewer than 30 windows): ``identified=False`` and
``value_m`` is the upper bound √(max(σ̂², 0) + 2 SE) (0 with no SE), with the reason; the
noise is then too small against the random walk to matter for a fit at this sampling.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InputError
from ..units import format_length

__all__ = ["PositionErrorEstimate", "estimate_position_error", "position_error_text"]

MIN_WINDOWS = 30
MIN_UNITS = 20          # below this many tracks, bootstrap blocks of BLOCK_WINDOWS windows instead
BLOCK_WINDOWS = 64
BOOTSTRAP = 400
CHUNK_FIXES = 1 << 18   # fixes per chunk (bounded memory on large files)
_ORDERS = ("local-constant", "local-quadratic")


@dataclass(frozen=True)
class PositionErrorEstimate:
    """σ of one fix per component (m), its standard error (m), how it was obtained.

    ``value_m``: the number to use (the estimate, or the upper bound when not identified);
    ``estimate_m``: √max(σ̂², 0) whatever the outcome; ``n_used``: windows (6 consecutive fixes)
    pooled; ``identified``: False when σ̂² is not significantly positive (see ``note``).
    """

    value_m: float
    standard_error_m: float
    method: str
    n_used: int
    identified: bool
    estimate_m: float
    n_tracks: int
    note: str = ""

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe record (an infinite standard error becomes None)."""
        se = self.standard_error_m if math.isfinite(self.standard_error_m) else None
        return {"value_m": self.value_m, "standard_error_m": se, "method": self.method,
                "n_used": self.n_used, "identified": self.identified, "estimate_m": self.estimate_m,
                "n_tracks": self.n_tracks, "note": self.note}


# ---------------------------------------------------------------- windows
def _accelerations(time_s: np.ndarray, position_m: np.ndarray, index: np.ndarray):
    """a_j of eq. (1) at every interior fix, with g_j = 2/(h_j + h_{j+1}) and the two h's.

    Returns (acc (n−2, d) m/s², g (n−2,) 1/s, h_left (n−2,), h_right (n−2,) s, ok (n−2,) bool:
    both neighbours in the same track and both steps positive).
    """
    h = np.diff(time_s)
    same = (index[1:] == index[:-1]) & (h > 0)
    h_safe = np.where(same, h, 1.0)
    v = np.diff(position_m, axis=0) / h_safe[:, None]
    g = 2.0 / (h_safe[:-1] + h_safe[1:])
    return g[:, None] * (v[1:] - v[:-1]), g, h_safe[:-1], h_safe[1:], same[:-1] & same[1:]


def _window_moments(time_s, position_m, index):
    """Per window of 4 consecutive accelerations: products P (W, 4), noise and random-walk
    coefficients N, R (W, 4), centre-time offsets τ (W, 4) s, and the window's first fix (W,)."""
    acc, g, hl, hr, ok = _accelerations(time_s, position_m, index)
    n_acc = acc.shape[0] - 3
    if n_acc <= 0:
        empty = np.zeros((0, 4))
        return empty, empty, empty, empty, np.zeros(0, np.int64)
    c_left, c_right = g / hl, g / hr                       # weights of x_{j−1} and x_{j+1} in a_j
    c_mid = -(c_left + c_right)
    q = np.arange(n_acc)
    valid = ok[q] & ok[q + 1] & ok[q + 2] & ok[q + 3]
    q = q[valid]
    prods = np.stack([np.sum(acc[q] * acc[q + m], axis=1) for m in range(4)], axis=1)
    zero = np.zeros(q.size)
    noise = np.stack([c_left[q]**2 + c_mid[q]**2 + c_right[q]**2,
                      c_mid[q] * c_left[q + 1] + c_right[q] * c_mid[q + 1],
                      c_right[q] * c_left[q + 2], zero], axis=1)
    walk = np.stack([2.0 * g[q]**2 * (1.0 / hl[q] + 1.0 / hr[q]), -2.0 * g[q] * g[q + 1] / hr[q], zero, zero],
                    axis=1)
    centre = time_s[1:-1]
    tau = np.stack([centre[q + m] - centre[q] for m in range(4)], axis=1)
    return prods, noise, walk, tau, q + 1


def _solve(noise, walk, tau, order: int, target: int) -> np.ndarray:
    """α (W, 4): α·N = [target = 0], α·R = [target = 1], Σα = 0 (and α·τ² = 0 for order 1).

    target 0 gives the σ² weights, target 1 the K weights (used only for the pooling weights).
    Rows are scaled by N_0, R_0 and τ_max²; solved by Cramer's rule (α = rhs · cofactors of the
    target row / det), vectorised over windows.
    """
    if noise.shape[0] > 1 and all(np.allclose(a, a[0], rtol=1e-9, atol=0.0) for a in (noise, walk, tau)):
        one = _solve(noise[:1], walk[:1], tau[:1], order, target)       # regular sampling: one system
        return np.broadcast_to(one, (noise.shape[0], 4))
    lags = 3 if order == 0 else 4
    n0, r0 = noise[:, :1], walk[:, :1]
    rows = [noise[:, :lags] / n0, walk[:, :lags] / r0, np.ones((noise.shape[0], lags))]
    if order == 1:
        t2 = tau[:, :lags] ** 2
        rows.append(t2 / t2[:, -1:])
    matrix = np.stack(rows, axis=1)                                   # (W, L, L)
    scale = 1.0 / (n0 if target == 0 else r0)[:, 0]
    cof = np.stack([(-1.0) ** (target + i) * _det(np.delete(np.delete(matrix, target, 1), i, 2))
                    for i in range(lags)], axis=1)                    # cofactors of row `target`
    alpha = scale[:, None] * cof / np.sum(matrix[:, target] * cof, axis=1, keepdims=True)
    return np.pad(alpha, ((0, 0), (0, 4 - lags)))


def _det(m: np.ndarray) -> np.ndarray:
    """Determinants of a stack (W, k, k), k ≤ 3, elementwise (faster than a LAPACK call per matrix)."""
    k = m.shape[-1]
    if k == 1:
        return m[:, 0, 0]
    if k == 2:
        return m[:, 0, 0] * m[:, 1, 1] - m[:, 0, 1] * m[:, 1, 0]
    return (m[:, 0, 0] * (m[:, 1, 1] * m[:, 2, 2] - m[:, 1, 2] * m[:, 2, 1])
            - m[:, 0, 1] * (m[:, 1, 0] * m[:, 2, 2] - m[:, 1, 2] * m[:, 2, 0])
            + m[:, 0, 2] * (m[:, 1, 0] * m[:, 2, 1] - m[:, 1, 1] * m[:, 2, 0]))


# ---------------------------------------------------------------- data
def _arrays(tracks) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time_s (n,), position_m (n, d), track index (n,)) of a Tracks-like object, checked."""
    try:
        time = np.asarray(tracks.time_s, dtype=np.float64)
        position = np.asarray(tracks.position_m, dtype=np.float64)
        ids = np.asarray(tracks.track_id)
    except (AttributeError, TypeError, ValueError) as err:
        raise InputError(f"position error estimate needs tracks with track_id, time_s and position_m ({err})") \
            from None
    if position.ndim != 2 or position.shape[0] != time.shape[0] or ids.shape != time.shape:
        raise InputError(f"position error estimate: track_id {ids.shape}, time_s {time.shape} and position_m "
                         f"{position.shape} do not match (need (n,), (n,), (n, d))")
    if not (np.isfinite(time).all() and np.isfinite(position).all()):
        raise InputError("position error estimate: a time or position is NaN or infinite")
    index = getattr(tracks, "track_index", None)
    if index is None:
        index = np.unique(ids, return_inverse=True)[1]
    return time, position, np.asarray(index, dtype=np.int64)


def _chunks(index: np.ndarray) -> list[tuple[int, int]]:
    """Slices of about CHUNK_FIXES fixes that never cut a track (a longer track is one chunk)."""
    starts = np.flatnonzero(np.r_[True, index[1:] != index[:-1]])
    bounds, lo = [], 0
    for start in starts[1:]:
        if start - lo >= CHUNK_FIXES:
            bounds.append((lo, int(start)))
            lo = int(start)
    return bounds + [(lo, index.size)] if index.size else []


# ---------------------------------------------------------------- pooling
@dataclass(frozen=True)
class _Level:
    """First-pass (unweighted) levels: σ², K and the flow term A (per component), ≥ 0."""

    noise_var_m2: float
    diffusivity_m2_s: float
    flow_m2_s4: float
    typical_var: float          # mean expected variance of one acceleration, m²/s⁴


def _first_pass(time, position, index, spans) -> tuple[_Level, int]:
    d = position.shape[1]
    sums = np.zeros(5)                                   # Σ s, Σ k, Σ P0/d, Σ N0, Σ R0
    count = 0
    for lo, hi in spans:
        prods, noise, walk, tau, _ = _window_moments(time[lo:hi], position[lo:hi], index[lo:hi])
        if not prods.shape[0]:
            continue
        s = np.sum(_solve(noise, walk, tau, 0, 0) * prods, axis=1) / d
        k = np.sum(_solve(noise, walk, tau, 0, 1) * prods, axis=1) / d
        sums += [s.sum(), k.sum(), prods[:, 0].sum() / d, noise[:, 0].sum(), walk[:, 0].sum()]
        count += prods.shape[0]
    if count == 0:
        return _Level(0.0, 0.0, 0.0, 0.0), 0
    s, k, p0, n0, r0 = sums / count
    s, k = max(s, 0.0), max(k, 0.0)
    flow = max(p0 - s * n0 - k * r0, 0.0)
    return _Level(s, k, flow, s * n0 + k * r0 + flow), count


def _unit_sums(time, position, index, spans, level: _Level, per_track: bool) -> np.ndarray:
    """(U, 4): per bootstrap unit Σw s and Σw for the two orders, w = 1/(|α|² v²) (v normalised)."""
    d = position.shape[1]
    rows, units, first_window = [], [], 0
    for lo, hi in spans:
        prods, noise, walk, tau, start = _window_moments(time[lo:hi], position[lo:hi], index[lo:hi])
        if not prods.shape[0]:
            continue
        v = (level.noise_var_m2 * noise[:, 0] + level.diffusivity_m2_s * walk[:, 0] + level.flow_m2_s4)
        v = v / level.typical_var if level.typical_var > 0 else np.ones_like(v)
        cols = []
        for order in (0, 1):
            alpha = _solve(noise, walk, tau, order, 0)
            w = 1.0 / (np.sum(alpha**2, axis=1) * np.maximum(v, 1e-12) ** 2)
            cols += [w * np.sum(alpha * prods, axis=1) / d, w]
        rows.append(np.stack(cols, axis=1))
        window = first_window + np.arange(prods.shape[0])
        units.append(index[lo:hi][start] if per_track else window // BLOCK_WINDOWS)
        first_window += prods.shape[0]
    unit = np.concatenate(units)
    _, unit = np.unique(unit, return_inverse=True)
    data = np.concatenate(rows)
    return np.stack([np.bincount(unit, weights=data[:, c]) for c in range(4)], axis=1)


def _bootstrap(sums: np.ndarray, n_boot: int, seed: int) -> np.ndarray:
    """(n_boot, 2) σ² of each order on resamples of the units (with replacement)."""
    rng = np.random.default_rng([seed, 7919])
    n_units = sums.shape[0]
    out = np.empty((n_boot, 2))
    for b in range(n_boot):
        counts = np.bincount(rng.integers(0, n_units, n_units), minlength=n_units).astype(float)
        total = counts @ sums
        out[b] = total[0] / total[1], total[2] / total[3]
    return out


# ---------------------------------------------------------------- the door
def estimate_position_error(tracks, *, seed: int = 0, n_bootstrap: int = BOOTSTRAP) -> PositionErrorEstimate:
    """σ (m) of one fix per component, from the tracks' second differences (module docstring).

    ``tracks``: a :class:`~driftwise.tracks.Tracks` (or anything with ``track_id`` (n,), ``time_s``
    (n,) s and ``position_m`` (n, d) m, sorted by track then time).  ``seed`` fixes the
    bootstrap.  Memory is bounded: the fixes are processed in chunks of whole tracks.
    """
    time, position, index = _arrays(tracks)
    n_tracks = int(np.unique(index).size)
    spans = _chunks(index)
    level, n_windows = _first_pass(time, position, index, spans)
    if n_windows < MIN_WINDOWS:
        return PositionErrorEstimate(0.0, math.inf, "none", n_windows, False, 0.0, n_tracks,
                                     f"only {n_windows} windows of 6 consecutive fixes (need {MIN_WINDOWS}); "
                                     "the position error cannot be estimated from these tracks")
    per_track = n_tracks >= MIN_UNITS
    sums = _unit_sums(time, position, index, spans, level, per_track)
    boot = _bootstrap(sums, int(n_bootstrap), seed)
    estimate = np.array([sums[:, 0].sum() / sums[:, 1].sum(), sums[:, 2].sum() / sums[:, 3].sum()])
    se = boot.std(axis=0, ddof=1)
    diff_se = float(np.std(boot[:, 0] - boot[:, 1], ddof=1))
    order = 0 if abs(estimate[0] - estimate[1]) <= 2.0 * diff_se else 1
    units = "tracks" if per_track else f"blocks of {BLOCK_WINDOWS} windows"
    method = (f"second differences of the fixes, lag 0-{2 + order} products of the accelerations with the flow "
              f"term cancelled per window ({_ORDERS[order]}); {n_windows} windows of 6 fixes from {n_tracks} "
              f"tracks; SE by bootstrap over {units} ({int(n_bootstrap)} resamples, seed {seed})")
    return _outcome(float(estimate[order]), float(se[order]), method, n_windows, n_tracks)


def _outcome(var_m2: float, se_m2: float, method: str, n_windows: int, n_tracks: int) -> PositionErrorEstimate:
    """σ = √σ², SE(σ) = SE(σ²)/(2σ); or the flagged upper bound √(max(σ², 0) + 2 SE(σ²))."""
    estimate = math.sqrt(max(var_m2, 0.0))
    if var_m2 > 2.0 * se_m2 and var_m2 > 0:
        return PositionErrorEstimate(estimate, se_m2 / (2.0 * estimate), method, n_windows, True, estimate,
                                     n_tracks)
    bound = math.sqrt(max(var_m2, 0.0) + 2.0 * se_m2)
    note = (f"not identifiable: σ² = {var_m2:.3g} ± {se_m2:.3g} m² is not above twice its standard error "
            f"(the random walk or the flow hides the noise at this sampling); using the upper bound "
            f"{format_length(bound)}")
    return PositionErrorEstimate(bound, se_m2 / (2.0 * bound) if bound > 0 else math.inf, method, n_windows,
                                 False, estimate, n_tracks, note)


def position_error_text(record: dict[str, Any]) -> str:
    """One line for a report from its ``position_error_m``, ``position_error_source`` and (when estimated)
    ``position_error_estimate`` (:meth:`PositionErrorEstimate.to_dict`):
    ``position error σ = 0.52 mm (estimated ± 0.03 mm from …)``, ``… (given)`` or, fitted through the transitions
    from ``position_error_start_m``, ``… (fitted through the transitions, started at …)``."""
    source, estimate = record["position_error_source"], record.get("position_error_estimate") or {}
    text = f"position error σ = {format_length(record['position_error_m'])} ({source}"
    if source == "fitted" and record.get("position_error_start_m") is not None:
        return text + f" through the transitions, started at {format_length(record['position_error_start_m'])})"
    if source == "estimated" and estimate:
        se = estimate.get("standard_error_m")
        text += "" if se is None else f" ± {format_length(se)}"
        text += (f" from the second differences of {estimate.get('n_used')} windows of 6 fixes in "
                 f"{estimate.get('n_tracks')} tracks")
        text += f"; {estimate['note']}" if estimate.get("note") else ""
    return text + ")"
