"""One process of the sharding tests (tests/dynamics/test_sharding.py): a spread of 64 releases on every
device of this process, or of all processes joined through the DRIFTWISE_* variables (driftwise.devices).

    python tests/sharding_worker.py OUT.npz

Process 0 writes the gathered moments (means (64, T, 2), covs (64, T, 2, 2)) to OUT.npz; every process
also writes its own copy to OUT.npz.<process id> so a test can check that all received the whole result.
"""

from __future__ import annotations

import sys

import jax
import numpy as np

from driftwise import devices
from driftwise.dynamics import moments
from driftwise.dynamics.sde import sde_from_field
from driftwise.gp import field as fieldmod

RELEASES = 64
TIMES_S = np.arange(0.0, 7.0) * 3600.0


def small_field() -> fieldmod.FlowField:
    """A Helmholtz field, 4 × 4 inducing points over 10 km, q optimal for 150 noisy velocities (seed 0)."""
    grid = np.linspace(0.0, 10_000.0, 4)
    inducing = np.stack(np.meshgrid(grid, grid), axis=-1).reshape(-1, 2)
    params = fieldmod.init_params("helmholtz", 2, inducing, velocity_scale_m_s=0.2, length_scale_m=3000.0,
                                  curl_free_velocity_scale_m_s=0.1, diffusivity_m2_s=2.5)
    rng = np.random.default_rng(0)
    xy = rng.uniform(0.0, 10_000.0, size=(150, 2))
    velocity = 0.1 * np.stack([np.sin(xy[:, 1] / 2000.0), np.cos(xy[:, 0] / 3000.0)], axis=1)
    batch = fieldmod.ObservationBatch(xy, velocity + 0.01 * rng.normal(size=xy.shape),
                                      np.full(150, 2.0 / 600.0), np.full(150, 2.0 * 5.0**2 / 600.0**2))
    return fieldmod.FlowField.from_params(fieldmod.optimal_q(params, batch), decorrelation_time_s=1800.0)


def spread_moments(mesh=None) -> tuple[np.ndarray, np.ndarray]:
    """Means and covariances of the 64 releases (seed 1) on ``mesh`` (default: all devices)."""
    rng = np.random.default_rng(1)
    means0 = rng.uniform(1000.0, 9000.0, size=(RELEASES, 2))
    covs0 = np.broadcast_to(np.eye(2) * 100.0**2, (RELEASES, 2, 2)).copy()
    out = moments.propagate_batch(sde_from_field(small_field()), means0, covs0, TIMES_S, chunk=8, mesh=mesh)
    return np.asarray(out[0]), np.asarray(out[1])


def main(out: str) -> None:
    devices.initialize()
    means, covs = spread_moments()
    info = np.array([jax.process_count(), jax.device_count()])
    np.savez(f"{out}.{jax.process_index()}", means=means, covs=covs, info=info)


if __name__ == "__main__":
    main(sys.argv[1])
