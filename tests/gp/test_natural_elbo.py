"""The fit's fused step (driftwise.gp.variational.natural_elbo): q's natural-gradient step and the ELBO at the
new q from one projection Φ, with the q-dependent sums written as traces of G = Φᵀ R⁻¹ Φ.

References beside the checks:
* at γ = 1 on all rows the value is Titsias' (2009, "Variational learning of inducing variables in sparse
  Gaussian processes", eq. 9) collapsed bound log N(y | 0, Q + R) − ½ Σ tr(K_nn − Q_nn)/r_n, evaluated densely
  with scipy.stats.multivariate_normal;
* for any γ and minibatch the value and the gradient in the hyperparameters equal those of the two-pass
  path it replaces (natural_step, then jax.grad of field.elbo at the new q; Hensman, Fusi & Lawrence 2013, §3),
  which tests/gp/test_field.py checks against a dense Hensman et al. (2013, eq. 7) reference.
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import driftwise  # noqa: F401  (float64)
from driftwise.data.observations import Observations
from driftwise.gp import field as fld
from driftwise.gp.temporal import TemporalStart
from driftwise.gp.variational import natural_elbo, natural_step, traced_elbo
from collapsed import dense_collapsed_bound

ELL, N, M = 900.0, 48, 14
HYPER = ("kernel", "log_diffusivity_m2_s", "log_noise_floor_m_s")
OMEGA_M2 = 2.0 * np.pi / (12.4206012 * 3600.0)


def _case(dim: int, seed: int, temporal: bool):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 4 * ELL, (N, dim))
    dt = rng.uniform(600.0, 3600.0, N)
    t = np.cumsum(dt)
    v = 0.2 * np.sin(x @ rng.normal(size=(dim, dim)) / ELL) * (1.0 + 0.5 * np.cos(OMEGA_M2 * t))[:, None]
    v = v + 0.03 * rng.normal(size=v.shape)
    obs = Observations(position_m=x, velocity_m_s=v, dt_s=dt, time_s=t, track_index=np.zeros(N, dtype=int),
                       position_error_m=10.0)
    batch = fld.batch_from_observations(obs)
    start = TemporalStart(("M2",), (OMEGA_M2,), 0.0, harmonic_velocity_scale_m_s=0.1) if temporal else None
    z = rng.uniform(0.0, 4 * ELL, (M, dim))
    params = fld.init_params("helmholtz", dim, z, velocity_scale_m_s=0.2, length_scale_m=ELL, diffusivity_m2_s=0.05,
                             noise_floor_m_s=0.01, temporal=start)
    if not temporal:
        batch = batch.without_time()
    # a q away from the optimum, so that γ < 1 mixes two different natural parameters
    f = params.q_mean.shape[0]
    s = np.tril(rng.normal(scale=0.2, size=(f, f)), -1) + np.diag(rng.uniform(0.3, 1.0, f))
    return dataclasses.replace(params, q_mean=jnp.asarray(rng.normal(size=f)), q_sqrt_raw=fld.q_sqrt_raw_from(s)), batch


def _two_pass(params, batch, n_total, gamma):
    stepped = natural_step(params, batch, n_total, gamma, jitter_multiple=fld.JITTER_MULTIPLE)

    def objective(h):
        return fld.elbo(dataclasses.replace(stepped, **h), batch, n_total)

    return (*jax.value_and_grad(objective)({k: getattr(params, k) for k in HYPER}), stepped)


def _fused(params, batch, n_total, gamma):
    def objective(h):
        return natural_elbo(dataclasses.replace(params, **h), batch, n_total, gamma, jitter_multiple=fld.JITTER_MULTIPLE)

    (value, stepped), grads = jax.value_and_grad(objective, has_aux=True)({k: getattr(params, k) for k in HYPER})
    return value, grads, stepped


@pytest.mark.parametrize("dim,temporal,gamma,rows", [(2, False, 1.0, N), (2, False, 0.4, 20), (3, False, 1.0, N),
                                                     (2, True, 1.0, N), (2, True, 0.4, 20)])
def test_fused_step_equals_the_two_pass_step(dim, temporal, gamma, rows):
    params, batch = _case(dim, seed=dim + 10 * temporal, temporal=temporal)
    batch = jax.tree_util.tree_map(lambda a: a[:rows], batch)
    n_total = float(N)
    value_ref, grads_ref, q_ref = _two_pass(params, batch, n_total, gamma)
    value, grads, q = _fused(params, batch, n_total, gamma)
    np.testing.assert_allclose(float(value), float(value_ref), rtol=1e-10)
    np.testing.assert_allclose(np.asarray(q.q_mean), np.asarray(q_ref.q_mean), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(np.asarray(q.q_sqrt_raw), np.asarray(q_ref.q_sqrt_raw), rtol=1e-9, atol=1e-12)
    flat, flat_ref = jax.tree_util.tree_leaves(grads), jax.tree_util.tree_leaves(grads_ref)
    assert len(flat) == len(flat_ref) > 3
    for g, g_ref in zip(flat, flat_ref):
        np.testing.assert_allclose(np.asarray(g), np.asarray(g_ref), rtol=1e-7,
                                   atol=1e-9 * max(1.0, float(np.max(np.abs(np.asarray(g_ref))))))


def test_fused_step_on_all_rows_is_the_collapsed_bound():
    # Titsias 2009, eq. 9, dense: log N(y | 0, Q + R) − ½ Σ_n tr(K_nn − Q_nn)/r_n, Q = K_XZ (K_ZZ + δI)⁻¹ K_ZX.
    params, batch = _case(2, seed=4, temporal=False)
    value, _ = natural_elbo(params, batch, float(N), 1.0, jitter_multiple=fld.JITTER_MULTIPLE)
    bound = dense_collapsed_bound(params, batch)
    np.testing.assert_allclose(float(value), bound, rtol=1e-9)


@pytest.mark.parametrize("temporal", [False, True])
def test_traced_elbo_is_the_elbo_at_any_q(temporal):
    # the trace identities Σ_n ‖Φ_n‖²/r_n = tr G, Σ_n ‖Φ_n S‖²/r_n = tr(S Sᵀ G) at a q away from the optimum,
    # against field.elbo (itself checked against a dense Hensman et al. 2013, eq. 7 reference in test_field.py)
    params, batch = _case(2, seed=21, temporal=temporal)
    part = jax.tree_util.tree_map(lambda a: a[:30], batch)
    expected = float(fld.elbo(params, part, float(N)))
    np.testing.assert_allclose(float(traced_elbo(params, part, float(N), jitter_multiple=fld.JITTER_MULTIPLE)),
                               expected, rtol=1e-10)
