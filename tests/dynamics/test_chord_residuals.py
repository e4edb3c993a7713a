"""The residual test after a fit through the transitions compares the finite-difference velocities with the chords the
field predicts, not with μ at the segment midpoints.

Truth: a steady Lamb–Oseen vortex u_θ(r) = Γ/(2πr)(1 − e^{−r²/r_c²}) (Oseen 1912; Lamb 1932, §334a), core radius
2 km, peak swirl 0.4 m/s, K = 1 m²/s, σ_pos = 10 m; 50 drifters with fixes 1–12 h apart (10 of them with two
fixes), simulated by RK4 plus Gaussian increments (files/steady_vortex_irregular.csv), and the transition fit of them
with σ_pos = 10 m (files/steady_vortex_irregular_transitions.npz, written by the stranger checks of 2026-12-05).  The
flow is steady by construction, so a significant periodicity in its residuals is a false alarm.  Outside reference
for the chords: scipy.integrate.solve_ivp (DOP853) on the field's own posterior mean.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy.integrate import solve_ivp

import driftwise
from driftwise.data.observations import velocity_observations
from driftwise.dynamics.temporalchoice import residual_evidence
from driftwise.dynamics.transitionstep import chord_velocities
from driftwise.dynamics.transitions import transition_set
from driftwise.gp.field import FlowField

FILES = Path(__file__).parent / "files"


def _case():
    field = driftwise.load(FILES / "steady_vortex_irregular_transitions.npz")
    tracks = driftwise.read_tracks(FILES / "steady_vortex_irregular.csv")
    return field, tracks


def test_chord_velocities_follow_the_fields_mean_path_as_scipy_integrates_it():
    field, tracks = _case()
    trans = transition_set(velocity_observations(tracks, position_error_m=10.0))
    chords = chord_velocities(field, trans)
    for k in np.linspace(0, trans.n - 1, 12).astype(int):
        path = solve_ivp(lambda t, y: np.asarray(field.predict(y[None, :])[0])[0], (0.0, trans.dt_s[k]),
                         trans.start_m[k], method="DOP853", rtol=1e-10, atol=1e-6)
        expected = (path.y[:, -1] - trans.start_m[k]) / trans.dt_s[k]
        # RK4 at ≤ 1 rad per step against DOP853 at rtol 1e-10: 2 mm/s on chords of up to 0.4 m/s
        np.testing.assert_allclose(chords[k], expected, atol=2e-3)


def test_no_false_tide_in_a_steady_vortex_fitted_through_its_transitions():
    field, tracks = _case()
    as_velocity_fit = FlowField.from_params(field.params, frame=field.frame_dict, data_summary=field.data_summary,
                                            decorrelation_time_s=field.decorrelation_time_s,
                                            position_error_m=field.position_error_m,
                                            fit_info={**field.fit_info, "likelihood": "velocities"},
                                            jitter_multiple=field.jitter_multiple)
    midpoint = residual_evidence(as_velocity_fit, tracks)
    chord = residual_evidence(field, tracks)
    # against μ at the midpoints the chord bias of the circling drifters looks like the M2 tide (p ≈ 0.004)
    assert [c.name for c in midpoint.components if c.significant] == ["M2"]
    assert not any(c.significant for c in chord.components)
    assert min(c.p_adjusted for c in chord.components if c.status == "tested") > 0.05
