"""Connectivity and back-tracking products without a time origin or a lon/lat frame (the CLI tests cover the
lon/lat, absolute-time case): both CF checkers, and GeoJSON refused for a metric frame.

External references: IOOS compliance-checker (cf suite, newest CF) and cfchecker 4.1 via cf_checkers.py.
"""

from __future__ import annotations

import numpy as np
import pytest

import driftwise  # noqa: F401  (float64)
from driftwise.dynamics.backtrack import BacktrackMap, Finds
from driftwise.dynamics.connectivity import Connectivity, first_passage_s
from driftwise.dynamics.sites import Site
from driftwise.errors import InputError
from driftwise.products.backtrackfiles import backtrack_geojson, write_backtrack
from driftwise.products.connectfiles import connect_to_dict, write_connect

cf_checkers = pytest.importorskip("cf_checkers")


def _connectivity(ensemble: bool) -> Connectivity:
    sites = (Site("a", np.array([[0, 0], [1000, 0], [1000, 1000], [0, 1000]], float)),
             Site("b", np.array([[2000, 0], [3000, 0], [2500, 800]], float)))
    times = np.array([0.0, 3600.0, 7200.0])
    prob = np.array([[[1.0, 0.6, 0.3], [0.0, 0.02, 0.1]], [[0.0, 0.0, 0.005], [1.0, 0.7, 0.5]]])
    return Connectivity(sites, times, prob, first_passage_s(times, prob, 0.01), 0.01,
                        np.zeros((2, 3)), np.zeros((2, 3, 2)), "ensemble" if ensemble else "cubature", 100,
                        standard_error=np.sqrt(prob * (1 - prob) / 100) if ensemble else None)


def _backtrack() -> BacktrackMap:
    x, y = np.linspace(-1000, 1000, 21), np.linspace(-800, 800, 17)
    gx, gy = np.meshgrid(x, y)
    density = np.exp(-0.5 * (gx**2 + gy**2) / 300.0**2)
    prob = np.stack([0.4 * density, 0.6 * density]) / density.sum()
    return BacktrackMap(x, y, np.array([-7200.0, -3600.0]), prob, Finds([[0.0, 0.0]], [0.0], [200.0]), "cubature", 0.0)


@pytest.mark.parametrize("ensemble", [False, True])
def test_connect_netcdf_without_time_origin_passes_both_checkers(tmp_path, ensemble):
    path = write_connect(_connectivity(ensemble), tmp_path / "c.nc")
    result = cf_checkers.compliance_results(path, cf_checkers.newest_cf_suite())
    assert result["errors"] == {} and result["high"] == [] and result["medium"] == [], result
    messages = cf_checkers.cfchecker_messages(path)
    assert messages["FATAL"] == [] and messages["ERROR"] == [], messages
    data = connect_to_dict(_connectivity(ensemble))
    assert data["first_passage_s"] == [[0.0, 3600.0], [None, 0.0]] and ("standard_error" in data) == ensemble


def test_backtrack_netcdf_without_time_origin_passes_both_checkers(tmp_path):
    path = write_backtrack(_backtrack(), tmp_path / "b.nc")
    result = cf_checkers.compliance_results(path, cf_checkers.newest_cf_suite())
    assert result["errors"] == {} and result["high"] == [] and result["medium"] == [], result
    messages = cf_checkers.cfchecker_messages(path)
    assert messages["FATAL"] == [] and messages["ERROR"] == [], messages
    with pytest.raises(InputError, match="lon/lat only"):
        backtrack_geojson(_backtrack())
