"""Unit parsing: SI conversions (exact factors: 1 h = 3600 s, 1 d = 86400 s, 1 kn = 1852 m / 3600 s (SI Brochure, 9th ed., table 8))."""

from __future__ import annotations

import json

import numpy as np
import pytest

from driftwise.data.frame import Frame
from driftwise.errors import InputError
from driftwise.gp import field as fld
from driftwise.gp.modelfile import save_model
from driftwise import units
from driftwise.units import parse_diffusivity_m2_s, parse_duration_s, parse_durations_s, parse_length_m, parse_speed_m_s


@pytest.mark.parametrize(
    ("text", "expected"),
    [("10m", 10.0), ("2km", 2000.0), ("1.5e3m", 1500.0), (" 25 cm ", 0.25), ("3mm", 0.003)],
)
def test_lengths(text, expected):
    assert parse_length_m(text) == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize(
    ("text", "expected"),
    [("6h", 21600.0), ("2d", 172800.0), ("10min", 600.0), ("30s", 30.0), ("3600s", 3600.0)],
)
def test_durations(text, expected):
    assert parse_duration_s(text) == pytest.approx(expected, rel=1e-15)


def test_duration_list():
    assert parse_durations_s("6h,12h,24h") == [21600.0, 43200.0, 86400.0]


def test_speed_and_diffusivity():
    assert parse_speed_m_s("1kn") == pytest.approx(0.514444, rel=1e-6)
    assert parse_speed_m_s("20cm/s") == pytest.approx(0.2, rel=1e-15)
    assert parse_diffusivity_m2_s("5m2/s") == pytest.approx(5.0, rel=1e-15)


@pytest.mark.parametrize("text", ["ten metres", "5 parsecs", "", "1..2m"])
def test_bad_values_name_the_option(text):
    with pytest.raises(InputError, match="--horizon"):
        parse_duration_s(text, what="--horizon")


# ---------------------------------------------------------------- a length or duration needs its unit
@pytest.mark.parametrize(("parse", "text", "suggested"), [
    (parse_duration_s, "48", "48s, 48min, 48h or 48d"),
    (parse_duration_s, " 1.5 ", "1.5s, 1.5min, 1.5h or 1.5d"),
    (parse_length_m, "500", "500m, 500km, 500cm or 500mm"),
    (parse_length_m, "-2e3", "-2e3m, -2e3km, -2e3cm or -2e3mm"),
])
def test_bare_length_or_duration_is_refused_with_suggestions(parse, text, suggested):
    with pytest.raises(InputError) as info:
        parse(text, what="--opt")
    assert str(info.value) == f"--opt: {text.strip()!r} has no unit; write it with one: {suggested}"


def test_bare_number_in_the_named_unit():
    assert parse_duration_s("48", bare_unit="h") == pytest.approx(172800.0, rel=1e-15)  # 48 × 3600 s
    assert parse_duration_s("90", bare_unit="s") == pytest.approx(90.0, rel=1e-15)
    assert parse_length_m("-300", bare_unit="m") == pytest.approx(-300.0, rel=1e-15)
    assert parse_length_m("2", bare_unit="km") == pytest.approx(2000.0, rel=1e-15)
    assert parse_length_m("2cm", bare_unit="km") == pytest.approx(0.02, rel=1e-15)  # a written unit wins


def test_zero_needs_no_unit_and_lists_refuse_a_bare_entry():
    assert parse_duration_s("0") == 0.0 and parse_length_m("0.0") == 0.0
    with pytest.raises(InputError, match="--horizons: '12' has no unit"):
        parse_durations_s("6h,12", what="--horizons")


def test_bare_speed_and_diffusivity_stay_si():
    assert parse_speed_m_s("2") == pytest.approx(2.0, rel=1e-15)
    assert parse_diffusivity_m2_s("5") == pytest.approx(5.0, rel=1e-15)


# ---------------------------------------------------------------- the command line
@pytest.fixture(scope="module")
def small_model(tmp_path_factory):
    """A saved 2-D Helmholtz model (prior q) over a 5 km square; the forecasts here only check times."""
    z = np.random.default_rng(0).uniform(0.0, 5000.0, (9, 2))
    params = fld.init_params("helmholtz", 2, z, velocity_scale_m_s=0.2, length_scale_m=1500.0,
                             diffusivity_m2_s=3.0, noise_floor_m_s=0.02)
    field = fld.FlowField.from_params(params, frame=Frame(), decorrelation_time_s=3600.0, position_error_m=10.0,
                                      data_summary={"n_tracks": 3, "n_observations": 40,
                                                    "extent_m": {"min": [0, 0], "max": [5000, 5000]}},
                                      fit_info={"elbo": 1.0})
    path = tmp_path_factory.mktemp("units") / "m.npz"
    save_model(field, path)
    return path


def test_cli_horizon_without_unit_is_exit_2(small_model, run_cli):
    code, out, err = run_cli("spread", small_model, "--release", "100,200", "--horizon", "48")
    assert (code, out) == (2, "")
    assert err.strip() == "driftwise: error: --horizon: '48' has no unit; write it with one: 48s, 48min, 48h or 48d"


def test_cli_horizon_with_unit_and_bare_release_metres(small_model, run_cli):
    code, out, _ = run_cli("spread", small_model, "--release", "100,200", "--horizon", "48h", "--every", "24h",
                           "--json")
    assert code == 0
    release = json.loads(out)["releases"][0]
    assert release["times_s"] == [0.0, 86400.0, 172800.0]  # 24 h = 86 400 s exactly (SI Brochure, table 8)
    np.testing.assert_allclose(release["start"], [100.0, 200.0], rtol=0, atol=0)  # --release help: bare = metres


@pytest.mark.parametrize(("argv", "option"), [
    (["inspect", "{tracks}", "--max-gap", "6"], "--max-gap"),
    (["fit", "{tracks}", "--out", "{tmp}/m.npz", "--position-error", "5"], "--position-error"),
    (["check", "{tracks}", "--position-error", "5"], "--position-error"),
])
def test_cli_bare_length_or_duration_options_are_exit_2(write_file, tmp_path, run_cli, argv, option):
    tracks = write_file("t.csv", "track_id,time,x,y\nA,0,0,0\nA,60,1,0\nA,120,2,0\nA,180,3,0\n")
    code, out, err = run_cli(*[a.format(tracks=tracks, tmp=tmp_path) for a in argv])
    assert (code, out) == (2, "")
    assert f"{option}: " in err and "has no unit" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "m.npz").exists()


# Printing in the unit that fits the size (SI prefixes, BIPM SI Brochure 2019, 9th ed., table 7), 3 significant figures.
@pytest.mark.parametrize("value, text", [
    (12345.0, "12.3 km"), (999.96, "1 km"), (150.0, "150 m"), (0.5, "500 mm"), (5e-4, "0.5 mm"),
    (0.0, "0 m"), (-2500.0, "-2.5 km"), (3e6, "3000 km"), (None, "—"),
])
def test_format_length_picks_the_unit_that_fits(value, text):
    assert units.format_length(value) == text


@pytest.mark.parametrize("value, text", [
    (5400.0, "1.5 h"), (0.5, "500 ms"), (172800.0, "2 d"), (86400.0, "24 h"), (59.99, "1 min"),
    (2e-3, "2 ms"), (0.0, "0 s"), (2.0, "2 s"),
])
def test_format_duration_picks_the_unit_that_fits(value, text):
    assert units.format_duration(value) == text


def test_format_speed_and_diffusivity_at_tank_and_ocean_scale():
    assert units.format_speed(0.25) == "0.25 m/s"
    assert units.format_speed(0.002) == "2 mm/s"
    assert units.format_speed(0.0123) == "12.3 mm/s"     # below 0.1 m/s in mm/s (a tank's speeds)
    assert units.format_diffusivity(1e-5) == "10 mm²/s"
    assert units.format_diffusivity(2.3) == "2.3 m²/s"


@pytest.mark.parametrize("name, value, text", [
    ("background_strain_scale_per_s", 3.2e-9, "3.2e-09"), ("background_rotation_scale_per_s", 4e-6, "0.000004"),
    ("background_rotation_scale_per_s", 1.234e-6, "0.00000123"),
    ("background_rotation_scale_per_s", 0.00691, "0.00691"), ("background_rotation_scale_per_s", 1.5e-4, "0.00015"),
    ("background_strain_scale_per_s", 0.0, "0"), ("count", 12345.0, "12300"),
])
def test_unitless_small_values_keep_their_figures(name, value, text):
    """A rate of 3.2e-9 /s (a learned background strain scale of a tank fit) printed as '0' read as "no strain";
    below 1e-6 the value is scientific, above it plain, with its 3 significant figures (Python format
    mini-language, 'g'; 1.234e-6 was printed '0.000001')."""
    assert units.format_named(name, value) == text


def test_estimates_keep_their_significant_figures():
    # the demo's divergent share 0.00497 ± 0.0012 was printed as "0.00 ± 0.00"
    format_estimate = units.format_estimate
    assert format_estimate(0.004966, 0.001234) == "0.00497 ± 0.0012"
    assert format_estimate(0.995034, 0.0000412) == "0.995 ± 0.000041"
    assert format_estimate(0.509, 9875.948) == "0.509 ± 9900"
    assert format_estimate(0.25, None) == "0.25" and format_estimate(0.25, float("nan")) == "0.25"
