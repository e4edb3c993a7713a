"""Analytic test flows for connectivity and back-tracking (tests only): a uniform stream with diffusion, and a
Lamb–Oseen vortex in a uniform stream (Lamb 1932, "Hydrodynamics", §334a: azimuthal speed
Γ / (2π r) · (1 − exp(−r² / r_c²))), each as a driftwise SDE and as a numpy drift for reference walkers."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np

from driftwise.dynamics.sde import SDE

STREAM_M_S = np.array([0.10, 0.03])
CIRCULATION_M2_S = 2.0e3
CORE_M = 1500.0
DIFFUSIVITY_M2_S = 5.0


def _vortex(x, y, xp):
    r2 = x * x + y * y
    safe = xp.where(r2 > 0, r2, 1.0)
    factor = CIRCULATION_M2_S / (2 * np.pi) * -xp.expm1(-safe / CORE_M**2) / safe
    factor = xp.where(r2 > 0, factor, 0.0)
    return STREAM_M_S[0] - factor * y, STREAM_M_S[1] + factor * x


def vortex_drift(x):
    """Stream plus Lamb–Oseen vortex at the origin: x (d,) m → (d,) m/s (jax)."""
    u, v = _vortex(x[0], x[1], jnp)
    return jnp.stack([u, v])


def vortex_drift_np(x):
    """The same drift for positions (n, 2) (numpy)."""
    u, v = _vortex(x[:, 0], x[:, 1], np)
    return np.stack([u, v], -1)


SHEAR_PER_S = np.array([[1.0e-5, 4.0e-5], [-1.0e-5, -1.0e-5]])   # a linear flow: strain, shear and rotation


def linear_drift(x):
    """Uniform stream plus a linear flow A x: x (d,) m → (d,) m/s (jax)."""
    return jnp.asarray(STREAM_M_S) + jnp.asarray(SHEAR_PER_S) @ x


def linear_drift_np(x):
    """The same drift for positions (n, 2) (numpy)."""
    return STREAM_M_S + x @ SHEAR_PER_S.T


def _stream(x):
    return jnp.asarray(STREAM_M_S) + 0.0 * x


def _diffusion(x):
    return 2.0 * DIFFUSIVITY_M2_S * jnp.eye(2)


def _no_drift(x):
    return 0.0 * x


LINEAR_SDE = SDE(drift=linear_drift, diffusion=_diffusion)
VORTEX_SDE = SDE(drift=vortex_drift, diffusion=_diffusion)
STREAM_SDE = SDE(drift=_stream, diffusion=_diffusion)
DIFFUSION_SDE = SDE(drift=_no_drift, diffusion=_diffusion)


def random_walk(x0, times_s, step_s, rng, drift=vortex_drift_np):
    """Euler–Maruyama walkers (numpy, Kloeden & Platen 1992): positions (T, n, 2) at times_s from x0 (n, 2)."""
    x = np.array(x0, dtype=np.float64)
    out = [x.copy()]
    for span in np.diff(times_s):
        n = int(np.ceil(span / step_s - 1e-9))
        h = span / n
        for _ in range(n):
            x = x + h * drift(x) + np.sqrt(2 * DIFFUSIVITY_M2_S * h) * rng.standard_normal(x.shape)
        out.append(x.copy())
    return np.stack(out)
