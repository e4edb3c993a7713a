"""The transition fit's RK4 step on flows far from the 2-km design case (stranger checks).

Outside references:
- Lamb–Oseen vortex u_θ(r) = Γ/(2πr)(1 − e^{−r²/r_c²}) (Oseen 1912; Lamb 1932, §334a); a lab-tank vortex of
  core radius 0.1 m and peak swirl 0.05 m/s, Γ = 0.05 · 2π · 0.1 / 0.6382 m²/s, turns at the core at
  Γ/(2π r_c²) = 0.78 rad/s.
- RK4's stability interval on the imaginary axis is |ωh| ≤ 2√2 (Hairer & Wanner 1996, "Solving ODEs II", §IV.2;
  from memory); the step must keep the typical turn per step at TURN_PER_STEP = 1 rad whatever the flow's time scale
  (a 60-s floor on the step gave one 5-s step at ωh = 3.2 and a non-finite objective at step 0).
"""

from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np
import pytest

import driftwise  # noqa: F401  (float64)
from driftwise.data.synthetic import LambOseenVortex, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics import transitionfit as TF
from driftwise.dynamics.sde import PointPosterior
from driftwise.dynamics.transitions import transition_set
from driftwise.gp.schedule import Schedule
from driftwise.gp.training import fit

CORE_M, PEAK_M_S, SIGMA_M = 0.1, 0.05, 1e-3


def tank_tracks(fix_interval_s: float = 5.0):
    rng = np.random.default_rng(3)
    radius, angle = rng.uniform(0.03, 0.3, 20), rng.uniform(0.0, 2.0 * math.pi, 20)
    vortex = LambOseenVortex(PEAK_M_S * 2.0 * math.pi * CORE_M / 0.6382, CORE_M)
    table = simulate_drifters(vortex, np.c_[radius * np.cos(angle), radius * np.sin(angle)], duration_s=80.0,
                              fix_interval_s=fix_interval_s, diffusivity_m2_s=1e-6, position_error_m=SIGMA_M,
                              seed=4, substeps=200)
    return tracks_from_frame(table)


def test_tank_vortex_gets_a_step_of_at_most_a_radian_and_fits(monkeypatch):
    tracks = tank_tracks()
    warm = fit(tracks, inducing=16, position_error_m=SIGMA_M, schedule=Schedule(steps=40, optimiser="adam"),
               progress=False)
    trans = transition_set(tracks, position_error_m=SIGMA_M)
    norms = np.asarray(TF._gradient_norms(PointPosterior.from_field(warm), jnp.asarray(trans.start_m)))
    rate = float(np.percentile(norms, 95))
    assert rate > 0.1                                   # a fast flow: a 60-s floor would give ωh ≥ 6 rad
    step = TF.step_for_field(warm, trans)
    assert step * rate <= TF.TURN_PER_STEP * (1 + 1e-9)    # at most 1 rad per RK4 step (step_for_field)
    prop = TF._propagation("cubature", trans, step, 32)
    problem = TF._Problem(trans, prop, float(warm.decorrelation_time_s), None)
    assert math.isfinite(TF._value(warm.params, problem, None, warm.jitter_multiple))
    schedule = Schedule(steps=6, batch_size=64, learning_rate=0.02, patience=3, q_update="adam")
    refit = TF.fit_transitions(tracks, warm, position_error_m=SIGMA_M, schedule=schedule, progress=False)
    assert refit.fit_info["transition_steps"] == 6 and np.all(np.isfinite(refit.fit_info["transition_history"]))
    assert refit.fit_info["transition_step_s"] <= step
    # the fitted field's turn between fixes: the median, and the 10th percentile against a third of a turn
    turn, closest = refit.fit_info["coarseness_fitted"], refit.fit_info["turn_p10_fitted"]
    assert turn == pytest.approx(TF.coarseness(refit, trans), rel=1e-6) and 0.5 < turn
    assert 0.0 < closest < min(turn, TF.ALIASING_TURN)
    monkeypatch.setattr(TF, "ALIASING_TURN", 0.5 * closest)
    with pytest.warns(TF.TransitionWarning, match="over a third of a turn"):
        TF.fit_transitions(tracks, warm, position_error_m=SIGMA_M, schedule=schedule, progress=False)
