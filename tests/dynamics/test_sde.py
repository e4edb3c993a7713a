"""Field → SDE (driftwise.sde).

Outside references:
- Taylor (1921), "Diffusion by continuous movements", Proc. London Math. Soc.
  20: a velocity with variance σ² and Lagrangian time scale τ disperses with
  diffusivity σ² τ; hence D = 2 (K + τ σ²) I where the posterior equals the
  prior, whose per-component variance is σ_df² + σ_cf² for the Helmholtz kernel
  (kernels.py docstring; checked there against the closed-form kernels).
- Einstein (1905): a constant isotropic D gives P(t) = P0 + D t.
- The sparse-GP predictive covariance K(x,x) − AAᵀ + ASSᵀAᵀ (Hensman et al.
  2013, eq. 6 in whitened form) as implemented by FlowField.cov_between and
  FlowField.predict, against which the precomputed projection is compared (steady and time-varying).
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import driftwise  # noqa: F401  (enables float64)
from driftwise.dynamics import moments
from driftwise.dynamics.sde import (
    SDE,
    PointPosterior,
    TimedPointPosterior,
    join_from_jit,
    sde_from_field,
    split_for_jit,
    timed_field_sde,
)
from driftwise.errors import InputError
from driftwise.gp import field as fieldmod

SIGMA_DF, SIGMA_CF = 0.2, 0.1  # m/s


def make_field(seed=0, fitted=True, decorrelation_time_s=1800.0, length_scale_m=3000.0):
    """A small Helmholtz field on a 4 × 4 inducing grid over 10 km, optionally fitted to random data."""
    grid = np.linspace(0.0, 10_000.0, 4)
    inducing = np.stack(np.meshgrid(grid, grid), axis=-1).reshape(-1, 2)
    params = fieldmod.init_params(
        "helmholtz", 2, inducing, velocity_scale_m_s=SIGMA_DF, length_scale_m=length_scale_m,
        curl_free_velocity_scale_m_s=SIGMA_CF, diffusivity_m2_s=2.5,
    )
    if fitted:
        rng = np.random.default_rng(seed)
        xy = rng.uniform(0.0, 10_000.0, size=(150, 2))
        velocity = 0.1 * np.stack([np.sin(xy[:, 1] / 2000.0), np.cos(xy[:, 0] / 3000.0)], axis=1)
        batch = fieldmod.ObservationBatch(
            jnp.asarray(xy), jnp.asarray(velocity + 0.01 * rng.normal(size=xy.shape)),
            jnp.full(150, 2.0 / 600.0), jnp.full(150, 2.0 * 5.0**2 / 600.0**2),
        )
        params = fieldmod.optimal_q(params, batch)
    return fieldmod.FlowField.from_params(params, decorrelation_time_s=decorrelation_time_s)


@pytest.fixture(scope="module")
def fitted_field():
    return make_field()


def test_point_posterior_equals_field_functions(fitted_field):
    posterior = PointPosterior.from_field(fitted_field)
    x = jnp.asarray(np.random.default_rng(4).uniform(-3000.0, 13_000.0, size=(40, 2)))
    mean_ref = jax.vmap(fitted_field.mean_at)(x)
    cov_ref = jax.vmap(lambda p: fitted_field.cov_between(p, p))(x)
    np.testing.assert_allclose(jax.vmap(posterior.mean_at)(x), mean_ref, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(jax.vmap(posterior.cov_at)(x), cov_ref, rtol=1e-9, atol=1e-13)


def test_drift_and_diffusion_follow_the_design_formula(fitted_field):
    sde = sde_from_field(fitted_field)
    markov = sde_from_field(fitted_field, velocity_memory=False)
    assert sde.with_age and not markov.with_age
    points = np.array([[1000.0, 2000.0], [5000.0, 5000.0], [12_000.0, -1000.0]])
    mean, cov = fitted_field.predict(points)
    k, tau = fitted_field.diffusivity_m2_s, fitted_field.decorrelation_time_s
    for p, m, c in zip(points, mean, cov):
        np.testing.assert_allclose(sde.drift(jnp.asarray(p)), m, rtol=1e-10, atol=1e-13)
        for age in (0.0, 0.3 * tau, 3.0 * tau):
            # D = 2 (K I + τ (1 − e^{−a/τ}) Σ), Taylor (1921) at release age a
            expected = 2.0 * (k * np.eye(2) + tau * (1.0 - np.exp(-age / tau)) * c)
            np.testing.assert_allclose(sde.rate(jnp.asarray(p), age), expected, rtol=1e-9, atol=1e-12)
        # the Markov limit a → ∞: D = 2 (K I + τ Σ)
        np.testing.assert_allclose(markov.diffusion(jnp.asarray(p)), 2.0 * (k * np.eye(2) + tau * c),
                                   rtol=1e-9, atol=1e-12)


def test_prior_field_gives_taylor_spread():
    # Zero mean flow, Σ = (σ_df² + σ_cf²) I everywhere: a velocity error with exponential
    # autocorrelation over τ spreads as 2Στ[t − τ(1 − e^{−t/τ})] (Taylor 1921, "Diffusion by
    # continuous movements", eq. for the exponential correlation), plus 2Kt (Einstein 1905).
    tau, k = 900.0, 2.5
    field = make_field(fitted=False, decorrelation_time_s=tau)
    sde = sde_from_field(field)
    x = jnp.asarray([3000.0, 7000.0])
    var = SIGMA_DF**2 + SIGMA_CF**2
    np.testing.assert_allclose(sde.rate(x, 1e9), 2.0 * (k + tau * var) * np.eye(2), rtol=1e-9, atol=0)
    np.testing.assert_allclose(sde.drift(x), 0.0, rtol=0, atol=1e-15)
    times = np.array([0.0, 300.0, 900.0, 3600.0, 7200.0])
    _, covs = moments.propagate(sde, np.asarray(x), np.zeros((2, 2)), times, integrator=moments.RK4(step_s=30.0))
    taylor = 2.0 * k * times + 2.0 * var * tau * (times - tau * (1.0 - np.exp(-times / tau)))
    # RK4 on a forcing of t alone is Simpson's rule: relative error ~ (h/τ)⁴/2880 ≈ 4e-10 at h = 30 s
    np.testing.assert_allclose(covs, taylor[:, None, None] * np.eye(2), rtol=1e-8, atol=1e-9)
    markov = sde_from_field(field, velocity_memory=False)
    _, covs = moments.propagate(markov, np.asarray(x), np.zeros((2, 2)), times, integrator=moments.RK4(step_s=1800.0))
    np.testing.assert_allclose(covs, 2.0 * (k + tau * var) * times[:, None, None] * np.eye(2), rtol=1e-9, atol=1e-9)


def test_overrides_and_uncalibrated_decorrelation_time(fitted_field):
    x = jnp.asarray([4000.0, 4000.0])
    posterior = PointPosterior.from_field(fitted_field)
    sigma = np.asarray(posterior.cov_at(x))
    d = sde_from_field(fitted_field, diffusivity_m2_s=7.0, decorrelation_time_s=60.0).rate(x, 60.0)
    np.testing.assert_allclose(d, 2.0 * (7.0 * np.eye(2) + 60.0 * (1 - math.exp(-1)) * sigma), rtol=1e-12, atol=0)
    uncalibrated = dataclasses.replace(fitted_field, decorrelation_time_s=None)
    d0 = sde_from_field(uncalibrated).rate(x, 3600.0)
    np.testing.assert_allclose(d0, 2.0 * fitted_field.diffusivity_m2_s * np.eye(2), rtol=1e-12, atol=0)


@pytest.mark.parametrize(
    "options, match",
    [
        ({"diffusivity_m2_s": -1.0}, "diffusivity_m2_s"),
        ({"decorrelation_time_s": float("nan")}, "decorrelation_time_s"),
        ({"decorrelation_time_s": [1.0, 2.0]}, "decorrelation_time_s"),
    ],
)
def test_bad_parameters_raise_input_error(fitted_field, options, match):
    with pytest.raises(InputError, match=match):
        sde_from_field(fitted_field, **options)


def test_two_fields_of_equal_shape_share_one_compilation(fitted_field):
    times = np.array([0.0, 1800.0, 3600.0])
    means0 = np.array([[2000.0, 3000.0], [6000.0, 6000.0], [8000.0, 1000.0]])
    covs0 = np.zeros((3, 2, 2))
    first = moments.propagate_batch(sde_from_field(fitted_field), means0, covs0, times, chunk=2)
    before = moments.propagate_batch_jit._cache_size()
    other = make_field(seed=1, length_scale_m=4000.0)
    second = moments.propagate_batch(sde_from_field(other), means0, covs0, times, chunk=2)
    assert moments.propagate_batch_jit._cache_size() == before
    assert np.max(np.abs(np.asarray(first[0] - second[0]))) > 1.0  # a different field moves releases differently


def test_split_and_join_keep_plain_functions_static():
    def drift(x):
        return -x

    sde = SDE(drift, jax.tree_util.Partial(lambda d, x: d, jnp.eye(2)))
    dynamic, static = split_for_jit(sde)
    assert hash(static) == hash(split_for_jit(sde)[1])
    rebuilt = join_from_jit(dynamic, static)
    assert rebuilt.drift is drift
    np.testing.assert_allclose(rebuilt.diffusion(jnp.zeros(2)), np.eye(2), rtol=0, atol=0)


def timed_field():
    """A small helmholtz field with M2 and the slow part, q optimal for random data over two days."""
    from driftwise.gp.temporal import TemporalStart

    rng = np.random.default_rng(7)
    n, t0 = 300, 1.7e9
    x, t = rng.uniform(-3000.0, 3000.0, (n, 2)), t0 + np.sort(rng.uniform(0.0, 2 * 86400.0, n))
    obs = type("Obs", (), {"position_m": x, "velocity_m_s": rng.normal(0.0, 0.2, (n, 2)), "dt_s": np.full(n, 1800.0),
                           "time_s": t, "position_error_m": 3.0})()
    start = TemporalStart(("M2",), (2.0 * math.pi / (12.4206012 * 3600.0),), t0, True, harmonic_velocity_scale_m_s=0.1,
                          slow_velocity_scale_m_s=0.05, slow_time_scale_s=43200.0, slow_inducing_m=x[:12],
                          slow_inducing_time_s=t[:12] - t0)
    params = fieldmod.init_params("helmholtz", 2, x[::15], velocity_scale_m_s=0.2, length_scale_m=1500.0,
                                  diffusivity_m2_s=0.5, temporal=start)
    return fieldmod.FlowField.from_params(fieldmod.optimal_q(params, fieldmod.batch_from_observations(obs)),
                                          decorrelation_time_s=1800.0)


def test_timed_point_posterior_equals_field_functions():
    """The precomputed time-varying posterior gives FlowField.mean_at / cov_between (the sparse-GP predictive) to
    1e-12 relative, at and past the data's times, for one point and for two (x, t) pairs."""
    field = timed_field()
    posterior = TimedPointPosterior.from_field(field)
    rng = np.random.default_rng(8)
    x = jnp.asarray(rng.uniform(-4000.0, 4000.0, (30, 2)))
    t = jnp.asarray(1.7e9 + rng.uniform(-3600.0, 4 * 86400.0, 30))
    mean = jax.vmap(lambda p, s: posterior.mean_at(p, t_s=s))(x, t)
    mean_ref = jax.vmap(lambda p, s: field.mean_at(p, t_s=s))(x, t)
    np.testing.assert_allclose(mean, mean_ref, rtol=1e-12, atol=1e-12 * float(jnp.abs(mean_ref).max()))
    cov = jax.vmap(lambda p, s: posterior.cov_between(p, p, t_x_s=s, t_y_s=s))(x, t)
    cov_ref = jax.vmap(lambda p, s: field.cov_between(p, p, t_x_s=s, t_y_s=s))(x, t)
    np.testing.assert_allclose(cov, cov_ref, rtol=1e-12, atol=1e-12 * float(jnp.abs(cov_ref).max()))
    cross = posterior.cov_between(x[0], x[1], t_x_s=t[0], t_y_s=t[1])
    cross_ref = field.cov_between(x[0], x[1], t_x_s=t[0], t_y_s=t[1])
    np.testing.assert_allclose(cross, cross_ref, rtol=1e-12, atol=1e-12 * float(jnp.abs(cov_ref).max()))
    with pytest.raises(InputError, match="whole field"):
        posterior.mean_at(x[0], "M2", t_s=t[0])


def test_timed_forecast_through_the_precomputed_posterior_is_unchanged():
    """A forecast of the time SDE built on the precomputed posterior equals the one built on the field's own
    functions (timed_field_sde(field, ...), the path before the precomputation), 1e-12 relative."""
    field = timed_field()
    new = sde_from_field(field)
    old = timed_field_sde(field, jnp.asarray(field.diffusivity_m2_s), jnp.asarray(1800.0), True)
    means0, covs0 = np.array([[500.0, -300.0], [-1000.0, 800.0]]), np.broadcast_to(100.0 * np.eye(2), (2, 2, 2))
    times, starts = np.arange(0.0, 6 * 3600.0 + 1.0, 3600.0), np.array([1.7e9 + 86400.0, 1.7e9 + 2.5 * 86400.0])
    out = [moments.propagate_batch(sde, means0, covs0, times, start_times_s=starts) for sde in (new, old)]
    np.testing.assert_allclose(out[0][0], out[1][0], rtol=1e-12, atol=1e-12 * float(np.abs(out[1][0]).max()))
    np.testing.assert_allclose(out[0][1], out[1][1], rtol=1e-12, atol=1e-12 * float(np.abs(out[1][1]).max()))
