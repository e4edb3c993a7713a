"""The full-batch fit's optimiser (driftwise.gp.quasinewton): L-BFGS-B on Titsias' collapsed bound.

References beside the checks:
* the maximum it reaches equals the maximum of the same bound written densely with numpy/scipy (Titsias 2009,
  "Variational learning of inducing variables in sparse Gaussian processes", eq. 9: log N(y | 0, Q + R) −
  ½ Σ tr(K_nn − Q_nn)/r_n) and maximised by scipy.optimize.minimize with finite-difference gradients — an
  optimiser that never sees our gradients;
* a trial point where the bound is not finite is stepped back from (the line search of Moré & Thuente 1994 on a
  large value) and the run still ends at that maximum.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.optimize
from jax.flatten_util import ravel_pytree

import driftwise  # noqa: F401  (float64)
from driftwise.data.observations import Observations
from driftwise.gp import field as fld
from driftwise.gp import quasinewton as qn
from driftwise.gp.adamstep import HYPER_NAMES
from driftwise.gp.schedule import TrainState
from collapsed import dense_collapsed_bound

ELL, N, M = 900.0, 60, 12


def _case(seed: int = 3):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 4 * ELL, (N, 2))
    v = 0.2 * np.sin(x @ rng.normal(size=(2, 2)) / ELL) + 0.03 * rng.normal(size=(N, 2))
    obs = Observations(position_m=x, velocity_m_s=v, dt_s=np.full(N, 1800.0), time_s=np.arange(N) * 1800.0,
                       track_index=np.zeros(N, dtype=int), position_error_m=5.0)
    batch = fld.batch_from_observations(obs).without_time()
    params = fld.init_params("helmholtz", 2, rng.uniform(0.0, 4 * ELL, (M, 2)), velocity_scale_m_s=0.1,
                             length_scale_m=2 * ELL, diffusivity_m2_s=0.05, noise_floor_m_s=0.02, background="none")
    return params, batch


_dense_bound = dense_collapsed_bound


def _run(params, batch, steps=200):
    state = TrainState(params, None, 0, (), fld.JITTER_MULTIPLE)
    checks = []

    def after_step(now):
        checks.append(now.history[-1])
        return now

    end = qn.maximise_bound(state, batch, float(N), names=HYPER_NAMES, z_scale=1.0, steps=steps,
                            after_step=after_step)
    return end, checks


def test_reaches_the_maximum_of_the_dense_bound_found_by_scipy_without_our_gradients():
    params, batch = _case()
    x0, unravel = ravel_pytree(qn.split_trainable(params, HYPER_NAMES, 1.0))

    def negative(x):
        return -_dense_bound(qn.merge_trainable(params, unravel(x), 1.0), batch)

    reference = scipy.optimize.minimize(negative, np.asarray(x0), method="L-BFGS-B",
                                        options={"maxiter": 500, "ftol": 1e-13, "gtol": 1e-7})
    end, history = _run(params, batch)
    ours = _dense_bound(end.params, batch)
    assert end.converged and len(history) == end.step and np.all(np.diff(history) > -1e-9)
    assert history[-1] == pytest.approx(ours, rel=1e-9)              # the bound it reports is the dense one
    assert ours == pytest.approx(-reference.fun, abs=1e-3)            # scipy's maximum (nats; measured: 180.7255005 both)
    assert ours - _dense_bound(params, batch) > 1.0                   # and it did move


def test_steps_back_from_a_point_where_the_bound_is_not_finite(monkeypatch):
    params, batch = _case()
    x0, _ = ravel_pytree(qn.split_trainable(params, HYPER_NAMES, 1.0))
    clean, _ = _run(params, batch)
    real = qn.negative_bound
    poisoned = []

    def guarded(flat, *args, **kwargs):
        value, grad = real(flat, *args, **kwargs)
        if float(np.max(np.abs(np.asarray(flat) - np.asarray(x0)))) > 0.5 and not poisoned:
            poisoned.append(True)            # the first far trial point: NaN, as an overflow would give
            return value * np.nan, grad
        return value, grad

    monkeypatch.setattr(qn, "negative_bound", guarded)
    end, history = _run(params, batch)
    assert poisoned and np.all(np.isfinite(history))
    assert _dense_bound(end.params, batch) == pytest.approx(_dense_bound(clean.params, batch), abs=1e-2)


def test_stops_at_the_step_limit_without_claiming_convergence():
    params, batch = _case()
    end, history = _run(params, batch, steps=3)
    assert end.step == 3 and len(history) == 3 and not end.converged
    assert dataclasses.replace(end, params=params).step == 3
