"""The moment methods' default RK4 step follows the field's own time scale (methods.default_moment_step_s).

Before: `connect` and `backtrack` stepped 1 h and `forecast` 10 min whatever the flow; on a 1 m tank (flow time
scale of seconds) `connect` with its defaults stopped with "integration diverged; use a smaller --step".
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pytest
import scipy.linalg

import driftwise  # noqa: F401  (float64)
from driftwise.data import synthetic
from driftwise.data.frame import Frame
from driftwise.dynamics.methods import RK4_STEPS_PER_FLOW_TIME, default_moment_step_s, default_step_s
from driftwise.dynamics.moments import RK4
from driftwise.gp import field as F
from driftwise.gp.modelfile import save_model


def test_the_default_rk4_step_is_a_quarter_of_the_flow_time_scale_capped_by_the_command():
    tank = SimpleNamespace(fit_info={"length_scale_m": 0.1, "rms_speed_m_s": 0.032}, decorrelation_time_s=30.0)
    bay = SimpleNamespace(fit_info={"length_scale_m": 6130.0, "rms_speed_m_s": 0.208}, decorrelation_time_s=3e4)
    assert RK4_STEPS_PER_FLOW_TIME == 4
    assert default_moment_step_s(tank, 3600.0) == pytest.approx(0.1 / 0.032 / 4, rel=1e-12)     # 0.78 s
    assert default_moment_step_s(bay, 3600.0) == 3600.0          # T = 8.2 h: a quarter is 2.0 h, above the cap
    assert default_moment_step_s(bay, 600.0) == 600.0
    assert default_moment_step_s(SimpleNamespace(fit_info={}, decorrelation_time_s=400.0), 600.0) == 100.0
    assert default_moment_step_s(object(), 600.0) == 600.0       # nothing known about the flow: the command's own
    assert default_step_s(tank, "ensemble", longest_ensemble_s=600.0) == pytest.approx(0.1 / 0.032 / 20, rel=1e-12)
    assert default_step_s(tank, "cubature") == pytest.approx(0.78125, rel=1e-12)


def test_rk4_at_a_quarter_radian_per_step_follows_a_rotation_as_the_matrix_exponential_does():
    """Solid-body rotation x' = A x, A = [[0, −ω], [ω, 0]], over one turn at h = 1/(4ω) (the default's step for a
    velocity gradient of 1/T): RK4 against the exact e^{At} x0 (scipy.linalg.expm); the phase error is
    (ωh)⁵/120 per step (RK4's amplification factor against e^{iωh}; Kutta 1901), 25 steps × 8.1·10⁻⁶ rad."""
    omega = 0.32                                                 # 1/s: a tank vortex turning in 20 s
    a = np.array([[0.0, -omega], [omega, 0.0]])
    turn = 2.0 * np.pi / omega
    x0 = np.array([0.1, 0.0])
    got = np.asarray(RK4(step_s=1.0 / (RK4_STEPS_PER_FLOW_TIME * omega)).integrate(
        lambda x: a @ x, x0, np.array([0.0, turn])))[-1]
    want = scipy.linalg.expm(a * turn) @ x0
    steps = np.ceil(turn * RK4_STEPS_PER_FLOW_TIME * omega)
    assert np.linalg.norm(got - want) / 0.1 < 1.5 * steps * 0.25**5 / 120      # 2.0·10⁻⁴ of the radius
    assert np.linalg.norm(got - want) / 0.1 > 0.5 * steps * 0.25**5 / 120      # the error is RK4's, not zero


@pytest.fixture(scope="module")
def tank_model(tmp_path_factory):
    """Taylor–Green cells (0.2 m, 5 mm/s) in a 1 m tank, as a fit records them: flow time scale
    length scale / RMS speed = 0.2 m / 3.5 mm/s = 57 s (the cells' gradients reach πU/ℓ = 0.079/s)."""
    rng = np.random.default_rng(3)
    x = rng.uniform(0.0, 1.0, (300, 2))
    flow = synthetic.TaylorGreen(velocity_scale_m_s=5e-3, length_scale_m=0.2)
    v = flow.velocity(x) + rng.normal(0, 5e-4, x.shape)
    obs = SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(300, 0.5), position_error_m=5e-4)
    z = np.stack(np.meshgrid(*[np.linspace(0.0, 1.0, 6)] * 2), -1).reshape(-1, 2)
    params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=5e-3, length_scale_m=0.2,
                           diffusivity_m2_s=1e-5, noise_floor_m_s=5e-4)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    summary = {"extent_m": {"min": x.min(axis=0).tolist(), "max": x.max(axis=0).tolist()}, "time_span_s": [0.0, 120.0]}
    info = {"length_scale_m": 0.2, "rms_speed_m_s": float(np.sqrt(np.mean(np.sum(v**2, axis=1))))}
    path = tmp_path_factory.mktemp("tank") / "tank.npz"
    return save_model(F.FlowField.from_params(params, frame=Frame(), data_summary=summary, position_error_m=5e-4,
                                              fit_info=info, decorrelation_time_s=60.0), path)


def test_connect_at_tank_scale_takes_a_step_from_the_flow_and_agrees_with_a_fine_step(tank_model, run_cli, tmp_path):
    sites = tmp_path / "sites.csv"
    sites.write_text("site,x_m,y_m\nA,0.3,0.3\nA,0.4,0.3\nA,0.4,0.4\nA,0.3,0.4\n"
                     "B,0.6,0.6\nB,0.7,0.6\nB,0.7,0.7\nB,0.6,0.7\n")
    base = ["connect", tank_model, "--sites", str(sites), "--horizon", "2min", "--every", "20s", "--per-site", "16"]
    code, out, err = run_cli(*base)
    assert code == 0, err
    step = float(err.split(" steps of ")[1].split(" s;")[0])
    assert step == pytest.approx(0.2 / 0.0035 / 4, rel=0.15), err                     # ≈ 14 s, not 1 h
    code, js_default, err = run_cli(*base, "--json")
    assert code == 0, err
    code, js_fine, err = run_cli(*base, "--json", "--step", "1s")
    assert code == 0, err
    default, fine = (np.asarray(json.loads(js)["probability"]) for js in (js_default, js_fine))
    assert np.max(np.abs(default - fine)) < 0.01, (default, fine)
