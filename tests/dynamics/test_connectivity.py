"""Connectivity between sites (driftwise.dynamics.connectivity, driftwise.dynamics.sites).

Outside references beside each check:
* pure diffusion between squares: the product of 1-D Gaussian integrals, with scipy.special.erf/ndtr —
  for the Gaussian mixture the method builds (each release N(x_r, (A/12N + 2Kt) I)) and, for the
  uniform source the mixture stands for, ∫Φ(u) du = uΦ(u) + φ(u) (from memory; standard calculus);
* a random-walk particle ensemble written with numpy here (Euler–Maruyama, Kloeden & Platen 1992) on the
  same SDE, 10⁵ particles per site, binomial standard errors √(P(1 − P)/n);
* point-in-polygon against matplotlib.path.Path.contains_points; the variance of a uniform distribution on
  an interval of length L is L²/12 (from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
from flows import DIFFUSION_SDE, DIFFUSIVITY_M2_S, LINEAR_SDE, VORTEX_SDE, linear_drift_np, random_walk, vortex_drift_np
from matplotlib.path import Path
from scipy.special import ndtr

import driftwise  # noqa: F401  (float64)
from driftwise.data.frame import Frame
from driftwise.dynamics.connectivity import (
    CULL_SD,
    _score_batch,
    connect,
    connect_ensemble,
    connect_memory_bytes,
    first_passage_s,
)
from driftwise.dynamics.moments import RK4
from driftwise.dynamics.sites import Site, cell_covariance_m2, inside_polygon, read_sites, seed_site
from driftwise.dynamics.spread import ROUNDING_FLOOR, probability_inside
from driftwise.errors import InputError


def _square(x0, y0, side):
    return np.array([[x0, y0], [x0 + side, y0], [x0 + side, y0 + side], [x0, y0 + side]], float)


SQUARES = (Site("a", _square(0.0, 0.0, 1000.0)), Site("b", _square(1500.0, 0.0, 1000.0)))
TIMES = np.array([0.0, 6 * 3600.0, 86400.0, 2 * 86400.0])
PER_SITE = 256


def _interval_mass(centre, sd, lo, hi):
    """P(lo < X < hi) for X ~ N(centre, sd²) (erf)."""
    return ndtr((hi - centre) / sd) - ndtr((lo - centre) / sd)


def _uniform_interval_mass(a0, a1, b0, b1, sd):
    """P(b0 < x0 + ε < b1) for x0 ~ U(a0, a1), ε ~ N(0, sd²): (sd/L) Σ ± F(·), F(u) = uΦ(u) + φ(u)."""
    def big_f(u):
        return u * ndtr(u) + np.exp(-0.5 * u * u) / np.sqrt(2 * np.pi)
    return sd / (a1 - a0) * (big_f((b1 - a0) / sd) - big_f((b1 - a1) / sd) - big_f((b0 - a0) / sd)
                              + big_f((b0 - a1) / sd))


@pytest.fixture(scope="module")
def diffusion_result():
    return connect(DIFFUSION_SDE, SQUARES, TIMES, per_site=PER_SITE, integrator=RK4(3600.0), seed=3)


def test_pure_diffusion_equals_the_erf_product_of_the_seeded_mixture(diffusion_result):
    """Each release is N(x_r, (A/12N + 2Kt) I) exactly (linear SDE); its mass in a square is a product of erf
    differences; P is their mean.  Agreement to 1e-10 (RK4 is exact for the constant rates here)."""
    for i, src in enumerate(SQUARES):
        points = seed_site(src, PER_SITE, seed=3 + i)
        for j, dst in enumerate(SQUARES):
            lo, hi = dst.polygon_m.min(0), dst.polygon_m.max(0)
            for t, time_s in enumerate(TIMES):
                sd = np.sqrt(src.area_m2 / (12 * PER_SITE) + 2 * DIFFUSIVITY_M2_S * time_s)
                mass = _interval_mass(points[:, 0], sd, lo[0], hi[0]) * _interval_mass(points[:, 1], sd, lo[1], hi[1])
                assert diffusion_result.probability[i, j, t] == pytest.approx(mass.mean(), abs=1e-10)


def test_pure_diffusion_matches_the_uniform_source_closed_form(diffusion_result):
    """Against the exact answer for material uniform in the source (∫Φ closed form per axis): the seeding
    error of 256 Sobol cells is below 2e-3 once diffusion has blurred the cells (t ≥ 6 h); at t = 0 the cells'
    Gaussian tails leave 2.8 % of a 1-km square's own mass outside it (the stated edge blur)."""
    for i, src in enumerate(SQUARES):
        a_lo, a_hi = src.polygon_m.min(0), src.polygon_m.max(0)
        for j, dst in enumerate(SQUARES):
            b_lo, b_hi = dst.polygon_m.min(0), dst.polygon_m.max(0)
            for t, time_s in enumerate(TIMES[1:], start=1):
                sd = np.sqrt(2 * DIFFUSIVITY_M2_S * time_s)
                exact = np.prod([_uniform_interval_mass(a_lo[k], a_hi[k], b_lo[k], b_hi[k], sd) for k in (0, 1)])
                assert diffusion_result.probability[i, j, t] == pytest.approx(exact, abs=2e-3)
    assert diffusion_result.probability[0, 0, 0] == pytest.approx(1.0, abs=0.03)
    assert diffusion_result.probability[0, 1, 0] == 0.0


def _walkers(sites, times, drift, n, seed):
    """P (S, S, T) and its binomial standard error from numpy random walkers uniform in each source."""
    rng = np.random.default_rng(seed)
    prob = np.zeros((len(sites), len(sites), len(times)))
    for i, site in enumerate(sites):
        lo, hi = site.polygon_m.min(0), site.polygon_m.max(0)
        x0 = rng.uniform(lo, hi, (2 * n, 2))
        x0 = x0[Path(site.polygon_m).contains_points(x0)][:n]
        xs = random_walk(x0, times, 300.0, rng, drift=drift)
        for j, dest in enumerate(sites):
            prob[i, j] = Path(dest.polygon_m).contains_points(xs.reshape(-1, 2)).reshape(len(times), n).mean(1)
    return prob, np.sqrt(prob * (1 - prob) / n)


THREE = (Site("a", _square(-2500.0, -1000.0, 1000.0)), Site("b", _square(500.0, -500.0, 1500.0)),
         Site("c", _square(-1000.0, 1500.0, 1500.0)))
FLOW_TIMES = np.array([0.0, 3 * 3600.0, 6 * 3600.0, 12 * 3600.0, 86400.0])


@pytest.mark.slow
def test_linear_flow_matches_a_random_walk_ensemble():
    """Stream + linear strain/shear/rotation with K = 5 m²/s, 10⁵ numpy walkers per site (step 300 s).  For a
    linear drift the Gaussian closure is exact (the moment equations close; Jazwinski 1970), so the stated
    closure error is 0 and what remains is the seeding error (≤ 2e-3, the previous test) and the walkers'
    Euler–Maruyama bias (exact in distribution for a linear drift's mean up to O(h)): every P within 3 s.e. +
    3e-3 for t > 0."""
    moments = connect(LINEAR_SDE, THREE, FLOW_TIMES, per_site=PER_SITE, integrator=RK4(600.0))
    walkers, se = _walkers(THREE, FLOW_TIMES, linear_drift_np, 100_000, seed=1)
    diff = np.abs(moments.probability - walkers)[..., 1:]
    assert np.all(diff <= 3 * se[..., 1:] + 3e-3), diff.max()
    assert walkers[0, 1, 2] > 0.1          # material does travel between sites (the check is not vacuous)


@pytest.mark.slow
def test_vortex_matches_a_random_walk_ensemble_within_the_closure_error():
    """Lamb–Oseen vortex (Γ = 2000 m²/s, core 1.5 km) in a stream, K = 5 m²/s, 10⁵ numpy walkers per site.
    Releases spread over the vortex core within a day, where one Gaussian per release cannot follow the
    winding: the stated Gaussian-closure error for this flow is 0.08 absolute (measured 0.070 at 12 h,
    c → c); every P within 3 s.e. + 0.08, and the median difference over all entries below 3e-3."""
    moments = connect(VORTEX_SDE, THREE, FLOW_TIMES, per_site=PER_SITE, integrator=RK4(600.0))
    walkers, se = _walkers(THREE, FLOW_TIMES, vortex_drift_np, 100_000, seed=2)
    diff = np.abs(moments.probability - walkers)[..., 1:]
    assert np.all(diff <= 3 * se[..., 1:] + 0.08), diff.max()
    assert np.median(diff) < 3e-3


@pytest.mark.slow
def test_our_ensemble_agrees_with_numpy_walkers_and_the_moments():
    """--method ensemble (jax Euler–Maruyama, particles uniform in the site) against the numpy walkers: both
    Monte Carlo, so within 3 combined standard errors (+1e-3 for the different step, 600 s vs 300 s)."""
    sites, times = SQUARES, TIMES[:3]
    ours = connect_ensemble(LINEAR_SDE, sites, times, particles=20_000, step_s=600.0, seed=5)
    walkers, se = _walkers(sites, times, linear_drift_np, 20_000, seed=6)
    combined = np.sqrt(se**2 + ours.standard_error**2)
    assert np.all(np.abs(ours.probability - walkers) <= 3 * combined + 1e-3)
    assert ours.probability[0, 0, 0] == 1.0 and ours.method == "ensemble"


def test_seeding_inside_deterministic_and_area_covariance():
    """Sobol points lie inside an L-shaped site (matplotlib.path), the same seed gives the same points, and the
    mixture's covariance (points + A/(12N) I per release) is the uniform site's (L²/12 per axis for a square)."""
    ell = Site("L", np.array([[0, 0], [2000, 0], [2000, 1000], [1000, 1000], [1000, 2000], [0, 2000]], float))
    pts = seed_site(ell, 500, seed=9)
    assert pts.shape == (500, 2) and np.all(Path(ell.polygon_m).contains_points(pts))
    assert np.array_equal(pts, seed_site(ell, 500, seed=9))
    square = SQUARES[0]
    pts = seed_site(square, 1024, seed=1)
    cov = np.cov(pts.T, bias=True) + cell_covariance_m2(square.area_m2, 1024)
    np.testing.assert_allclose(np.diag(cov), 1000.0**2 / 12, rtol=0.01)
    assert abs(cov[0, 1]) < 0.01 * 1000.0**2 / 12
    assert cell_covariance_m2(1e6, 100)[0, 0] == pytest.approx(1e6 / 1200)


def test_inside_polygon_agrees_with_matplotlib():
    rng = np.random.default_rng(0)
    poly = np.array([[0, 0], [3, 0], [3, 1], [1, 1], [1, 3], [0, 3]], float)
    pts = rng.uniform(-0.5, 3.5, (5000, 2))
    assert np.array_equal(inside_polygon(pts, poly), Path(poly).contains_points(pts))


def test_first_passage_and_memory_estimate():
    times = np.array([0.0, 10.0, 20.0])
    got = first_passage_s(times, np.array([[0.0, 0.02, 0.0], [0.0, 0.0, 0.001]]), 0.01)
    assert got[0] == 10.0 and np.isnan(got[1])
    assert connect_memory_bytes(1000, 10_000, 64, 5) > 8 * 1000 * 1000 * 10_000


def test_sites_files(write_file):
    path = write_file("s.csv", "site,x_m,y_m\na,0,0\na,10,0\na,10,10\nb,20,0\nb,30,0\nb,30,10\n")
    sites = read_sites(path)
    assert [s.name for s in sites] == ["a", "b"] and sites[0].area_m2 == pytest.approx(50.0)
    bad = write_file("bad.csv", "site,x,y\na,0,0\n")
    with pytest.raises(InputError, match="site, x_m, y_m"):
        read_sites(bad)
    bad = write_file("nan.csv", "site,x_m,y_m\na,0,0\na,zz,0\na,1,1\n")
    with pytest.raises(InputError, match="row 3"):
        read_sites(bad)
    geo = write_file("s.geojson", '{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": '
                     '{"name": "reef"}, "geometry": {"type": "Polygon", "coordinates": [[[-9, 44], [-8.99, 44], '
                     '[-8.99, 44.01], [-9, 44]]]}}]}')
    with pytest.raises(InputError, match="metric frame"):
        read_sites(geo)
    (site,) = read_sites(geo, frame=Frame("lonlat", -9.0, 44.0))
    assert site.name == "reef" and site.area_m2 == pytest.approx(0.5 * 804.0 * 1112.0, rel=0.01)


def test_culled_scores_equal_every_site_scored():
    """Scoring only sites within CULL_SD s.d. changes nothing: the skipped mass is ≤ 2 Φ(−CULL_SD) per axis
    (normal tail by scipy.special.ndtr) < ROUNDING_FLOOR, below which probability_inside returns 0."""
    assert 2 * ndtr(-CULL_SD) < ROUNDING_FLOOR
    square = np.array([[-500.0, -500.0], [500.0, -500.0], [500.0, 500.0], [-500.0, 500.0]])
    sites = tuple(Site(f"s{i}", square + [3000.0 * (i % 4), 3000.0 * (i // 4)]) for i in range(8))
    rng = np.random.default_rng(3)
    means = rng.uniform(-2000.0, 11000.0, (200, 5, 2))
    a = rng.normal(size=(200, 5, 2, 2)) * rng.uniform(10.0, 3000.0, (200, 5, 1, 1))
    covs = a @ np.swapaxes(a, -1, -2)
    covs[:, 0] = 0.0                                   # point releases at t = 0, some exactly on a vertex
    means[:4, 0] = sites[0].polygon_m[0]
    every = np.stack([probability_inside(means, covs, s.polygon_m) for s in sites], axis=1)
    assert 0.05 < np.mean(every > 0) < 0.9            # both culled and scored pairs occur
    np.testing.assert_allclose(_score_batch(means, covs, sites), every, rtol=0, atol=1e-15)
