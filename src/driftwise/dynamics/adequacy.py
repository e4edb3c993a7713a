"""Is a single Gaussian a fair summary of a spread forecast?  Measured against a small ensemble.

The moment propagators (:mod:`driftwise.dynamics.moments`) carry a mean m and covariance P and
draw the forecast as the ellipses of N(m, P).  In a flow that curves over the width of
the cloud (a gyre, a shear) the particles spread along an arc: the moments may still be
close, but the ellipse then covers water the material never reaches and misses the
tips of the arc.  This module measures that at one output time by simulating the same
SDE with a small Euler–Maruyama ensemble (:func:`driftwise.dynamics.ensemble.simulate`) and
asking two questions a reader of the figure asks:

* **Coverage**: what share of the simulated particles lies inside the Gaussian's 50 %
  and 95 % ellipses?  A particle x is inside the level-p ellipse when
  (x − m)ᵀ P⁻¹ (x − m) ≤ χ²₂⁻¹(p) = −2 ln(1 − p) (horizontal components).  When the
  law really is N(m, P) (a linear drift with additive noise: the Itô SDE is linear,
  its law Gaussian, e.g. Särkkä & Solin 2019, "Applied Stochastic Differential
  Equations", ch. 6) the shares are p up to the binomial sampling error
  √(p(1 − p)/N); the coverage test is invariant under any affine map of the plane.
* **Moments**: the Hellinger distance between N(m, P) and the Gaussian with the
  ensemble's own mean and covariance (closed form for two Gaussians,
  H² = 1 − det(P₁)^¼ det(P₂)^¼ / det(P̄)^½ · exp(−⅛ δᵀ P̄⁻¹ δ), P̄ = (P₁ + P₂)/2,
  δ = m₁ − m₂; e.g. Pardo 2006, "Statistical Inference Based on Divergence
  Measures", from memory).  0 for equal Gaussians, 1 for disjoint ones.

The summary is called poor (:attr:`GaussianAdequacy.poor`) when the 95 % ellipse holds
less than 90 % of the particles or the 50 % ellipse is off by more than 10 percentage
points (beyond three binomial standard errors of the ensemble).  These margins are a
project choice (what visibly misleads a reader of the map), not a published standard.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import jax
import numpy as np

from ..errors import InputError
from ..units import format_duration
from .ensemble import EulerMaruyama, simulate
from .sde import sde_from_field

__all__ = ["GaussianAdequacy", "gaussian_adequacy", "hellinger_gaussian", "inside_fraction", "spread_adequacy"]

MIN_INSIDE_95 = 0.90       # the 95 % ellipse must hold at least this share of the particles
MAX_OFF_50 = 0.10          # and the 50 % ellipse be within this of one half (project choice, see module doc)


@dataclass(frozen=True)
class GaussianAdequacy:
    """How well N(m, P) summarises the simulated particles at ``time_s`` (s since the release).

    ``inside_50``, ``inside_95``: shares of the ``particles`` inside the Gaussian's 50 % / 95 %
    ellipses (–); ``se_50``, ``se_95``: their binomial standard errors at the nominal level (–);
    ``hellinger``: distance between the Gaussian and the ensemble's Gaussian fit (–, 0..1);
    ``ensemble_mean_m`` (2,), ``ensemble_cov_m2`` (2, 2): the ensemble's own moments;
    ``samples_m`` (N, 2): the simulated positions (metres, the model's frame), to draw.
    """

    time_s: float
    particles: int
    inside_50: float
    inside_95: float
    se_50: float
    se_95: float
    hellinger: float
    ensemble_mean_m: np.ndarray
    ensemble_cov_m2: np.ndarray
    samples_m: np.ndarray

    @property
    def poor(self) -> bool:
        """True when the ellipses misstate where the particles are (see the module docstring)."""
        low_95 = self.inside_95 < MIN_INSIDE_95 - 3.0 * self.se_95
        off_50 = abs(self.inside_50 - 0.5) > MAX_OFF_50 + 3.0 * self.se_50
        return bool(low_95 or off_50)

    def sentence(self, what: str = "") -> str:
        """One line for a figure or report: what the ellipses hold, and what to do when that is poor.

        ``what`` names the release checked (e.g. "the oldest parcel"), else "this release"."""
        held = (f"at {format_duration(self.time_s)} the 95 % ellipse holds {100 * self.inside_95:.0f} % and the 50 % ellipse "
                f"{100 * self.inside_50:.0f} % of {self.particles} simulated particles")
        subject = what or "this release"
        if not self.poor:
            return f"Gaussian summary checked for {subject}: {held}."
        return (f"The single-Gaussian ellipses are a poor summary of {subject}: {held} (nominal 95 % and 50 %). "
                "Use the ensemble method (driftwise spread --method ensemble) here.")

    def to_dict(self) -> dict[str, Any]:
        return {"time_s": self.time_s, "particles": self.particles, "inside_50_ellipse": self.inside_50,
                "inside_95_ellipse": self.inside_95, "hellinger_distance": self.hellinger, "poor": self.poor}


def inside_fraction(points_m: Any, mean_m: Any, cov_m2: Any, level: float) -> float:
    """Share of ``points_m`` (N, 2) inside the ``level`` ellipse of N(mean (2,), cov (2, 2)) (χ²₂ radius)."""
    d = np.asarray(points_m, float)[:, :2] - np.asarray(mean_m, float)[:2]
    cov = np.asarray(cov_m2, float)[:2, :2]
    maha2 = np.einsum("ni,ij,nj->n", d, np.linalg.pinv(0.5 * (cov + cov.T)), d)
    return float(np.mean(maha2 <= -2.0 * math.log1p(-level)))


def hellinger_gaussian(mean1: Any, cov1: Any, mean2: Any, cov2: Any) -> float:
    """Hellinger distance H (–, 0..1) between N(mean1, cov1) and N(mean2, cov2); formula in the module doc."""
    m1, m2 = np.asarray(mean1, float), np.asarray(mean2, float)
    p1, p2 = np.asarray(cov1, float), np.asarray(cov2, float)
    avg = 0.5 * (p1 + p2)
    _, ld1 = np.linalg.slogdet(p1)
    _, ld2 = np.linalg.slogdet(p2)
    _, lda = np.linalg.slogdet(avg)
    delta = m1 - m2
    log_bc = 0.25 * ld1 + 0.25 * ld2 - 0.5 * lda - 0.125 * float(delta @ np.linalg.solve(avg, delta))
    return float(math.sqrt(max(0.0, 1.0 - math.exp(log_bc))))


def gaussian_adequacy(sde: Any, mean0_m: Any, cov0_m2: Any, times_s: Any, mean_m: Any, cov_m2: Any, *,
                      key: jax.Array, particles: int = 1000, step_s: float = 300.0,
                      start_time_s: float | None = None) -> GaussianAdequacy:
    """Compare the Gaussian N(``mean_m``, ``cov_m2``) at ``times_s[-1]`` with an ensemble of the same SDE.

    ``sde`` (:class:`driftwise.dynamics.sde.SDE`), the release N(``mean0_m`` (d,) m, ``cov0_m2`` (d, d) m²),
    ``times_s`` (T,) s since the release from 0 (the ensemble reports at these times; only the last
    is used), the Gaussian summary at the last time ``mean_m`` (d,) m, ``cov_m2`` (d, d) m²
    (e.g. the cubature forecast).  ``particles`` Euler–Maruyama paths with step ≤ ``step_s`` s
    (weak order 1; Kloeden & Platen 1992), seeded by ``key``; ``start_time_s`` the release's absolute start
    (s; needed by a time-dependent SDE).  Horizontal components only.
    """
    mean_m, cov_m2 = np.asarray(mean_m, float), np.asarray(cov_m2, float)
    if mean_m.ndim != 1 or mean_m.size < 2 or cov_m2.shape != (mean_m.size, mean_m.size):
        raise InputError(f"gaussian_adequacy: mean_m (d,) and cov_m2 (d, d) with d >= 2 expected, "
                         f"got {mean_m.shape} and {cov_m2.shape}")
    method = EulerMaruyama(particles=int(particles), step_s=float(step_s), chunk=min(int(particles), 4096))
    result = simulate(sde, mean0_m, cov0_m2, times_s, method=method, key=key, keep_samples=True,
                      start_time_s=start_time_s)
    samples = np.asarray(result.samples)[:, :2]
    ens_mean, ens_cov = np.asarray(result.mean)[-1, :2], np.asarray(result.cov)[-1, :2, :2]
    m, p = mean_m[:2], cov_m2[:2, :2]
    n = samples.shape[0]
    return GaussianAdequacy(
        time_s=float(np.asarray(times_s, float)[-1]), particles=n,
        inside_50=inside_fraction(samples, m, p, 0.5), inside_95=inside_fraction(samples, m, p, 0.95),
        se_50=math.sqrt(0.25 / n), se_95=math.sqrt(0.95 * 0.05 / n),
        hellinger=hellinger_gaussian(m, p, ens_mean, ens_cov), ensemble_mean_m=ens_mean, ensemble_cov_m2=ens_cov,
        samples_m=samples)


def spread_adequacy(field: Any, forecast: Any, release: int = 0, *, particles: int = 1000, step_s: float = 300.0,
                    seed: int = 0) -> GaussianAdequacy:
    """:func:`gaussian_adequacy` of release ``release`` of a :class:`driftwise.dynamics.spread.Spread` made from ``field``.

    The SDE is :func:`driftwise.dynamics.sde.sde_from_field` with the field's own K and τ (as the forecast's);
    the Gaussian is the forecast's mean and covariance at its last output time.
    """
    if not 0 <= release < len(forecast.releases):
        raise InputError(f"spread_adequacy: release index {release} is outside 0..{len(forecast.releases) - 1}")
    rel = forecast.releases[release]
    return gaussian_adequacy(sde_from_field(field), rel.start_m, rel.cov0_m2, forecast.times_s,
                             forecast.means[release, -1], forecast.covs[release, -1], key=jax.random.key(seed),
                             particles=particles, step_s=step_s, start_time_s=rel.start_time_s)
