"""The tabulated posterior (dynamics/tabulate.py) against the exact one, and forecasts with it.

Outside references: the tensor-product cubic Hermite interpolant reproduces bicubic polynomials exactly
and its error falls as h⁴ (Birkhoff, Schultz & Varga 1968, "Piecewise Hermite interpolation in one and two
variables", Numer. Math. 11); the exact posterior is the sparse GP's predictive (Titsias 2009), evaluated
by FlowField.predict; the bound on a forecast's mean error from a drift error uses Gronwall's inequality.
"""

from __future__ import annotations

import dataclasses
import json
import sys
import warnings
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import driftwise
from driftwise.dynamics import spread as spreadmod
from driftwise.dynamics import tabulate
from driftwise.dynamics.backtrack import Finds, backtrack_from_field
from driftwise.dynamics.connectivity import connect_from_field
from driftwise.dynamics.sde import PointPosterior
from driftwise.dynamics.sites import Site
from driftwise.errors import InputError
from driftwise.gp import field as fieldmod

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from sharding_worker import small_field  # noqa: E402

TOL = 0.05   # the stated tolerance: mean error in posterior s.d., covariance error relative (Frobenius)
LO, HI = np.array([-2000.0, -2000.0]), np.array([12_000.0, 12_000.0])


@pytest.fixture(scope="module")
def field():
    return small_field()


@pytest.fixture(scope="module")
def table(field):
    return tabulate.tabulate_field(field, LO, HI, tolerance=TOL)


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class PolynomialPosterior:
    """A stand-in posterior with mean (p(x), q(x)) bicubic polynomials and Σ = C Cᵀ with C linear in x."""

    scale: jax.Array

    def mean_at(self, x):
        u, v = x / self.scale
        return jnp.array([1 + u - 2 * v + u * v + u**3 * v**2 - v**3, u**2 * v**3 + 2 * u**3 - u * v])

    def cov_at(self, x):
        u, v = x / self.scale
        c = jnp.array([[2.0 + u, 0.0], [0.5 * v, 1.5 - 0.3 * u]])
        return c @ c.T


def test_hermite_table_reproduces_bicubic_polynomials_exactly():
    """Bicubic polynomials lie in the interpolant's space (Birkhoff et al. 1968): error at rounding level."""
    post = PolynomialPosterior(jnp.asarray(1000.0))
    table = tabulate._build(post, np.zeros(2), np.array([1000.0, 1000.0]), 5)
    x = jnp.asarray(np.random.default_rng(3).uniform(0.0, 1000.0, size=(200, 2)))
    np.testing.assert_allclose(jax.vmap(table.mean_at)(x), jax.vmap(post.mean_at)(x), rtol=0, atol=1e-12)
    np.testing.assert_allclose(jax.vmap(table.cov_at)(x), jax.vmap(post.cov_at)(x), rtol=0, atol=1e-12)


def test_error_falls_as_the_fourth_power_of_the_spacing(field):
    """Halving h divides the cubic Hermite error by 2⁴ = 16 (Birkhoff et al. 1968); measured ratio 10–24."""
    post = PointPosterior.from_field(field)
    points = LO + (HI - LO) * np.random.default_rng(4).uniform(size=(1500, 2))
    errors = [np.max(tabulate.tabulation_errors(tabulate._build(post, LO, HI, n), post, points)[0]) for n in (9, 17)]
    assert 10.0 < errors[0] / errors[1] < 24.0


def test_table_matches_the_exact_posterior_on_fresh_random_points(field, table):
    """Measured on 3000 new random points against FlowField.predict (the exact predictive, Titsias 2009)."""
    points = LO + (HI - LO) * np.random.default_rng(11).uniform(size=(3000, 2))
    mean, cov = field.predict(points)
    mean_t = jax.vmap(table.mean_at)(jnp.asarray(points))
    cov_t = jax.vmap(table.cov_at)(jnp.asarray(points))
    white = np.linalg.solve(np.linalg.cholesky(cov), (np.asarray(mean_t) - mean)[..., None])[..., 0]
    assert np.max(np.linalg.norm(white, axis=-1)) <= TOL
    rel = np.linalg.norm(np.asarray(cov_t) - cov, axis=(1, 2)) / np.linalg.norm(cov, axis=(1, 2))
    assert np.max(rel) <= TOL
    assert float(table.mean_error) <= TOL and float(table.cov_error) <= TOL       # recorded by the builder
    assert np.min(np.linalg.eigvalsh(np.asarray(cov_t))) >= 0.0                  # C Cᵀ: PSD by construction


@pytest.mark.slow
def test_three_dimensional_table_meets_the_tolerance():
    grid = np.linspace(0.0, 4000.0, 3)
    z = np.stack(np.meshgrid(grid, grid, grid, indexing="ij"), -1).reshape(-1, 3)
    params = fieldmod.init_params("helmholtz", 3, z, velocity_scale_m_s=0.1, length_scale_m=2000.0,
                                  diffusivity_m2_s=1.0)
    rng = np.random.default_rng(5)
    xyz = rng.uniform(0.0, 4000.0, size=(200, 3))
    batch = fieldmod.ObservationBatch(xyz, 0.05 * np.sin(xyz / 1500.0) + 0.005 * rng.normal(size=xyz.shape),
                                      np.full(200, 2.0 / 600.0), np.full(200, 2.0 * 5.0**2 / 600.0**2))
    field3 = fieldmod.FlowField.from_params(fieldmod.optimal_q(params, batch))
    table = tabulate.tabulate_field(field3, [-500.0] * 3, [4500.0] * 3, tolerance=TOL)
    points = rng.uniform(-500.0, 4500.0, size=(1000, 3))
    mean_err, cov_err = tabulate.tabulation_errors(table, PointPosterior.from_field(field3), points)
    assert np.max(mean_err) <= TOL and np.max(cov_err) <= TOL


def test_off_the_grid_is_a_flag_never_an_extrapolation(table):
    outside = jnp.array([HI[0] + 1.0, 5000.0])
    assert not bool(table.inside(outside)) and bool(table.inside(jnp.asarray(HI)))
    assert np.all(np.isnan(np.asarray(table.mean_at(outside)))) and np.all(np.isnan(np.asarray(table.cov_at(outside))))


def drift_lipschitz(field, points) -> float:
    """max ‖∂μ/∂x‖₂ (1/s) of the exact posterior mean over ``points``."""
    post = PointPosterior.from_field(field)
    jac = jax.vmap(jax.jacfwd(post.mean_at))(jnp.asarray(points))
    return float(np.max(np.linalg.norm(np.asarray(jac), ord=2, axis=(1, 2))))


@pytest.mark.slow
def test_forecast_with_the_table_agrees_with_the_exact_forecast(field, table):
    """Propagated tolerance: a drift error |δμ| ≤ ε σ_max (ε the table's measured mean error, σ_max the largest
    posterior velocity s.d.) moves the mean ODE's solution by at most ε σ_max (e^{Lt} − 1)/L (Gronwall;
    L = max ‖∂μ/∂x‖ over the region); divided by the forecast's smallest s.d. √λ_min(P(t)) that is the bound
    asserted on the whitened mean difference at every output time, alongside the stated tolerance itself.
    The covariances must agree within the tolerance (D's error ≤ ε relative; the gradient error is O(h³))."""
    starts = np.random.default_rng(8).uniform(1000.0, 9000.0, size=(24, 2))
    times = np.arange(0.0, 13.0) * 3600.0
    exact = spreadmod.spread_from_field(field, starts, times, posterior="exact")
    tab = spreadmod.spread_from_field(field, starts, times, posterior="table")
    points = LO + (HI - LO) * np.random.default_rng(9).uniform(size=(2000, 2))
    lipschitz = drift_lipschitz(field, points)
    sigma_max = np.sqrt(np.max(np.linalg.eigvalsh(field.predict(points)[1])))
    eps = max(float(table.mean_error), 1e-12)
    t = times[1:]
    bound = eps * sigma_max * np.expm1(lipschitz * t) / lipschitz / np.sqrt(np.linalg.eigvalsh(exact.covs[:, 1:])[..., 0])
    diff = (tab.means - exact.means)[:, 1:, :, None]
    white = np.linalg.norm(np.linalg.solve(np.linalg.cholesky(exact.covs[:, 1:]), diff)[..., 0], axis=-1)
    assert np.all(white <= bound) and np.max(white) <= TOL
    rel = np.linalg.norm(tab.covs[:, 1:] - exact.covs[:, 1:], axis=(-2, -1)) / np.linalg.norm(exact.covs[:, 1:], axis=(-2, -1))
    assert np.max(rel) <= TOL


@pytest.mark.slow
def test_auto_choice_and_the_rerun_off_the_grid(field, monkeypatch):
    """A release that leaves the table is rerun on a wider table (within the tolerance of the exact forecast: the
    table's mean error ≤ 0.05 posterior s.d. of the velocity, ≤ 0.05 × 0.2 m/s × 3 h ≈ 108 m of drift at most;
    checked to 1 m, measured 1.3·10⁻⁵ m),
    and with the exact posterior when no wider table can be had (bit for bit)."""
    starts = np.array([[5000.0, 5000.0], [8000.0, 5000.0]])
    times = np.arange(0.0, 4.0) * 3600.0
    exact = spreadmod.spread_from_field(field, starts, times, posterior="exact")
    monkeypatch.setattr(tabulate, "REGION_MARGIN", 0.0)   # box = data extent ∪ starts: the far start on its edge
    monkeypatch.setattr(tabulate, "TABLE_RELEASE_STEPS", 1)    # auto → table
    pair = np.array([[5000.0, 5000.0], [25_000.0, 5000.0]])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        auto = spreadmod.spread_from_field(field, pair, times)
    assert any("1 of 2 releases left the tabulated region" in str(w.message) for w in caught)
    far = spreadmod.spread_from_field(field, [[25_000.0, 5000.0]], times, posterior="exact")
    assert np.all(np.isfinite(auto.means)) and np.max(np.abs(auto.means[1] - far.means[0])) <= 1.0
    np.testing.assert_allclose(np.sqrt(np.diagonal(auto.covs[1, -1])), np.sqrt(np.diagonal(far.covs[0, -1])),
                               rtol=0.01)
    monkeypatch.setattr(tabulate.WiderTable, "__call__", lambda self, count=1: None)     # no wider table: exact
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rerun = spreadmod.spread_from_field(field, pair, times)
    np.testing.assert_allclose(rerun.means[1], far.means[0], rtol=1e-12, atol=0)  # rerun exactly, same numbers
    monkeypatch.setattr(tabulate, "TABLE_RELEASE_STEPS", 10**9)    # auto → exact
    again = spreadmod.spread_from_field(field, starts, times)
    np.testing.assert_array_equal(again.means, exact.means)


def test_bad_region_and_options_are_input_errors(field):
    with pytest.raises(InputError, match="region_max_m"):
        tabulate.tabulate_field(field, [0.0, 0.0], [0.0, 10.0])
    with pytest.raises(InputError, match="2 finite numbers"):
        tabulate.tabulate_field(field, [0.0], [1.0])
    with pytest.raises(InputError, match="more than 10 nodes"):
        tabulate.tabulate_field(field, LO, HI, tolerance=1e-9, start_nodes=3, max_nodes=10)
    with pytest.raises(InputError, match="posterior"):
        spreadmod.spread_from_field(field, [[1.0, 1.0]], [0.0, 3600.0], posterior="grid")


@pytest.mark.slow
def test_cli_exact_flag_forces_the_direct_path(field, run_cli, tmp_path, monkeypatch):
    """With the threshold at 1 release-step the default path tabulates; --exact gives the API's exact numbers."""
    path = tmp_path / "model.npz"
    driftwise.save(field, path)
    monkeypatch.setattr(tabulate, "TABLE_RELEASE_STEPS", 1)
    argv = ["spread", path, "--release", "4000,5000", "--horizon", "3h", "--every", "1h", "--json"]
    results = {}
    for name, extra in (("auto", []), ("exact", ["--exact"])):
        code, out, err = run_cli(*argv, *extra)
        assert code == 0, err
        results[name] = np.asarray(json.loads(out)["releases"][0]["mean"])
    exact = spreadmod.spread_from_field(field, [[4000.0, 5000.0]], np.arange(4.0) * 3600.0, posterior="exact")
    np.testing.assert_allclose(results["exact"], exact.means[0], rtol=1e-12, atol=1e-9)
    assert 0.0 < np.max(np.abs(results["auto"] - exact.means[0])) < 1.0      # the table's (small) difference, metres


def _two_sites():
    square = lambda x0, y0: np.array([[x0, y0], [x0 + 2000.0, y0], [x0 + 2000.0, y0 + 2000.0], [x0, y0 + 2000.0]])  # noqa: E731
    return (Site("west", square(2000.0, 4000.0)), Site("east", square(6000.0, 4000.0)))


@pytest.mark.slow
def test_connect_and_backtrack_choose_the_table_by_the_spread_rule(field, monkeypatch):
    """connect/backtrack tabulate by spread's rule ("auto": releases × RK4 steps ≥ TABLE_RELEASE_STEPS).
    A table whose forecasts stay within TOL (whitened mean, relative covariance; the forecast test above) moves
    a Gaussian's mass of any set by at most the total-variation distance ≤ √(KL/2) (Pinsker 1964); with both
    errors ≤ TOL that KL is below TOL², so each P[i, j, t] may change by at most TOL/√2 + 1e-12."""
    sites, times = _two_sites(), np.arange(0.0, 7.0) * 3600.0
    run = lambda **kw: connect_from_field(field, sites, times, per_site=4, step_s=3600.0, **kw)  # noqa: E731
    exact, table = run(posterior="exact"), run(posterior="table")
    diff = np.abs(table.probability - exact.probability)
    assert np.max(diff) <= TOL / np.sqrt(2) + 1e-12 and np.max(diff) > 0.0  # the table was used, within bound
    monkeypatch.setattr(tabulate, "TABLE_RELEASE_STEPS", 1)
    np.testing.assert_array_equal(run().probability, table.probability)      # auto → table
    monkeypatch.setattr(tabulate, "TABLE_RELEASE_STEPS", 10**9)
    np.testing.assert_array_equal(run().probability, exact.probability)      # auto → exact
    finds = Finds([[6000.0, 5000.0]], [6 * 3600.0], [300.0])
    back = lambda **kw: backtrack_from_field(field, finds, (1000.0, 1000.0, 9000.0, 9000.0), 1000.0,  # noqa: E731
                                             [0.0, 3 * 3600.0], step_s=3600.0, **kw)
    b_exact, b_table = back(posterior="exact"), back(posterior="table")
    np.testing.assert_allclose(b_table.probability.sum(), 1.0, rtol=0, atol=1e-12)   # normalised posterior
    np.testing.assert_array_equal(back().probability, b_exact.probability)   # auto → exact (threshold 10⁹)
    monkeypatch.setattr(tabulate, "TABLE_RELEASE_STEPS", 1)
    np.testing.assert_array_equal(back().probability, b_table.probability)   # auto → table
    assert not np.array_equal(b_table.probability, b_exact.probability)


@pytest.mark.slow
def test_connect_and_backtrack_cli_exact_flag(field, run_cli, tmp_path, monkeypatch):
    """With the threshold at 1 release-step the default tabulates; --exact gives the API's exact numbers."""
    path = tmp_path / "model.npz"
    driftwise.save(field, path)
    sites = tmp_path / "sites.csv"
    sites.write_text("site,x_m,y_m\n" + "".join(f"{s.name},{x},{y}\n" for s in _two_sites() for x, y in s.polygon_m))
    monkeypatch.setattr(tabulate, "TABLE_RELEASE_STEPS", 1)
    argv = ["connect", path, "--sites", sites, "--horizon", "3h", "--every", "1h", "--per-site", "4", "--json",
            "--step", "1h"]
    code, out, err = run_cli(*argv, "--exact")
    assert code == 0, err
    exact = connect_from_field(field, _two_sites(), np.arange(4.0) * 3600.0, per_site=4, step_s=3600.0,
                               posterior="exact")
    np.testing.assert_allclose(json.loads(out)["probability"], exact.probability, rtol=1e-12, atol=1e-15)
    code, out, err = run_cli("backtrack", path, "--found", "6000,5000", "--at", "21600", "--window", "6h",
                             "--every", "3h", "--region", "1000,1000,9000,9000", "--spacing", "2km", "--exact",
                             "--json")
    assert code == 0, err
    assert abs(sum(item["probability"] for item in json.loads(out)["probability_by_time"]) - 1.0) < 1e-9


@pytest.mark.parametrize("memory", [True, False])
def test_one_evaluation_gives_the_drift_and_the_diffusion(field, table, memory):
    """SDE.drift_and_rate (one kernel row / one interpolation per point) equals drift_at and rate called apart,
    on the exact posterior and on the table, with and without the velocity memory; and the tabulated SDE's
    compiled forecast reads the table once per point: one gather per RK4 stage (4), where the drift and the
    diffusion read it apart twice as often (8) and ran at 0.55× the release-steps per second."""
    from driftwise.dynamics import moments
    from driftwise.dynamics.sde import sde_from_field, split_for_jit

    exact = sde_from_field(field, velocity_memory=memory)
    points = jnp.asarray(LO + (HI - LO) * np.random.default_rng(9).uniform(size=(64, 2)))
    for sde in (exact, tabulate.on_table(exact, table)):
        assert sde.drift_and_diffusion is not None
        both = jax.vmap(lambda x: sde.drift_and_rate(x, 5400.0))(points)
        apart = jax.vmap(lambda x: (sde.drift_at(x), sde.rate(x, 5400.0)))(points)
        np.testing.assert_allclose(both[0], apart[0], rtol=1e-13, atol=1e-18)
        np.testing.assert_allclose(both[1], apart[1], rtol=1e-13, atol=1e-18)
    dynamic, static = split_for_jit(tabulate.on_table(exact, table))
    means, covs = points, jnp.broadcast_to(jnp.eye(2) * 100.0, (64, 2, 2))
    text = moments.propagate_batch_jit.lower(dynamic, static, moments.SphericalCubature(), moments.RK4(600.0), 64,
                                             means, covs, jnp.array([0.0, 3600.0])).compile().as_text()
    slice_shape = ",".join(str(n) for n in table.values.shape[2:])
    assert text.count(f"slice_sizes={{2,2,{slice_shape}}}") == 4


# ------------------------------------------------------------------ the support ratio on a grid, padded batches
def test_support_table_meets_its_tolerance_on_fresh_points_and_is_exact_off_the_grid(field):
    """The interpolated variance ratio against FlowField.local_variance_ratio (the sparse GP's posterior over its
    prior variance, Titsias 2009) on 3,000 points the table never saw; multilinear interpolation's error is
    O(h²) (de Boor 1978, ch. 2; from memory), so it is measured, with a 25 % margin for points the build's own
    check did not sample."""
    from driftwise.dynamics.supporttable import SUPPORT_TOLERANCE, support_table

    lo, hi = np.array([-5000.0, -5000.0]), np.array([22_000.0, 22_000.0])      # the data cover 0 … 10 km
    table = support_table(field, lo, hi)
    assert table is not None and table.error <= SUPPORT_TOLERANCE
    fresh = np.random.default_rng(11).uniform(lo, hi, (3000, 2))
    exact = field.local_variance_ratio(fresh)
    assert np.max(np.abs(table(fresh) - exact)) <= 1.25 * SUPPORT_TOLERANCE
    assert exact.min() < 0.5 and exact.max() > 0.9        # the box spans supported and unsupported ground
    far = np.array([[30_000.0, 5000.0], [-9000.0, -9000.0]])
    np.testing.assert_allclose(table(far), field.local_variance_ratio(far), rtol=1e-12, atol=0)


def test_batches_of_any_size_share_a_few_compiled_programs(field):
    """bucket_rows pads a batch to a power of two up to the chunk, then to a multiple of it; the padded rows are
    dropped, so every release's moments equal an unpadded run to the last bit."""
    from driftwise.dynamics import moments

    assert [tabulate.bucket_rows(n, 256) for n in (1, 2, 3, 5, 200, 256, 257, 464, 513)] == \
        [1, 2, 4, 8, 256, 256, 512, 512, 768]
    sde = fieldmod_sde(field)
    rng = np.random.default_rng(3)
    starts = rng.uniform(1000.0, 9000.0, (7, 2))
    covs = np.broadcast_to(np.eye(2) * 50.0**2, (7, 2, 2)).copy()
    times = np.array([0.0, 3600.0])
    kw = dict(method=moments.SphericalCubature(), integrator=moments.RK4(1800.0), chunk=4)
    before = moments.propagate_batch_jit._cache_size()
    outs = [tabulate.propagate_with_fallback(sde, None, starts[:n], covs[:n], times, **kw) for n in (5, 6, 7)]
    assert moments.propagate_batch_jit._cache_size() - before == 1          # 5, 6 and 7 rows all run as 8
    direct = moments.propagate_batch(sde, starts, covs, times, **kw)
    np.testing.assert_array_equal(outs[-1][0], np.asarray(direct[0]))
    np.testing.assert_array_equal(outs[0][1], np.asarray(direct[1])[:5])


def fieldmod_sde(field):
    from driftwise.dynamics.sde import sde_from_field

    return sde_from_field(field)


def test_a_wider_table_is_built_once_and_only_after_enough_releases_needed_it(field, monkeypatch):
    """table_fallbacks: WiderTable stages (3× and 9× the first table's box), then the exact SDE; a stage is built on
    first use once more than ``after`` releases needed it, once, over its widened box."""
    sde = fieldmod_sde(field)
    boxes = []
    monkeypatch.setattr(tabulate, "tabulated_sde", lambda f, s, corners, *a: boxes.append(np.asarray(corners)) or s)
    stages = tabulate.table_fallbacks(field, sde, sde, [[4000.0, 4000.0], [6000.0, 6000.0]], [0.0, 3600.0])
    assert [(w.widen, w.after) for w in stages[:-1]] == list(tabulate.WIDER_STAGES) and stages[-1] is sde
    lo, hi = tabulate.table_region([[4000.0, 4000.0], [6000.0, 6000.0]], field.data_summary["extent_m"])
    late = tabulate.WiderTable(field, sde, lo, hi, widen=6.0, after=64)
    assert late(40) is None and late(24) is None and boxes == []          # 64 releases so far: not yet
    assert late(1) is sde and late(5) is sde and len(boxes) == 1          # the 65th builds it, once
    centre, half = 0.5 * (lo + hi), 3.0 * (hi - lo)
    np.testing.assert_allclose(boxes[0], [centre - half, centre + half])
