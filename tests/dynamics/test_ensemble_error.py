"""The ensemble forecast reports its Monte Carlo error: standard errors of the mean and of the covariance,
carried from driftwise.dynamics.ensemble into the Spread, its JSON and the spread text.

Reference problem: the sweep's decaying rotation (tests/sweeps.py), a linear SDE whose Gaussian law is known
in closed form (Jazwinski 1970, Stochastic Processes and Filtering Theory, §7).  For N independent draws of a
Gaussian with covariance Σ: SE of a mean coordinate = sqrt(Σ_ii / N); SE of a covariance entry
= sqrt((Σ_ii Σ_jj + Σ_ij²) / N) (the Wishart moments, Anderson 2003, An Introduction to Multivariate
Statistical Analysis, 3rd ed., §7.3; 1/N against 1/(N − 1) is below the tolerance).
"""

from __future__ import annotations

import jax
import numpy as np
from sweeps import decaying_rotation

from driftwise.dynamics.methods import make_method
from driftwise.dynamics.spread import spread_releases
from driftwise.products.writers import monte_carlo_error, spread_to_dict

N = 20_000


def test_ensemble_standard_errors_match_the_gaussian_formulas():
    sde, rels, times, exact_mean, exact_cov, _ = decaying_rotation()
    method, _ = make_method("ensemble", particles=N, step_s=60.0)
    out = spread_releases(sde, rels, times, method=method, key=jax.random.key(3))
    assert out.particles == N and out.mean_se_m.shape == out.means.shape and out.cov_se_m2.shape == out.covs.shape
    cov = exact_cov[:, -1]                                            # (R, 2, 2) at the last output time
    var = np.diagonal(cov, axis1=-2, axis2=-1)
    # the SEs are themselves estimates from N draws: relative noise ~ 1/sqrt(2N) (mean), a few % (covariance)
    np.testing.assert_allclose(out.mean_se_m[:, -1], np.sqrt(var / N), rtol=0.03)
    wishart = np.sqrt((var[:, :, None] * var[:, None, :] + cov**2) / N)
    np.testing.assert_allclose(out.cov_se_m2[:, -1], wishart, rtol=0.08)
    error = monte_carlo_error(out, 0)
    assert error["mean_se_m"] == np.max(out.mean_se_m[0, -1])
    np.testing.assert_allclose(error["variance_relative_se"], np.sqrt(2.0 / N), rtol=0.08)   # SE(s²)/σ² = √(2/N)
    payload = spread_to_dict(out)
    assert payload["particles"] == N and "mean_se_m" in payload["units"]
    assert np.asarray(payload["releases"][0]["covariance_se_m2"]).shape == (len(times), 2, 2)


def test_moment_methods_report_no_monte_carlo_error():
    sde, rels, times, *_ = decaying_rotation()
    method, integrator = make_method("cubature")
    out = spread_releases(sde, rels, times, method=method, integrator=integrator)
    assert out.mean_se_m is None and out.particles is None and monte_carlo_error(out, 0) is None
    assert "particles" not in spread_to_dict(out) and "mean_se_m" not in spread_to_dict(out)["releases"][0]


def test_the_default_ensemble_step_follows_the_flow_time_scale():
    from types import SimpleNamespace

    from driftwise.dynamics.methods import ENSEMBLE_MAX_STEP_S, default_ensemble_step_s

    tank = SimpleNamespace(fit_info={"length_scale_m": 0.08, "rms_speed_m_s": 2e-3}, decorrelation_time_s=1e3)
    ocean = SimpleNamespace(fit_info={"length_scale_m": 4000.0, "rms_speed_m_s": 0.14}, decorrelation_time_s=1.0)
    assert default_ensemble_step_s(tank) == 0.08 / 2e-3 / 20                  # 40 s crossing time → 2 s steps
    assert default_ensemble_step_s(ocean) == ENSEMBLE_MAX_STEP_S == 300.0     # 8 h crossing time: capped at 5 min
    assert default_ensemble_step_s(SimpleNamespace(fit_info={}, decorrelation_time_s=600.0)) == 30.0
    assert default_ensemble_step_s(object()) == ENSEMBLE_MAX_STEP_S
