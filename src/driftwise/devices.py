"""Work split over every device of every process, on JAX's own sharding engine.

Rows of a batch (releases of a spread, chunks of observations in the fit's full-data passes) are spread
over a one-axis :class:`jax.sharding.Mesh` of all devices (``jax.devices()``: every process's devices
after :func:`initialize`), each device computes its rows (``jax.shard_map``), and the results are
gathered back to every process.  The same code runs on one CPU, on CPU devices forced with
``XLA_FLAGS=--xla_force_host_platform_device_count=N``, on GPUs, and on several processes or hosts.

Several processes: each process runs the same command with

    DRIFTWISE_COORDINATOR=host:port   (the address of process 0, reachable from all)
    DRIFTWISE_NUM_PROCESSES=P
    DRIFTWISE_PROCESS_ID=i            (0 … P − 1)

and :func:`initialize` calls ``jax.distributed.initialize`` with them, on CPU with the gloo collectives
(``jax_cpu_collectives_implementation``).  Every process holds the whole input (same files, same seed),
provides the rows of its own devices, and receives the whole result.
"""

from __future__ import annotations

import os
from typing import Any

import jax
import numpy as np
from jax.experimental import multihost_utils
from jax.sharding import Mesh, NamedSharding, PartitionSpec

from .errors import InputError

__all__ = ["AXIS", "ENV_COORDINATOR", "ENV_NUM_PROCESSES", "ENV_PROCESS_ID", "gather_rows", "initialize",
           "mesh", "replicate", "shard_rows"]

AXIS = "rows"
ENV_COORDINATOR = "DRIFTWISE_COORDINATOR"
ENV_NUM_PROCESSES = "DRIFTWISE_NUM_PROCESSES"
ENV_PROCESS_ID = "DRIFTWISE_PROCESS_ID"


def initialize(environ: Any = None) -> bool:
    """Join a multi-process run when DRIFTWISE_COORDINATOR is set (see the module doc); True if joined.

    Must run before any other jax work in the process.  Raises InputError naming the variable when
    one is missing or malformed.
    """
    env = os.environ if environ is None else environ
    address = env.get(ENV_COORDINATOR)
    if not address:
        return False
    if jax.distributed.is_initialized():
        return True
    try:
        count, rank = int(env[ENV_NUM_PROCESSES]), int(env[ENV_PROCESS_ID])
    except (KeyError, ValueError):
        raise InputError(f"{ENV_COORDINATOR} is set, so {ENV_NUM_PROCESSES} (the number of processes) and "
                         f"{ENV_PROCESS_ID} (this process, 0 … N − 1) must be integers too") from None
    if count < 1 or not 0 <= rank < count:
        raise InputError(f"{ENV_PROCESS_ID}={rank} must be in 0 … {ENV_NUM_PROCESSES} − 1 = {count - 1}")
    jax.config.update("jax_cpu_collectives_implementation", "gloo")
    jax.distributed.initialize(coordinator_address=address, num_processes=count, process_id=rank)
    return True


def mesh(devices: Any = None) -> Mesh:
    """A one-axis mesh (axis ``rows``) over ``devices`` (default: all devices of all processes)."""
    return Mesh(np.asarray(jax.devices() if devices is None else devices), (AXIS,))


def shard_rows(array: Any, over: Mesh) -> tuple[jax.Array, int]:
    """(global array split by rows over ``over``, the true row count): rows padded to a multiple of the
    mesh size by repeating the last row (each process supplies its own devices' rows from its copy)."""
    host = np.asarray(array)
    n = host.shape[0]
    pad = (-n) % over.size
    padded = np.concatenate([host, np.repeat(host[-1:], pad, axis=0)]) if pad else host
    sharding = NamedSharding(over, PartitionSpec(AXIS))
    return jax.make_array_from_callback(padded.shape, sharding, lambda idx: padded[idx]), n


def replicate(tree: Any, over: Mesh) -> Any:
    """Every array leaf of ``tree`` as a global array with a full copy on each device of ``over``."""
    sharding = NamedSharding(over, PartitionSpec())

    def one(leaf: Any) -> Any:
        if not isinstance(leaf, (jax.Array, np.ndarray)):
            return leaf
        host = np.asarray(leaf)
        return jax.make_array_from_callback(host.shape, sharding, lambda idx: host[idx])

    return jax.tree_util.tree_map(one, tree)


def gather_rows(array: jax.Array, n: int) -> np.ndarray:
    """The first ``n`` rows of a row-sharded global array, as one numpy array in every process."""
    if jax.process_count() > 1:
        return np.asarray(multihost_utils.process_allgather(array, tiled=True))[:n]
    return np.asarray(array)[:n]
