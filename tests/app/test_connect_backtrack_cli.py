"""``driftwise connect`` and ``driftwise backtrack`` end to end on a small fitted bay model.

Outside references beside each check: the CF checkers (IOOS compliance-checker ``cf`` suite at its newest
version and cfchecker 4.1, via tests/products/cf_checkers.py), RFC 7946 GeoJSON read by geopandas and
validated by shapely/GEOS, CF time decoding by xarray.
"""

from __future__ import annotations

import json
import sys
import types
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

import driftwise  # noqa: F401  (float64)
from driftwise.app.bay import DemoBay
from driftwise.data.frame import Frame
from driftwise.gp import field as F
from driftwise.gp.modelfile import save_model

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "products"))
cf_checkers = pytest.importorskip("cf_checkers")
geopandas = pytest.importorskip("geopandas")

T0_S = 1717416000.0     # 2024-06-03T12:00:00Z


def _model(path, frame):
    """A GP with fixed hyperparameters and closed-form optimal q on noisy DemoBay velocities (as test_cf_products)."""
    rng = np.random.default_rng(11)
    x = rng.uniform(-8000.0, 8000.0, (300, 2))
    v = DemoBay().velocity(x) + rng.normal(0.0, 0.02, x.shape)
    obs = types.SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=np.full(300, 3600.0), position_error_m=10.0)
    z = np.stack(np.meshgrid(*[np.linspace(-8000.0, 8000.0, 6)] * 2), -1).reshape(-1, 2)
    params = F.init_params("helmholtz", 2, z, velocity_scale_m_s=0.15, length_scale_m=3000.0,
                           diffusivity_m2_s=2.0, noise_floor_m_s=0.01)
    params = F.optimal_q(params, F.batch_from_observations(obs))
    summary = {"extent_m": {"min": x.min(axis=0).tolist(), "max": x.max(axis=0).tolist()},
               "time_origin_utc": "1970-01-01T00:00:00Z", "time_span_s": [T0_S - 86400.0, T0_S]}
    return save_model(F.FlowField.from_params(params, frame=frame, data_summary=summary), path)


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    out = tmp_path_factory.mktemp("models")
    return {"lonlat": _model(out / "lonlat.npz", Frame("lonlat", -9.0, 44.0)), "metric": _model(out / "m.npz", Frame())}


SITES = ("site,x_m,y_m\nreef,-3000,-1000\nreef,-1500,-1000\nreef,-1500,500\nreef,-3000,500\n"
         "bed,0,-500\nbed,2000,-500\nbed,2000,1500\nbed,0,1500\n")


@pytest.mark.slow
def test_connect_json_files_and_cf(models, run_cli, write_file, tmp_path):
    sites = write_file("sites.csv", SITES)
    outs = [tmp_path / "c.nc", tmp_path / "c.csv", tmp_path / "c.json"]
    code, out, err = run_cli("connect", models["lonlat"], "--sites", sites, "--horizon", "2d", "--every", "12h",
                             "--per-site", "16", "--step", "2h", "--json", "--figures", tmp_path / "fig",
                             *[a for o in outs for a in ("--out", o)])
    assert code == 0, err
    data = json.loads(out)
    assert data["sites"] == ["reef", "bed"] and data["times_s"] == [0.0, 43200.0, 86400.0, 129600.0, 172800.0]
    prob = np.array(data["probability"])
    assert prob.shape == (2, 2, 5) and np.all((prob >= 0) & (prob <= 1)) and prob[0, 0, 0] > 0.85  # 16-cell edge blur
    assert data["times_utc"][0] == "2024-06-03T12:00:00Z" and "Caution" in data["caution"]
    assert all(Path(o).exists() for o in data["outputs"]) and len(data["outputs"]) == 5
    ds = xr.open_dataset(tmp_path / "c.nc")
    assert ds["probability"].dims == ("source", "destination", "time")
    np.testing.assert_allclose(ds["probability"].values, prob, rtol=0, atol=1e-15)
    assert str(ds["time"].values[0]).startswith("2024-06-03T12:00")        # CF time decoded by xarray
    ds.close()
    result = cf_checkers.compliance_results(tmp_path / "c.nc", cf_checkers.newest_cf_suite())
    assert result["errors"] == {} and result["high"] == [] and result["medium"] == [], result
    messages = cf_checkers.cfchecker_messages(tmp_path / "c.nc")
    assert messages["FATAL"] == [] and messages["ERROR"] == [], messages
    rows = (tmp_path / "c.csv").read_text().splitlines()
    assert rows[0].startswith("source,destination,time_s,time_utc,probability") and len(rows) == 1 + 2 * 2 * 5


@pytest.mark.slow
def test_connect_ensemble_cross_check_and_metric_model(models, run_cli, write_file):
    sites = write_file("sites.csv", SITES)
    code, out, err = run_cli("connect", models["metric"], "--sites", sites, "--horizon", "1d", "--every", "12h",
                             "--method", "ensemble", "--particles", "2000", "--step", "5min", "--json")
    assert code == 0, err
    data = json.loads(out)
    assert data["method"] == "ensemble" and np.array(data["standard_error"]).shape == (2, 2, 3)
    code, out, err = run_cli("connect", models["metric"], "--sites", sites, "--horizon", "1d", "--every", "12h",
                             "--per-site", "64", "--step", "30min", "--json")
    moments = np.array(json.loads(out)["probability"])
    se = np.array(data["standard_error"])
    # allowance 0.02: Gaussian closure in the gyre plus the 5-min Euler–Maruyama bias (measured 0.011 between
    # moments and 20000 particles at 5-min steps; 0.1 at 30-min steps, which is why the step is short here)
    assert np.all(np.abs(moments - np.array(data["probability"]))[..., 1:] <= 3 * se[..., 1:] + 0.02)


@pytest.mark.slow
def test_backtrack_json_geojson_and_cf(models, run_cli, tmp_path):
    outs = [tmp_path / "b.nc", tmp_path / "b.geojson", tmp_path / "b.json"]
    code, out, err = run_cli("backtrack", models["lonlat"], "--found=-8.98,44.01", "--at", "2024-06-03T12:00:00Z",
                             "--window", "12h", "--every", "6h", "--region=-9.04,43.98,-8.96,44.04",
                             "--spacing", "400m", "--json", "--figures", tmp_path / "fig",
                             *[a for o in outs for a in ("--out", o)])
    assert code == 0, err
    data = json.loads(out)
    best = data["most_probable"]
    assert set(best) >= {"position_m", "time_s", "position_lonlat", "time_utc"}
    for key in ("region_50", "region_90"):
        assert data[key]["polygon_m"] and all(len(p) >= 4 and p[0] == p[-1] for p in data[key]["polygon_m"])
        assert len(data[key]["polygon_lonlat"]) == len(data[key]["polygon_m"])
    assert data["region_50"]["area_m2"] < data["region_90"]["area_m2"]
    assert [p["release_time_s"] for p in data["probability_by_time"]] == [T0_S - 43200.0, T0_S - 21600.0, T0_S]
    assert sum(p["probability"] for p in data["probability_by_time"]) == pytest.approx(1.0, abs=1e-12)
    frame = geopandas.read_file(tmp_path / "b.geojson")
    assert len(frame) == 3 and frame.geometry.is_valid.all()
    assert frame.geometry.iloc[0].area < frame.geometry.iloc[1].area      # 50 % region inside the 90 % one
    inner, outer = frame.geometry.iloc[0], frame.geometry.iloc[1]
    assert inner.difference(outer).area < 1e-4 * inner.area   # nested up to the 1e-7° rounding (measured 1e-6)
    result = cf_checkers.compliance_results(tmp_path / "b.nc", cf_checkers.newest_cf_suite())
    assert result["errors"] == {} and result["high"] == [] and result["medium"] == [], result
    messages = cf_checkers.cfchecker_messages(tmp_path / "b.nc")
    assert messages["FATAL"] == [] and messages["ERROR"] == [], messages
    assert (tmp_path / "fig" / "backtrack_map.png").stat().st_size > 10_000


@pytest.mark.slow
def test_backtrack_several_finds_on_a_metric_model(models, run_cli):
    code, out, err = run_cli("backtrack", models["metric"], "--found", "1km,0.5km", "--found", "2km,1km",
                             "--at", str(T0_S), "--at", str(T0_S + 6 * 3600), "--sd", "300m", "--window", "12h",
                             "--every", "6h", "--spacing", "1km", "--json")
    assert code == 0, err
    data = json.loads(out)
    assert "position_lonlat" not in data["most_probable"] and "polygon_lonlat" not in data["region_90"]
    assert data["finds"]["sd_m"] == [300.0, 300.0]


@pytest.mark.parametrize(("argv", "message"), [
    (["connect", "{metric}", "--sites", "{bad_sites}"], "site, x_m, y_m"),
    (["connect", "{metric}", "--sites", "{sites}", "--per-site", "0"], "--per-site"),
    (["connect", "{metric}", "--sites", "{sites}", "--out", "x.txt"], "unknown format"),
    (["backtrack", "{metric}", "--found", "1km,2km", "--at", "{t0}", "--at", "{t0}", "--at", "{t0}"], "--at"),
    (["backtrack", "{metric}", "--found", "1km,2km", "--at", "{t0}", "--out", "r.geojson"], "lon/lat"),
    (["backtrack", "{metric}", "--found", "1km,2km", "--at", "{t0}", "--spacing", "1mm"], "memory"),
    (["backtrack", "{metric}", "--found", "1km,2km", "--at", "6"], "1970-01-01T00:00:06Z"),
    # an output interval longer than the span gave outputs at 0 and the end only, without a word
    (["connect", "{metric}", "--sites", "{sites}", "--horizon", "20s", "--every", "30s"],
     "--every 30s is longer than --horizon 20s"),
    (["spread", "{metric}", "--release", "0,0", "--horizon", "2h", "--every", "3h"], "--every 3h is longer"),
    (["backtrack", "{metric}", "--found", "1km,2km", "--at", "{t0}", "--window", "1d", "--every", "2d"],
     "--every 2d is longer than --window 1d"),
])
def test_bad_input_and_memory_refusal_exit_2(models, run_cli, write_file, argv, message):
    paths = {"metric": models["metric"], "sites": write_file("s.csv", SITES),
             "bad_sites": write_file("b.csv", "name,x,y\na,0,0\n"), "t0": T0_S}
    code, out, err = run_cli(*[a.format(**{k: str(v) for k, v in paths.items()}) for a in argv])
    assert code == 2 and message in err and "Traceback" not in err and out == ""


def test_connect_and_backtrack_run_on_one_cpu_device_per_core():
    """Run as the program, connect and backtrack add one forced host device per usable core to XLA_FLAGS (the
    count os.sched_getaffinity gives), keeping the other flags and never overriding a count the user set."""
    import os

    from driftwise.app import cli

    assert cli.SHARDED_COMMANDS == ("connect", "backtrack")
    cores = len(os.sched_getaffinity(0))
    env = {"XLA_FLAGS": "--xla_cpu_experimental_ynn_fusion_type="}
    cli.one_device_per_core(env)
    assert env["XLA_FLAGS"] == f"--xla_cpu_experimental_ynn_fusion_type= --xla_force_host_platform_device_count={cores}"
    mine = {"XLA_FLAGS": "--xla_force_host_platform_device_count=3"}
    cli.one_device_per_core(mine)
    assert mine["XLA_FLAGS"] == "--xla_force_host_platform_device_count=3"
    empty: dict = {}
    cli.one_device_per_core(empty)
    assert empty["XLA_FLAGS"] == f"--xla_force_host_platform_device_count={cores}"
