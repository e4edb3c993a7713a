"""The tank-scale 3-D case end to end: `driftwise fit` with no options on drifters in an ABC flow.

Truth: the Arnold–Beltrami–Childress flow (Dombre et al. 1986, J. Fluid Mech. 167, 353; A = √3, B = √2, C = 1)
with period 1 m (a 1 m box) and U = 2 mm/s (RMS speed √6 U ≈ 4.9 mm/s); 20 drifters released uniformly in the
box, fixes at 2 Hz for 1 min, eddy diffusivity K = 1e-5 m²/s (Einstein 1905: displacement variance 2KΔt per
component), position noise σ = 0.5 mm per axis — the data of tests/benchmarks/bench_tank_abc.py.

Measured on this branch (bench_tank_abc.py, one fit, loaded 2-core machine, 138 s): K 9.88e-6 m²/s (ratio 0.99),
σ estimated 0.769 ± 0.170 mm (flagged not identified; 54 % above the truth), velocity RMSE near the data 26.1 % of
the RMS speed.  Issue 13 asks for 10 % and σ within 20 %: those two are open and recorded as strict expected
failures below (the velocity error did not move with 256 inducing points: 25.5 %).
"""

from __future__ import annotations

import contextlib
import io
import json

import numpy as np
import pytest

from driftwise.app.cli import main
from driftwise.data import synthetic
from driftwise.data.tracks import read_tracks, velocity_observations
from driftwise.gp.modelfile import load_model

SIGMA_M, K_M2_S, SPEED_M_S = 5e-4, 1e-5, 2e-3
FLOW = synthetic.ABCFlow(speed_m_s=SPEED_M_S, box_m=1.0)

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def tank_fit(tmp_path_factory):
    """(fit --json report, model path, tracks path) of `driftwise fit tracks.csv --out model.npz` with no options."""
    folder = tmp_path_factory.mktemp("tank")
    starts = np.random.default_rng(0).uniform(0.0, 1.0, (20, 3))
    synthetic.simulate_drifters(FLOW, starts, duration_s=60.0, fix_interval_s=0.5, diffusivity_m2_s=K_M2_S,
                                position_error_m=SIGMA_M, seed=1).to_csv(folder / "tracks.csv", index=False)
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        code = main(["fit", str(folder / "tracks.csv"), "--out", str(folder / "model.npz"), "--json", "--quiet"])
    assert code == 0
    return json.loads(buffer.getvalue()), folder / "model.npz", folder / "tracks.csv"


def _relative_rmse(model_path, csv_path) -> float:
    """RMS |posterior mean − truth| over RMS |truth| at the midpoints of consecutive fixes ("near the data")."""
    obs = velocity_observations(read_tracks(csv_path), position_error_m=0.0)
    mean, _ = load_model(model_path).predict(obs.position_m)
    truth = FLOW.velocity(obs.position_m)
    return float(np.sqrt(np.mean(np.sum((mean - truth) ** 2, 1)) / np.mean(np.sum(truth**2, 1))))


def test_tank_fit_recovers_the_diffusivity(tank_fit):
    report, _, _ = tank_fit
    assert report["position_error_source"] == "estimated"
    assert report["diffusivity_m2_s"] == pytest.approx(K_M2_S, rel=0.30)


@pytest.mark.xfail(strict=True, reason="issue 13 open gap: velocity RMSE 26 % (target 10 %) and σ 54 % off "
                                       "(target 20 %) on 20 tracks of 1 min at 2 Hz")
def test_tank_fit_recovers_velocity_and_position_error(tank_fit):
    report, model, tracks = tank_fit
    assert _relative_rmse(model, tracks) <= 0.10
    assert report["position_error_m"] == pytest.approx(SIGMA_M, rel=0.20)


def test_tank_check_says_divergence_free_and_not_curl_free(tank_fit, run_cli):
    """`driftwise check tracks.csv` with no options: the ABC flow is divergence-free (∇·u = 0) and Beltrami
    (∇ × u = k u ≠ 0).  Measured when written (same tracks, `driftwise check --json`): divergence-free yes (674
    cells, max |z| 1.59), curl-free no (6.2 % of the hull, max |z| 4.84), divergent share 0.013 ± 0.018, held-out
    tracks favour divergence-free over curl-free by 97 nats."""
    _, _, tracks = tank_fit
    code, out, err = run_cli("check", tracks, "--json", "--quiet")
    assert code == 0, err
    result = json.loads(out)
    assert result["verdict"]["answers"] == {"divergence_free": "yes", "curl_free": "no"}
    assert result["divergent_variance_fraction"] < 0.1 and result["families_distinguishable"] is True
