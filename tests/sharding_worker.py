"""One process of the sharding tests (tests/dynamics/test_sharding.py): a spread of 64 releases and the
fit's full-data passes (optimal q, ELBO) on every device of this process, or of all processes joined
through the DRIFTWISE_* variables (driftwise.devices).

    python tests/sharding_worker.py OUT.npz

Every process writes what it received (means (64, T, 2), covs (64, T, 2, 2), q_mean, q_sqrt, elbo) to
OUT.<process id>.npz, so a test can check that all received the whole result.
"""

from __future__ import annotations

import sys

import jax
import numpy as np

from driftwise import devices
from driftwise.data.frame import Frame
from driftwise.dynamics import moments
from driftwise.dynamics.sde import sde_from_field
from driftwise.gp import field as fieldmod
from driftwise.gp import variational

RELEASES = 64
TIMES_S = np.arange(0.0, 7.0) * 3600.0


def small_field() -> fieldmod.FlowField:
    """A Helmholtz field, 4 × 4 inducing points over 10 km, q optimal for 150 noisy velocities (seed 0);
    metric frame, data extent 0…10 km."""
    grid = np.linspace(0.0, 10_000.0, 4)
    inducing = np.stack(np.meshgrid(grid, grid), axis=-1).reshape(-1, 2)
    params = fieldmod.init_params("helmholtz", 2, inducing, velocity_scale_m_s=0.2, length_scale_m=3000.0,
                                  curl_free_velocity_scale_m_s=0.1, diffusivity_m2_s=2.5)
    rng = np.random.default_rng(0)
    xy = rng.uniform(0.0, 10_000.0, size=(150, 2))
    velocity = 0.1 * np.stack([np.sin(xy[:, 1] / 2000.0), np.cos(xy[:, 0] / 3000.0)], axis=1)
    batch = fieldmod.ObservationBatch(xy, velocity + 0.01 * rng.normal(size=xy.shape),
                                      np.full(150, 2.0 / 600.0), np.full(150, 2.0 * 5.0**2 / 600.0**2))
    return fieldmod.FlowField.from_params(fieldmod.optimal_q(params, batch), decorrelation_time_s=1800.0,
                                          frame=Frame(), data_summary={"extent_m": {"min": [0.0, 0.0],
                                                                                    "max": [10_000.0, 10_000.0]}})


def spread_moments(mesh=None) -> tuple[np.ndarray, np.ndarray]:
    """Means and covariances of the 64 releases (seed 1) on ``mesh`` (default: all devices)."""
    rng = np.random.default_rng(1)
    means0 = rng.uniform(1000.0, 9000.0, size=(RELEASES, 2))
    covs0 = np.broadcast_to(np.eye(2) * 100.0**2, (RELEASES, 2, 2)).copy()
    out = moments.propagate_batch(sde_from_field(small_field()), means0, covs0, TIMES_S, chunk=8, mesh=mesh)
    return np.asarray(out[0]), np.asarray(out[1])


def fit_passes(mesh=None) -> tuple[np.ndarray, np.ndarray, float]:
    """The full-data passes on 20,000 velocities (3 chunks; seed 2): optimal q's mean and S, and the ELBO."""
    field = small_field()
    rng = np.random.default_rng(2)
    n = 20_000
    xy = rng.uniform(0.0, 10_000.0, size=(n, 2))
    batch = fieldmod.ObservationBatch(xy, 0.1 * np.cos(xy / 3000.0) + 0.02 * rng.normal(size=xy.shape),
                                      np.full(n, 2.0 / 600.0), np.full(n, 2.0 * 5.0**2 / 600.0**2))
    params = variational.exact_q(field.params, batch, jitter_multiple=field.jitter_multiple, mesh=mesh)
    elbo = variational.full_elbo(params, batch, jitter_multiple=field.jitter_multiple, mesh=mesh)
    return np.asarray(params.q_mean), np.asarray(params.q_sqrt), elbo


def main(out: str) -> None:
    devices.initialize()
    means, covs = spread_moments()
    q_mean, q_sqrt, elbo = fit_passes()
    info = np.array([jax.process_count(), jax.device_count()])
    np.savez(f"{out}.{jax.process_index()}", means=means, covs=covs, q_mean=q_mean, q_sqrt=q_sqrt, elbo=elbo,
             info=info)


if __name__ == "__main__":
    main(sys.argv[1])
