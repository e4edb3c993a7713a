"""Each figure shows what it says: axes cover the data, colour scales come from the plotted quantity,
labels carry units, every figure has a title, a key, and (spread figures) the release time.

These tests read the drawn artists back from the Figure (limits, norms, texts, legends); the
numbers they compare with are computed here from the inputs by their definitions.  Outside
references: the χ²₂ quantile of the probability ellipse (scipy.stats.chi2), and the highest-density
region of a single Gaussian, whose 50 % contour is its 50 % χ²₂ ellipse (same quantile).
"""

from __future__ import annotations

import re
from types import SimpleNamespace

import numpy as np
import pytest
from matplotlib.colors import TwoSlopeNorm, to_rgba
from matplotlib.quiver import QuiverKey
from scipy.stats import chi2

from driftwise.diagnostics import physics
from driftwise.diagnostics.verdict import CheckMaps
from driftwise.products import plots
from driftwise.products.plotspread import TIME_TINTS

X_M = np.linspace(0.0, 20e3, 41)
Y_M = np.linspace(0.0, 12e3, 25)
UNIT = re.compile(r"\(.+\)")


def _vortex():
    gx, gy = np.meshgrid(X_M, Y_M)
    rx, ry = gx - 10e3, gy - 6e3
    g = np.exp(-(rx**2 + ry**2) / (2 * 4e3**2))
    return np.stack([-0.3 * ry / 4e3 * g, 0.3 * rx / 4e3 * g], -1), g


def _maps(fig):
    return [a for a in fig.axes if not hasattr(a, "_colorbar")]


def _colourbar_labels(fig):
    return [a.get_xlabel() or a.get_ylabel() for a in fig.axes if hasattr(a, "_colorbar")]


def _title(fig):
    parts = [fig._suptitle.get_text() if fig._suptitle else ""]
    parts += [a.get_title(loc) for a in _maps(fig) for loc in ("left", "center")]
    return " ".join(p for p in parts if p)


def _covers(ax, x, y):
    """The axis limits contain every finite x, y value (drawn units)."""
    x0, x1 = sorted(ax.get_xlim())
    y0, y1 = sorted(ax.get_ylim())
    x, y = np.asarray(x)[np.isfinite(x)], np.asarray(y)[np.isfinite(y)]
    assert x0 <= x.min() + 1e-9 and x.max() - 1e-9 <= x1, (x0, x1, x.min(), x.max())
    assert y0 <= y.min() + 1e-9 and y.max() - 1e-9 <= y1, (y0, y1, y.min(), y.max())


def _labels_have_units(fig):
    for ax in _maps(fig):
        assert UNIT.search(ax.get_xlabel()) and UNIT.search(ax.get_ylabel()), (ax.get_xlabel(), ax.get_ylabel())
    for label in _colourbar_labels(fig):
        assert UNIT.search(label), label


def _speed_key(ax):
    keys = [a for a in ax.artists if isinstance(a, QuiverKey)]
    assert len(keys) == 1
    assert re.fullmatch(r"[0-9.]+ m/s.*", keys[0].text.get_text())
    return keys[0]


# ----------------------------------------------------------------- tracks
def test_tracks_axes_cover_every_fix():
    rng = np.random.default_rng(0)
    pos = np.cumsum(rng.normal(0, 300, size=(90, 2)), axis=0) + 5e3
    track = np.repeat(np.array(["a", "b", "c"], dtype=object), 30)
    fig = plots.plot_tracks(pos, track, heldout_position_m=pos[:30] + 900, heldout_track=track[:30],
                            title="Drifter tracks of the test")
    (ax,) = _maps(fig)
    _covers(ax, np.r_[pos[:, 0], pos[:30, 0] + 900] / 1e3, np.r_[pos[:, 1], pos[:30, 1] + 900] / 1e3)
    _labels_have_units(fig)
    assert ax.get_title() == "Drifter tracks of the test" and ax.get_legend() is not None


# ----------------------------------------------------------------- mean field
def test_field_uncertainty_has_its_own_scale_and_the_figure_a_title():
    mean, g = _vortex()
    sd = 0.003 + 0.05 * (1 - g)  # an s.d. ten times smaller than the speed, as in the demo
    fig = plots.plot_mean_field(X_M, Y_M, mean, sd)
    ax_speed, ax_sd = _maps(fig)
    mesh_speed = next(c for c in ax_speed.collections if c.get_array() is not None and c.get_array().size == sd.size)
    mesh_sd = next(c for c in ax_sd.collections if c.get_array() is not None and c.get_array().size == sd.size)
    np.testing.assert_allclose([mesh_speed.norm.vmin, mesh_speed.norm.vmax], [0.0, np.hypot(*mean.T).max()],
                               rtol=1e-12, atol=0)
    np.testing.assert_allclose([mesh_sd.norm.vmin, mesh_sd.norm.vmax], [0.0, sd.max()], rtol=1e-12, atol=0)
    # the s.d. now spans the whole colour range: its smallest value maps near the bottom, its largest to the top
    assert mesh_sd.norm(sd.min()) < 0.1 and mesh_sd.norm(sd.max()) == pytest.approx(1.0, abs=1e-12)
    for ax in (ax_speed, ax_sd):
        _covers(ax, X_M / 1e3, Y_M / 1e3)
    _labels_have_units(fig)
    assert any("(m/s)" in lab for lab in _colourbar_labels(fig))
    assert "uncertainty (own scale)" in ax_sd.get_title(loc="left")
    assert "posterior mean velocity and its uncertainty" in fig._suptitle.get_text()
    _speed_key_text = [a.text.get_text() for a in ax_speed.artists if isinstance(a, QuiverKey)]
    assert _speed_key_text and _speed_key_text[0].endswith("m/s")


# ----------------------------------------------------------------- divergence / vorticity
def test_signed_maps_scale_to_the_significant_signal():
    _, g = _vortex()
    rng = np.random.default_rng(4)
    sd = np.full(g.shape, 1e-6)
    signal = 8e-6 * g                       # |z| up to 8: significant near the centre
    noise = rng.normal(0, 1e-6, g.shape)    # |z| ~ 1: never significant alone
    spike = np.zeros_like(g)
    spike[2, 2] = 3e-5                       # a large value where the s.d. is huge: not significant
    sd_spike = sd.copy()
    sd_spike[2, 2] = 1e-4
    div = signal + noise + spike
    z_div = div / sd_spike
    vort = noise
    z_vort = vort / sd
    fig = plots.plot_divergence_vorticity(X_M, Y_M, div, z_div, vort, z_vort, z_threshold=(3.0, 3.5))
    ax_div, ax_vort = _maps(fig)
    mesh = next(c for c in ax_div.collections if isinstance(getattr(c, "norm", None), TwoSlopeNorm))
    exponent = plots.power_of_ten(np.array([np.abs(div[np.abs(z_div) >= 3.0]).max()]))
    # divergence: the scale ends at the largest significant |value|, not at the 3e-5 spike
    np.testing.assert_allclose(mesh.norm.vmax * 10.0**exponent, np.abs(div[np.abs(z_div) >= 3.0]).max(),
                               rtol=1e-12, atol=0)
    assert mesh.norm.vmax * 10.0**exponent < 3e-5
    (bar,) = [a for a in fig.axes if hasattr(a, "_colorbar") and "divergence" in a.get_xlabel()]
    assert bar._colorbar.extend == "both"  # the spike beyond the scale is flagged by the bar's arrows
    # vorticity: nothing significant, said in words with the numbers, scale 3.5 x median s.d. = 3.5e-6
    text = " ".join(t.get_text() for t in ax_vort.texts)
    assert f"nothing significant: largest |z| {np.abs(z_vort).max():.2g} < 3.5 needed" in text
    mesh = next(c for c in ax_vort.collections if isinstance(getattr(c, "norm", None), TwoSlopeNorm))
    np.testing.assert_allclose(mesh.norm.vmax * 10.0 ** plots.power_of_ten(np.array([3.5e-6])), 3.5e-6,
                               rtol=1e-9, atol=0)
    assert not [c for c in ax_vort.collections if list(getattr(c, "levels", [])) == [3.5]]  # no outline
    _labels_have_units(fig)
    assert "Divergence and vorticity" in fig._suptitle.get_text()
    keys = [t.get_text() for leg in fig.legends for t in leg.get_texts()]
    assert "|z| ≥ 3 (divergence)" in keys and not any("vorticity" in k for k in keys)


def test_signal_limit_definition():
    value = np.array([1.0, -4.0, 2.0, np.nan])
    z = np.array([1.0, -4.0, 0.5, np.nan])
    assert plots.signal_limit(value, z, 3.0) == (4.0, True)
    # nothing significant: threshold x median(|value / z|) = 10 x median(1, 1, 4) = 10
    assert plots.signal_limit(value, z, 10.0) == (10.0, False)


def _check_maps(z_critical):
    """A CheckMaps like verdict.run_check's, on the hull grid of a disc of observations."""
    grid = physics.HullGrid((X_M, Y_M), np.ones((Y_M.size, X_M.size), bool), 500.0)
    _, g = _vortex()
    posts = {"divergence": SimpleNamespace(mean=(2e-7 * g).ravel(), z=(0.9 * g).ravel()),
             "vorticity": SimpleNamespace(mean=(5e-5 * g).ravel(), z=(9.0 * g).ravel())}
    sig = {"divergence": physics.Significance(np.zeros(g.size, bool), np.inf, 0.9, 0.05),
           "vorticity": physics.Significance((9.0 * g).ravel() >= z_critical, z_critical, 9.0, 0.05)}
    return CheckMaps(grid, posts, sig, {}, None, grid.points_m)


def test_physics_maps_say_nothing_significant_and_scale_to_the_signal():
    from scipy.stats import norm

    fig = plots.plot_physics_maps(_check_maps(z_critical=3.2))
    ax_div, ax_vort = _maps(fig)
    m = X_M.size * Y_M.size
    cut = norm.isf(0.05 / (2 * m))  # the single-cell Bonferroni cut-off quoted when BH rejected nothing
    text = " ".join(t.get_text() for t in ax_div.texts)
    assert f"nothing significant: largest |z| 0.9 < {cut:.3g} needed" in text
    _, g = _vortex()
    mesh = next(c for c in ax_vort.collections if isinstance(getattr(c, "norm", None), TwoSlopeNorm))
    top = np.abs(5e-5 * g[9.0 * g >= 3.2]).max()
    np.testing.assert_allclose(mesh.norm.vmax * 10.0 ** plots.power_of_ten(np.array([top])), top, rtol=1e-12,
                               atol=0)
    for ax in (ax_div, ax_vort):
        _covers(ax, X_M / 1e3, Y_M / 1e3)
    _labels_have_units(fig)
    assert "Benjamini–Hochberg" in fig._suptitle.get_text() and ax_vort.get_legend() is not None
    assert ax_div.get_legend() is None  # nothing outlined, so no outline key


# ----------------------------------------------------------------- spread
def _release():
    t = np.arange(0, 49) * 3600.0
    m = np.array([5e3, 6e3]) + np.outer(t, [0.08, 0.03])
    cov = np.array([np.diag([1e4 + 300 * s, 1e4 + 100 * s]) for s in t])
    return {"label": "spill", "times_s": t, "mean_m": m, "covariance_m2": cov}


def test_release_spread_has_release_time_speed_key_note_and_covers_ellipses_and_particles():
    rel = _release()
    mean, _ = _vortex()
    rng = np.random.default_rng(2)
    particles = rng.multivariate_normal(rel["mean_m"][-1], rel["covariance_m2"][-1] * 2, size=300)
    note = "The single-Gaussian ellipses are a poor summary here: use the ensemble method."
    fig = plots.plot_release_spread([rel], ellipse_times_s=[6 * 3600, 48 * 3600],
                                    field={"x_m": X_M, "y_m": Y_M, "mean_m_s": mean},
                                    release_time="2024-06-05T06:00:00Z", note=note, particles_m=particles)
    (ax,) = _maps(fig)
    assert "release: 2024-06-05T06:00:00Z" in ax.get_title() and "ellipses at 6, 48 h" in ax.get_title()
    _speed_key(ax)
    assert any(note[:40] in (leg.get_title().get_text().replace("\n", " ")) for leg in fig.legends)
    ellipses = np.vstack([plots.ellipse_xy_m(rel["mean_m"][k], rel["covariance_m2"][k], 0.95) for k in (6, 48)])
    # the map covers the ellipses, the path and the central 99 % of the particles in each direction
    bulk = np.percentile(particles, [0.5, 99.5], axis=0)
    everything = np.vstack([ellipses, bulk, rel["mean_m"]])
    _covers(ax, everything[:, 0] / 1e3, everything[:, 1] / 1e3)
    # a time on every ellipse: the labels are the requested hours
    assert sorted(t.get_text() for t in ax.texts if t.get_text().endswith(" h")) == ["48 h", "6 h"]
    _labels_have_units(fig)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "95 % ellipse" in labels
    (dots,) = [lab for lab in labels if lab.startswith("simulated particles")]
    lo, hi = everything.min(axis=0), everything.max(axis=0)  # the data box the map was sized to
    beyond = int(np.sum(np.any((particles < lo) | (particles > hi), axis=1)))
    assert beyond > 0 and dots == f"simulated particles; {beyond} beyond the map"


def test_release_spread_without_a_clock_says_so():
    fig = plots.plot_release_spread([_release()], ellipse_times_s=[24 * 3600])
    assert "release time not given" in _maps(fig)[0].get_title()


def test_plume_ties_every_tint_to_its_time():
    rng = np.random.default_rng(1)
    snaps = []
    for i, hours in enumerate((6, 12, 24)):
        centre = np.array([4e3 + 400 * hours, 5e3])
        snaps.append({"label": f"{hours} h after the start", "time_label": f"{hours} h",
                      "means_m": centre + rng.normal(0, 200, size=(5, 2)),
                      "covariances_m2": np.array([np.eye(2) * (150.0 + 40 * hours) ** 2] * 5)})
    fig = plots.plot_plume(snaps, release_time=None, title="Test plume")
    (ax,) = _maps(fig)
    assert "discharge start time not given" in ax.get_title() and "Test plume" in ax.get_title()
    # one key row per snapshot, naming its time, drawn with that snapshot's tint
    legend = ax.get_legend()
    texts = [t.get_text() for t in legend.get_texts()]
    assert texts == [f"{h} h after the start: 50 % tint, 95 % line" for h in (6, 12, 24)]
    fills = [c for c in ax.collections if c.get_facecolor().size and hasattr(c, "levels")
             and np.isinf(c.levels[-1])]
    for fill, tint in zip(fills, TIME_TINTS):
        np.testing.assert_allclose(fill.get_facecolor()[0][:3], to_rgba(tint)[:3], rtol=0, atol=1e-9)
    # the time written on every tint
    assert sorted(t.get_text() for t in ax.texts if t.get_text().endswith(" h")) == ["12 h", "24 h", "6 h"]
    centres = np.vstack([s["means_m"] for s in snaps])
    _covers(ax, centres[:, 0] / 1e3, centres[:, 1] / 1e3)
    _labels_have_units(fig)


def test_single_gaussian_plume_50_percent_region_is_its_chi_square_ellipse():
    # one parcel: the highest-density region holding p is the chi2_2(p) ellipse (outside reference: scipy chi2)
    cov = np.diag([400.0**2, 250.0**2])
    x, y, pdf = plots.mixture_density_grid(np.zeros((1, 2)), cov[None], n=401)
    (p50,) = plots.highest_density_levels(pdf, (x[1] - x[0]) * (y[1] - y[0]), [0.5])
    expected = np.exp(-0.5 * chi2.ppf(0.5, 2)) / (2 * np.pi * np.sqrt(np.linalg.det(cov)))
    np.testing.assert_allclose(p50, expected, rtol=0.02, atol=0)


def test_probability_and_share_are_never_on_one_axis():
    t = np.arange(0, 49) * 3600.0
    p = np.exp(-((t - 17 * 3600) / (4 * 3600)) ** 2) * 0.44
    share = 0.06 * (1 - np.exp(-t / 36000.0))
    curves = [{"label": "fuel spill", "times_s": t, "probability": p, "xlabel": "time since the spill (h)",
               "ylabel": "probability inside the bed (–)"},
              {"label": "outfall", "times_s": t[:25], "probability": share[:25],
               "xlabel": "time since the outfall started (h)", "ylabel": "expected share inside (–)"}]
    fig = plots.plot_area_probability(curves, threshold=0.1, title="Reaching the bed",
                                      release_time="2024-06-05T06:00:00Z")
    ax_p, ax_s = _maps(fig)
    assert ax_p.get_ylabel() != ax_s.get_ylabel()
    for ax, curve in ((ax_p, curves[0]), (ax_s, curves[1])):
        data = [ln for ln in ax.get_lines() if len(ln.get_xdata()) > 2]
        assert len(data) == 1  # one quantity per axis
        np.testing.assert_allclose(data[0].get_ydata(), curve["probability"], rtol=1e-12, atol=0)
        _covers(ax, curve["times_s"] / 3600, curve["probability"])
    assert "Reaching the bed" in fig._suptitle.get_text() and "2024-06-05T06:00:00Z" in fig._suptitle.get_text()
    _labels_have_units(fig)


# ----------------------------------------------------------------- skill and fitting
def test_skill_figure_title_and_ranges():
    h = np.array([6, 12, 24]) * 3600.0
    fig = plots.plot_skill_coverage(h, skill=[0.78, 0.83, 0.85], separation_m=[600, 900, 1500],
                                    coverage_50=[0.52, 0.54, 0.55], coverage_95=[0.95, 0.94, 0.92],
                                    baselines={"persistence": {"skill": [0.4, 0.3, 0.16],
                                                               "separation_m": [2400, 7000, 17800]}})
    ax_s, ax_d, _ = fig.axes
    _covers(ax_d, h / 3600, np.array([600, 900, 1500, 2400, 7000, 17800]) / 1e3)
    _covers(ax_s, h / 3600, [0.78, 0.83, 0.85, 0.4, 0.3, 0.16])
    assert "held-out tracks" in fig._suptitle.get_text()
    for ax in fig.axes:
        assert UNIT.search(ax.get_xlabel()) and UNIT.search(ax.get_ylabel())


def test_elbo_figure_reads_as_relative_progress():
    steps = np.arange(1, 61)
    elbo = 8800.0 * (1 - 0.01 * np.exp(-steps / 6.0))
    fig = plots.plot_elbo(steps, elbo, n_observations=2880, final_elbo=elbo[-1], converged=False)
    ax_gap, ax_rate = fig.axes
    title = fig._suptitle.get_text()
    assert "NOT converged" in title and "60 steps" in title and "per step" in title
    assert f"{elbo[-1] / 2880:.5g} nats per observation" in title
    # the gap axis covers the drawn gaps of the last half; the early steps it cuts off are counted in words
    gap = 100 * (elbo - elbo[-1]) / elbo[-1]
    _covers(ax_gap, steps[30:], gap[30:])
    below = int(np.sum(gap < ax_gap.get_ylim()[0]))
    assert below > 0 and any(f"{below} early step(s) below the axis" in t.get_text() for t in ax_gap.texts)
    # the rate axis covers the drawn relative changes; one quantity per axis
    changes = ax_rate.get_lines()[0].get_ydata()
    _covers(ax_rate, steps[5:5 + changes.size], changes)
    assert ax_gap.get_ylabel() != ax_rate.get_ylabel()
    for ax in fig.axes:
        assert UNIT.search(ax.get_xlabel()) and UNIT.search(ax.get_ylabel())
