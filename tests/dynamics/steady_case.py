"""A fixed steady forecast case whose numbers were saved from `main` before time-dependent SDEs existed
(tests/dynamics/files/steady_reference.npz); test_timevarying checks they are reproduced bit for bit.

Regenerate only on purpose:  PYTHONPATH=src python tests/dynamics/steady_case.py
"""

from __future__ import annotations

from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

import driftwise  # noqa: F401  (float64)
from driftwise.data.frame import Frame
from driftwise.dynamics import ensemble, moments
from driftwise.dynamics.sde import SDE, velocity_memory_weight
from driftwise.dynamics.spread import Release, spread_from_field
from driftwise.dynamics.transitions import TransitionSet, transition_log_likelihoods
from driftwise.gp import field as fieldmod

REFERENCE = Path(__file__).with_name("files") / "steady_reference.npz"
Partial = jax.tree_util.Partial


def _gyre_drift(omega, x):
    """A nonlinear gyre: solid rotation that weakens outwards, plus a weak inflow (m/s)."""
    r2 = jnp.sum(x**2) / 4e6
    rot = jnp.array([-x[1], x[0]]) * omega / (1.0 + r2)
    return rot - 1e-5 * x * jnp.tanh(r2)


def _aged_diffusion(k, tau, x, age_s):
    """2 (K I + τ(1 − e^{−a/τ}) S(x)), S(x) a position-dependent velocity covariance (m²/s)."""
    s = 1e-4 * jnp.array([[1.0 + 0.5 * jnp.sin(x[0] / 900.0), 0.2], [0.2, 1.0 + 0.3 * jnp.cos(x[1] / 700.0)]])
    return 2.0 * (k * jnp.eye(2) + velocity_memory_weight(tau, age_s) * s)


def gyre_sde() -> SDE:
    return SDE(Partial(_gyre_drift, jnp.asarray(2e-4)), Partial(_aged_diffusion, jnp.asarray(0.5), jnp.asarray(1800.0)),
               with_age=True)


def small_field(data_summary: dict | None = None) -> fieldmod.FlowField:
    rng = np.random.default_rng(3)
    xy = rng.uniform(-5000.0, 5000.0, size=(300, 2))
    velocity = np.stack([-xy[:, 1], xy[:, 0]], -1) * 2e-5 + 0.02 * rng.normal(size=xy.shape)
    grid = np.linspace(-5000.0, 5000.0, 5)
    inducing = np.stack(np.meshgrid(grid, grid), axis=-1).reshape(-1, 2)
    params = fieldmod.init_params("helmholtz", 2, inducing, velocity_scale_m_s=0.15, length_scale_m=3000.0,
                                  diffusivity_m2_s=1.0, noise_floor_m_s=0.02)
    batch = fieldmod.ObservationBatch(jnp.asarray(xy), jnp.asarray(velocity), jnp.full(300, 2.0 / 1800.0),
                                      jnp.full(300, 2.0 * 10.0**2 / 1800.0**2))
    return fieldmod.FlowField.from_params(fieldmod.optimal_q(params, batch), decorrelation_time_s=1800.0,
                                        frame=Frame(), data_summary=data_summary)


STARTS = np.array([[1000.0, -500.0], [-2000.0, 300.0], [400.0, 2500.0]])
TIMES = np.array([0.0, 600.0, 1800.0, 3600.0, 7200.0])


def compute() -> dict[str, np.ndarray]:
    """Every steady forecast path: four moment methods (RK4), cubature with Dopri5, the ensemble, the
    transition likelihood and spread_from_field on a fitted field (moments and ensemble)."""
    sde = gyre_sde()
    covs0 = np.broadcast_to(100.0 * np.eye(2), (3, 2, 2))
    out = {}
    for name, method in (("linearize", moments.Linearize()), ("cubature", moments.SphericalCubature()),
                         ("unscented", moments.Unscented()), ("gauss-hermite", moments.GaussHermite(3))):
        m, p = moments.propagate_batch(sde, STARTS, covs0, TIMES, method=method, integrator=moments.RK4(300.0))
        out[f"{name}_mean"], out[f"{name}_cov"] = np.asarray(m), np.asarray(p)
    m, p = moments.propagate(sde, STARTS[0], covs0[0], TIMES, integrator=moments.Dopri5(rtol=1e-8, atol=1e-8))
    out["dopri5_mean"], out["dopri5_cov"] = np.asarray(m), np.asarray(p)
    res = ensemble.simulate(sde, STARTS[1], covs0[1], TIMES, method=ensemble.EulerMaruyama(500, 120.0, 256),
                            key=jax.random.key(7))
    out["ensemble_mean"], out["ensemble_cov"] = np.asarray(res.mean), np.asarray(res.cov)
    trans = TransitionSet(STARTS, STARTS + np.array([[50.0, 80.0], [-30.0, 10.0], [0.0, -90.0]]),
                          np.array([900.0, 1800.0, 3600.0]), np.zeros(3, int), 10.0)
    out["transition_loglik"] = transition_log_likelihoods(sde, trans, step_s=300.0)
    field = small_field()
    releases = [Release(s, start_time_s=t) for s, t in zip(STARTS, (0.0, 5000.0, -300.0))]
    for method in ("cubature", "ensemble"):
        spread = spread_from_field(field, releases, TIMES, method=method, particles=400, step_s=300.0, seed=2)
        out[f"field_{method}_mean"], out[f"field_{method}_cov"] = spread.means, spread.covs
    return out


if __name__ == "__main__":
    np.savez(REFERENCE, **compute())
    print(f"wrote {REFERENCE}")
