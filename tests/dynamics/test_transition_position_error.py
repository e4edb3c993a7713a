"""fit_by_likelihood with an estimated position error (stranger checks: a lab-tank vortex with coarse fixes).

Outside references:
- Lamb–Oseen vortex u_θ(r) = Γ/(2πr)(1 − e^{−r²/r_c²}) (Oseen 1912; Lamb 1932, §334a); core radius 0.1 m, peak
  swirl 0.05 m/s (Γ = 0.05 · 2π · 0.1 / 0.6382 m²/s): 20-s fixes are coarse for it (Δt|∇u| ≈ 1 or more).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import driftwise  # noqa: F401  (float64)
from driftwise.data.synthetic import LambOseenVortex, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.dynamics import transitionfit as TF
from driftwise.gp.schedule import Schedule

CORE_M, PEAK_M_S = 0.1, 0.05


def test_auto_keeps_an_estimated_position_error_an_estimate(monkeypatch):
    """auto chooses transitions; the warm-start refit must not treat the velocity fit's estimate as a given
    --position-error (it was refused against the median step, exit 2, naming an option the user never gave, or
    reported as "given") and the model records it as estimated.  At fixes this coarse the estimator is biased
    (data.positionerror: valid below about 0.1 rad of turn between fixes), and the transition fit would take its value
    as every fix's error: a warning says so."""
    monkeypatch.setattr(TF, "fit_transitions", lambda tracks, field, **options: field)   # the stage is not tested here
    choose = TF.choose_likelihood
    monkeypatch.setattr(TF, "choose_likelihood", lambda *args: choose(*args, threshold=0.0))   # auto → transitions
    rng = np.random.default_rng(3)
    radius, angle = rng.uniform(0.03, 0.3, 20), rng.uniform(0.0, 2.0 * math.pi, 20)
    vortex = LambOseenVortex(PEAK_M_S * 2.0 * math.pi * CORE_M / 0.6382, CORE_M)
    table = simulate_drifters(vortex, np.c_[radius * np.cos(angle), radius * np.sin(angle)], duration_s=160.0,
                              fix_interval_s=20.0, diffusivity_m2_s=1e-6, position_error_m=1e-3, seed=4, substeps=800)
    with pytest.warns(TF.TransitionWarning, match="estimated from the tracks.*median turn.*--position-error"):
        field, choice = TF.fit_by_likelihood(tracks_from_frame(table), "helmholtz", "auto", inducing=16, quiet=True,
                                             schedule=Schedule(steps=40))
    assert choice.likelihood == "transitions"
    assert field.fit_info["position_error_source"] == "estimated"
