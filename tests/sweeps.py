"""One registry sweep per family of choices, shared by the tests of every layer.

A new kernel family or forecast method joins the registry (``gp.kernels.KERNEL_FAMILIES``,
``dynamics.methods.METHODS``) and is then put through the same checks by every test that sweeps these
lists, without editing the tests.
"""

from __future__ import annotations

import itertools

import jax
import jax.numpy as jnp
import numpy as np

import driftwise  # noqa: F401  (float64)
from driftwise.dynamics.methods import METHODS
from driftwise.dynamics.sde import SDE
from driftwise.dynamics.spread import Release
from driftwise.gp.kernels import BASES, KERNEL_FAMILIES

# every kernel family × scalar base × dimension
KERNEL_CASES = list(itertools.product(KERNEL_FAMILIES, BASES, (2, 3)))

# every forecast method by name, and the moment methods' strategy objects (the ensemble has its own error model)
METHOD_NAMES = list(METHODS)
MOMENT_METHODS = [spec.build(0, 3) for spec in METHODS.values() if not spec.ensemble]


def _linear_drift(matrix, x):
    return matrix @ x


def _isotropic_diffusion(k, x):
    return 2.0 * k * jnp.eye(x.shape[-1])


def decaying_rotation(a: float = 1e-4, b: float = 2e-4, k: float = 1.0):
    """The shared reference problem of the method sweep: dx = A x dt + √(2K) dβ with A = −a I + b J.

    Closed form (the linear moment equations dm/dt = A m, dP/dt = AP + PAᵀ + 2K I, Jazwinski 1970 §7,
    solved by hand): m(t) = e^{−at} R(bt) m0 and, for an isotropic P0 = p0 I,
    P(t) = (p0 e^{−2at} + K (1 − e^{−2at}) / a) I.  Returns (sde, releases, times_s, mean (R, T, 2) m,
    covariance (R, T, 2, 2) m², the largest exact variance m²).
    """
    matrix = jnp.array([[-a, -b], [b, -a]])
    sde = SDE(drift=jax.tree_util.Partial(_linear_drift, matrix),
              diffusion=jax.tree_util.Partial(_isotropic_diffusion, jnp.asarray(k)))
    releases = [Release([100.0, 0.0], name="=cmd"),
                Release([0.0, 50.0], start_time_s=3600.0, cov0_m2=25.0 * np.eye(2))]
    times = np.arange(0.0, 6 * 3600.0 + 1, 3600.0)
    decay, angle = np.exp(-a * times), b * times
    rot = np.stack([np.stack([np.cos(angle), -np.sin(angle)], -1), np.stack([np.sin(angle), np.cos(angle)], -1)], -2)
    mean = np.stack([decay[:, None] * (rot @ r.start_m) for r in releases])
    var = np.stack([p0 * decay**2 + k * (1 - decay**2) / a for p0 in (0.0, 25.0)])
    return sde, releases, times, mean, var[..., None, None] * np.eye(2), float(var.max())
