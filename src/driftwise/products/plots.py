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

from ..files import atomic_write
from .mapaxes import (
    GREYS,
    LINESTYLES,
    MARKERS,
    WIDTH_IN,
    MapCoords,
    draw_places,
    draw_polygon,
    draw_tracks,
    hatch_unsupported,
    map_height_in,
    new_figure,
    nice_round,
    unique_in_order,
)
from .plotspread import (
    ellipse_xy_m,
    highest_density_levels,
    mixture_density_grid,
    plot_area_probability,
    plot_plume,
    plot_release_spread,
)

DPI = 130
SEQUENTIAL = "viridis"
UNCERTAINTY = "cividis"
DIVERGING = "RdBu_r"

__all__ = [
    "elbo_progress",
    "ellipse_xy_m",
    "highest_density_levels",
    "mixture_density_grid",
    "plot_area_probability",
    "plot_divergence_vorticity",
    "plot_elbo",
    "plot_mean_field",
    "plot_physics_maps",
    "plot_plume",
    "plot_release_spread",
    "plot_skill_coverage",
    "plot_tracks",
    "save_figure",
    "signal_limit",
    "skill_figure",
    "velocity_sd_m_s",
    "wilson_interval",
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


def wilson_interval(k: np.ndarray, n: np.ndarray, *, z: float = 1.959964) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval for a binomial proportion k/n (95 % by default)."""
    k, n = np.asarray(k, float), np.asarray(n, float)
    p = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    centre = (p + z**2 / (2 * n)) / (1 + z**2 / n)
    half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / (1 + z**2 / n)
    return centre - half, centre + half


def power_of_ten(values: np.ndarray) -> int:
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
                    data_position_m: np.ndarray | None = None, arrows_every: int | None = None,
                    title: str = "Fitted flow: posterior mean velocity and its uncertainty") -> Figure:
    """Posterior mean velocity (speed colour + arrows) beside its standard deviation, each on its own scale.

    ``x_m`` (nx,), ``y_m`` (ny,) grid axes in metres; ``mean_m_s`` (ny, nx, 2) m/s;
    ``sd_m_s`` (ny, nx) m/s, e.g. :func:`velocity_sd_m_s` of the predictive
    covariance; ``support`` (ny, nx) bool, False where the posterior is close
    to the prior (hatched); ``data_position_m`` (n, 2) observation points.
    The speed scale runs from 0 to the largest speed, the s.d. scale from 0 to the largest
    s.d.: the s.d. is often ten times smaller than the speed and would vanish on a shared scale.
    """
    mean_m_s, sd_m_s = np.asarray(mean_m_s, float), np.asarray(sd_m_s, float)
    coords = MapCoords.from_frame(frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    speed = np.hypot(mean_m_s[..., 0], mean_m_s[..., 1])
    fig, (ax_speed, ax_sd) = new_figure(2, height_in=map_height_in(coords, X, Y, 2, extra_in=2.0))
    mesh = ax_speed.pcolormesh(X, Y, speed, cmap=SEQUENTIAL, shading="auto", vmin=0.0,
                               vmax=float(np.nanmax(speed)) or 1.0)
    fig.colorbar(mesh, ax=ax_speed, orientation="horizontal", label="posterior mean speed (m/s)", shrink=0.9)
    step = arrows_every or max(1, int(round(max(speed.shape) / 16)))
    q = ax_speed.quiver(X[::step, ::step], Y[::step, ::step], mean_m_s[::step, ::step, 0],
                        mean_m_s[::step, ::step, 1], color="white", edgecolor="black", linewidth=0.4,
                        angles="uv", pivot="middle", width=0.006)
    ref = nice_round(np.nanpercentile(speed, 90))
    ax_speed.quiverkey(q, 0.80, 1.03, ref, f"{ref:g} m/s", labelpos="E", coordinates="axes",
                       fontproperties={"size": "small"})
    mesh_sd = ax_sd.pcolormesh(X, Y, sd_m_s, cmap=UNCERTAINTY, shading="auto", vmin=0.0,
                               vmax=float(np.nanmax(sd_m_s)) or 1.0)
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
    ax_sd.set_title("(b) uncertainty (own scale)", loc="left")
    fig.suptitle(title, fontsize="medium")
    if handles:
        fig.legend(handles=handles, loc="outside lower center", ncols=len(handles), fontsize="x-small",
                   frameon=False)
    return fig


def plot_divergence_vorticity(x_m: np.ndarray, y_m: np.ndarray, divergence_s: np.ndarray | None,
                              divergence_z: np.ndarray | None, vorticity_s: np.ndarray,
                              vorticity_z: np.ndarray, *, frame: Any = None,
                              z_threshold: float | tuple[float, float] = 1.96,
                              support: np.ndarray | None = None, divergence_note: str = "",
                              title: str = "Divergence and vorticity of the fitted flow") -> Figure:
    """Posterior mean divergence and vorticity (1/s) with |z| > ``z_threshold`` outlined.

    Grids are (ny, nx) on the axes ``x_m`` (nx,), ``y_m`` (ny,).  Colours are
    diverging and centred at zero; thin contours of the mean are dashed where
    negative; a thick black line encloses the regions where the posterior
    z-score (mean / s.d.) exceeds the threshold (one for both panels, or a
    (divergence, vorticity) pair, e.g. each test's corrected critical value).  Pass ``divergence_s=None``
    with a ``divergence_note`` for a model that is divergence-free by
    construction (nothing is drawn in that panel but the note).  Each colour scale ends at the
    largest significant |mean| (:func:`signal_limit`); a panel with nothing significant says so.
    """
    coords = MapCoords.from_frame(frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    fig, axes = new_figure(2, height_in=map_height_in(coords, X, Y, 2, extra_in=2.5))
    panels = [("(a) divergence ∇·u", divergence_s, divergence_z), ("(b) vorticity ∂v/∂x − ∂u/∂y", vorticity_s,
                                                                      vorticity_z)]
    thresholds = (z_threshold, z_threshold) if np.isscalar(z_threshold) else tuple(z_threshold)
    handles: dict[str, Any] = {}
    hatches: list[Any] = []
    for ax, (panel_title, value, z), threshold in zip(axes, panels, thresholds):
        ax.set_title(panel_title, loc="left")
        if value is None:
            ax.text(0.5, 0.5, divergence_note or "not available", ha="center", va="center", wrap=True,
                    transform=ax.transAxes, fontsize="small")
            ax.set_xlim(np.min(X), np.max(X))
            ax.set_ylim(np.min(Y), np.max(Y))
        else:
            for h in _signed_panel(fig, ax, X, Y, np.asarray(value, float), np.asarray(z, float), threshold,
                                   panel_title.split()[1]):
                handles.setdefault(h.get_label(), h)
            hatches = hatch_unsupported(ax, X, Y, support)
        coords.decorate(ax)
    for h in hatches:  # the hatch key last, after the line keys
        handles.setdefault(h.get_label(), h)
    if handles:
        fig.legend(handles=list(handles.values()), loc="outside lower center", ncols=len(handles),
                   fontsize="x-small", frameon=False)
    fig.suptitle(f"{title}\ncolour scale set by the significant signal; thick outline: significant", fontsize="small")
    return fig


def signal_limit(value: np.ndarray, z: np.ndarray, z_threshold: float) -> tuple[float, bool]:
    """Colour limit for a signed map, from the significant signal: (limit, any cell significant).

    With cells where |z| ≥ ``z_threshold``: the largest |value| among them, so the scale shows
    the signal and not the noise around it (larger, non-significant values saturate).  With none:
    the smallest value that could be significant where the s.d. is typical, ``z_threshold`` ×
    median(|value / z|), so noise below it stays pale.  ``value``, ``z`` same shape; NaN ignored.
    """
    value, z = np.asarray(value, float), np.asarray(z, float)
    finite = np.isfinite(value) & np.isfinite(z)
    significant = finite & (np.abs(z) >= z_threshold)
    if significant.any():
        return float(np.max(np.abs(value[significant]))) or 1.0, True
    nonzero = finite & (np.abs(z) > 0)
    sd = np.abs(value[nonzero] / z[nonzero])
    limit = z_threshold * float(np.median(sd)) if sd.size else float(np.nanmax(np.abs(value), initial=0.0))
    return limit or 1.0, False


def _signed_panel(fig: Figure, ax: Any, X: np.ndarray, Y: np.ndarray, value: np.ndarray, z: np.ndarray,
                  z_threshold: float, name: str) -> list[Any]:
    limit, significant = signal_limit(value, z, z_threshold)
    exponent = power_of_ten(np.array([limit]))
    scaled, limit = value / 10.0**exponent, limit / 10.0**exponent
    norm = TwoSlopeNorm(vcenter=0.0, vmin=-limit, vmax=limit)
    mesh = ax.pcolormesh(X, Y, scaled, cmap=DIVERGING, norm=norm, shading="auto")
    unit = f"10{_superscript(exponent)} s⁻¹" if exponent else "s⁻¹"
    beyond = bool(np.nanmax(np.abs(scaled), initial=0.0) > limit * (1 + 1e-9))
    fig.colorbar(mesh, ax=ax, orientation="horizontal", label=f"posterior mean {name} ({unit})", shrink=0.9,
                 extend="both" if beyond else "neither")
    if not significant:
        top = float(np.nanmax(np.abs(z), initial=0.0))
        ax.text(0.5, 0.92, f"nothing significant: largest |z| {top:.2g} < {z_threshold:.3g} needed\n"
                f"(pale colours: the scale ends at the smallest significant value)", transform=ax.transAxes,
                ha="center", va="top", fontsize="x-small", bbox={"facecolor": "white", "alpha": 0.85, "linewidth": 0})
        return []
    levels = [lv for lv in np.linspace(-limit, limit, 9) if abs(lv) > 1e-12]
    ax.contour(X, Y, scaled, levels=levels, colors="0.25", linewidths=0.5, negative_linestyles="dashed")
    ax.contour(X, Y, np.abs(z), levels=[z_threshold], colors="black", linewidths=1.8)
    return [Line2D([], [], color="0.25", linewidth=0.6, label="mean > 0"),
            Line2D([], [], color="0.25", linewidth=0.6, linestyle="--", label="mean < 0"),
            Line2D([], [], color="black", linewidth=1.8, label=f"|z| ≥ {z_threshold:.3g} ({name})")]


# ----------------------------------------------------------------- skill
def plot_skill_coverage(horizons_s: Sequence[float], *, skill: Sequence[float], separation_m: Sequence[float],
                        coverage_50: Sequence[float], coverage_95: Sequence[float],
                        baselines: Mapping[str, Mapping[str, Sequence[float]]] | None = None,
                        n_forecasts: Sequence[int] | None = None,
                        coverage_se: tuple[Sequence[float], Sequence[float]] | None = None,
                        title: str = "Forecast skill on held-out tracks, against baselines") -> Figure:
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
    for ax, panel_title in zip((ax_s, ax_d, ax_c), ("(a) skill", "(b) separation", "(c) calibration")):
        ax.set_xlabel("forecast horizon (h)")
        ax.set_title(panel_title, loc="left")
        ax.grid(True, color="0.9")
        ax.set_xlim(0, max(h) * 1.08 if len(h) else 1)
        ax.set_xticks(h)
        ax.set_xticklabels([f"{v:g}" for v in h])
    ax_s.legend(fontsize="x-small", loc="best")
    fig.suptitle(title, fontsize="medium")
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
def elbo_progress(elbo: Sequence[float], *, window: int = 10, final_elbo: float | None = None) -> dict[str, Any]:
    """The ELBO history as relative progress, the terms a reader judges convergence in.

    ``elbo`` (n,) nats per step.  Returns ``reference`` (nats: ``final_elbo``, else the last running
    mean), ``gap_percent`` (n,) = 100 (ELBO − reference) / |reference|, ``smooth`` the centred running
    mean over ``window`` steps (n − window + 1,) (the raw values when shorter), ``change`` its
    per-step relative change Δ(smooth) / |reference| (–), and ``last_change`` the mean |change| over
    the last ``window`` steps (–).
    """
    elbo = np.asarray(elbo, float)
    smooth = np.convolve(elbo, np.ones(window) / window, mode="valid") if elbo.size >= window else elbo
    reference = float(final_elbo) if final_elbo is not None else float(smooth[-1])
    scale = abs(reference) or 1.0
    change = np.diff(smooth) / scale
    last = float(np.mean(np.abs(change[-window:]))) if change.size else float("nan")
    return {"reference": reference, "gap_percent": 100.0 * (elbo - reference) / scale, "smooth": smooth,
            "change": change, "last_change": last}


def plot_elbo(steps: Sequence[float], elbo: Sequence[float], *, n_observations: int | None = None,
              final_elbo: float | None = None, stopped_at: int | None = None, window: int = 10,
              converged: bool | None = None, tolerance: float = 1e-4, title: str = "Fitting the flow field") -> Figure:
    """The ELBO history in relative terms: (a) the gap to the final value in %, (b) the relative change per step.

    ``elbo`` (nats per step; often a minibatch estimate, so drawn thin and grey with its centred
    running mean over ``window`` steps in black) against ``steps``.  Panel (a)'s range is robust: an
    early transient far below the plateau is cut off and the number of steps below the axis stated.
    Panel (b) is logarithmic, with ``tolerance`` dotted.  The title says whether the fit converged
    (``converged`` from the fit; when None, whether the last ``window`` steps changed the ELBO by less
    than ``tolerance`` per step) and gives the final ELBO, per observation with ``n_observations``.
    """
    steps = np.asarray(steps, float)
    prog = elbo_progress(elbo, window=window, final_elbo=final_elbo)
    fig, (ax_gap, ax_rate) = new_figure(2, height_in=3.4, width_in=WIDTH_IN + 0.8)
    gap = prog["gap_percent"]
    ax_gap.plot(steps, gap, color="0.6", linewidth=0.7, label="per step")
    smooth_steps = steps[window // 2: window // 2 + prog["smooth"].size] if len(gap) >= window else steps
    scale = abs(prog["reference"]) or 1.0
    ax_gap.plot(smooth_steps, 100.0 * (prog["smooth"] - prog["reference"]) / scale, color="0.0", linewidth=1.6,
                label=f"running mean ({window} steps)")
    _robust_gap_range(ax_gap, gap)
    ax_rate.semilogy(smooth_steps[1:], np.abs(prog["change"]), color="0.0", linewidth=1.2, label="running mean")
    ax_rate.axhline(tolerance, color="0.3", linestyle=":", linewidth=1.0, label=f"tolerance {tolerance:g}")
    for ax in (ax_gap, ax_rate):
        if stopped_at is not None:
            ax.axvline(stopped_at, color="0.4", linestyle="--", linewidth=1.0, label="early stop")
        ax.set_xlabel("optimiser step (–)")
        ax.grid(True, color="0.9")
        ax.legend(fontsize="x-small", loc="best")
    ax_gap.set_ylabel("ELBO minus final ELBO (% of |final|)")
    ax_gap.set_title("(a) distance from the final value", loc="left", fontsize="small")
    ax_rate.set_ylabel("|relative change| per step (–)")
    ax_rate.set_title("(b) how fast it still moved", loc="left", fontsize="small")
    fig.suptitle(_elbo_headline(prog, len(gap), window, converged, tolerance, n_observations, title),
                 fontsize="small")
    return fig


def _robust_gap_range(ax: Any, gap: np.ndarray) -> None:
    tail = gap[len(gap) // 2:]
    spread = float(np.nanmax(tail) - np.nanmin(tail)) or abs(float(np.nanmax(tail))) * 1e-3 or 1e-3
    low = float(np.nanmin(tail)) - 3.0 * spread
    below = int(np.sum(gap < low))
    if below:
        ax.set_ylim(low, max(float(np.nanmax(gap)), 0.0) + 0.5 * spread)
        ax.text(0.99, 0.03, f"{below} early step(s) below the axis (lowest {np.nanmin(gap):.3g} %)",
                transform=ax.transAxes, ha="right", fontsize="x-small", color="0.3",
                bbox={"facecolor": "white", "alpha": 0.85, "linewidth": 0})


def _elbo_headline(prog: Mapping[str, Any], n_steps: int, window: int, converged: bool | None, tolerance: float,
                   n_observations: int | None, title: str) -> str:
    last = prog["last_change"]
    if converged is None:
        converged = bool(np.isfinite(last) and last < tolerance)
        state = "levelled off" if converged else "still changing"
    else:
        state = "converged" if converged else "NOT converged (stopped at the step limit)"
    per_obs = f" = {prog['reference'] / n_observations:.5g} nats per observation" if n_observations else ""
    return (f"{title}: {state} after {n_steps} steps; over the last {window} steps the ELBO changed by "
            f"{last:.1e} of its value per step\nfinal ELBO {prog['reference']:.6g} nats{per_obs}")


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
    fig, axes = new_figure(2, height_in=map_height_in(coords, X, Y, 2, extra_in=2.1))
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
        if handles:
            ax.legend(handles=handles, loc="lower right", fontsize="x-small", framealpha=0.9)
    fig.suptitle("Divergence and vorticity of the fitted flow, colour scale set by the significant signal\n"
                 f"outlined: significant after the Benjamini–Hochberg correction (α = {alpha:g})", fontsize="small")
    return fig
