"""Figures for the user's job: tracks, the fitted field, physics maps, spread, skill, fitting.

Every ``plot_*`` function takes plain numpy arrays (SI units, positions in the
model's local metric frame) and returns a :class:`matplotlib.figure.Figure`;
:func:`save_figure` writes it atomically as PNG.  No pyplot state is used, so
the functions are safe in scripts, notebooks and threads (Agg canvas).

Conventions a reader of the printed figure can rely on:

* perceptually uniform, lightness-monotonic colour maps (viridis for speed,
  cividis for uncertainty) so a greyscale print keeps the order of values;
* signed fields (divergence, vorticity) use a diverging map centred at zero
  by :class:`~matplotlib.colors.TwoSlopeNorm`, and carry contour lines with
  negative values dashed, so the sign survives a greyscale print;
* lines that must be told apart differ in line style and marker, not colour only;
* every axis and colour bar names its quantity and unit; axes are kilometres
  of the local frame (metric data) or longitude/latitude (geographic data),
  chosen from the ``frame`` the data came with.

Other modules may add one figure function each here, following the same
pattern (plain arrays in, ``Figure`` out).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from scipy.stats import norm

from ..dynamics.spread import ellipse
from ..files import atomic_write
from .mapaxes import (
    WIDTH_IN,
    MapCoords,
    draw_places,
    draw_polygon,
    draw_tracks,
    grid_corners,
    hatch_unsupported,
    light_arrows,
    map_height_in,
    new_figure,
    nice_round,
    unique_in_order,
)

DPI = 130
SEQUENTIAL = "viridis"
UNCERTAINTY = "cividis"
DIVERGING = "RdBu_r"
LINESTYLES = ("-", "--", "-.", ":")
MARKERS = ("o", "s", "^", "D", "v", "P")
GREYS = ("0.0", "0.35", "0.55", "0.2")

__all__ = [
    "save_figure",
    "skill_figure",
    "velocity_sd_m_s",
    "ellipse_xy_m",
    "wilson_interval",
    "plot_tracks",
    "plot_mean_field",
    "plot_divergence_vorticity",
    "plot_release_spread",
    "plot_area_probability",
    "plot_plume",
    "mixture_density_grid",
    "highest_density_levels",
    "plot_skill_coverage",
    "plot_elbo",
    "plot_physics_maps",
]


# ----------------------------------------------------------------- helpers
def save_figure(fig: Figure, path: str | os.PathLike, *, dpi: int = DPI) -> Path:
    """Write ``fig`` as PNG to ``path`` atomically (via :func:`driftwise.files.atomic_write`)."""
    return atomic_write(path, lambda tmp: fig.savefig(tmp, format="png", dpi=dpi, metadata={"Software": None}))


def velocity_sd_m_s(cov: np.ndarray) -> np.ndarray:
    """Velocity standard deviation, the RMS over components: sqrt(tr Σ / d), m/s.

    ``cov`` has shape (..., d, d) (m²/s²).  This is the uncertainty a reader
    compares with the speed: an arrow shorter than it is not resolved.
    """
    cov = np.asarray(cov, dtype=float)
    d = cov.shape[-1]
    return np.sqrt(np.clip(np.trace(cov, axis1=-2, axis2=-1) / d, 0.0, None))


def ellipse_xy_m(mean: np.ndarray, cov: np.ndarray, probability: float, *, n: int = 73) -> np.ndarray:
    """Vertices (n, 2) of the ``probability`` contour of the 2-D Gaussian N(mean, cov).

    The region {x : (x − m)ᵀ P⁻¹ (x − m) ≤ r²} holds probability p when
    r² = χ²₂ quantile(p) = −2 ln(1 − p) (chi-square with two degrees of freedom); the one ellipse
    builder is :func:`driftwise.dynamics.spread.ellipse`, closed here for drawing.
    """
    ring = ellipse(np.asarray(mean, float), np.asarray(cov, float), probability, n - 1)
    return np.concatenate([ring, ring[:1]])       # closed: the first vertex repeated last


def wilson_interval(k: np.ndarray, n: np.ndarray, *, z: float = 1.959964) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval for a binomial proportion k/n (95 % by default)."""
    k, n = np.asarray(k, float), np.asarray(n, float)
    p = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    centre = (p + z**2 / (2 * n)) / (1 + z**2 / n)
    half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / (1 + z**2 / n)
    return centre - half, centre + half


def _power_of_ten(values: np.ndarray) -> int:
    """Exponent e so that values / 10**e are of order one (for colour-bar units)."""
    big = np.nanmax(np.abs(values)) if np.size(values) and np.any(np.isfinite(values)) else 1.0
    return int(np.floor(np.log10(big))) if big > 0 else 0


def _superscript(exponent: int) -> str:
    table = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")
    return str(exponent).translate(table)


# ----------------------------------------------------------------- tracks
def plot_tracks(position_m: np.ndarray, track: np.ndarray, *, frame: Any = None,
                heldout_position_m: np.ndarray | None = None, heldout_track: np.ndarray | None = None,
                places: Sequence[Mapping[str, Any]] | None = None, area_m: np.ndarray | None = None,
                area_label: str = "area of interest", title: str = "Drifter tracks") -> Figure:
    """The fixes as tracks: fit set solid dark grey, held-out set dashed, starts marked.

    ``position_m`` (n, 2) metres in the local frame, ``track`` (n,) track ids,
    sorted by time within each track; ``places`` named sites ``{"label", "xy_m"}``;
    ``area_m`` (k, 2) a polygon of interest, drawn hatched.
    """
    position_m, track = np.asarray(position_m, float), np.asarray(track)
    coords = MapCoords.from_frame(frame, position_m)
    everything = position_m if heldout_position_m is None else np.vstack([position_m, heldout_position_m])
    fig, (ax,) = new_figure(height_in=map_height_in(coords, *coords.xy(everything), 1, extra_in=1.0))
    draw_tracks(ax, coords, position_m, track, color="0.25", linewidth=0.8)
    starts = np.array([position_m[track == k][0] for k in unique_in_order(track)])
    sx, sy = coords.xy(starts)
    ax.plot(sx, sy, "o", color="0.0", markersize=3.5, linestyle="none")
    handles = [Line2D([], [], color="0.25", linewidth=1.0, label=f"fit set ({len(starts)} tracks)"),
               Line2D([], [], color="0.0", marker="o", markersize=3.5, linestyle="none", label="track start")]
    if heldout_position_m is not None and heldout_track is not None:
        heldout_position_m, heldout_track = np.asarray(heldout_position_m, float), np.asarray(heldout_track)
        draw_tracks(ax, coords, heldout_position_m, heldout_track, color="#d55e00", linewidth=1.1,
                     linestyle="--")
        n_held = len(unique_in_order(heldout_track))
        handles.append(Line2D([], [], color="#d55e00", linestyle="--", label=f"held out ({n_held} tracks)"))
    if area_m is not None:
        handles.append(draw_polygon(ax, coords, np.asarray(area_m, float), area_label))
    draw_places(ax, coords, places)
    coords.decorate(ax)
    ax.set_title(title)
    ax.legend(handles=handles, loc="best", fontsize="small", framealpha=0.9)
    return fig


# ----------------------------------------------------------------- mean field
def plot_mean_field(x_m: np.ndarray, y_m: np.ndarray, mean_m_s: np.ndarray, sd_m_s: np.ndarray, *,
                    frame: Any = None, support: np.ndarray | None = None,
                    data_position_m: np.ndarray | None = None, arrows_every: int | None = None) -> Figure:
    """Posterior mean velocity (speed colour + arrows) beside its standard deviation.

    ``x_m`` (nx,), ``y_m`` (ny,) grid axes in metres; ``mean_m_s`` (ny, nx, 2) m/s;
    ``sd_m_s`` (ny, nx) m/s, e.g. :func:`velocity_sd_m_s` of the predictive
    covariance; ``support`` (ny, nx) bool, False where the posterior is close
    to the prior (hatched); ``data_position_m`` (n, 2) observation points.
    """
    mean_m_s, sd_m_s = np.asarray(mean_m_s, float), np.asarray(sd_m_s, float)
    coords = MapCoords.from_frame(frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    speed = np.hypot(mean_m_s[..., 0], mean_m_s[..., 1])
    fig, (ax_speed, ax_sd) = new_figure(2, height_in=map_height_in(coords, X, Y, 2, extra_in=2.0))
    vmax = float(np.nanmax(np.concatenate([speed.ravel(), sd_m_s.ravel()])))
    mesh = ax_speed.pcolormesh(X, Y, speed, cmap=SEQUENTIAL, shading="auto", vmin=0.0, vmax=vmax)
    fig.colorbar(mesh, ax=ax_speed, orientation="horizontal", label="posterior mean speed (m/s)", shrink=0.9)
    step = arrows_every or max(1, int(round(max(speed.shape) / 16)))
    q = ax_speed.quiver(X[::step, ::step], Y[::step, ::step], mean_m_s[::step, ::step, 0],
                        mean_m_s[::step, ::step, 1], color="white", edgecolor="black", linewidth=0.4,
                        angles="uv", pivot="middle", width=0.006)
    ref = nice_round(np.nanpercentile(speed, 90))
    ax_speed.quiverkey(q, 0.80, 1.03, ref, f"{ref:g} m/s", labelpos="E", coordinates="axes",
                       fontproperties={"size": "small"})
    mesh_sd = ax_sd.pcolormesh(X, Y, sd_m_s, cmap=UNCERTAINTY, shading="auto", vmin=0.0, vmax=vmax)
    fig.colorbar(mesh_sd, ax=ax_sd, orientation="horizontal",
                 label="velocity s.d., √(tr Σ / 2) (m/s)", shrink=0.9)
    handles = []
    if data_position_m is not None:
        dx, dy = coords.xy(np.asarray(data_position_m, float))
        ax_sd.plot(dx, dy, ".", color="white", markersize=1.2, alpha=0.7, linestyle="none")
        handles.append(Line2D([], [], marker=".", color="0.5", linestyle="none", label="observations"))
    for ax in (ax_speed, ax_sd):
        handles_ax = hatch_unsupported(ax, X, Y, support)
        coords.decorate(ax)
    handles += handles_ax
    ax_speed.set_title("(a) mean velocity", loc="left")
    ax_sd.set_title("(b) uncertainty (same scale)", loc="left")
    if handles:
        fig.legend(handles=handles, loc="outside lower center", ncols=len(handles), fontsize="x-small",
                   frameon=False)
    return fig


def plot_divergence_vorticity(x_m: np.ndarray, y_m: np.ndarray, divergence_s: np.ndarray | None,
                              divergence_z: np.ndarray | None, vorticity_s: np.ndarray,
                              vorticity_z: np.ndarray, *, frame: Any = None,
                              z_threshold: float | tuple[float, float] = 1.96,
                              support: np.ndarray | None = None, divergence_note: str = "") -> Figure:
    """Posterior mean divergence and vorticity (1/s) with |z| > ``z_threshold`` outlined.

    Grids are (ny, nx) on the axes ``x_m`` (nx,), ``y_m`` (ny,).  Colours are
    diverging and centred at zero; thin contours of the mean are dashed where
    negative; a thick black line encloses the regions where the posterior
    z-score (mean / s.d.) exceeds the threshold (one for both panels, or a
    (divergence, vorticity) pair, e.g. each test's corrected critical value).  Pass ``divergence_s=None``
    with a ``divergence_note`` for a model that is divergence-free by
    construction (nothing is drawn in that panel but the note).
    """
    coords = MapCoords.from_frame(frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    fig, axes = new_figure(2, height_in=map_height_in(coords, X, Y, 2, extra_in=2.0))
    panels = [("(a) divergence ∇·u", divergence_s, divergence_z), ("(b) vorticity ∂v/∂x − ∂u/∂y", vorticity_s,
                                                                      vorticity_z)]
    thresholds = (z_threshold, z_threshold) if np.isscalar(z_threshold) else tuple(z_threshold)
    handles: dict[str, Any] = {}
    hatches: list[Any] = []
    for ax, (title, value, z), threshold in zip(axes, panels, thresholds):
        ax.set_title(title, loc="left")
        if value is None:
            ax.text(0.5, 0.5, divergence_note or "not available", ha="center", va="center", wrap=True,
                    transform=ax.transAxes, fontsize="small")
            ax.set_xlim(np.min(X), np.max(X))
            ax.set_ylim(np.min(Y), np.max(Y))
        else:
            for h in _signed_panel(fig, ax, X, Y, np.asarray(value, float), np.asarray(z, float), threshold,
                                   title.split()[1]):
                handles.setdefault(h.get_label(), h)
            hatches = hatch_unsupported(ax, X, Y, support)
        coords.decorate(ax)
    for h in hatches:  # the hatch key last, after the line keys
        handles.setdefault(h.get_label(), h)
    if handles:
        fig.legend(handles=list(handles.values()), loc="outside lower center", ncols=len(handles),
                   fontsize="x-small", frameon=False)
    return fig


def _signed_panel(fig: Figure, ax: Any, X: np.ndarray, Y: np.ndarray, value: np.ndarray, z: np.ndarray,
                  z_threshold: float, name: str) -> list[Any]:
    exponent = _power_of_ten(value)
    scaled = value / 10.0**exponent
    limit = float(np.nanmax(np.abs(scaled))) or 1.0
    norm = TwoSlopeNorm(vcenter=0.0, vmin=-limit, vmax=limit)
    mesh = ax.pcolormesh(X, Y, scaled, cmap=DIVERGING, norm=norm, shading="auto")
    unit = f"10{_superscript(exponent)} s⁻¹" if exponent else "s⁻¹"
    fig.colorbar(mesh, ax=ax, orientation="horizontal", label=f"posterior mean {name} ({unit})", shrink=0.9)
    levels = [lv for lv in np.linspace(-limit, limit, 9) if abs(lv) > 1e-12]
    ax.contour(X, Y, scaled, levels=levels, colors="0.25", linewidths=0.5, negative_linestyles="dashed")
    handles = [Line2D([], [], color="0.25", linewidth=0.6, label="mean > 0"),
               Line2D([], [], color="0.25", linewidth=0.6, linestyle="--", label="mean < 0")]
    if np.nanmax(np.abs(z)) > z_threshold:
        ax.contour(X, Y, np.abs(z), levels=[z_threshold], colors="black", linewidths=1.8)
        handles.append(Line2D([], [], color="black", linewidth=1.8, label=f"|z| ≥ {z_threshold:.3g} ({name})"))
    else:
        ax.text(0.02, 0.02, f"|z| ≤ {z_threshold:g} everywhere", transform=ax.transAxes, fontsize="x-small")
    return handles


# ----------------------------------------------------------------- spread
def plot_release_spread(releases: Sequence[Mapping[str, Any]], *, ellipse_times_s: Sequence[float],
                        frame: Any = None, field: Mapping[str, np.ndarray] | None = None,
                        area_m: np.ndarray | None = None, area_label: str = "target area",
                        places: Sequence[Mapping[str, Any]] | None = None,
                        title: str = "Release forecasts") -> Figure:
    """Mean path of each release with its 50 % (filled) and 95 % (dashed) ellipses.

    Each release is a mapping with ``label``, ``times_s`` (nt,) since its start,
    ``mean_m`` (nt, 2) and ``covariance_m2`` (nt, 2, 2).  Ellipses are drawn at
    the output times nearest to ``ellipse_times_s``.  ``field`` (optional) is
    ``{"x_m", "y_m", "mean_m_s"}`` drawn as light grey arrows; ``area_m`` (k, 2)
    a polygon drawn hatched; ``places`` named sites ``{"label", "xy_m"}``.
    """
    sample = np.concatenate([np.asarray(r["mean_m"], float)[:, :2] for r in releases])
    coords = MapCoords.from_frame(frame, sample[:1])
    extent = np.vstack([sample, _ellipse_extent(releases, ellipse_times_s)])
    if field is not None:
        extent = np.vstack([extent, grid_corners(field)])
    fig, (ax,) = new_figure(height_in=map_height_in(coords, *coords.xy(extent), 1, extra_in=1.0))
    if field is not None:
        light_arrows(ax, coords, field)
    handles = []
    if area_m is not None:
        handles.append(draw_polygon(ax, coords, np.asarray(area_m, float), area_label))
    for i, rel in enumerate(releases):
        handles += _draw_release(ax, coords, rel, ellipse_times_s, i)
    draw_places(ax, coords, places)
    handles += [Line2D([], [], color="0.2", linewidth=4, alpha=0.35, label="50 % ellipse"),
                Line2D([], [], color="0.2", linestyle="--", linewidth=1.0, label="95 % ellipse")]
    coords.decorate(ax)
    hours = ", ".join(f"{t / 3600:g}" for t in ellipse_times_s)
    ax.set_title(f"{title}: ellipses at {hours} h")
    ax.legend(handles=handles, loc="best", fontsize="x-small", framealpha=0.9)
    return fig


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
        for prob, kwargs in ((0.5, {"alpha": 0.3, "fill": True}), (0.95, {"fill": False, "ls": "--"})):
            ex, ey = coords.xy(ellipse_xy_m(mean[k], cov[k], prob))
            if kwargs.get("fill"):
                ax.fill(ex, ey, color=colour, alpha=kwargs["alpha"], linewidth=0, zorder=2)
            else:
                ax.plot(ex, ey, color=colour, linestyle="--", linewidth=0.9, zorder=2)
        ax.annotate(f"{times[k] / 3600:g} h", (x[k], y[k]), xytext=(3, 3), textcoords="offset points",
                    fontsize="x-small", color="0.1", zorder=5)
    return [path]


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
               title: str = "Plume") -> Figure:
    """A continuous release as plume snapshots: 50 % (filled) and 95 % (line) highest-density regions.

    Each snapshot is ``{"label", "means_m" (R, 2), "covariances_m2" (R, 2, 2)}``: the parcels
    present at one clock time; the plume is their equal-weight Gaussian mixture
    (:func:`mixture_density_grid`), and its highest-density regions hold 50 % and 95 % of it.
    """
    grids = [mixture_density_grid(s["means_m"], s["covariances_m2"]) for s in snapshots]
    corners = np.vstack([[[g[0][0], g[1][0]], [g[0][-1], g[1][-1]]] for g in grids])
    coords = MapCoords.from_frame(frame, corners[:1])
    extent = corners if field is None else np.vstack([corners, grid_corners(field)])
    fig, (ax,) = new_figure(height_in=map_height_in(coords, *coords.xy(extent), 1, extra_in=1.0))
    if field is not None:
        light_arrows(ax, coords, field)
    handles = [] if area_m is None else [draw_polygon(ax, coords, np.asarray(area_m, float), area_label)]
    for i, (snap, (x, y, pdf)) in enumerate(zip(snapshots, grids)):
        colour, style = GREYS[i % len(GREYS)], LINESTYLES[i % len(LINESTYLES)]
        p50, p95 = highest_density_levels(pdf, (x[1] - x[0]) * (y[1] - y[0]), (0.5, 0.95))
        X, Y = coords.grid(x, y)
        ax.contourf(X, Y, pdf, levels=[p50, np.inf], colors=[colour], alpha=0.35, zorder=2)
        ax.contour(X, Y, pdf, levels=[p95], colors=[colour], linestyles=[style], linewidths=1.4, zorder=3)
        handles.append(Line2D([], [], color=colour, linestyle=style, linewidth=1.4, label=str(snap["label"])))
    draw_places(ax, coords, places)
    handles += [Line2D([], [], color="0.2", linewidth=4, alpha=0.35, label="50 % of the plume (shaded)"),
                Line2D([], [], color="0.2", linewidth=1.2, label="95 % of the plume (line)")]
    coords.decorate(ax)
    ax.set_title(title)
    ax.legend(handles=handles, loc="best", fontsize="x-small", framealpha=0.9)
    return fig


def plot_area_probability(curves: Sequence[Mapping[str, Any]], *, area_label: str = "target area",
                          threshold: float | None = None, time_label: str = "time since release (h)") -> Figure:
    """Probability of being inside an area against time, one line per scenario.

    Each curve is ``{"label", "times_s" (nt,), "probability" (nt,)}``.  With
    ``threshold`` a dotted line is drawn and the first time each curve reaches
    it is marked.
    """
    fig, (ax,) = new_figure(height_in=3.6)
    for i, curve in enumerate(curves):
        t_h = np.asarray(curve["times_s"], float) / 3600.0
        p = np.asarray(curve["probability"], float)
        ax.plot(t_h, p, color=GREYS[i % len(GREYS)], linestyle=LINESTYLES[i % len(LINESTYLES)],
                marker=MARKERS[i % len(MARKERS)], markevery=max(1, len(p) // 8), markersize=4,
                label=str(curve["label"]))
        if threshold is not None and np.any(p >= threshold):
            k = int(np.argmax(p >= threshold))
            ax.plot(t_h[k], p[k], marker="*", color="black", markersize=11, linestyle="none")
            ax.annotate(f"{t_h[k]:.3g} h", (t_h[k], p[k]), xytext=(-26, 6), textcoords="offset points",
                        fontsize="x-small")
    if threshold is not None:
        ax.axhline(threshold, color="0.3", linestyle=":", linewidth=1.0, label=f"threshold {threshold:g}")
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlabel(time_label)
    ax.set_ylabel(f"probability inside {area_label} (–)")
    ax.grid(True, color="0.9")
    ax.legend(loc="best", fontsize="small")
    return fig


# ----------------------------------------------------------------- skill
def plot_skill_coverage(horizons_s: Sequence[float], *, skill: Sequence[float], separation_m: Sequence[float],
                        coverage_50: Sequence[float], coverage_95: Sequence[float],
                        baselines: Mapping[str, Mapping[str, Sequence[float]]] | None = None,
                        n_forecasts: Sequence[int] | None = None,
                        coverage_se: tuple[Sequence[float], Sequence[float]] | None = None) -> Figure:
    """Skill, separation and ellipse coverage against forecast horizon, with baselines.

    ``skill`` is the Liu & Weisberg (2011) score (1 perfect, 0 no skill),
    ``separation_m`` the median separation (m), ``coverage_*`` the fraction of
    observed end points inside the 50 %/95 % ellipses.  ``baselines`` maps a
    name (e.g. "persistence") to ``{"skill", "separation_m"}``.  With
    ``coverage_se`` = (standard errors of the 50 % and of the 95 % coverage, e.g. clustered by
    track) the coverage carries ±1.96 SE bands; otherwise, with ``n_forecasts``, Wilson 95 %
    intervals (which treat the forecasts as independent: too narrow when starts share a track).
    """
    h = np.asarray(horizons_s, float) / 3600.0
    fig, (ax_s, ax_d, ax_c) = new_figure(3, height_in=3.5, width_in=WIDTH_IN + 1.2)
    series = [("driftwise", {"skill": skill, "separation_m": separation_m})]
    series += list((baselines or {}).items())
    for i, (name, values) in enumerate(series):
        style = {"color": GREYS[i % len(GREYS)], "linestyle": LINESTYLES[i % len(LINESTYLES)],
                 "marker": MARKERS[i % len(MARKERS)], "label": name.replace("_", " ")}
        if "skill" in values:
            ax_s.plot(h, np.asarray(values["skill"], float), **style)
        if "separation_m" in values:
            ax_d.plot(h, np.asarray(values["separation_m"], float) / 1000.0, **style)
    ax_s.axhline(0.0, color="0.6", linewidth=0.8)
    ax_s.set_ylabel("Liu–Weisberg skill (–)")
    ax_s.set_ylim(-0.03, 1.0)
    ax_d.set_ylabel("median separation (km)")
    ax_d.set_ylim(bottom=0.0)
    _coverage_panel(ax_c, h, coverage_50, coverage_95, n_forecasts, coverage_se)
    for ax, title in zip((ax_s, ax_d, ax_c), ("(a) skill", "(b) separation", "(c) calibration")):
        ax.set_xlabel("forecast horizon (h)")
        ax.set_title(title, loc="left")
        ax.grid(True, color="0.9")
        ax.set_xlim(0, max(h) * 1.08 if len(h) else 1)
        ax.set_xticks(h)
        ax.set_xticklabels([f"{v:g}" for v in h])
    ax_s.legend(fontsize="x-small", loc="best")
    return fig


def _coverage_panel(ax: Any, h: np.ndarray, cov50: Sequence[float], cov95: Sequence[float],
                    n: Sequence[int] | None, se: tuple[Sequence[float], Sequence[float]] | None = None) -> None:
    for i, (nominal, values, marker, style) in enumerate(((0.5, cov50, "o", "-"), (0.95, cov95, "s", "--"))):
        values = np.asarray(values, float)
        ax.axhline(nominal, color="0.6", linestyle=":", linewidth=1.0)
        ax.plot(h, values, color="0.1", marker=marker, linestyle=style, label=f"{nominal:.0%} ellipse")
        if se is not None:
            half = 1.959964 * np.asarray(se[i], float)
            ax.fill_between(h, np.clip(values - half, 0, 1), np.clip(values + half, 0, 1), color="0.5", alpha=0.2,
                            linewidth=0)
        elif n is not None:
            lo, hi = wilson_interval(np.round(values * np.asarray(n, float)), np.asarray(n, float))
            ax.fill_between(h, lo, hi, color="0.5", alpha=0.2, linewidth=0)
    ax.set_ylim(0.0, 1.02)
    ax.set_ylabel("observed fraction inside (–)")
    ax.legend(fontsize="x-small", loc="lower right", title="dotted: nominal", title_fontsize="x-small")


# ----------------------------------------------------------------- fitting
def plot_elbo(steps: Sequence[float], elbo: Sequence[float], *, n_observations: int | None = None,
              final_elbo: float | None = None, stopped_at: int | None = None, window: int = 10) -> Figure:
    """The evidence lower bound during fitting, per optimiser step.

    ``elbo`` (nats; per observation when ``n_observations`` is given, so runs of
    different size compare) is often a minibatch estimate, so it is drawn thin
    and grey with its centred running mean over ``window`` steps in black;
    ``final_elbo`` (the bound on all data at the end) is a dashed line.  The
    y-range is robust: an early transient far below the plateau is cut off
    and the number of steps below the axis is stated.
    """
    steps, elbo = np.asarray(steps, float), np.asarray(elbo, float)
    unit = "nats"
    scale = float(n_observations) if n_observations else 1.0
    if n_observations:
        unit = "nats per observation"
    elbo = elbo / scale
    fig, (ax,) = new_figure(height_in=3.2, width_in=WIDTH_IN * 0.8)
    ax.plot(steps, elbo, color="0.6", linewidth=0.7, label="per step")
    if len(elbo) >= window:
        kernel = np.ones(window) / window
        smooth = np.convolve(elbo, kernel, mode="valid")
        ax.plot(steps[window // 2: window // 2 + smooth.size], smooth, color="0.0", linewidth=1.6,
                label=f"running mean ({window} steps)")
    if final_elbo is not None:
        ax.axhline(final_elbo / scale, color="0.2", linestyle="--", linewidth=1.0, label="final, all data")
    tail = elbo[len(elbo) // 2:]
    spread = float(np.nanmax(tail) - np.nanmin(tail)) or abs(float(np.nanmax(tail))) * 1e-3 or 1.0
    low = float(np.nanmin(tail)) - 3.0 * spread
    top = max(float(np.nanmax(elbo)), final_elbo / scale if final_elbo is not None else -np.inf) + 0.5 * spread
    below = int(np.sum(elbo < low))
    if below:
        ax.set_ylim(low, top)
        ax.text(0.99, 0.03, f"{below} early step(s) below the axis (min {np.nanmin(elbo):.4g})",
                transform=ax.transAxes, ha="right", fontsize="x-small", color="0.3")
    if stopped_at is not None:
        ax.axvline(stopped_at, color="0.4", linestyle=":", linewidth=1.0, label="early stop")
    ax.set_xlabel("optimiser step (–)")
    ax.set_ylabel(f"ELBO ({unit})")
    ax.grid(True, color="0.9")
    ax.legend(fontsize="x-small", loc="lower right" if not below else "center right")
    return fig


# ----------------------------------------------------------------- skill: from a score result
def skill_figure(result: Mapping[str, Any]) -> Figure:
    """The skill/separation/coverage figure of a ``skill.score`` result, coverage bands ±1.96 SE by track."""
    baselines = {name: {"skill": b["skill"], "separation_m": b["separation_m"]}
                 for name, b in result["baselines"].items()}
    se = None
    if "coverage_50_se" in result and "coverage_95_se" in result:
        se = tuple([np.nan if v is None else v for v in result[key]] for key in ("coverage_50_se", "coverage_95_se"))
    return plot_skill_coverage(result["horizons_s"], skill=result["skill"], separation_m=result["separation_m"],
                               coverage_50=result["coverage_50"], coverage_95=result["coverage_95"],
                               baselines=baselines, n_forecasts=result.get("n_pairs"), coverage_se=se)


def plot_skill(result: Mapping[str, Any], path: str | os.PathLike) -> Path:
    """Write :func:`skill_figure` of a ``skill.score`` result to ``path`` (PNG)."""
    return save_figure(skill_figure(result), path)


# ----------------------------------------------------------------- physics: from a check result (physics.py)
def plot_physics_maps(maps: Any) -> Figure:
    """Divergence and vorticity maps (1/s) of a ``verdict.run_check`` result (its ``CheckMaps``).

    Cells outside the data hull are blank.  Each panel outlines the cells whose |z| reaches
    that quantity's Benjamini–Hochberg cut-off; when nothing is significant, the cut-off a
    single cell would need (z at p = α/m) is quoted instead.  2-D only.
    """
    grid = maps.grid
    if len(grid.axes_m) != 2:
        raise ValueError("physics maps are drawn for 2-D fields only")
    x_m, y_m = grid.axes_m
    coords = MapCoords.from_frame(maps.frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    fig, axes = new_figure(2, height_in=map_height_in(coords, X, Y, 2, extra_in=1.7))
    titles = {"divergence": "(a) divergence ∇·u", "vorticity": "(b) vorticity ∂v/∂x − ∂u/∂y"}
    alpha = maps.significance["divergence"].alpha
    for ax, name in zip(axes, ("divergence", "vorticity")):
        post, sig = maps.posteriors[name], maps.significance[name]
        mean, z = np.full(grid.inside.shape, np.nan), np.full(grid.inside.shape, np.nan)
        mean[grid.inside], z[grid.inside] = post.mean, post.z
        cut = sig.z_critical if np.isfinite(sig.z_critical) else float(norm.isf(alpha / (2 * max(sig.significant.size, 1))))
        coords.decorate(ax)
        ax.set_title(titles[name], loc="left")
        handles = _signed_panel(fig, ax, X, Y, mean, z, cut, name)
        ax.set_xlim(np.min(X), np.max(X))
        ax.set_ylim(np.min(Y), np.max(Y))
        ax.legend(handles=handles, loc="lower right", fontsize="x-small", framealpha=0.9)
    fig.suptitle(f"outlined: significant after the Benjamini–Hochberg correction (α = {alpha:g})", fontsize="small")
    return fig
