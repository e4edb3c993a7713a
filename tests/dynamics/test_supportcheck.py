"""Honest forecasts where the data are thin: the thinned data support kept with a model, the warning before a
release outside it runs, the ``outside_support`` marks along mean paths (JSON/CSV/NetCDF), the map's and the
score's warnings.

References: the nearest-fix distance is checked against a brute-force numpy minimum over every fix; the flows
are fields with fixed hyperparameters and q in closed form (Titsias 2009), so no fit runs.
"""

from __future__ import annotations

import csv
import json
import types
import warnings

import numpy as np
import pytest
import xarray as xr

import driftwise  # noqa: F401  (switches on float64)
from driftwise.data import support as sup
from driftwise.data.datascales import map_spacing_m
from driftwise.data.tracks import Tracks
from driftwise.diagnostics.grid import field_grid
from driftwise.diagnostics.skill import score
from driftwise.dynamics import spread as spread_module
from driftwise.dynamics.spread import Release, spread_from_field
from driftwise.dynamics.supportcheck import SupportWarning
from driftwise.gp import field as F
from driftwise.products.writers import spread_to_dict, write_spread

BOX_M = 1000.0
STREAM_M_S = 0.2


def test_thinned_support_is_the_nearest_fix_distance_within_its_tolerance():
    rng = np.random.default_rng(0)
    fixes = np.concatenate([rng.normal([0.0, 0.0], 300.0, (20_000, 2)), rng.normal([5000.0, 2000.0], 50.0, (5000, 2))])
    record = sup.support_record(fixes)
    kept = np.asarray(record["points_m"])
    assert kept.shape[0] <= sup.MAX_SUPPORT_POINTS and record["tolerance_m"] == pytest.approx(1.01 * np.sqrt(2) * record["cell_m"])
    json.dumps(record, allow_nan=False)
    queries = rng.uniform([-2000.0, -2000.0], [8000.0, 5000.0], (400, 2))
    exact = np.sqrt(((queries[:, None, :] - fixes[None, :, :]) ** 2).sum(-1)).min(axis=1)   # brute force, numpy
    found = sup.distance_to_data_m(record, queries)
    assert np.all(found >= exact - 0.01 * np.sqrt(2) * record["cell_m"])   # kept fixes are fixes (rounded to 1 % of a cell)
    assert np.all(found <= exact + record["tolerance_m"])              # every fix is within a cell diagonal


def stream_field(box_m: float = BOX_M, extent_m: float | None = None) -> F.FlowField:
    """A uniform eastward stream of 0.2 m/s per km of ``box_m`` observed in a square box (noise 10 %): GP with a
    uniform background, fixed hyperparameters (ℓ = 0.3 box), closed-form q; the model keeps the support record
    of the observations and ``extent_m`` (default the data's) as the extent a map covers."""
    rng = np.random.default_rng(3)
    x = rng.uniform(0.0, box_m, (300, 2))
    speed = STREAM_M_S * box_m / BOX_M
    v = np.zeros((300, 2))
    v[:, 0] = speed
    v += rng.normal(0.0, 0.1 * speed, v.shape)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(300, 600.0), position_error_m=1e-3 * box_m)
    z = np.stack(np.meshgrid(*[np.linspace(0.0, box_m, 5)] * 2), -1).reshape(-1, 2)
    params = F.init_params("independent", 2, z, velocity_scale_m_s=0.25 * speed, length_scale_m=0.3 * box_m,
                           diffusivity_m2_s=1e-8 * box_m**2, noise_floor_m_s=0.05 * speed, background="uniform",
                           centre_m=[box_m / 2] * 2)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    top = x.max(0).tolist() if extent_m is None else [extent_m, box_m]
    summary = {"extent_m": {"min": x.min(0).tolist(), "max": top}, "support": sup.support_record(x)}
    return F.FlowField.from_params(params, frame={"kind": "metric"}, data_summary=summary, decorrelation_time_s=600.0,
                                   position_error_m=1.0)


def test_a_release_far_from_the_data_is_warned_about_before_anything_runs(monkeypatch):
    field = stream_field()

    def refuse(*args, **kwargs):
        raise RuntimeError("the propagation started")

    monkeypatch.setattr(spread_module, "spread_releases", refuse)
    with pytest.warns(SupportWarning) as caught, pytest.raises(RuntimeError, match="propagation started"):
        spread_from_field(field, Release([11_000.0, 500.0], name="far"), [0.0, 3600.0])
    text = str(caught[0].message)
    # nearest observation at x ≤ 1 km: 10 km away to within the support's tolerance (1 km / 128 cells · √2)
    assert text.startswith("release far at (11 km, 500 m) is outside the model's data support (10 km from the "
                           "nearest data; the data leave 100 % of the prior velocity variance there)"), text
    assert "extrapolates the prior" in text and "outside_support" in text


def test_outputs_past_the_edge_of_the_data_are_marked(tmp_path):
    """A release at the box centre drifts east at 0.2 m/s (the learned background stream): it reaches the data's
    edge 500 m later, after about 2500 s, and the outputs from the first time outside the support on are marked."""
    field = stream_field()
    times = np.arange(0.0, 4 * 3600.0 + 1, 600.0)
    with pytest.warns(SupportWarning, match=r"release centre: the mean path leaves the model's data support after "):
        forecast = spread_from_field(field, Release([500.0, 500.0], name="centre"), times)
    flags = forecast.support.outside_support[0]
    first = int(np.argmax(flags))
    assert not flags[0] and np.all(flags[first:]) and not np.any(flags[:first])
    edge_s = (BOX_M - 500.0) / STREAM_M_S                     # 2500 s to the box's edge at the stream speed
    assert edge_s <= times[first] <= edge_s + 3600.0          # the variance recovers within ~1-2 length scales
    assert forecast.means[0, first, 0] > BOX_M
    record = spread_to_dict(forecast)["releases"][0]
    assert record["outside_support"] == flags.tolist() and len(record["distance_to_data_m"]) == times.size
    rows = list(csv.DictReader(open(write_spread(forecast, tmp_path / "f.csv"))))
    assert [int(r["outside_support"]) for r in rows] == flags.astype(int).tolist()
    with xr.open_dataset(write_spread(forecast, tmp_path / "f.nc"), engine="h5netcdf") as ds:
        np.testing.assert_array_equal(ds["outside_support"].values[0], flags.astype("int8"))
        assert ds["outside_support"].attrs["flag_meanings"] == "inside_support outside_support"
        assert ds["distance_to_data_m"].attrs["units"] == "m"
    with warnings.catch_warnings():
        warnings.simplefilter("error")                        # a short forecast inside the data: no warning
        inside = spread_from_field(field, Release([200.0, 500.0]), [0.0, 600.0])
    assert not inside.support.outside_support.any()


def test_the_map_warns_and_keeps_the_distance_per_node():
    """Data in the western 1 km of a 3 km × 1 km extent: the eastern nodes are up to 2 km from the data."""
    with pytest.warns(SupportWarning, match=r"grid nodes \(\d+ %\) lie outside the model's data support .* up to "
                                            r"(1\.9\d|2\.0\d) km from the nearest data"):
        grid = field_grid(stream_field(extent_m=3000.0), spacing_m=125.0)
    assert grid.distance_to_data_m.shape == grid.supported.shape
    west = grid.x_m <= 1000.0
    assert grid.distance_to_data_m[:, west].max() < 150.0            # inside the data: within about a cell
    np.testing.assert_allclose(grid.distance_to_data_m[:, -1], 2000.0, atol=60.0)   # x = 3 km: 2 km east of x ≤ 1 km


def test_map_default_spacing_follows_the_data(tmp_path, run_cli):
    """DataScales.map_spacing_m: the 1-2-5 step nearest L/80 — a 1 m tank model maps every 1 cm (not metres)."""
    model = driftwise.save(stream_field(box_m=1.0), tmp_path / "tank.npz")
    code, out, _ = run_cli("map", model, "--out", tmp_path / "tank.nc", "--json")
    assert code == 0
    report = json.loads(out)
    assert report["spacing_m"] == pytest.approx(0.01) and report["shape"][1] in (100, 101, 102)
    assert map_spacing_m(1.0) == 0.01 and map_spacing_m(40_000.0) == 500.0


def test_score_warns_before_forecasting_starts_outside_the_support():
    field = stream_field()
    t = np.arange(0.0, 7201.0, 600.0)
    inside = np.c_[100.0 + STREAM_M_S * t, np.full(t.size, 500.0)]
    far = inside + [20_000.0, 0.0]
    tracks = Tracks(track_id=np.array(["in"] * t.size + ["far"] * t.size, dtype=object), time_s=np.r_[t, t],
                    position_m=np.r_[inside, far])
    with pytest.warns(SupportWarning, match=r"score: 10 of 20 forecast starts lie outside the model's data support, "
                                            r"up to 2\d\.\d km from the nearest data"):
        result = score(field, tracks, horizons_s=[1200.0, 3600.0]).to_dict()   # 10 starts per track (windows)
    # the far track's forecasts (half the pairs) are outside from the start; the near track's leave the box
    # once its mean passes x = 1 km
    assert result["outside_support_fraction"][0] >= 0.5 and result["outside_support_fraction"][1] >= 0.5


def test_spread_refuses_a_horizon_shorter_than_the_sampling_interval(tmp_path, run_cli):
    """The model's fixes came every 10 min (data_summary median_dt_s): a 5 min horizon forecasts nothing observable."""
    field = stream_field()
    summary = {**field.data_summary, "median_dt_s": 600.0}
    model = driftwise.save(F.FlowField.from_params(field.params, frame={"kind": "metric"}, data_summary=summary,
                                                   decorrelation_time_s=600.0, position_error_m=1.0), tmp_path / "m.npz")
    code, _, err = run_cli("spread", model, "--release", "500,500", "--horizon", "5min", "--every", "1min")
    assert code == 2
    assert "--horizon: 5 min is shorter than the sampling interval of these data (10 min, median)" in err
    assert err.count("\n") == 1 and "Traceback" not in err
    code, out, _ = run_cli("spread", model, "--release", "500,500", "--horizon", "10min", "--every", "5min", "--json")
    assert code == 0 and json.loads(out)["releases"][0]["outside_support"] == [False, False, False]
