"""Model files written before the package was split into layers still load and predict the same.

``files/model_v0_1_helmholtz.npz`` was written by driftwise 0.1.0 at commit 2eef097 (the flat package, before the
layered layout): a 16-point Helmholtz fit to six tracks of the demo bay.  The expected predictions beside it were
computed by that same code right after writing it.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

import driftwise

FILES = Path(__file__).resolve().parent / "files"


def test_a_model_file_from_the_flat_package_loads_and_predicts_identically(tmp_path):
    field = driftwise.load(FILES / "model_v0_1_helmholtz.npz")
    expected = json.loads((FILES / "model_v0_1_helmholtz.expected.json").read_text(encoding="utf-8"))
    mean, cov = field.predict(np.asarray(expected["points_m"]))
    # Same model, arithmetic reordered since (2026-12-04: kernels as profiles A, B of |r|²): rounding only,
    # measured 6.5e-12 relative on the mean and 1.3e-15 m²/s² (3.5e-11 of the largest entry) on the covariance.
    np.testing.assert_allclose(mean, expected["mean_m_s"], rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(cov, expected["cov_m2_s2"], rtol=1e-10, atol=1e-14)
    assert field.kernel_family == "helmholtz" and field.params.n_inducing == 16
    assert field.frame.kind == "lonlat"
    again = driftwise.load(driftwise.save(field, tmp_path / "resaved.npz"))     # and round-trips in today's layout
    np.testing.assert_allclose(again.predict(np.asarray(expected["points_m"]))[0], mean, rtol=0, atol=0)
