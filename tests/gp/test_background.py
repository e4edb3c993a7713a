"""The background flow of the prior (gp/background.py): kernel algebra, families, model files, recovery.

Outside references:
* the closed-form background kernels are checked against the explicit sum Σ_k s_k² (B_k ξ)(B_k η)ᵀ over the
  coefficient basis (a Gaussian linear model's covariance, e.g. Rasmussen & Williams 2006, §2.1, eq. 2.7);
* a pure linear flow v = G (x − x₀) (the classic linear fit to drifter clusters, Molinari & Kirwan 1975,
  J. Phys. Oceanogr. 5:483) has divergence tr G and vorticity G_yx − G_xy everywhere: the fitted background
  must recover them.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.stats import chi2

import driftwise
from driftwise.data.synthetic import LinearFlow, Mixture, PotentialSources, TaylorGreen, UniformFlow, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.diagnostics import physics
from driftwise.errors import InputError
from driftwise.gp.background import coefficient_names, features
from driftwise.gp.field import init_params
from driftwise.gp.kernels import KERNEL_FAMILIES, make_kernel
from geometry import grid_inside_alpha_shape

SCALES = {"uniform": 0.2, "divergence": 1e-4, "rotation": 2e-4, "strain": 3e-4}


def _kernel(family, d, background="linear"):
    return make_kernel(family, d, velocity_scale_m_s=0.1, length_scale_m=1000.0, background=background,
                       centre_m=np.arange(d) * 100.0, background_scales=SCALES)


@pytest.mark.parametrize("family", list(KERNEL_FAMILIES))
@pytest.mark.parametrize("d", [2, 3])
def test_closed_form_background_kernel_equals_the_sum_over_its_coefficient_basis(family, d):
    kernel = _kernel(family, d)
    rng = np.random.default_rng(0)
    x, y = rng.normal(size=(5, d)) * 1000.0, rng.normal(size=(7, d)) * 1000.0
    closed = sum(b.blocks(x[:, None], y[None]) for b in kernel.backgrounds())
    explicit = 0.0
    for background in kernel.backgrounds():
        fx, var = features(background, jnp.asarray(x))
        fy, _ = features(background, jnp.asarray(y))
        explicit = explicit + jnp.einsum("nap,p,mbp->nmab", fx, var, fy)     # Cov of F(x) c, c ~ N(0, diag var)
    np.testing.assert_allclose(closed, explicit, rtol=1e-12, atol=1e-15)
    # and the Gram matrix is the stationary part plus that
    np.testing.assert_allclose(kernel.gram(x, y), kernel.blocks(x[:, None] - y[None]) + closed, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(kernel.diag_blocks(x), jnp.stack([kernel.block(p, p) for p in x]), rtol=1e-12)


@pytest.mark.parametrize("family", list(KERNEL_FAMILIES))
@pytest.mark.parametrize("d", [2, 3])
def test_each_family_gets_only_the_linear_terms_it_can_represent(family, d):
    """Divergence tr G and vorticity of every basis field: zero where the family (or part) forbids them."""
    spec = KERNEL_FAMILIES[family]
    kernel = _kernel(family, d)
    parts = kernel.parts if family == "helmholtz" else {family: kernel}
    x = jnp.asarray(np.linspace(100.0, 900.0, d))
    for name, part in parts.items():
        for background in part.backgrounds():
            jac = jax.jacfwd(lambda p, b=background: features(b, p)[0])(x)     # (d, p, d): ∂F_ap/∂x_b
            div = jnp.einsum("apa->p", jac)
            antisym = jac - jnp.transpose(jac, (2, 1, 0))
            rot = jnp.max(jnp.abs(antisym), axis=(0, 2))
            can_diverge = spec.can_diverge if family != "helmholtz" else name == "curl_free"
            can_rotate = spec.can_rotate if family != "helmholtz" else name == "divergence_free"
            if not can_diverge:
                np.testing.assert_allclose(div, 0.0, atol=1e-15)
            if not can_rotate:
                np.testing.assert_allclose(rot, 0.0, atol=1e-15)
    names = [n for b in kernel.backgrounds() for n in coefficient_names(b.terms, d)]
    assert ("divergence_per_s" in names) == spec.can_diverge
    assert any(n.startswith("vorticity") for n in names) == spec.can_rotate


def test_background_choices_and_bad_values():
    assert _kernel("helmholtz", 2, "none").backgrounds() == ()
    assert [b.terms for b in _kernel("helmholtz", 2, "uniform").backgrounds()] == [("uniform",)]
    with pytest.raises(InputError, match="background"):
        _kernel("helmholtz", 2, "quadratic")
    with pytest.raises(InputError, match="centre"):
        make_kernel("curl-free", 2, velocity_scale_m_s=0.1, length_scale_m=1.0, background="linear", centre_m=[1.0])


def test_a_background_model_file_round_trips(tmp_path):
    z = np.random.default_rng(1).uniform(0, 1000.0, (6, 2))
    params = init_params("helmholtz", 2, z, velocity_scale_m_s=0.1, length_scale_m=300.0, background="linear",
                         centre_m=[500.0, 400.0], background_scales=SCALES)
    params = jax.tree_util.tree_map(jnp.asarray, params)
    field = driftwise.FlowField.from_params(params, frame={"kind": "metric"})
    again = driftwise.load(driftwise.save(field, tmp_path / "m.npz"))
    pts = np.array([[0.0, 0.0], [2000.0, -300.0]])
    np.testing.assert_allclose(again.predict(pts)[1], field.predict(pts)[1], rtol=1e-13)
    assert again.params.kernel.divergence_free.background.centre_m == (500.0, 400.0)
    assert again.hyperparameters["curl_free_background_divergence_scale_per_s"] == pytest.approx(1e-4, rel=1e-12)


# ------------------------------------------------------------------ recovery on a pure linear flow
LINEAR = LinearFlow(divergence_per_s=2e-5, vorticity_per_s=4e-5, normal_strain_per_s=1e-5, shear_strain_per_s=-1e-5)


@pytest.fixture(scope="module")
def linear_fit():
    """30 drifters, 12 h of hourly fixes in v = G x (K = 1 m²/s, 10 m position noise): 360 velocities."""
    starts = np.random.default_rng(5).uniform(-5000.0, 5000.0, (30, 2))
    table = simulate_drifters(LINEAR, starts, duration_s=12 * 3600.0, fix_interval_s=3600.0, diffusivity_m2_s=1.0,
                              position_error_m=10.0, seed=5)
    tracks = tracks_from_frame(table)
    return driftwise.fit(tracks, position_error_m=10.0, progress=False), tracks


@pytest.mark.slow
def test_the_background_recovers_the_rates_of_a_linear_flow(linear_fit):
    field, _ = linear_fit
    names, mean, cov = field.background_posterior()
    got = dict(zip(names, mean))
    std = dict(zip(names, np.sqrt(np.diag(cov))))
    truth = {"divergence_per_s": 2e-5, "vorticity_per_s": 4e-5, "normal_strain_per_s": 1e-5,
             "shear_strain_per_s": -1e-5}                                    # Molinari & Kirwan (1975) rates of G
    for name, value in truth.items():
        # 15 % of the largest rate (6e-6 s⁻¹): the GP part shares the linear field a little
        assert abs(got[name] - value) < 0.15 * 4e-5, (name, got[name], value)
        assert std[name] < 0.15 * 4e-5, (name, std[name])
    # the uniform part is the flow at the data's centre, G x₀ (x₀ the mean observation position)
    centre = np.asarray(field.params.kernel.divergence_free.background.centre_m)
    np.testing.assert_allclose([got["uniform_x_m_s"], got["uniform_y_m_s"]], LINEAR.velocity(centre[None])[0],
                               atol=0.01)


@pytest.mark.slow
def test_the_helmholtz_parts_carry_the_linear_divergence_and_rotation(linear_fit):
    """Split: the linear divergence belongs to the curl-free part, the rotation to the divergence-free part."""
    field, _ = linear_fit
    pts = np.random.default_rng(6).uniform(-3000.0, 3000.0, (20, 2))
    div = physics.divergence_posterior(field, pts, part="curl_free")
    rot = physics.vorticity_posterior(field, pts, part="divergence_free")
    assert np.abs(div.mean - 2e-5).max() < 0.15 * 4e-5, div.mean           # ∇·v = tr G = δ everywhere
    assert np.abs(rot.mean - 4e-5).max() < 0.15 * 4e-5, rot.mean           # ω = G_yx − G_xy everywhere


# ------------------------------------------------------------------ a uniform stream past a source and a sink




def stream_past_source_and_sink(xy: np.ndarray) -> np.ndarray:
    """Potential flow v = ∇(U x + φ), φ = −q e^{−|x − p₁|²/2w²} + q e^{−|x − p₂|²/2w²} (Batchelor 1967, An
    Introduction to Fluid Dynamics, §2.5 and §6.5: superposed potentials; smooth Gaussian source and sink so the
    speed stays finite), U = 0.1 m/s, w = 4 km, q = 0.1 w e^{1/2} m²/s (peak speed 0.1 m/s), p = (∓6 km, 0).
    Written out here, not taken from driftwise.data.synthetic (which only drives the drifters)."""
    w, q = 4000.0, 0.1 * 4000.0 * np.exp(0.5)
    v = np.zeros_like(xy) + np.array([0.1, 0.0])
    for centre, sign in (((-6000.0, 0.0), 1.0), ((6000.0, 0.0), -1.0)):
        d = xy - np.asarray(centre)
        v += sign * q / w**2 * np.exp(-0.5 * np.sum(d * d, axis=1) / w**2)[:, None] * d
    return v


@pytest.mark.slow
def test_a_stream_past_a_source_and_a_sink_is_recovered_with_calibrated_uncertainty():
    w, q = 4000.0, 0.1 * 4000.0 * np.exp(0.5)
    flow = Mixture(UniformFlow((0.2, 0.0)), PotentialSources(((-6000.0, 0.0), (6000.0, 0.0)), (2 * q, -2 * q), w), 0.5)
    rng = np.random.default_rng(41)
    starts = np.column_stack([rng.uniform(-20000.0, 0.0, 80), rng.uniform(-10000.0, 10000.0, 80)])
    table = simulate_drifters(flow, starts, duration_s=36 * 3600.0, fix_interval_s=3600.0, diffusivity_m2_s=1.0,
                              position_error_m=10.0, seed=41)
    tracks = tracks_from_frame(table)
    field = driftwise.fit(tracks, position_error_m=10.0, progress=False)           # the default kernel and background
    positions = np.asarray(driftwise.velocity_observations(tracks, position_error_m=10.0).position_m)
    grid = grid_inside_alpha_shape(positions, alpha_m=1000.0)
    true = stream_past_source_and_sink(grid)
    np.testing.assert_allclose(true, flow.velocity(grid), rtol=1e-12, atol=1e-15)   # the simulation drove this flow
    mean, cov = field.predict(grid)
    err = mean - true
    rel_error = np.sqrt(np.mean(np.sum(err**2, axis=1)) / np.mean(np.sum(true**2, axis=1)))
    inside = np.einsum("ni,nij,nj->n", err, np.linalg.inv(cov), err) <= chi2.ppf(0.95, 2)   # 5.991, scipy.stats
    assert grid.shape[0] > 1000
    assert rel_error < 0.10, rel_error
    assert 0.90 <= inside.mean() <= 0.98, inside.mean()
    names, coef, coef_cov = field.background_posterior()
    u = dict(zip(names, coef))
    assert abs(u["uniform_x_m_s"] - 0.1) < 3.0 * np.sqrt(coef_cov[0, 0]) + 0.005    # the stream U = 0.1 m/s


# ------------------------------------------------------------------ the diffusivity in cellular flow
@pytest.mark.slow
def test_the_diffusivity_in_taylor_green_cells_is_recovered_with_the_defaults():
    """Steady cells u = U sin kx cos ky, v = −U cos kx sin ky (Taylor & Green 1937, Proc. R. Soc. A 158, 499),
    U = 0.2 m/s, k = π/1 km, plus a random walk of K = 1 m²/s (Einstein 1905: displacement variance 2KΔt per
    component) and 5 m fix noise; 120 drifters, 10-min fixes for 3 h.  The default fit (background flow, position
    error estimated from the tracks) must give K within 30 %."""
    starts = np.random.default_rng(22).uniform(0.0, 2000.0, (120, 2))
    table = simulate_drifters(TaylorGreen(0.2, 1000.0), starts, duration_s=3 * 3600.0, fix_interval_s=600.0,
                              diffusivity_m2_s=1.0, position_error_m=5.0, seed=22)
    field = driftwise.fit(tracks_from_frame(table), progress=False)
    assert field.diffusivity_m2_s == pytest.approx(1.0, rel=0.30)
