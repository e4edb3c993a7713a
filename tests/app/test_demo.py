"""``driftwise demo``: the bookkeeping, the derived scenario numbers, and one reduced end-to-end run.

The full-size demo is CI's separate smoke test; here the pieces are checked on hand-made inputs
and one run at reduced size checks that every product, figure and the report appear and agree.
"""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest

from driftwise.app import demo, scenarios
from driftwise.app.cli import main
from driftwise.units import format_diffusivity


def _job(tmp_path: Path) -> demo.Job:
    (tmp_path / "figures").mkdir(exist_ok=True)
    return demo.Job(tmp_path, demo.DemoSettings.fast(), progress=False, figures_dir=tmp_path / "figures")


def test_outfall_share_is_the_mixture_mean_of_parcel_probabilities():
    # Three parcels released at 0, 1, 2 h; parcel i's probability at age a hours is p_i(a).
    # By hand, at clock 2 h: parcels of ages 2, 1, 0 h -> (p0(2) + p1(1) + p2(0)) / 3.
    times = 3600.0 * np.arange(5)
    starts = 3600.0 * np.arange(3)
    p = np.array([[0.0, 0.1, 0.4, 0.6, 0.8], [0.0, 0.2, 0.3, 0.5, 0.7], [0.0, 0.05, 0.15, 0.25, 0.35]])
    share = scenarios.outfall_share(p, times, starts)
    np.testing.assert_allclose(share[0], 0.0, rtol=0, atol=1e-15)
    np.testing.assert_allclose(share[1], (0.1 + 0.0) / 2, rtol=1e-12, atol=0)
    np.testing.assert_allclose(share[2], (0.4 + 0.2 + 0.0) / 3, rtol=1e-12, atol=0)
    np.testing.assert_allclose(share[4], (0.8 + 0.5 + 0.15) / 3, rtol=1e-12, atol=0)  # ages 4, 3, 2 h


def test_sites_land_where_the_generator_put_them():
    # Through lon/lat and back into a frame centred elsewhere: distances between sites are kept
    # (AEQD, WGS 84; a 10 km baseline differs by < 1e-4 between two nearby centres).
    from driftwise.data.frame import Frame

    other = Frame("lonlat", -9.02, 44.015)
    a, b = scenarios.sites_in_frame(other, [scenarios.HARBOUR_MOUTH_M, scenarios.OUTFALL_M])
    d_bay = np.hypot(*np.subtract(scenarios.HARBOUR_MOUTH_M, scenarios.OUTFALL_M))
    np.testing.assert_allclose(np.hypot(*(a - b)), d_bay, rtol=1e-4, atol=0)


def test_a_failing_step_is_recorded_not_hidden(tmp_path):
    job = _job(tmp_path)

    def broken(_job):
        raise RuntimeError("no\nconvergence")

    def missing(_job):
        raise demo.Unavailable("needs no_such_module_here, which this installation lacks")

    assert not job.run("fit", "fit", broken)
    assert not job.run("score", "skill", missing)
    assert job.steps[0]["status"] == "failed" and job.steps[0]["detail"] == "RuntimeError: no convergence"
    assert job.steps[1]["status"] == "not available" and "no_such_module_here" in job.steps[1]["detail"]
    assert [m["section"] for m in job.missing] == ["fit", "skill"]
    assert "RuntimeError" in job.state["tracebacks"][0]


def test_warnings_become_single_lines_with_counts():
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for _ in range(3):
            warnings.warn("naive ISO time taken as UTC\nsecond line", UserWarning)
        warnings.warn("projection stretch 0.2 %", RuntimeWarning)
    assert demo.one_line_warnings(caught) == ["UserWarning: naive ISO time taken as UTC (×3)",
                                              "RuntimeWarning: projection stretch 0.2 %"]


def test_progress_bar_only_on_a_terminal_plain_lines_elsewhere(monkeypatch):
    import io

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    monkeypatch.setattr("sys.stderr", Terminal())
    shown = demo.progress_bar(3, quiet=False)
    assert shown.bar is not None and not shown.plain
    quiet = demo.progress_bar(3, quiet=True)
    assert quiet.bar is None and not quiet.plain
    monkeypatch.setattr("sys.stderr", io.StringIO())  # a pipe or a log file: no bar garbage, plain lines
    piped = demo.progress_bar(3, quiet=False)
    assert piped.bar is None and piped.plain


@pytest.mark.parametrize("command", ["inspect", "fit", "spread", "score", "check", "map", "demo"])
def test_every_help_page_renders_cleanly(command, capsys):
    """argparse leaves a description's text as written (only help strings are %-formatted): no stray '%%'."""
    with pytest.raises(SystemExit) as done:
        main([command, "--help"])
    assert done.value.code == 0
    text = capsys.readouterr().out
    assert "%%" not in text and "%(" not in text
    if command in ("spread", "score", "demo"):  # forecasts that can guide decisions carry the caution
        assert "research tool" in " ".join(text.split())


def test_cli_help_and_bad_output_folder(tmp_path, capsys):
    with pytest.raises(SystemExit) as done:
        main(["demo", "--help"])
    assert done.value.code == 0
    assert "--out DIR" in capsys.readouterr().out
    afile = tmp_path / "taken"
    afile.write_text("x")
    assert main(["demo", "--out", str(afile), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "is not a folder" in err


@pytest.mark.slow
def test_reduced_demo_end_to_end(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--fast"]) == 0
    captured = capsys.readouterr()
    printed = captured.out
    assert "\r" not in captured.err and "it/s" not in captured.err  # not a terminal: no progress bars
    summary = json.loads((out / "summary.json").read_text())
    assert [s["status"] for s in summary["job"]["steps"]] == ["done"] * len(summary["job"]["steps"])
    for f in summary["files"]:
        assert (out / f["path"]).is_file(), f["path"]
    names = {Path(f["path"]).name for f in summary["figures"]}
    assert names == {"tracks.png", "elbo.png", "field.png", "tide_ellipses.png", "tide_phases.png",
                     "tide_spectrum.png", "physics.png", "spread_spill.png", "spread_outfall.png",
                     "area_probability.png", "skill.png", "connect_matrix.png", "connect_map.png", "backtrack_map.png"}
    _check_connect_and_backtrack(out, summary)
    _check_tide(out, summary)
    # the invented bay has a divergent river mouth: it must not be called divergence-free
    assert summary["check"]["verdict"]["divergence_free"] is False
    # forecasts beat persistence on the held-out tracks at the last horizon, and the numbers agree
    skill = summary["skill"]
    assert skill["skill"][-1] > skill["baselines"]["persistence"]["skill"][-1]
    scored = json.loads((out / "skill.json").read_text())
    np.testing.assert_allclose(scored["skill"], skill["skill"], rtol=1e-12, atol=0)
    # the digest and the report carry the same key numbers
    report = (out / "report.html").read_text()
    k = summary["fit"]["diffusivity_m2_s"]
    # the tidal fit keeps its own K (not recalibrated from transitions, and the report says why)
    assert f"K = {format_diffusivity(k)} and τ" in printed and format_diffusivity(k) in report
    assert "not recalibrated from the fit tracks" in report
    np.testing.assert_allclose(k, 5.0, rtol=0.3)   # the generator's K (demo_data/README.md); ELBO estimate
    assert str(out / "") in printed or f"files in {out}/" in printed
    assert "Caution" in printed and "Caution" in report


def _check_tide(out: Path, summary: dict) -> None:
    """The demo's fit finds the bay's M2 tide: its ellipses against the generator's own amplitude fields
    (app.bay.DemoBay.tide_amplitudes, the truth of the simulation), and the residual spectrum at M2."""
    ellipses, spectrum = summary["tide"]
    # --temporal auto chose the tide by itself and nothing else: the inertial frequency, which moving drifters see
    # as leakage of the M2 signal (significant but under the 5 % share floor of dynamics.temporalchoice), is not
    # modelled
    assert summary["fit"]["temporal"]["components"] == ["steady", "M2"]
    c = ellipses["comparison"]
    # the true semi-major axis has rms ≈ 0.12 m/s over the points; the noise of one hourly velocity is
    # √(2K/Δt) ≈ 0.05 m/s (K = 5 m²/s), averaged over ~2800 of them.  The reduced fit (M = 32) gave a median
    # error of 0.004 m/s; 0.02 m/s (under a sixth of the truth's rms) is the stated tolerance.
    assert 0.08 < c["rms_true_semi_major_m_s"] < 0.16
    assert c["median_abs_error_semi_major_m_s"] < 0.02 and c["median_abs_error_semi_minor_m_s"] < 0.02
    assert c["median_abs_error_inclination_deg"] < 10.0 and c["median_abs_error_phase_deg"] < 10.0
    # residual spectrum at M2: the steady fit leaves the tide (about half the squared amplitude, ≈ 0.007 m²/s²,
    # above the 1 % threshold); the tidal fit removes at least 90 % of it
    (name0, _, before, threshold, _), (name1, _, after, _, _) = spectrum["rows"]
    assert (name0, name1) == ("steady fit", "tidal fit")
    assert before > threshold and before > 0.003 and after < 0.1 * before
    report = (out / "report.html").read_text()
    assert '<h2 id="tide">Tide</h2>' in report and "M2 tidal current ellipses" in report
    assert "Residual spectrum at M2" in report and "steady part" in report


def _check_connect_and_backtrack(out: Path, summary: dict) -> None:
    """The demo's connectivity and back-tracking steps ran and their files hold sane numbers."""
    steps = {s["name"]: s["status"] for s in summary["job"]["steps"]}
    assert steps["connect"] == "done" and steps["backtrack"] == "done"
    for name in ("connect.nc", "connect.csv", "connect.json", "backtrack.nc", "backtrack.json"):
        assert (out / name).is_file(), name
    conn = json.loads((out / "connect.json").read_text())
    p = np.asarray(conn["probability"], float)  # [source][destination][time]
    assert p.shape == (3, 3, len(conn["times_s"])) and "research tool" in conn["caution"]
    assert np.all((p >= 0.0) & (p <= 1.0))
    # the three sites do not overlap, so the masses inside them are of disjoint events and add up to at most 1
    # (Kolmogorov 1933, additivity); Owen's-T polygon masses are exact to ~1e-15 per edge, so 1e-9 is ample
    assert np.all(p.sum(axis=1) <= 1.0 + 1e-9)
    # at the release nearly all of a site's material is inside it (only the Gaussian tails of edge releases
    # spill over); a loose floor, 0.5, that a misplaced site (in another frame) would fail
    assert np.all(np.diagonal(p[:, :, 0]) > 0.5)
    back = json.loads((out / "backtrack.json").read_text())
    by_time = np.array([item["probability"] for item in back["probability_by_time"]])
    np.testing.assert_allclose(by_time.sum(), 1.0, rtol=0, atol=1e-9)  # a normalised posterior
    assert back["region_90"]["area_m2"] >= back["region_50"]["area_m2"] > 0
    truth = summary["backtrack"][0]["truth_comparison"]
    best = back["most_probable"]["position_m"]
    np.testing.assert_allclose(truth["distance_m"], np.hypot(best[0] - truth["truth_m"][0],
                                                             best[1] - truth["truth_m"][1]), rtol=1e-9, atol=0)
    assert truth["truth_inside_90"] or not truth["truth_inside_50"]  # the 50 % region lies inside the 90 % one
    report = (out / "report.html").read_text()
    assert "Connectivity between sites" in report and "Back-tracking a find" in report
    assert f"{truth['distance_m'] / 1000:.2f}" in report


def test_durations_read_naturally():
    assert [demo.format_duration(s) for s in (34632.0, 95.0, 1.0, 2 * 86400.0)] == ["9.62 h", "1.58 min", "1 s", "2 d"]


# ---------------------------------------------------------------- the tide of the demo bay
def test_demo_bay_tide_is_periodic_with_the_m2_period_and_averages_to_the_steady_flow():
    # v(x, t) = v̄(x) + a cos ωt + b sin ωt: periodic in T = 12.4206012 h (Doodson 1921 M2 period, the generator's
    # constant) and its mean over one period is v̄ (∫ cos = ∫ sin = 0 over a period; trapezoid rule on a uniform
    # periodic grid is exact for a single harmonic, Davis & Rabinowitz 1984 §2.9, from memory)
    from driftwise.app.bay import DemoBay

    bay = DemoBay()
    xy = np.array([[0.0, 0.0], [4000.0, -3000.0], [-6000.0, 5000.0]])
    period = 12.4206012 * 3600.0
    np.testing.assert_allclose(2 * np.pi / bay.tide_omega_rad_s, period, rtol=1e-12, atol=0)
    t0 = 1.717e9
    np.testing.assert_allclose(bay.velocity_at(xy, t0 + period), bay.velocity_at(xy, t0), rtol=0, atol=1e-12)
    times = t0 + period * np.arange(16) / 16
    mean = np.mean([bay.velocity_at(xy, t) for t in times], axis=0)
    np.testing.assert_allclose(mean, bay.velocity(xy), rtol=0, atol=1e-12)
    a, b = bay.tide_amplitudes(xy)
    quarter = math.pi / 2 / bay.tide_omega_rad_s  # at ωt = 0 the tide is a, a quarter period later b
    t_zero = 2 * math.pi / bay.tide_omega_rad_s * 40_000   # 2.1e9 s: ωt ≈ 2.5e5 rad, rounding ≈ 1e-11 rad
    np.testing.assert_allclose(bay.velocity_at(xy, t_zero) - bay.velocity(xy), a, rtol=0, atol=1e-9)
    np.testing.assert_allclose(bay.velocity_at(xy, t_zero + quarter) - bay.velocity(xy), b, rtol=0, atol=1e-9)
    # a is curl-free and b divergence-free (analytic: ∇φ and the rotated ∇ψ), checked by central differences
    h = 1.0
    da = [(bay.tide_amplitudes(xy + h * e)[0] - bay.tide_amplitudes(xy - h * e)[0]) / (2 * h) for e in np.eye(2)]
    db = [(bay.tide_amplitudes(xy + h * e)[1] - bay.tide_amplitudes(xy - h * e)[1]) / (2 * h) for e in np.eye(2)]
    np.testing.assert_allclose(da[0][:, 1] - da[1][:, 0], 0.0, rtol=0, atol=1e-10)   # ∂a_v/∂x − ∂a_u/∂y
    np.testing.assert_allclose(db[0][:, 0] + db[1][:, 1], 0.0, rtol=0, atol=1e-10)   # ∂b_u/∂x + ∂b_v/∂y


def test_demo_data_regenerate_to_identical_arrays():
    # the generator is deterministic: two calls give the same tables, value for value
    from driftwise.app.bay import demo_tables

    first, second = demo_tables(), demo_tables()
    assert len(first) == len(second) == 2
    for a, b in zip(first, second):
        assert a.equals(b) and len(a) > 2000


def test_true_amplitudes_move_frames_through_lon_lat():
    # in the generator's own frame the truth is the generator's amplitudes; in a frame centred 2 km away the
    # vectors are rotated by the meridian convergence only, ≈ Δλ sin φ (Snyder 1987, Map Projections §25,
    # from memory) — 0.02° × sin 44° ≈ 2.4e-4 rad — so they agree to 1e-3 relative
    from driftwise.app import demotide
    from driftwise.app.bay import DemoBay, DemoScenario
    from driftwise.data.frame import Frame

    s = DemoScenario()
    xy = np.array([[1000.0, 2000.0], [-3000.0, -4000.0]])
    a, b = DemoBay().tide_amplitudes(xy)
    same = demotide.true_amplitudes(Frame("lonlat", s.lon0_deg, s.lat0_deg), xy)
    np.testing.assert_allclose(same, np.concatenate([a, b], axis=1), rtol=0, atol=1e-7)
    other = Frame("lonlat", s.lon0_deg + 0.02, s.lat0_deg + 0.01)
    moved = scenarios.sites_in_frame(other, xy)
    np.testing.assert_allclose(demotide.true_amplitudes(other, moved), np.concatenate([a, b], axis=1), rtol=1e-3,
                               atol=1e-5)


def test_phase_times_and_ellipse_comparison_wrap_angles():
    from driftwise.app import demotide
    from driftwise.diagnostics.tidalellipse import tidal_ellipses

    omega = 2 * np.pi / (12.4206012 * 3600)
    times = demotide.phase_times_s(omega, np.array([1.7e9, 1.7e9 + 86400.0]))
    np.testing.assert_allclose(np.cos(omega * times), [1, 0, -1, 0], rtol=0, atol=1e-6)
    np.testing.assert_allclose(np.sin(omega * times), [0, 1, 0, -1], rtol=0, atol=1e-6)
    assert times[0] <= 1.7e9 + 43200.0 < times[0] + 12.4206012 * 3600
    # inclinations 179° and 1° differ by 2° (mod 180°); phases 359° and 1° by 2° (mod 360°)
    from driftwise.diagnostics.tidalellipse import amplitudes_from_ellipse

    fit = tidal_ellipses(amplitudes_from_ellipse([0.10], [0.02], [179.0], [359.0]))
    true = tidal_ellipses(amplitudes_from_ellipse([0.12], [0.02], [1.0], [1.0]))
    c = demotide.compare_ellipses(fit, true)
    np.testing.assert_allclose([c["median_abs_error_semi_major_m_s"], c["median_abs_error_inclination_deg"],
                                c["median_abs_error_phase_deg"]], [0.02, 2.0, 2.0], rtol=0, atol=1e-9)
