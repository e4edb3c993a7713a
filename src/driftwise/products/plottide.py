"""Tide figures: tidal current ellipses over the map, and the residual spectrum before and after a fit.

Plain arrays in, a :class:`matplotlib.figure.Figure` out (Agg, no pyplot state), written with
:func:`driftwise.products.plots.save_figure`, as in :mod:`driftwise.products.plots`.

* :func:`plot_tidal_ellipses` draws each ellipse (from :class:`~driftwise.diagnostics.tidalellipse.TidalEllipses`)
  around its centre, w(φ) = e^{iθ} (A cos φ + i B sin φ) scaled from m/s to map metres so that the largest fits
  inside about half the spacing of the centres; counter-clockwise ellipses solid, clockwise dashed (the sense
  survives a greyscale print), a radius to the current at t = 0 (which shows the phase), ellipses whose
  semi-major axis is below two posterior s.d. in light grey.  A bar of a 1-2-5 speed gives the scale.
* :func:`plot_residual_spectrum` draws the variance one harmonic explains, against period (the pooled
  least-squares periodogram of :func:`driftwise.data.residualspectrum.residual_periodogram`), before and after,
  with the constituents' periods marked.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter
from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar
from scipy.spatial import cKDTree

from ..data.residualspectrum import Periodogram
from ..diagnostics.tidalellipse import TidalEllipses
from ..units import DURATION_S, format_duration, format_speed
from .mapaxes import MapCoords, map_height_in, new_figure, nice_round

__all__ = ["plot_residual_spectrum", "plot_tidal_ellipses"]

CCW_COLOUR, CW_COLOUR, WEAK_COLOUR = "0.1", "#d55e00", "0.7"


def _spacing_m(centres_m: np.ndarray, data_position_m: np.ndarray | None) -> float:
    """Typical distance between ellipse centres (m): the median nearest-neighbour distance; for one centre a
    fifth of the data's extent, or 1 km."""
    if len(centres_m) >= 2:
        nearest = cKDTree(centres_m[:, :2]).query(centres_m[:, :2], k=2)[0][:, 1]
        nearest = nearest[np.isfinite(nearest) & (nearest > 0)]
        if nearest.size:
            return float(np.median(nearest))
    if data_position_m is not None and len(data_position_m) >= 2:
        extent = float(np.max(np.ptp(np.asarray(data_position_m, float)[:, :2], axis=0)))
        if extent > 0:
            return extent / 5.0
    return 1000.0


def _outlines_m(centres_m: np.ndarray, e: TidalEllipses, scale_m_per_m_s: float, n: int = 73) -> np.ndarray:
    """(k, n, 2) ellipse outlines and (k, 2, 2) radii to the current at t = 0, in map metres."""
    theta, g = np.radians(e.inclination_deg)[:, None], np.radians(e.phase_deg)[:, None]
    phi = np.concatenate([np.linspace(0.0, 2 * np.pi, n)[None, :].repeat(len(theta), 0), -g], axis=1)
    w = np.exp(1j * theta) * (e.semi_major_m_s[:, None] * np.cos(phi) + 1j * e.semi_minor_m_s[:, None] * np.sin(phi))
    pts = centres_m[:, None, :2] + scale_m_per_m_s * np.stack([w.real, w.imag], axis=-1)
    radii = np.stack([centres_m[:, :2], pts[:, -1]], axis=1)
    return pts[:, :-1], radii


def _speed_bar(ax: Any, coords: MapCoords, anchor_m: np.ndarray, scale_m_per_m_s: float, ref_m_s: float) -> Any:
    """A horizontal bar as long as a current of ``ref_m_s`` is drawn, lower left, labelled with that speed."""
    ends = np.array([anchor_m[:2], anchor_m[:2] + [scale_m_per_m_s * ref_m_s, 0.0]])
    x, _ = coords.xy(ends)
    bar = AnchoredSizeBar(ax.transData, float(abs(x[1] - x[0])), f"{format_speed(ref_m_s)} current",
                          "lower left", pad=0.4, sep=3, frameon=True, size_vertical=0,
                          fontproperties=FontProperties(size="x-small"))
    bar.patch.set_alpha(0.8)
    ax.add_artist(bar)
    return bar


def plot_tidal_ellipses(centres_m: Any, ellipses: TidalEllipses, *, constituent: str = "M2",
                        period_s: float | None = None, frame: Any = None, data_position_m: Any = None,
                        title: str | None = None) -> Figure:
    """Tidal current ellipses of one constituent at ``centres_m`` (n, 2) metres of the local frame.

    ``ellipses`` holds n ellipses (m/s, degrees); points with a non-finite parameter are skipped, a NaN s.d.
    is read as unknown (drawn normally).  ``data_position_m`` (k, 2) observation points, drawn faintly.
    """
    centres = np.asarray(centres_m, dtype=float).reshape(-1, 2)
    coords = MapCoords.from_frame(frame, centres)
    params = np.stack([ellipses.semi_major_m_s, ellipses.semi_minor_m_s, ellipses.inclination_deg,
                       ellipses.phase_deg], axis=-1)
    ok = np.all(np.isfinite(params), axis=-1)
    big = float(np.max(ellipses.semi_major_m_s[ok])) if np.any(ok) and np.max(ellipses.semi_major_m_s[ok]) > 0 \
        else 1.0
    data = None if data_position_m is None else np.asarray(data_position_m, dtype=float).reshape(-1, 2)
    scale = 0.45 * _spacing_m(centres, data) / big
    outlines, radii = _outlines_m(centres, ellipses, scale)
    extent = np.vstack([centres, outlines[ok].reshape(-1, 2)] + ([data] if data is not None else []))
    fig, (ax,) = new_figure(height_in=map_height_in(coords, *coords.xy(extent), 1, extra_in=1.3))
    if data is not None:
        ax.plot(*coords.xy(data), ".", color="0.75", markersize=1.0, linestyle="none", zorder=0)
    weak = ok & (ellipses.semi_major_sd_m_s * 2.0 > ellipses.semi_major_m_s)       # NaN s.d. → False
    groups = [(ok & ~weak & (ellipses.semi_minor_m_s >= 0), CCW_COLOUR, "-", "counter-clockwise"),
              (ok & ~weak & (ellipses.semi_minor_m_s < 0), CW_COLOUR, "--", "clockwise"),
              (weak, WEAK_COLOUR, "-", "semi-major axis < 2 s.d.")]
    handles = []
    for sel, colour, style, label in groups:
        if not np.any(sel):
            continue
        lines = [np.stack(coords.xy(o), axis=-1) for o in outlines[sel]]
        ax.add_collection(LineCollection(lines, colors=colour, linestyles=style, linewidths=1.0,
                                         gid=f"ellipses {label}"))
        ax.add_collection(LineCollection([np.stack(coords.xy(r), axis=-1) for r in radii[sel]], colors=colour,
                                         linewidths=0.8, gid=f"radii {label}"))
        handles.append(Line2D([], [], color=colour, linestyle=style, label=label))
    handles.append(Line2D([], [], color="0.4", label="radius: current at t = 0 (phase)"))
    ax.plot(*coords.xy(centres[ok]), "o", color="0.2", markersize=1.5, linestyle="none")
    coords.decorate(ax)
    ax.autoscale_view()
    _speed_bar(ax, coords, centres[0], scale, nice_round(big))
    fig.legend(handles=handles, loc="outside lower center", ncols=len(handles), fontsize="x-small", frameon=False)
    when = f", period {format_duration(period_s)}" if period_s else ""
    ax.set_title(title or f"Tidal current ellipses, {constituent}{when}", fontsize="medium")
    return fig


def _duration_unit(values_s: np.ndarray) -> tuple[str, float]:
    """The unit (and its size in s) in which the median of ``values_s`` prints best: s, min, h or d."""
    unit = format_duration(float(np.median(values_s))).split()[-1]
    return (unit, DURATION_S[unit]) if unit in DURATION_S else ("s", 1.0)


def _constituent_labels(ax: Any, constituents: Mapping[str, float], size: float) -> None:
    """Dotted lines at the constituents' periods; names of periods within 10 % of each other share one label."""
    groups: list[list[tuple[str, float]]] = []
    for name, period in sorted(constituents.items(), key=lambda item: item[1]):
        ax.axvline(period / size, color="0.5", linestyle=":", linewidth=0.9)
        if groups and period < groups[-1][0][1] * 1.10:
            groups[-1].append((name, period))
        else:
            groups.append([(name, period)])
    for group in groups:
        where = float(np.exp(np.mean(np.log([p for _, p in group])))) / size
        ax.annotate(" ".join(name for name, _ in group), (where, 1.0), xycoords=("data", "axes fraction"),
                    xytext=(0, -3), textcoords="offset points", fontsize="x-small", ha="center", va="top",
                    bbox={"boxstyle": "round,pad=0.15", "facecolor": "white", "edgecolor": "none", "alpha": 0.85})


def plot_residual_spectrum(before: Periodogram, after: Periodogram | None = None, *,
                           constituents: Mapping[str, float] | None = None,
                           labels: Sequence[str] = ("steady fit", "time-varying fit"),
                           title: str = "Residual spectrum: variance one harmonic explains") -> Figure:
    """Variance explained (summed over velocity components) against period, before and after a fit.

    ``before``/``after`` from :func:`driftwise.data.residualspectrum.residual_periodogram` on the two fits'
    residuals; the ``before`` fit's one-period significance threshold is drawn thin, ``constituents``
    {name: period_s} are marked by dotted lines, and a right axis gives the share of the ``before`` fit's
    residual variance in %.
    """
    periods = np.asarray(before.periods_s, dtype=float)
    order = np.argsort(periods)
    unit, size = _duration_unit(periods)
    curves = [(before.variance_m2_s2, labels[0], "-", "0.0")]
    if after is not None:
        curves.append((after.variance_m2_s2, labels[1], "--", "#0072b2"))
    values = np.concatenate([np.asarray(c[0], float) for c in curves] + [before.threshold_m2_s2])
    peak = float(np.nanmax(values)) if np.any(np.isfinite(values)) else 0.0
    v_unit, v_size = ("cm²/s²", 1e-4) if peak < 1e-2 else ("m²/s²", 1.0)
    fig, (ax,) = new_figure(height_in=3.8)
    marker = "o" if periods.size < 40 else None
    for curve, label, style, colour in curves:
        ax.plot(periods[order] / size, np.asarray(curve, float)[order] / v_size, linestyle=style, marker=marker,
                markersize=3, color=colour, label=label)
    ax.plot(periods[order] / size, before.threshold_m2_s2[order] / v_size, color="0.55", linewidth=0.8,
            label=f"{100 * before.alpha:g} % significance at one period ({labels[0]})")
    _constituent_labels(ax, constituents or {}, size)
    marked = np.concatenate([periods, np.asarray(list((constituents or {}).values()), float)]) / size
    if marked.max() > marked.min() * 1.5:
        ax.set_xscale("log")
        ax.xaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlim(marked.min() / 1.15, marked.max() * 1.15)
    ax.set_ylim(bottom=0.0, top=1.25 * peak / v_size if peak > 0 else 1.0)
    ax.set_xlabel(f"period ({unit})")
    ax.set_ylabel(f"variance explained ({v_unit})")
    if before.residual_variance_m2_s2 > 0:
        share = 100.0 * v_size / float(before.residual_variance_m2_s2)
        right = ax.secondary_yaxis("right", functions=(lambda y: y * share, lambda p: p / share))
        right.set_ylabel(f"share of the {labels[0]}'s residual variance (%)")
    ax.legend(loc="upper left", bbox_to_anchor=(0.0, 0.9), fontsize="x-small")
    ax.set_title(title, fontsize="medium")
    return fig
