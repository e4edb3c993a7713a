"""Spread figures: a release's mean path and ellipses, a plume's highest-density regions, P(inside) in time.

Same conventions as :mod:`driftwise.products.plots` (plain arrays in SI units, a ``Figure`` out, no
pyplot state), and what a reader of a forecast map needs besides: the release time, a speed
key for the background flow, the time written on every ellipse or tint, and a boxed note
when the single-Gaussian ellipses are a poor summary (:mod:`driftwise.dynamics.adequacy`), with the
simulated particles drawn so the reader sees where the material goes instead.
"""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np
from matplotlib.figure import Figure
from matplotlib.legend_handler import HandlerTuple
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from ..dynamics.spread import ellipse
from .mapaxes import (
    GREYS,
    LINESTYLES,
    MARKERS,
    MapCoords,
    draw_places,
    draw_polygon,
    figure_note,
    grid_corners,
    light_arrows,
    map_height_in,
    new_figure,
    release_text,
)

__all__ = [
    "TIME_TINTS",
    "ellipse_xy_m",
    "highest_density_levels",
    "mixture_density_grid",
    "plot_area_probability",
    "plot_plume",
    "plot_release_spread",
]

# one tint per plume snapshot, light (early) to dark (late), so the order survives a greyscale print
TIME_TINTS = ("#9ecae1", "#4292c6", "#08306b", "#041a3a")


def ellipse_xy_m(mean: np.ndarray, cov: np.ndarray, probability: float, *, n: int = 73) -> np.ndarray:
    """Vertices (n, 2) of the ``probability`` contour of the 2-D Gaussian N(mean, cov).

    The region {x : (x − m)ᵀ P⁻¹ (x − m) ≤ r²} holds probability p when
    r² = χ²₂ quantile(p) = −2 ln(1 − p) (chi-square with two degrees of freedom); the one ellipse
    builder is :func:`driftwise.dynamics.spread.ellipse`, closed here for drawing.
    """
    ring = ellipse(np.asarray(mean, float), np.asarray(cov, float), probability, n - 1)
    return np.concatenate([ring, ring[:1]])       # closed: the first vertex repeated last


# ----------------------------------------------------------------- one or more releases
def plot_release_spread(releases: Sequence[Mapping[str, Any]], *, ellipse_times_s: Sequence[float],
                        frame: Any = None, field: Mapping[str, np.ndarray] | None = None,
                        area_m: np.ndarray | None = None, area_label: str = "target area",
                        places: Sequence[Mapping[str, Any]] | None = None, title: str = "Release forecasts",
                        release_time: str | None = None, note: str | None = None,
                        particles_m: np.ndarray | None = None, particles_label: str = "simulated particles") -> Figure:
    """Mean path of each release with its 50 % (filled) and 95 % (dashed) ellipses, each labelled with its time.

    Each release is a mapping with ``label``, ``times_s`` (nt,) since its start,
    ``mean_m`` (nt, 2) and ``covariance_m2`` (nt, 2, 2).  Ellipses are drawn at
    the output times nearest to ``ellipse_times_s``.  ``field`` (optional) is
    ``{"x_m", "y_m", "mean_m_s"}`` drawn as light grey arrows with a speed key; ``area_m`` (k, 2)
    a polygon drawn hatched; ``places`` named sites ``{"label", "xy_m"}``; ``release_time``
    (ISO-8601 text or None) goes in the title; ``note`` in a box under the map;
    ``particles_m`` (N, 2) positions of an ensemble check, drawn as dots.
    """
    sample = np.concatenate([np.asarray(r["mean_m"], float)[:, :2] for r in releases])
    coords = MapCoords.from_frame(frame, sample[:1])
    bulk = None if particles_m is None else _bulk(np.asarray(particles_m, float)[:, :2])
    extent = np.vstack([sample, _ellipse_extent(releases, ellipse_times_s)] + ([bulk] if bulk is not None else []))
    if field is not None:
        extent = np.vstack([extent, grid_corners(field)])
    fig, (ax,) = new_figure(height_in=map_height_in(coords, *coords.xy(extent), 1, extra_in=1.6 if note else 1.0))
    if field is not None:
        light_arrows(ax, coords, field)
    handles = []
    if area_m is not None:
        handles.append(draw_polygon(ax, coords, np.asarray(area_m, float), area_label))
    for i, rel in enumerate(releases):
        handles += _draw_release(ax, coords, rel, ellipse_times_s, i)
    if particles_m is not None:
        handles.append(_draw_particles(ax, coords, np.asarray(particles_m, float)[:, :2], extent, particles_label))
    draw_places(ax, coords, places)
    if bulk is not None:  # strays beyond the data box stay off the map (counted in the key)
        _limit_to(ax, coords, extent)
    handles += [Patch(facecolor="0.2", alpha=0.3, label="50 % ellipse (time beside it)"),
                Line2D([], [], color="0.2", linestyle="--", linewidth=1.0, label="95 % ellipse")]
    coords.decorate(ax)
    hours = ", ".join(f"{t / 3600:g}" for t in ellipse_times_s)
    ax.set_title(f"{title}: 50 % and 95 % ellipses at {hours} h after the release\n{release_text(release_time)}",
                 fontsize="medium")
    ax.legend(handles=handles, loc="best", fontsize="x-small", framealpha=0.8)
    if note:
        figure_note(fig, note)
    return fig


def _bulk(points_m: np.ndarray) -> np.ndarray:
    """The corners of the box holding the central 99 % of ``points_m`` (N, 2) per axis: a few strays
    do not shrink the map (they are counted in the key instead)."""
    return np.percentile(points_m, [0.5, 99.5], axis=0)


def _draw_particles(ax: Any, coords: MapCoords, pts: np.ndarray, extent: np.ndarray, label: str) -> Line2D:
    """Ensemble positions (N, 2) m as small dots under the ellipses; the key counts those beyond ``extent``."""
    px, py = coords.xy(pts)
    ax.plot(px, py, ".", color="#d55e00", markersize=1.5, alpha=0.6, linestyle="none", zorder=1.5)
    lo, hi = extent.min(axis=0), extent.max(axis=0)
    outside = int(np.sum(np.any((pts < lo) | (pts > hi), axis=1)))
    return Line2D([], [], marker=".", color="#d55e00", linestyle="none",
                  label=label + (f"; {outside} beyond the map" if outside else ""))


def _limit_to(ax: Any, coords: MapCoords, extent_m: np.ndarray, pad: float = 0.03) -> None:
    x, y = coords.xy(extent_m)
    dx, dy = pad * (np.max(x) - np.min(x)), pad * (np.max(y) - np.min(y))
    ax.set_xlim(np.min(x) - dx, np.max(x) + dx)
    ax.set_ylim(np.min(y) - dy, np.max(y) + dy)


def _nearest_index(times_s: np.ndarray, t: float) -> int:
    return int(np.argmin(np.abs(np.asarray(times_s, float) - t)))


def _ellipse_extent(releases: Sequence[Mapping[str, Any]], ellipse_times_s: Sequence[float]) -> np.ndarray:
    """All 95 % ellipse vertices that will be drawn (to size the map)."""
    pts = [ellipse_xy_m(np.asarray(r["mean_m"], float)[k], np.asarray(r["covariance_m2"], float)[k], 0.95)
           for r in releases for k in {_nearest_index(r["times_s"], t) for t in ellipse_times_s}]
    return np.vstack(pts) if pts else np.zeros((0, 2))


def _draw_release(ax: Any, coords: MapCoords, rel: Mapping[str, Any], ellipse_times_s: Sequence[float],
                  i: int) -> list[Line2D]:
    colour, style, marker = GREYS[i % len(GREYS)], LINESTYLES[i % len(LINESTYLES)], MARKERS[i % len(MARKERS)]
    mean, cov = np.asarray(rel["mean_m"], float)[:, :2], np.asarray(rel["covariance_m2"], float)[:, :2, :2]
    times = np.asarray(rel["times_s"], float)
    x, y = coords.xy(mean)
    (path,) = ax.plot(x, y, color=colour, linestyle=style, linewidth=1.5, label=str(rel["label"]), zorder=3,
                      marker=marker, markevery=[0], markersize=8, markeredgecolor="white")
    for t in ellipse_times_s:
        k = _nearest_index(times, t)
        if k == 0 and t > 0:
            continue
        ex, ey = coords.xy(ellipse_xy_m(mean[k], cov[k], 0.5))
        ax.fill(ex, ey, color=colour, alpha=0.3, linewidth=0, zorder=2)
        ex, ey = coords.xy(ellipse_xy_m(mean[k], cov[k], 0.95))
        ax.plot(ex, ey, color=colour, linestyle="--", linewidth=0.9, zorder=2)
        ax.annotate(f"{times[k] / 3600:g} h", (x[k], y[k]), xytext=(3, 3), textcoords="offset points",
                    fontsize="x-small", color="0.1", zorder=5)
    return [path]


# ----------------------------------------------------------------- a plume (continuous release)
def mixture_density_grid(means_m: np.ndarray, covs_m2: np.ndarray, *, n: int = 160,
                         pad_sd: float = 4.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Equal-weight Gaussian mixture density on a regular grid covering it: (x (n,), y (n,), pdf (n, n) in 1/m²).

    pdf(x) = (1/R) Σ_r N(x | m_r, P_r), the position density of material released as R
    equal parcels (a plume).  The grid spans every component's mean ± ``pad_sd`` s.d.
    """
    means, covs = np.asarray(means_m, float)[:, :2], np.asarray(covs_m2, float)[:, :2, :2]
    covs = covs + np.eye(2) * 1e-6 * max(1.0, float(np.max(np.trace(covs, axis1=1, axis2=2))))
    sd = np.sqrt(np.stack([covs[:, 0, 0], covs[:, 1, 1]], -1))
    lo, hi = (means - pad_sd * sd).min(0), (means + pad_sd * sd).max(0)
    x, y = np.linspace(lo[0], hi[0], n), np.linspace(lo[1], hi[1], n)
    pts = np.stack(np.meshgrid(x, y), -1).reshape(-1, 2)
    inv, det = np.linalg.inv(covs), np.linalg.det(covs)
    d = pts[None, :, :] - means[:, None, :]
    maha = np.einsum("rni,rij,rnj->rn", d, inv, d)
    pdf = np.mean(np.exp(-0.5 * maha) / (2 * np.pi * np.sqrt(det))[:, None], axis=0)
    return x, y, pdf.reshape(n, n)


def highest_density_levels(pdf: np.ndarray, cell_area_m2: float, probabilities: Sequence[float]) -> list[float]:
    """Density thresholds whose super-level sets hold ``probabilities`` of the mass (highest-density regions).

    Cells are sorted by density; the level for p is the density at which the running
    sum of density × cell area first reaches p (of the total on the grid).
    """
    values = np.sort(np.asarray(pdf, float).ravel())[::-1]
    mass = np.cumsum(values) * cell_area_m2
    mass /= mass[-1]
    return [float(values[min(int(np.searchsorted(mass, p)), values.size - 1)]) for p in probabilities]


def plot_plume(snapshots: Sequence[Mapping[str, Any]], *, frame: Any = None,
               field: Mapping[str, np.ndarray] | None = None, area_m: np.ndarray | None = None,
               area_label: str = "target area", places: Sequence[Mapping[str, Any]] | None = None,
               title: str = "Plume", release_time: str | None = None, note: str | None = None) -> Figure:
    """A continuous release as plume snapshots: 50 % (filled tint) and 95 % (line) highest-density regions.

    Each snapshot is ``{"label", "means_m" (R, 2), "covariances_m2" (R, 2, 2)}`` and optionally
    ``"time_label"`` (short, e.g. "12 h", written on its tint): the parcels present at one clock
    time; the plume is their equal-weight Gaussian mixture (:func:`mixture_density_grid`), and its
    highest-density regions hold 50 % and 95 % of it.  Snapshot i has the tint ``TIME_TINTS[i]``
    (light to dark in time) and line style ``LINESTYLES[i]``; the key ties each tint to its time.
    ``release_time``: when the discharge started (ISO-8601 text or None); ``note`` a boxed note.
    """
    grids = [mixture_density_grid(s["means_m"], s["covariances_m2"]) for s in snapshots]
    corners = np.vstack([[[g[0][0], g[1][0]], [g[0][-1], g[1][-1]]] for g in grids])
    coords = MapCoords.from_frame(frame, corners[:1])
    extent = corners if field is None else np.vstack([corners, grid_corners(field)])
    fig, (ax,) = new_figure(height_in=map_height_in(coords, *coords.xy(extent), 1, extra_in=1.6 if note else 1.0))
    if field is not None:
        light_arrows(ax, coords, field)
    handles = [] if area_m is None else [draw_polygon(ax, coords, np.asarray(area_m, float), area_label)]
    labels = [] if area_m is None else [area_label]
    for i, (snap, grid) in enumerate(zip(snapshots, grids)):
        handles.append(_draw_snapshot(ax, coords, snap, grid, i))
        labels.append(f"{snap['label']}: 50 % tint, 95 % line")
    draw_places(ax, coords, places)
    coords.decorate(ax)
    ax.set_title(f"{title}\n{release_text(release_time, 'discharge start')}", fontsize="medium")
    ax.legend(handles=handles, labels=labels, loc="upper left", fontsize="x-small", framealpha=0.9,
              handler_map={tuple: HandlerTuple(ndivide=None, pad=0.3)})
    if note:
        figure_note(fig, note)
    return fig


def _draw_snapshot(ax: Any, coords: MapCoords, snap: Mapping[str, Any], grid: tuple, i: int) -> tuple:
    """One snapshot's tint (50 %), line (95 %) and time label at its densest point; returns its key handle."""
    import matplotlib.patheffects as effects

    x, y, pdf = grid
    colour, style = TIME_TINTS[i % len(TIME_TINTS)], LINESTYLES[i % len(LINESTYLES)]
    p50, p95 = highest_density_levels(pdf, (x[1] - x[0]) * (y[1] - y[0]), (0.5, 0.95))
    X, Y = coords.grid(x, y)
    ax.contourf(X, Y, pdf, levels=[p50, np.inf], colors=[colour], alpha=0.45, zorder=2)
    ax.contour(X, Y, pdf, levels=[p95], colors=[colour], linestyles=[style], linewidths=1.5, zorder=3)
    iy, ix = _label_cell(pdf, p50)
    ax.annotate(str(snap.get("time_label", snap["label"])), (X[iy, ix], Y[iy, ix]), fontsize="x-small",
                ha="center", va="center", color=colour, fontweight="bold", zorder=6,
                path_effects=[effects.withStroke(linewidth=2.5, foreground="white")])
    return (Patch(facecolor=colour, alpha=0.45, edgecolor="none"),
            Line2D([], [], color=colour, linestyle=style, linewidth=1.5))


def _label_cell(pdf: np.ndarray, level: float) -> tuple[int, int]:
    """The cell of the region ``pdf ≥ level`` nearest its centroid (inside the region even when it is an arc)."""
    iy, ix = np.nonzero(pdf >= level)
    k = int(np.argmin((iy - iy.mean()) ** 2 + (ix - ix.mean()) ** 2))
    return int(iy[k]), int(ix[k])


# ----------------------------------------------------------------- probability against time
def plot_area_probability(curves: Sequence[Mapping[str, Any]], *, area_label: str = "target area",
                          threshold: float | None = None, time_label: str = "time since release (h)",
                          title: str | None = None, release_time: str | None = None) -> Figure:
    """Probability (or share) inside an area against time; one panel per quantity, never two on one axis.

    Each curve is ``{"label", "times_s" (nt,), "probability" (nt,)}`` and optionally ``"ylabel"``
    (the quantity, with its unit; default "probability inside <area> (–)") and ``"xlabel"`` (its
    clock; default ``time_label``).  Curves with the same (x label, y label) share a panel.  With
    ``threshold`` a dotted line is drawn and the first time each curve reaches it is starred.
    """
    default_y = f"probability inside {area_label} (–)"
    keys = list(dict.fromkeys((c.get("xlabel", time_label), c.get("ylabel", default_y)) for c in curves))
    fig, axes = new_figure(len(keys), height_in=3.6)
    for i, curve in enumerate(curves):
        panel = keys.index((curve.get("xlabel", time_label), curve.get("ylabel", default_y)))
        _probability_curve(axes[panel], curve, i, threshold)
    for ax, (xlabel, ylabel), letter in zip(axes, keys, "abcdefgh"):
        if threshold is not None:
            ax.axhline(threshold, color="0.3", linestyle=":", linewidth=1.0, label=f"threshold {threshold:g}")
        ax.set_ylim(-0.02, 1.02)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
        ax.grid(True, color="0.9")
        ax.legend(loc="upper right", fontsize="x-small")
        if len(keys) > 1:
            ax.set_title(f"({letter})", loc="left")
    fig.suptitle(f"{title or 'Reaching ' + area_label}\n{release_text(release_time)}", fontsize="medium")
    return fig


def _probability_curve(ax: Any, curve: Mapping[str, Any], i: int, threshold: float | None) -> None:
    t_h = np.asarray(curve["times_s"], float) / 3600.0
    p = np.asarray(curve["probability"], float)
    ax.plot(t_h, p, color=GREYS[i % len(GREYS)], linestyle=LINESTYLES[i % len(LINESTYLES)],
            marker=MARKERS[i % len(MARKERS)], markevery=max(1, len(p) // 8), markersize=4, label=str(curve["label"]))
    if threshold is not None and np.any(p >= threshold):
        k = int(np.argmax(p >= threshold))
        ax.plot(t_h[k], p[k], marker="*", color="black", markersize=11, linestyle="none")
        ax.annotate(f"{t_h[k]:.3g} h", (t_h[k], p[k]), xytext=(-26, 6), textcoords="offset points",
                    fontsize="x-small")
    ax.set_xlim(t_h.min(), t_h.max())
