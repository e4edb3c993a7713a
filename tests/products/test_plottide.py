"""Tide figures: ellipses drawn with the right shape, orientation and scale; units on every axis; PNGs decode.

Outside references: the ellipse geometry (largest/smallest distance of the drawn outline from its centre in the
ratio A : |B|, the largest along the inclination), the analytic inverse w(φ) = e^{iθ}(A cos φ + i B sin φ) of
the parameters (driftwise.diagnostics.tidalellipse, checked there by brute force), and PIL for decoding the PNGs.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from matplotlib.collections import LineCollection
from PIL import Image

from driftwise.data.frame import Frame
from driftwise.data.residualspectrum import Periodogram
from driftwise.diagnostics.tidalellipse import amplitudes_from_ellipse, tidal_ellipses
from driftwise.products import plots
from driftwise.products.plottide import plot_residual_spectrum, plot_tidal_ellipses

M2_S = 12.4206012 * 3600.0


def _grid_ellipses(n_side: int = 4, sd: float = 0.01):
    x, y = np.meshgrid(np.linspace(0, 9e3, n_side), np.linspace(0, 6e3, n_side))
    centres = np.stack([x.ravel(), y.ravel()], axis=-1)
    k = np.arange(centres.shape[0])
    amps = amplitudes_from_ellipse(0.1 + 0.02 * k, 0.03 * np.cos(k), 20.0 * k % 180, 30.0 * k % 360)
    return centres, tidal_ellipses(amps, np.tile(sd**2 * np.eye(4), (len(k), 1, 1)))


def _check_units_and_save(fig, path):
    for ax in fig.axes:
        labels = [ax.get_xlabel(), ax.get_ylabel()]
        for label in filter(None, labels):
            assert re.search(r"\(.+\)", label), f"axis label without a unit: {label!r}"
    plots.save_figure(fig, path)
    assert path.stat().st_size > 1000
    with Image.open(path) as img:
        img.load()
        assert np.asarray(img.convert("L"), float).std() > 5.0     # not a blank canvas


def test_ellipse_map_geometry_and_scale(tmp_path):
    centre = np.array([[2e3, 1e3]])
    e = tidal_ellipses(amplitudes_from_ellipse(0.2, 0.05, 30.0, 70.0), 1e-6 * np.eye(4))
    fig = plot_tidal_ellipses(centre, e, period_s=M2_S, data_position_m=np.array([[0.0, 0.0], [5e3, 4e3]]))
    (ax,) = fig.axes
    (outline,) = [c for c in ax.collections if c.get_gid() == "ellipses counter-clockwise"]
    pts = outline.get_segments()[0] * 1000.0 - centre[0]          # km → m about the centre
    r = np.hypot(pts[:, 0], pts[:, 1])
    np.testing.assert_allclose(r.max() / r.min(), 0.2 / 0.05, rtol=2e-3)      # A : |B|, 73-point outline
    direction = np.degrees(np.arctan2(pts[np.argmax(r), 1], pts[np.argmax(r), 0])) % 180.0
    assert abs(direction - 30.0) < 3.0                                         # inclination, 5° outline step
    # the speed bar: 0.2 m/s → 1-2-5 rounding gives a 0.2 m/s bar, as long as the semi-major axis drawn
    bar = next(a for a in ax.artists if hasattr(a, "size_bar"))
    width_km = bar.size_bar.get_children()[0].get_width()
    np.testing.assert_allclose(width_km * 1000.0, r.max(), rtol=1e-3)
    assert "0.2 m/s current" in [t.get_text() for t in bar.txt_label.get_children()]
    assert "period 12.4 h" in ax.get_title()
    _check_units_and_save(fig, tmp_path / "one.png")


def test_ellipse_grid_metric_and_lonlat(tmp_path):
    centres, e = _grid_ellipses()
    fig = plot_tidal_ellipses(centres, e, constituent="M2")
    gids = {c.get_gid() for c in fig.axes[0].collections}
    assert {"ellipses counter-clockwise", "ellipses clockwise"} <= gids
    _check_units_and_save(fig, tmp_path / "metric.png")
    fig = plot_tidal_ellipses(centres, e, frame=Frame("lonlat", 4.0, 52.0))
    assert fig.axes[0].get_xlabel() == "longitude (° E)"
    _check_units_and_save(fig, tmp_path / "lonlat.png")


def test_weak_ellipses_in_grey_and_nan_sd_and_nan_parameters(tmp_path):
    centres, e = _grid_ellipses(3, sd=0.2)                     # s.d. 0.2 m/s > half of every axis
    fig = plot_tidal_ellipses(centres, e)
    assert {c.get_gid() for c in fig.axes[0].collections if c.get_gid()} == {"ellipses semi-major axis < 2 s.d.",
                                                                             "radii semi-major axis < 2 s.d."}
    _check_units_and_save(fig, tmp_path / "weak.png")
    amps = amplitudes_from_ellipse(np.array([0.1, 0.2]), np.array([0.02, -0.05]), np.array([10.0, 100.0]),
                                   np.array([0.0, 90.0]))
    nan_sd = tidal_ellipses(amps)                               # no covariance: every s.d. NaN
    assert np.all(np.isnan(nan_sd.phase_sd_deg))
    _check_units_and_save(plot_tidal_ellipses(np.array([[0.0, 0.0], [3e3, 0.0]]), nan_sd), tmp_path / "nan.png")
    amps[1, 0] = np.nan                                         # a point without parameters is skipped
    fig = plot_tidal_ellipses(np.array([[0.0, 0.0], [3e3, 0.0]]), tidal_ellipses(amps))
    drawn = [c for c in fig.axes[0].collections if isinstance(c, LineCollection) and "ellipses" in c.get_gid()]
    assert sum(len(c.get_segments()) for c in drawn) == 1


def test_single_point_without_data(tmp_path):
    e = tidal_ellipses(amplitudes_from_ellipse(0.004, -0.001, 120.0, 10.0), np.full((4, 4), np.nan))
    fig = plot_tidal_ellipses(np.array([1e3, 1e3]), e)
    # the bar is the 1-2-5 step below the 4 mm/s semi-major axis
    assert "2 mm/s current" in [t.get_text() for a in fig.axes[0].artists if hasattr(a, "txt_label")
                                for t in a.txt_label.get_children()]
    _check_units_and_save(fig, tmp_path / "single.png")


def _gram(periods, variance, threshold=None, residual=0.01):
    threshold = np.full_like(periods, 3e-5) if threshold is None else threshold
    return Periodogram(periods, variance, threshold, residual, 0.01)


def test_residual_spectrum_figure(tmp_path):
    periods = np.geomspace(3 * 3600.0, 4 * 86400.0, 120)
    before = 0.002 * np.exp(-(np.log(periods / M2_S) / 0.05) ** 2) + 1e-5
    after = np.full_like(periods, 1e-5)
    fig = plot_residual_spectrum(_gram(periods, before), _gram(periods, after),
                                 constituents={"M2": M2_S, "S2": 12 * 3600.0, "K1": 23.93447213 * 3600})
    ax = fig.axes[0]
    assert ax.get_xlabel() == "period (h)" and ax.get_ylabel() == "variance explained (cm²/s²)"
    assert ax.get_xscale() == "log"
    np.testing.assert_allclose(ax.get_lines()[0].get_ydata(), before * 1e4, rtol=1e-12)     # m²/s² → cm²/s²
    np.testing.assert_allclose(ax.get_lines()[0].get_xdata(), periods / 3600.0, rtol=1e-12)  # s → h
    assert [t.get_text() for t in ax.texts] == ["S2 M2", "K1"]       # 12 h and 12.42 h share a label
    (right,) = ax.child_axes
    assert right.get_ylabel() == "share of the steady fit's residual variance (%)"
    _check_units_and_save(fig, tmp_path / "spectrum.png")


@pytest.mark.parametrize("after", [None, np.array([np.nan])])
def test_residual_spectrum_one_period(tmp_path, after):
    one = np.array([M2_S])
    fig = plot_residual_spectrum(_gram(one, np.array([0.03]), np.array([np.nan])),
                                 None if after is None else _gram(one, after))
    assert fig.axes[0].get_ylabel() == "variance explained (m²/s²)"
    _check_units_and_save(fig, tmp_path / "one.png")
