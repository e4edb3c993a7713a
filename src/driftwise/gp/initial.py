"""The starting point of a fit: inducing points by k-means and data-driven starting hyperparameters."""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy.cluster.vq import kmeans2

from .background import TERMS

__all__ = ["KMEANS_SUBSAMPLE", "extent_m", "initial_hyperparameters", "initial_inducing"]

KMEANS_SUBSAMPLE = 20000  # observations used for k-means


def extent_m(position: np.ndarray) -> float:
    """L = (Π ptp_i)^{1/d}, a typical size of the sampled region (m), floored at 1 m."""
    span = np.maximum(np.ptp(position, axis=0), 1e-3 * max(float(np.ptp(position)), 1.0))
    return max(float(np.exp(np.mean(np.log(span)))), 1.0)


def initial_inducing(position_m: np.ndarray, n_inducing: int, *, seed: int) -> np.ndarray:
    """Z (M, d) m: k-means centres (k-means++ start, scipy ``kmeans2``) of the observation midpoints.

    Uses a seeded subsample of at most 20 000 points; coincident centres are merged,
    so M can come out smaller when the data hold fewer distinct places.
    """
    rng = np.random.default_rng(seed)
    points = np.unique(np.asarray(position_m, dtype=np.float64), axis=0)
    if points.shape[0] > KMEANS_SUBSAMPLE:
        points = points[np.sort(rng.choice(points.shape[0], KMEANS_SUBSAMPLE, replace=False))]
    if n_inducing >= points.shape[0]:
        return points
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        centres, _ = kmeans2(points, n_inducing, iter=20, minit="++", rng=rng)
    tol = 1e-6 * extent_m(points)
    return np.unique(np.round(centres / tol) * tol, axis=0)


def initial_hyperparameters(batch, inducing_m: np.ndarray) -> dict[str, float]:
    """Data-driven starting values (m, m/s, m²/s) from an ObservationBatch and Z (M, d) m.

    σ = RMS velocity component (for Helmholtz split equally between the parts);
    ℓ = max(L/8, 2 h) with L the data extent and h = L/M^{1/d} the inducing spacing;
    K such that 2K/Δt̃ is an eighth of the velocity variance at the median Δt̃;
    σ₀ = σ/10; the background's centre x₀ = the mean observation position, its uniform scale σ and
    its rate scales 2σ/L (a linear field reaching speed σ at L/2 from the centre).
    """
    position = np.asarray(batch.position_m)
    velocity = np.asarray(batch.velocity_m_s)
    extent = extent_m(position)
    spacing = extent / inducing_m.shape[0] ** (1.0 / position.shape[1])
    var = max(float(np.mean(velocity**2)), 1e-12)
    dt_median = float(np.median(2.0 / np.asarray(batch.random_walk_coefficient_s_inv)))
    return {"velocity_scale_m_s": math.sqrt(var), "length_scale_m": max(extent / 8.0, 2.0 * spacing),
            "diffusivity_m2_s": var * dt_median / 16.0, "noise_floor_m_s": 0.1 * math.sqrt(var),
            "spacing_m": spacing, "centre_m": position.mean(axis=0),
            "background_scales": {term: math.sqrt(var) * (1.0 if term == "uniform" else 2.0 / extent)
                                  for term in TERMS}}
