"""Tidal current ellipses: the four parameters of one constituent's current, and their posterior s.d.

A constituent of angular frequency ω adds u(t) = a cos ωt + b sin ωt to the velocity, with the cosine and
sine amplitude vectors a = (a_u, a_v), b = (b_u, b_v) in m/s (t on the model's time axis).  In complex form
w = u + i v = W₊ e^{iωt} + W₋ e^{−iωt}, the sum of a counter-clockwise and a clockwise rotating vector with

    W₊ = ½ [(a_u + b_v) + i (a_v − b_u)],      W₋ = ½ [(a_u − b_v) + i (a_v + b_u)]

(rotary components; Gonella 1972, "A rotary-component method for analysing meteorological and oceanographic
vector time series", Deep-Sea Res. 19:833–846; ellipse parameters from them as in Prandle 1982, "The vertical
structure of tidal currents", Geophys. Astrophys. Fluid Dyn. 22:29–49; both from memory).  With ε± = arg W±:

    semi-major  A = |W₊| + |W₋|                  (m/s)
    semi-minor  B = |W₊| − |W₋|                  (m/s; B > 0: the current vector turns counter-clockwise)
    inclination θ = (ε₊ + ε₋) / 2   in [0°, 180°), counter-clockwise from east
    phase       g = (ε₋ − ε₊) / 2   in [0°, 360°), the lag of the greatest current along θ after t = 0

so that w(t) = e^{iθ} [A cos(ωt − g) + i B sin(ωt − g)] (the inverse, :func:`amplitudes_from_ellipse`).
Bringing θ into [0°, 180°) by k·180° adds k·180° to g, which leaves w(t) unchanged.

Posterior standard deviations come from the (4 × 4) covariance Σ of (a_u, a_v, b_u, b_v) by the delta method,
Cov ≈ J Σ Jᵀ with J the Jacobian of the four parameters (``jax.jacfwd``); valid while the s.d. of (a, b) is
small against |W₋| and |W₊|.  Where either rotary component vanishes (a circular ellipse, or a degenerate
W₊ = 0), the parameters are not differentiable and the s.d. is NaN.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError
from ..files import plain

__all__ = ["TidalEllipses", "amplitudes_from_ellipse", "ellipse_parameters", "tidal_ellipses"]


@dataclass(frozen=True)
class TidalEllipses:
    """Ellipse parameters at n points, each (n,), and their delta-method s.d. (NaN where not available)."""

    semi_major_m_s: np.ndarray
    semi_minor_m_s: np.ndarray
    inclination_deg: np.ndarray
    phase_deg: np.ndarray
    semi_major_sd_m_s: np.ndarray
    semi_minor_sd_m_s: np.ndarray
    inclination_sd_deg: np.ndarray
    phase_sd_deg: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready lists keyed by the field names (units in the names)."""
        return {name: plain(np.asarray(value)) for name, value in self.__dict__.items()}


def ellipse_parameters(amplitudes_m_s: jax.Array) -> jax.Array:
    """(a_u, a_v, b_u, b_v) in m/s → (semi-major m/s, semi-minor m/s, inclination °, phase °) for one point.

    Pure and differentiable away from W± = 0 (module docstring for the formulas); use under ``jax.vmap``.
    """
    a_u, a_v, b_u, b_v = amplitudes_m_s[0], amplitudes_m_s[1], amplitudes_m_s[2], amplitudes_m_s[3]
    plus_re, plus_im = 0.5 * (a_u + b_v), 0.5 * (a_v - b_u)
    minus_re, minus_im = 0.5 * (a_u - b_v), 0.5 * (a_v + b_u)
    size_plus = jnp.sqrt(plus_re**2 + plus_im**2)
    size_minus = jnp.sqrt(minus_re**2 + minus_im**2)
    eps_plus, eps_minus = jnp.arctan2(plus_im, plus_re), jnp.arctan2(minus_im, minus_re)
    theta = 0.5 * (eps_plus + eps_minus)
    phase = 0.5 * (eps_minus - eps_plus)
    turns = jnp.floor(theta / jnp.pi)
    theta, phase = theta - turns * jnp.pi, jnp.mod(phase + turns * jnp.pi, 2.0 * jnp.pi)
    return jnp.stack([size_plus + size_minus, size_plus - size_minus, jnp.degrees(theta), jnp.degrees(phase)])


def amplitudes_from_ellipse(semi_major_m_s: Any, semi_minor_m_s: Any, inclination_deg: Any,
                            phase_deg: Any) -> np.ndarray:
    """The inverse: (..., 4) amplitudes (a_u, a_v, b_u, b_v) in m/s of the ellipse with these parameters.

    From w(t) = e^{iθ} [A cos(ωt − g) + i B sin(ωt − g)]:  a = e^{iθ} (A cos g − i B sin g),
    b = e^{iθ} (A sin g + i B cos g), with a = a_u + i a_v and b = b_u + i b_v.
    """
    major, minor = np.asarray(semi_major_m_s, float), np.asarray(semi_minor_m_s, float)
    theta, g = np.radians(np.asarray(inclination_deg, float)), np.radians(np.asarray(phase_deg, float))
    turn = np.exp(1j * theta)
    a = turn * (major * np.cos(g) - 1j * minor * np.sin(g))
    b = turn * (major * np.sin(g) + 1j * minor * np.cos(g))
    return np.stack([a.real, a.imag, b.real, b.imag], axis=-1)


@jax.jit
def _parameters_and_cov(mean: jax.Array, cov: jax.Array) -> tuple[jax.Array, jax.Array]:
    """vmapped parameters (n, 4) and their delta-method covariance J Σ Jᵀ (n, 4, 4)."""
    params = jax.vmap(ellipse_parameters)(mean)
    jac = jax.vmap(jax.jacfwd(ellipse_parameters))(mean)
    return params, jnp.einsum("nij,njk,nlk->nil", jac, cov, jac)


def tidal_ellipses(mean_m_s: Any, cov_m2_s2: Any = None) -> TidalEllipses:
    """Ellipse parameters at n points from (n, 4) amplitudes (a_u, a_v, b_u, b_v) m/s and their (n, 4, 4)
    posterior covariance (m²/s²; None → s.d. NaN).  A single point may be given as (4,) and (4, 4)."""
    mean = np.asarray(mean_m_s, dtype=float)
    mean = mean[None, :] if mean.shape == (4,) else mean
    if mean.ndim != 2 or mean.shape[1] != 4:
        raise InputError(f"tidal ellipses: amplitudes must have shape (n, 4) as (a_u, a_v, b_u, b_v), "
                         f"got {np.shape(mean_m_s)}")
    n = mean.shape[0]
    cov = np.zeros((n, 4, 4)) if cov_m2_s2 is None else np.asarray(cov_m2_s2, dtype=float)
    cov = cov[None] if cov.shape == (4, 4) and n == 1 else cov
    if cov.shape != (n, 4, 4):
        raise InputError(f"tidal ellipses: the covariance must have shape ({n}, 4, 4), got {np.shape(cov_m2_s2)}")
    params, out_cov = (np.asarray(x) for x in _parameters_and_cov(jnp.asarray(mean), jnp.asarray(cov)))
    sd = np.sqrt(np.clip(np.diagonal(out_cov, axis1=-2, axis2=-1), 0.0, None))
    if cov_m2_s2 is None:
        sd = np.full_like(sd, np.nan)
    return TidalEllipses(*(params[:, k] for k in range(4)), *(sd[:, k] for k in range(4)))
