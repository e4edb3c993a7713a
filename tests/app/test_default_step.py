"""The moment methods' default RK4 step follows the field's own time scale (methods.default_moment_step_s).

Before: `connect` and `backtrack` stepped 1 h and `forecast` 10 min whatever the flow; on a 1 m tank (flow time
scale of seconds) `connect` with its defaults stopped with "integration diverged; use a smaller --step".
"""

from __future__ import annotations

import json
import re
import warnings
from types import SimpleNamespace

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg

import driftwise  # noqa: F401  (float64)
from driftwise.data import synthetic
from driftwise.data.frame import Frame
from driftwise.dynamics.methods import RK4_STEPS_PER_FLOW_TIME, default_ensemble_step_s, default_moment_step_s
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
    assert default_ensemble_step_s(tank, 600.0) == pytest.approx(0.1 / 0.032 / 20, rel=1e-12)


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
    assert re.search(r"per site, step 1[0-9]\.?[0-9]* s,", out), out                # ≈ 14 s, not 1 h
    code, js_default, err = run_cli(*base, "--json")
    assert code == 0, err
    assert json.loads(js_default)["step_s"] == pytest.approx(0.2 / 0.0035 / 4, rel=0.15)
    code, js_fine, err = run_cli(*base, "--json", "--step", "1s")
    assert code == 0, err
    default, fine = (np.asarray(json.loads(js)["probability"]) for js in (js_default, js_fine))
    assert np.max(np.abs(default - fine)) < 0.01, (default, fine)


def test_diverged_flags_what_numpy_finds_indefinite_in_2d_and_3d():
    """moments.diverged against numpy.linalg.eigvalsh on random symmetric matrices, half of them indefinite."""
    from driftwise.dynamics.moments import diverged

    rng = np.random.default_rng(5)
    for d in (2, 3):
        for _ in range(200):
            a = rng.normal(size=(d, d))
            cov = a @ a.T + rng.choice([0.0, -1.0]) * np.abs(rng.normal()) * np.eye(d)
            want = np.linalg.eigvalsh(cov)[0] < -1e-9 * max(np.linalg.eigvalsh(cov)[-1], 0.0)
            assert diverged(np.zeros(d), cov) == want
        assert not diverged(np.zeros((4, d)), np.zeros((4, d, d)))            # a point release: P = 0
        assert diverged(np.full(d, np.nan), np.eye(d))


@pytest.mark.parametrize("command", ["backtrack", "spread", "connect"])
def test_a_step_beyond_the_stability_bound_is_warned_and_the_default_stays_inside_it(tank_model, run_cli, command,
                                                                                      tmp_path):
    """5-min RK4 steps in cells whose velocity gradient has eigenvalues up to 0.029/s over the data (|λ|h = 8.6,
    RK4's bound 1.39): before, `backtrack` answered with exit 0 and only a numpy warning, `spread` printed an
    ellipse '… × 0 m'.  The bound is checked against the fitted mean's gradient by central differences and
    numpy's eigenvalues on the same 12 × 12 grid over the data (the printed bound has 3 figures)."""
    sites = tmp_path / "sites.csv"
    sites.write_text("site,x_m,y_m\nA,0.3,0.3\nA,0.4,0.3\nA,0.4,0.4\nA,0.3,0.4\n")
    args = {"backtrack": ["--found", "0.5,0.3", "--at", "10min", "--sd", "5cm", "--window", "5min", "--every",
                          "5min", "--spacing", "5cm"],
            "spread": ["--release", "0.45,0.35", "--horizon", "10min", "--every", "5min"],
            "connect": ["--sites", str(sites), "--horizon", "10min", "--every", "5min", "--per-site", "4"]}[command]
    with pytest.warns(UserWarning, match=r"the RK4 step 5 min is beyond RK4's stability bound for this field, "
                                         r"([\d.]+) s \(1.39 / the largest velocity-gradient eigenvalue over the "
                                         r"data, ([\d.]+)/s\).*use a step of \1 s or less") as caught:
        run_cli(command, tank_model, *args, "--step", "5min", "--quiet")
    bound = float(re.search(r"bound for this field, ([\d.]+) s", str(caught[0].message)).group(1))
    assert bound == pytest.approx(1.39 / _largest_eigenvalue_by_differences(tank_model), rel=2e-3), bound
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)
        code, _, err = run_cli(command, tank_model, *args, "--quiet")
    assert code == 0, err


def _largest_eigenvalue_by_differences(path) -> float:
    field = driftwise.load(path)
    lo, hi = (np.asarray(field.data_summary["extent_m"][k]) for k in ("min", "max"))
    grid = np.stack(np.meshgrid(*[np.linspace(a, b, 12) for a, b in zip(lo, hi)]), -1).reshape(-1, 2)
    h = 1e-5 * float(np.max(hi - lo))
    mean = lambda x: np.asarray(jax.vmap(field.mean_at)(jnp.asarray(x)))          # noqa: E731
    jac = np.stack([(mean(grid + h * e) - mean(grid - h * e)) / (2 * h) for e in np.eye(2)], axis=-1)
    return float(np.max(np.abs(np.linalg.eigvals(jac))))


def test_an_indefinite_covariance_stops_with_a_message(monkeypatch):
    """A forecast whose covariance turns indefinite (an integration beyond RK4's stability) stops with InputError
    naming the cause, not with numbers: simulated by a propagation that returns P = diag(1, −1)."""
    from driftwise.dynamics import backtrack as bt
    from driftwise.errors import InputError

    monkeypatch.setattr(bt, "propagate_with_fallback", lambda *a, **k: (np.zeros((1, 2, 2)), np.broadcast_to(
        np.diag([1.0, -1.0]), (1, 2, 2, 2)).copy()))
    with pytest.raises(InputError, match=r"the integration diverged\); use a smaller --step"):
        bt.forward_moments(None, np.zeros((1, 2)), np.array([0.0, 60.0]), step_s=10.0)
