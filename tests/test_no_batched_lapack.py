"""No batched LAPACK call in the programs that run under vmap over many points, releases or transitions.

jaxlib 0.10.2's CPU LAPACK kernels split a large batch into tasks on XLA's intra-op thread pool and block the
calling pool thread until they finish; two such calls running at once on a 2-core machine left no thread to run
the tasks and the process hung at 0 % CPU (the time-varying table build, in CI).  These programs therefore use
driftwise.smallmatrix under vmap; unbatched calls (one matrix) run inline and are allowed.  The check reads the
compiled program (HLO text) that XLA would run, so it fails whenever a batched call comes back.
"""

from __future__ import annotations

import re

import jax
import jax.numpy as jnp
import numpy as np

from driftwise.dynamics import calibrate, tabulate, transitionbound, transitions

CALL = re.compile(r"=\s*\(?\s*f64\[([0-9,]*)\][^\n]*custom_call_target=\"(lapack_[a-z_]+)")


def batched_lapack_calls(program, *args) -> list[str]:
    """The LAPACK custom calls of ``program`` compiled for ``args`` whose result has batch dimensions."""
    text = jax.jit(program).lower(*args).compile().as_text()
    found = [(target, shape) for shape, target in CALL.findall(text)]
    assert all(target.startswith("lapack_") for target, _ in found)
    return [f"{target} {shape}" for target, shape in found if shape.count(",") >= 2]


class TenChannels:
    """A posterior with 10 mean channels and a smooth SPD 10 × 10 covariance (like a tidal field's parts)."""

    def mean_at(self, x):
        return jnp.sin(x[0] / 1000.0 + jnp.arange(10.0)) + jnp.cos(x[1] / 2000.0)

    def cov_at(self, x):
        a = jnp.cos(jnp.outer(jnp.arange(10.0), jnp.arange(10.0)) * 0.1 + x[0] / 5000.0)
        return a @ a.T + (2.0 + jnp.sin(x[1] / 3000.0)) * jnp.eye(10)


def test_time_varying_table_nodes():
    nodes = jnp.asarray(np.random.default_rng(0).uniform(0.0, 10_000.0, (256, 2)))
    program = jax.vmap(lambda x: tabulate._node_values(TenChannels(), jnp.array([100.0, 100.0]), x))
    assert batched_lapack_calls(program, nodes) == []


def test_transition_log_density_and_its_gradient():
    x, mean = jnp.ones((4096, 3)), jnp.zeros((4096, 3))
    cov = jnp.broadcast_to(jnp.eye(3) * 2.0, (4096, 3, 3))
    program = jax.vmap(jax.value_and_grad(transitions.gaussian_log_density, argnums=(1, 2)))
    assert batched_lapack_calls(program, x, mean, cov) == []


def test_calibration_likelihood_and_its_gradient():
    means, observed = jnp.zeros((512, 5, 2)), jnp.ones((512, 5, 2))
    covs = jnp.broadcast_to(jnp.eye(2), (512, 5, 2, 2))
    obs_var, weight = jnp.full((512, 5), 4.0), jnp.ones((512, 5))
    program = jax.value_and_grad(calibrate._mean_log_likelihood, argnums=(0, 1))
    assert batched_lapack_calls(program, means, covs, observed, obs_var, weight) == []


def test_transition_bound_jacobian():
    cross, cov = jnp.ones((4096, 3, 3)), jnp.broadcast_to(jnp.eye(3) * 5.0, (4096, 3, 3))
    assert batched_lapack_calls(jax.vmap(transitionbound.expected_jacobian), cross, cov) == []


def test_the_check_sees_a_batched_call():
    """The detector itself: jnp.linalg.cholesky under vmap is a batched LAPACK call."""
    covs = jnp.broadcast_to(jnp.eye(10) * 2.0, (256, 10, 10))
    assert batched_lapack_calls(jax.vmap(jnp.linalg.cholesky), covs) == ["lapack_dpotrf_ffi 256,10,10"]
