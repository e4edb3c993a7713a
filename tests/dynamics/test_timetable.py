"""The tabulated posterior of a time-varying field (tabulate.TimedTable) against the exact one, and forecasts.

Outside references: the time combination is exact because the field is linear in its parts,
v(x, t) = W(t) P(x) with W(t) = [1, cos θ_c, sin θ_c, …] ⊗ I, so Cov[v(x, t)] = W(t) Cov[P(x)] W(t)ᵀ for any
joint covariance of the parts (linear transformation of a Gaussian vector; e.g. Anderson 2003, An Introduction
to Multivariate Statistical Analysis, Theorem 2.4.1, from memory); the spatial interpolant is tensor-product
cubic Hermite, exact at the nodes, with error O(h⁴) (Birkhoff, Schultz & Varga 1968, Numer. Math. 11;
de Boor 1978, A Practical Guide to Splines, ch. IV, from memory); the exact posterior is the sparse GP's
predictive (Titsias 2009) evaluated by FlowField.predict; the forecast bound uses Gronwall's inequality
(as tests/dynamics/test_tabulate.py).
"""

from __future__ import annotations

import math
import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from driftwise.data.tracks import Frame
from driftwise.dynamics import spread as spreadmod
from driftwise.dynamics import tabulate
from driftwise.dynamics.backtrack import Finds, backtrack_from_field
from driftwise.dynamics.connectivity import connect_from_field
from driftwise.dynamics.moments import RK4, SphericalCubature, propagate_batch
from driftwise.dynamics.sde import sde_from_field
from driftwise.dynamics.sites import Site
from driftwise.errors import InputError
from driftwise.gp import field as fieldmod
from driftwise.gp.temporal import TemporalStart

TOL = 0.05                                   # mean error in posterior s.d.; covariance error relative (Frobenius)
OMEGA_M2 = 2.0 * math.pi / (12.4206012 * 3600.0)   # M2 and K1 periods (Doodson 1921 tables, from memory)
OMEGA_K1 = 2.0 * math.pi / (23.93447213 * 3600.0)
T0 = 1.7e9                                   # time origin, s since 1970 (like an ISO-timed track file)
LO, HI = np.array([-2000.0, -2000.0]), np.array([12_000.0, 12_000.0])
SPAN_S = 2 * 86400.0


def tidal_field(slow: bool = False, n_side: int = 4) -> fieldmod.FlowField:
    """A Helmholtz field with M2 and K1 parts (and optionally a slow part) on n_side × n_side inducing points over
    10 km, q optimal for 300 noisy velocities over 3 days with a tidal signal (seed 0)."""
    grid = np.linspace(0.0, 10_000.0, n_side)
    z = np.stack(np.meshgrid(grid, grid), -1).reshape(-1, 2)
    extra = {"slow": True, "slow_inducing_m": z[:4], "slow_inducing_time_s": np.array([0.0, 3e4, 6e4, 9e4]),
             "slow_time_scale_s": 86400.0, "slow_velocity_scale_m_s": 0.05} if slow else {}
    start = TemporalStart(("M2", "K1"), (OMEGA_M2, OMEGA_K1), T0, harmonic_velocity_scale_m_s=0.15, **extra)
    params = fieldmod.init_params("helmholtz", 2, z, velocity_scale_m_s=0.2, length_scale_m=3000.0,
                                  curl_free_velocity_scale_m_s=0.1, diffusivity_m2_s=2.5, temporal=start)
    rng = np.random.default_rng(0)
    xy, t = rng.uniform(0.0, 10_000.0, (300, 2)), T0 + rng.uniform(0.0, 3 * 86400.0, 300)
    v = 0.1 * np.stack([np.sin(xy[:, 1] / 2000.0), np.cos(xy[:, 0] / 3000.0)], 1)
    v += 0.12 * np.cos(OMEGA_M2 * t)[:, None] * np.stack([np.cos(xy[:, 0] / 4000.0), np.sin(xy[:, 1] / 5000.0)], 1)
    v += 0.05 * np.sin(OMEGA_K1 * t)[:, None]
    batch = fieldmod.ObservationBatch(xy, v + 0.01 * rng.normal(size=xy.shape), np.full(300, 2.0 / 600.0),
                                      np.full(300, 2.0 * 5.0**2 / 600.0**2), t)
    return fieldmod.FlowField.from_params(fieldmod.optimal_q(params, batch), decorrelation_time_s=1800.0,
                                          frame=Frame(), data_summary={"extent_m": {"min": [0.0, 0.0],
                                                                                    "max": [10_000.0, 10_000.0]}})


@pytest.fixture(scope="module")
def field():
    return tidal_field()


@pytest.fixture(scope="module")
def table(field):
    return tabulate.tabulate_timed_field(field, LO, HI, T0, T0 + SPAN_S, tolerance=TOL)


def _table_moments(table, points, times):
    return (np.asarray(a) for a in tabulate._timed_table_moments(table, jnp.asarray(points), jnp.asarray(times)))


def test_time_combination_is_exact_at_the_nodes(field, table):
    """At grid nodes the Hermite interpolant returns the node values, so the table equals the exact posterior
    up to rounding at every time: W(t) μ_P and W(t) Σ_P W(t)ᵀ are exact (linearity, module docstring)."""
    rng = np.random.default_rng(5)
    idx = rng.integers(0, table.grid.shape[0], size=(40, 2))
    nodes = np.asarray(table.grid.origin_m) + idx * np.asarray(table.grid.spacing_m)
    times = T0 + rng.uniform(-5 * 86400.0, 10 * 86400.0, 40)       # also far outside the checked span
    mean, cov = field.predict(nodes, times)
    mean_t, cov_t = _table_moments(table, nodes, times)
    np.testing.assert_allclose(mean_t, mean, rtol=0, atol=1e-10 * np.max(np.abs(mean)))
    np.testing.assert_allclose(cov_t, cov, rtol=0, atol=1e-10 * np.max(np.abs(cov)))


def test_timed_table_meets_the_tolerance_on_fresh_random_points(field, table):
    """Measured on 1500 fresh random (x, t) (not those the refinement used): both errors ≤ the tolerance, and
    the tabulated covariance is positive semi-definite everywhere (Σ = (W L)(W L)ᵀ)."""
    rng = np.random.default_rng(11)
    points, times = LO + (HI - LO) * rng.uniform(size=(1500, 2)), T0 + SPAN_S * rng.uniform(size=1500)
    mean_err, cov_err = tabulate.timed_tabulation_errors(table, field, points, times)
    print(f"timed table {table.grid.shape}: fresh max mean error {mean_err.max():.3g} s.d., cov error "
          f"{cov_err.max():.3g}; at build {float(table.grid.mean_error):.3g}, {float(table.grid.cov_error):.3g}")
    assert mean_err.max() <= TOL and cov_err.max() <= TOL
    assert float(table.grid.mean_error) <= TOL and float(table.grid.cov_error) <= TOL
    _, cov_t = _table_moments(table, points, times)
    eig = np.linalg.eigvalsh(cov_t)
    assert np.all(eig[:, 0] >= -1e-12 * eig[:, -1])
    off = np.asarray(table.mean_at(jnp.asarray(HI + 1.0), t_s=T0))
    assert not table.inside(jnp.asarray(HI + 1.0)) and np.all(np.isnan(off))      # off the grid: a flag (NaN)


def _lipschitz_and_sigma(field, points, times) -> tuple[float, float]:
    """max ‖∂μ/∂x‖₂ (1/s) and the largest posterior velocity s.d. (m/s) of the exact posterior at (x, t)."""
    jac = [np.asarray(jax.jacfwd(lambda y, s=t: field.mean_at(y, t_s=s))(jnp.asarray(x))) for x, t in
           zip(points, times)]
    sigma = np.sqrt(np.max(np.linalg.eigvalsh(field.predict(points, times)[1])))
    return float(np.max(np.linalg.norm(np.stack(jac), ord=2, axis=(1, 2)))), float(sigma)


@pytest.mark.slow
def test_timed_forecast_with_the_table_agrees_with_the_exact_forecast(field, table, monkeypatch):
    """Releases starting at different times: the table forecast (the tolerance's own table, forced) against
    the exact one.  Bound as the steady test: drift error ≤ ε σ_max moves the mean by ≤ ε σ_max (e^{Lt} − 1)/L
    (Gronwall), asserted whitened by the forecast's smallest s.d., and the stated tolerance itself."""
    rng = np.random.default_rng(8)
    starts = [spreadmod.Release(x, start_time_s=T0 + s) for x, s in
              zip(rng.uniform(3000.0, 7000.0, (12, 2)), rng.uniform(0.0, 86400.0, 12))]
    times = np.arange(0.0, 7.0) * 3600.0
    exact = spreadmod.spread_from_field(field, starts, times, posterior="exact")
    monkeypatch.setattr(tabulate, "tabulate_timed_field", lambda *a, **k: table)   # the module's own table
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        tab = spreadmod.spread_from_field(field, starts, times, posterior="table")
    assert not any("tabulated region" in str(w.message) for w in caught)   # every release stayed on the grid
    pts = LO + (HI - LO) * rng.uniform(size=(200, 2))
    lipschitz, sigma_max = _lipschitz_and_sigma(field, pts, T0 + SPAN_S * rng.uniform(size=200))
    eps, t = max(float(table.grid.mean_error), 1e-12), times[1:]
    bound = eps * sigma_max * np.expm1(lipschitz * t) / lipschitz / np.sqrt(np.linalg.eigvalsh(exact.covs[:, 1:])[..., 0])
    diff = (tab.means - exact.means)[:, 1:, :, None]
    white = np.linalg.norm(np.linalg.solve(np.linalg.cholesky(exact.covs[:, 1:]), diff)[..., 0], axis=-1)
    rel = np.linalg.norm(tab.covs[:, 1:] - exact.covs[:, 1:], axis=(-2, -1)) / np.linalg.norm(exact.covs[:, 1:],
                                                                                             axis=(-2, -1))
    print(f"timed forecast: max whitened mean difference {white.max():.3g} s.d. (bound min {bound.min():.3g}), "
          f"max relative cov difference {rel.max():.3g}")
    assert np.all(white <= bound) and white.max() <= TOL and rel.max() <= TOL


def test_fallback_reruns_releases_off_the_grid_exactly_from_their_start_times(field):
    """One path for every command: a release starting off a small table's grid is recomputed through the exact
    SDE from its own start time (bit-for-bit the exact run), the others stay on the table."""
    sde = sde_from_field(field)
    small = tabulate.tabulate_timed_field(field, [2000.0, 2000.0], [8000.0, 8000.0], T0, T0 + 86400.0, tolerance=0.2)
    means0 = np.array([[5000.0, 5000.0], [20_000.0, 5000.0], [30_000.0, 9000.0]])
    covs0 = np.broadcast_to(np.eye(2) * 100.0**2, (3, 2, 2)).copy()
    starts, times = T0 + np.array([0.0, 7200.0, 50_000.0]), np.arange(0.0, 4.0) * 1800.0
    kw = {"method": SphericalCubature(), "integrator": RK4(step_s=600.0)}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        means, covs = tabulate.propagate_with_fallback(tabulate.on_table(sde, small), sde, means0, covs0, times,
                                                       start_times_s=starts, **kw)
    assert any("2 of 3 releases left the tabulated region" in str(w.message) for w in caught)
    ref_m, ref_c = propagate_batch(sde, means0[1:], covs0[1:], times, start_times_s=starts[1:], **kw)
    np.testing.assert_array_equal(means[1:], np.asarray(ref_m))
    np.testing.assert_array_equal(covs[1:], np.asarray(ref_c))
    assert np.all(np.isfinite(means[0]))
    # several batches (or candidate release times) counted in one tally: one warning for the whole run
    tally = tabulate.FallbackTally()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for lo in (0, 1):
            again, _ = tabulate.propagate_with_fallback(tabulate.on_table(sde, small), sde, means0[lo:lo + 2],
                                                        covs0[lo:lo + 2], times, start_times_s=starts[lo:lo + 2],
                                                        tally=tally, **kw)
            np.testing.assert_array_equal(again, means[lo:lo + 2])
        assert not caught
        tally.warn("candidate releases")
    assert [str(w.message).split(";")[0] for w in caught] == ["3 of 4 candidate releases left the tabulated region"]


def test_a_slow_part_is_forecast_exactly():
    """The slow part s(x, t) is not periodic: no table holds it, so "auto" gives the exact posterior (None) and
    "table" or a direct tabulation is an InputError naming the reason."""
    slow = tidal_field(slow=True)
    sde = sde_from_field(slow)
    assert tabulate.tabulated_sde(slow, sde, [[0.0, 0.0]], 10**9, "auto", [T0], 3600.0) is None
    with pytest.raises(InputError, match="slow part"):
        tabulate.tabulated_sde(slow, sde, [[0.0, 0.0]], 10**9, "table", [T0], 3600.0)
    with pytest.raises(InputError, match="slow part"):
        tabulate.tabulate_timed_field(slow, LO, HI, T0, T0 + 3600.0)


def _square(x0: float, y0: float, side: float = 2000.0) -> np.ndarray:
    return np.array([[x0, y0], [x0 + side, y0], [x0 + side, y0 + side], [x0, y0 + side]])


@pytest.mark.slow
def test_connect_on_a_time_varying_model_uses_the_table_and_its_start_time(field, table, monkeypatch):
    """connect with a tidal model: the table and the exact posterior give the same P[i, j, t] within the
    tolerance (a shift of δ posterior s.d. in a release's mean moves a Gaussian set probability by at most
    δ/√(2π), the Gaussian isoperimetric bound (Sudakov & Tsirelson 1974; Borell 1975, from memory), and the
    measured mean differences are ≪ TOL); the start time matters (half an M2 period later, another answer)."""
    sites = (Site("west", _square(2000.0, 4000.0)), Site("east", _square(6000.0, 4000.0)))
    times = np.arange(0.0, 7.0) * 3600.0
    kw = {"per_site": 16, "seed": 2}
    exact = connect_from_field(field, sites, times, start_time_s=T0 + 3600.0, posterior="exact", **kw)
    monkeypatch.setattr(tabulate, "tabulate_timed_field", lambda *a, **k: table)
    tab = connect_from_field(field, sites, times, start_time_s=T0 + 3600.0, posterior="table", **kw)
    later = connect_from_field(field, sites, times, start_time_s=T0 + 3600.0 + math.pi / OMEGA_M2, posterior="table",
                               **kw)
    diff = np.abs(tab.probability - exact.probability)
    print(f"connect (tidal): max |P_table − P_exact| {diff.max():.3g}; max |P(t0 + 6.2 h) − P(t0)| "
          f"{np.abs(later.probability - tab.probability).max():.3g}")
    assert diff.max() <= TOL / math.sqrt(2.0 * math.pi)
    assert np.abs(later.probability - tab.probability).max() > 10 * diff.max()
    assert tab.outside_support is not None and np.all(np.isfinite(tab.outside_support))


TIDE_U0_M_S, TIDE_A_M_S, TIDE_K_M2_S = np.array([0.01, 0.005]), np.array([0.4, 0.1]), 1.0


def _tidal_stream(x, t):
    return jnp.asarray(TIDE_U0_M_S) + jnp.asarray(TIDE_A_M_S) * jnp.cos(OMEGA_M2 * (t - T0))


def _tidal_stream_diffusion(x, t):
    return 2.0 * TIDE_K_M2_S * jnp.eye(2)


def _tidal_displacement(t_r, t_k):
    """∫_{t_r}^{t_k} u(t) dt for u = U₀ + A cos ω(t − T0), in closed form."""
    return TIDE_U0_M_S * (t_k - t_r) + TIDE_A_M_S * (np.sin(OMEGA_M2 * (t_k - T0)) - np.sin(OMEGA_M2 * (t_r - T0))) / OMEGA_M2


def test_backtrack_in_a_tidal_stream_matches_the_closed_form():
    """A spatially uniform tidal stream u(t) = U₀ + A cos ωt with diffusivity K: a point release at x₀ at t_r is
    N(x₀ + ∫u dt, 2 K (t_k − t_r) I) at t_k, so under a flat prior x₀ | find y is N(y − ∫u dt, 2 K (t_k − t_r) I
    + R) (Gaussian conjugacy, from memory).  Candidate times half a tidal period apart give posterior means
    2|A|/ω ≈ 5.9 km apart (the steady approximation would put both at y − U₀ (t_k − t_r)); with one find and a grid covering
    both, each candidate time holds half the mass (the likelihood integrates to 1 over x₀)."""
    from driftwise.dynamics.backtrack import backtrack, candidate_grid
    from driftwise.dynamics.sde import SDE

    sde = SDE(drift=_tidal_stream, diffusion=_tidal_stream_diffusion, with_time=True)
    t_find, sd = T0 + 30 * 3600.0, 150.0
    found = np.array([20_000.0, 8_000.0])
    quarter = 0.25 * 12.4206012 * 3600.0                 # releases at the two flood/ebb maxima
    release_times = np.array([T0 + quarter, T0 + 3 * quarter])
    means = [found - _tidal_displacement(t_r, t_find) for t_r in release_times]
    sds = [math.sqrt(2 * TIDE_K_M2_S * (t_find - t_r) + sd**2) for t_r in release_times]
    lo = np.min(means, 0) - 6 * max(sds)
    hi = np.max(means, 0) + 6 * max(sds)
    x, y = candidate_grid((lo[0], lo[1], hi[0], hi[1]), min(sds) / 6)
    result = backtrack(sde, Finds(found[None], [t_find], [sd]), x, y, release_times, step_s=1800.0)
    print(f"tidal backtrack: closed-form means {np.round(means, 1).tolist()}, "
          f"apart {np.hypot(*(means[0] - means[1])):.0f} m; by time {result.by_time.round(4).tolist()}")
    assert np.hypot(*(means[0] - means[1])) > 10 * max(sds)
    np.testing.assert_allclose(result.by_time, [0.5, 0.5], atol=0.01)
    for j in range(2):
        mean, cov = result.mean_cov(j)
        assert np.all(np.abs(mean - means[j]) < 0.02 * sds[j])                        # within 2 % of the s.d.
        np.testing.assert_allclose(np.diag(cov), [sds[j] ** 2] * 2, rtol=0.03)


def test_backtrack_from_a_time_varying_field_runs_with_the_table_and_exactly(field):
    """A fitted tidal field: the tabulated and the exact posterior give the same map (TOL-level differences)."""
    finds = Finds(np.array([[5000.0, 5000.0]]), np.array([T0 + 86400.0]), np.array([300.0]))
    args = (field, finds, (0.0, 0.0, 10_000.0, 10_000.0), 1000.0, [T0 + 6 * 3600.0, T0 + 12 * 3600.0])
    exact = backtrack_from_field(*args, step_s=1800.0, posterior="exact")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tab = backtrack_from_field(*args, step_s=1800.0, posterior="table")
    print(f"tidal field backtrack: max |P_table − P_exact| {np.abs(tab.probability - exact.probability).max():.3g}")
    np.testing.assert_allclose(exact.probability.sum(), 1.0, atol=1e-9)
    assert np.abs(tab.probability - exact.probability).max() < 0.01


def test_one_evaluation_gives_the_timed_drift_and_diffusion(field, table):
    """SDE.drift_and_rate equals drift_at and rate apart for a time-varying field, exact and tabulated."""
    from driftwise.dynamics.sde import sde_from_field

    exact = sde_from_field(field)
    rng = np.random.default_rng(5)
    points = jnp.asarray(LO + (HI - LO) * rng.uniform(size=(48, 2)))
    times = jnp.asarray(T0 + SPAN_S * rng.uniform(size=48))
    for sde in (exact, tabulate.on_table(exact, table)):
        assert sde.drift_and_diffusion is not None
        both = jax.vmap(lambda x, t: sde.drift_and_rate(x, 3600.0, t))(points, times)
        apart = jax.vmap(lambda x, t: (sde.drift_at(x, t), sde.rate(x, 3600.0, t)))(points, times)
        np.testing.assert_allclose(both[0], apart[0], rtol=1e-12, atol=1e-18)
        np.testing.assert_allclose(both[1], apart[1], rtol=1e-12, atol=1e-18)
