"""Printed answers of `driftwise backtrack` at tank scale (a 1 m tank, finds known to mm): the numbers keep units
that fit their size and are not rounded to 0.

The model: a GP with fixed hyperparameters and closed-form optimal q on noisy velocities of Taylor–Green cells
(synthetic.TaylorGreen: 0.2 m cells at 5 mm/s) in a 1 m square — a stand-in for a fitted tank model.
"""

from __future__ import annotations

import json
import re
import types

import numpy as np
import pytest

import driftwise  # noqa: F401  (float64)
from driftwise.data import synthetic
from driftwise.data.frame import Frame
from driftwise.gp import field as F
from driftwise.gp.modelfile import save_model


@pytest.fixture(scope="module")
def tank_model(tmp_path_factory):
    rng = np.random.default_rng(3)
    x = rng.uniform(0.0, 1.0, (300, 2))
    v = synthetic.TaylorGreen(velocity_scale_m_s=5e-3, length_scale_m=0.2).velocity(x) + rng.normal(0, 5e-4, x.shape)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(300, 0.5), position_error_m=5e-4)
    z = np.stack(np.meshgrid(*[np.linspace(0.0, 1.0, 6)] * 2), -1).reshape(-1, 2)
    params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=5e-3, length_scale_m=0.2,
                           diffusivity_m2_s=1e-5, noise_floor_m_s=5e-4)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    summary = {"extent_m": {"min": x.min(axis=0).tolist(), "max": x.max(axis=0).tolist()}, "time_span_s": [0.0, 120.0]}
    path = tmp_path_factory.mktemp("tank") / "tank.npz"
    return save_model(F.FlowField.from_params(params, frame=Frame(), data_summary=summary), path)


def test_backtrack_text_at_tank_scale_keeps_mm_and_cm2(tank_model, run_cli):
    """Before: 'most probable release: (1, 0) m' for a point at (0.515, 0.316) m and '50 % region 9.1e-09 km²'.
    The printed point must equal the --json one to a tenth of a grid cell and the areas (cm², SI prefixes, BIPM
    SI Brochure 2019, table 7) must equal the --json area_m2 to the 3 printed figures."""
    argv = ["backtrack", tank_model, "--found", "0.5,0.3", "--at", "100s", "--sd", "2mm", "--window", "30s",
            "--every", "10s", "--step", "1s", "--quiet"]
    code, out, err = run_cli(*argv)
    assert code == 0, err
    code, js, err = run_cli(*argv, "--json")
    assert code == 0, err
    data = json.loads(js)
    x, y = (float(v) for v in re.search(r"most probable release: \(([-\d.]+), ([-\d.]+)\) m", out).groups())
    cell_m = min(data["grid"]["spacing_m"])
    assert np.allclose([x, y], data["most_probable"]["position_m"], atol=0.1 * cell_m), out
    assert 0.3 < x < 0.7 and 0.1 < y < 0.5, out          # near the find (0.5, 0.3) m, not rounded to (1, 0)
    for share in ("50", "90"):
        value, unit = re.search(rf"{share} % region ([\d.]+) ([^\s,]+)", out).groups()
        assert unit == "cm²", out
        assert float(value) * 1e-4 == pytest.approx(data[f"region_{share}"]["area_m2"], rel=5e-3)
