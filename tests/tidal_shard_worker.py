"""One process of tests/dynamics/test_sharding.py's time-varying check: 512 releases through the exact posterior
of the tidal field of test_timetable.py on 8 × 8 inducing points (M = 64), cubature, RK4 1 h over one day, in
batches of 256 rows (moments.propagate_batch caps them on several CPU devices), on every device of this process.

    python tests/tidal_shard_worker.py OUT.npz
"""

from __future__ import annotations

import sys
from pathlib import Path

import jax
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent / "dynamics"))
from test_timetable import tidal_field  # noqa: E402

from driftwise.dynamics import moments  # noqa: E402
from driftwise.dynamics.sde import sde_from_field  # noqa: E402

RELEASES = 512


def main(out: str) -> None:
    field = tidal_field(n_side=8)
    rng = np.random.default_rng(0)
    means0 = rng.uniform(0.0, 10_000.0, (RELEASES, 2))
    covs0 = np.broadcast_to(np.eye(2) * 100.0**2, (RELEASES, 2, 2)).copy()
    starts = float(field.time_origin_s) + rng.uniform(0.0, 86400.0, RELEASES)
    means, covs = moments.propagate_batch(sde_from_field(field), means0, covs0, np.array([0.0, 86400.0]),
                                          integrator=moments.RK4(3600.0), chunk=256, start_times_s=starts)
    np.savez(out, means=np.asarray(means), covs=np.asarray(covs), devices=jax.device_count())


if __name__ == "__main__":
    main(sys.argv[1])
