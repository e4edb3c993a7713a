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
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from .io import atomic_write

WIDTH_IN = 7.2
DPI = 130
SEQUENTIAL = "viridis"
UNCERTAINTY = "cividis"
DIVERGING = "RdBu_r"
LINESTYLES = ("-", "--", "-.", ":")
MARKERS = ("o", "s", "^", "D", "v", "P")
GREYS = ("0.0", "0.35", "0.55", "0.2")

__all__ = [
    "save_figure",
    "velocity_sd_m_s",
    "ellipse_xy_m",
    "wilson_interval",
    "plot_tracks",
    "plot_mean_field",
    "plot_divergence_vorticity",
    "plot_release_spread",
    "plot_area_probability",
    "plot_skill_coverage",
    "plot_elbo",
]


# ----------------------------------------------------------------- helpers
def save_figure(fig: Figure, path: str | os.PathLike, *, dpi: int = DPI) -> Path:
    """Write ``fig`` as PNG to ``path`` atomically (via :func:`driftwise.io.atomic_write`)."""
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
    r² = χ²₂ quantile(p) = −2 ln(1 − p) (chi-square with two degrees of freedom).
    """
    from scipy.stats import chi2

    r = np.sqrt(chi2.ppf(probability, df=2))
    vals, vecs = np.linalg.eigh(0.5 * (np.asarray(cov, float)[:2, :2] + np.asarray(cov, float)[:2, :2].T))
    angle = np.linspace(0.0, 2.0 * np.pi, n)
    circle = np.stack([np.cos(angle), np.sin(angle)], axis=-1)
    return np.asarray(mean, float)[:2] + r * (circle * np.sqrt(np.clip(vals, 0.0, None))) @ vecs.T


def wilson_interval(k: np.ndarray, n: np.ndarray, *, z: float = 1.959964) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval for a binomial proportion k/n (95 % by default)."""
    k, n = np.asarray(k, float), np.asarray(n, float)
    p = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    centre = (p + z**2 / (2 * n)) / (1 + z**2 / n)
    half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / (1 + z**2 / n)
    return centre - half, centre + half


@dataclass(frozen=True)
class _Coords:
    """Maps local metric positions to what the axes show (km or lon/lat)."""

    to_lonlat: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None
    lat0_deg: float = 0.0

    @classmethod
    def from_frame(cls, frame: Any, sample_m: np.ndarray | None = None) -> "_Coords":
        if frame is None or getattr(frame, "kind", "metric") != "lonlat":
            return cls(None)
        coords = cls(frame.to_lonlat)
        lat0 = 0.0
        if sample_m is not None and np.size(sample_m):
            _, lat = coords.xy(np.asarray(sample_m, float).reshape(-1, 2)[:1])
            lat0 = float(np.ravel(lat)[0])
        return cls(frame.to_lonlat, lat0)

    @property
    def aspect(self) -> float:
        """Display units per unit of y relative to x (1/cos φ₀ for lon/lat, 1 for km)."""
        return 1.0 / max(np.cos(np.radians(self.lat0_deg)), 1e-3) if self.geographic else 1.0

    @property
    def geographic(self) -> bool:
        return self.to_lonlat is not None

    def xy(self, points_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        pts = np.asarray(points_m, float)
        flat = pts.reshape(-1, pts.shape[-1])[:, :2]
        if self.to_lonlat is None:
            x, y = flat[:, 0] / 1000.0, flat[:, 1] / 1000.0
        else:
            lon, lat = self.to_lonlat(flat)
            x, y = np.asarray(lon, float), np.asarray(lat, float)
        return x.reshape(pts.shape[:-1]), y.reshape(pts.shape[:-1])

    def grid(self, x_m: np.ndarray, y_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        gx, gy = np.meshgrid(np.asarray(x_m, float), np.asarray(y_m, float))
        return self.xy(np.stack([gx, gy], axis=-1))

    def decorate(self, ax: Any) -> None:
        if self.geographic:
            ax.set_xlabel("longitude (° E)")
            ax.set_ylabel("latitude (° N)")
            ax.set_aspect(self.aspect)
        else:
            ax.set_xlabel("x, local frame (km)")
            ax.set_ylabel("y, local frame (km)")
            ax.set_aspect("equal")


def _figure(ncols: int = 1, *, height_in: float = 4.6, width_in: float = WIDTH_IN) -> tuple[Figure, list[Any]]:
    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    axes = fig.subplots(1, ncols, squeeze=False)[0]
    return fig, list(axes)


def _map_height_in(coords: "_Coords", X: np.ndarray, Y: np.ndarray, ncols: int, *, extra_in: float) -> float:
    """Figure height that fits ``ncols`` equal-aspect map panels of the extent of X, Y without blank bands."""
    width = max(float(np.nanmax(X) - np.nanmin(X)), 1e-12)
    height = float(np.nanmax(Y) - np.nanmin(Y)) * coords.aspect
    panel_in = (WIDTH_IN - 0.9 * ncols) / ncols
    return float(np.clip(panel_in * height / width + extra_in, 2.6, 8.5))


def _power_of_ten(values: np.ndarray) -> int:
    """Exponent e so that values / 10**e are of order one (for colour-bar units)."""
    big = np.nanmax(np.abs(values)) if np.size(values) and np.any(np.isfinite(values)) else 1.0
    return int(np.floor(np.log10(big))) if big > 0 else 0


def _superscript(exponent: int) -> str:
    table = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")
    return str(exponent).translate(table)


def _hatch_unsupported(ax: Any, X: np.ndarray, Y: np.ndarray, support: np.ndarray | None) -> list[Any]:
    """Hatch grid cells outside the data support; return a legend handle when drawn."""
    if support is None or np.all(support):
        return []
    from matplotlib.patches import Patch

    cs = ax.contourf(X, Y, (~np.asarray(support, bool)).astype(float), levels=[0.5, 1.5], colors="none",
                     hatches=["///"])
    cs.set_hatchcolor("0.3")
    cs.set_hatch_linewidth(0.7)
    return [Patch(facecolor="none", edgecolor="0.3", hatch="///", label="little data (posterior ≈ prior)")]


def _draw_tracks(ax: Any, coords: _Coords, position_m: np.ndarray, track: np.ndarray, **style: Any) -> None:
    x, y = coords.xy(position_m)
    for key in _unique_in_order(track):
        sel = track == key
        ax.plot(x[sel], y[sel], **style)


def _unique_in_order(values: np.ndarray) -> list[Any]:
    _, first = np.unique(values, return_index=True)
    return [values[i] for i in np.sort(first)]


def _draw_places(ax: Any, coords: _Coords, places: Sequence[Mapping[str, Any]] | None) -> None:
    """Named sites ``{"label", "xy_m" (2,)}`` as a black-and-white cross with a haloed label."""
    import matplotlib.patheffects as effects

    halo = [effects.withStroke(linewidth=2.5, foreground="white")]
    for place in places or ():
        x, y = coords.xy(np.asarray(place["xy_m"], float)[None, :2])
        ax.plot(x, y, marker="X", color="black", markeredgecolor="white", markersize=9, linestyle="none",
                zorder=6)
        ax.annotate(str(place["label"]), (x[0], y[0]), xytext=(6, -10), textcoords="offset points",
                    fontsize="x-small", zorder=6, path_effects=halo)


def _draw_polygon(ax: Any, coords: _Coords, polygon_m: np.ndarray, label: str) -> Any:
    from matplotlib.patches import Patch

    ring = np.vstack([polygon_m, polygon_m[:1]])
    x, y = coords.xy(ring)
    patch = ax.fill(x, y, facecolor="none", edgecolor="0.1", hatch="..", linewidth=0)[0]
    patch.set_hatchcolor("0.35")
    ax.plot(x, y, color="0.1", linewidth=1.4)
    return Patch(facecolor="none", edgecolor="0.1", hatch="..", linewidth=1.4, label=label)


# ----------------------------------------------------------------- tracks
def plot_tracks(position_m: np.ndarray, track: np.ndarray, *, frame: Any = None,
                heldout_position_m: np.ndarray | None = None, heldout_track: np.ndarray | None = None,
                places: Sequence[Mapping[str, Any]] | None = None, title: str = "Drifter tracks") -> Figure:
    """The fixes as tracks: fit set solid dark grey, held-out set dashed, starts marked.

    ``position_m`` (n, 2) metres in the local frame, ``track`` (n,) track ids,
    sorted by time within each track; ``places`` named sites ``{"label", "xy_m"}``.
    """
    position_m, track = np.asarray(position_m, float), np.asarray(track)
    coords = _Coords.from_frame(frame, position_m)
    everything = position_m if heldout_position_m is None else np.vstack([position_m, heldout_position_m])
    fig, (ax,) = _figure(height_in=_map_height_in(coords, *coords.xy(everything), 1, extra_in=1.0))
    _draw_tracks(ax, coords, position_m, track, color="0.25", linewidth=0.8)
    starts = np.array([position_m[track == k][0] for k in _unique_in_order(track)])
    sx, sy = coords.xy(starts)
    ax.plot(sx, sy, "o", color="0.0", markersize=3.5, linestyle="none")
    handles = [Line2D([], [], color="0.25", linewidth=1.0, label=f"fit set ({len(starts)} tracks)"),
               Line2D([], [], color="0.0", marker="o", markersize=3.5, linestyle="none", label="track start")]
    if heldout_position_m is not None and heldout_track is not None:
        heldout_position_m, heldout_track = np.asarray(heldout_position_m, float), np.asarray(heldout_track)
        _draw_tracks(ax, coords, heldout_position_m, heldout_track, color="#d55e00", linewidth=1.1,
                     linestyle="--")
        n_held = len(_unique_in_order(heldout_track))
        handles.append(Line2D([], [], color="#d55e00", linestyle="--", label=f"held out ({n_held} tracks)"))
    _draw_places(ax, coords, places)
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
    coords = _Coords.from_frame(frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    speed = np.hypot(mean_m_s[..., 0], mean_m_s[..., 1])
    fig, (ax_speed, ax_sd) = _figure(2, height_in=_map_height_in(coords, X, Y, 2, extra_in=2.0))
    vmax = float(np.nanmax(np.concatenate([speed.ravel(), sd_m_s.ravel()])))
    mesh = ax_speed.pcolormesh(X, Y, speed, cmap=SEQUENTIAL, shading="auto", vmin=0.0, vmax=vmax)
    fig.colorbar(mesh, ax=ax_speed, orientation="horizontal", label="posterior mean speed (m/s)", shrink=0.9)
    step = arrows_every or max(1, int(round(max(speed.shape) / 16)))
    q = ax_speed.quiver(X[::step, ::step], Y[::step, ::step], mean_m_s[::step, ::step, 0],
                        mean_m_s[::step, ::step, 1], color="white", edgecolor="black", linewidth=0.4,
                        angles="uv", pivot="middle", width=0.006)
    ref = _nice_round(np.nanpercentile(speed, 90))
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
        handles_ax = _hatch_unsupported(ax, X, Y, support)
        coords.decorate(ax)
    handles += handles_ax
    ax_speed.set_title("(a) mean velocity", loc="left")
    ax_sd.set_title("(b) uncertainty (same scale)", loc="left")
    if handles:
        fig.legend(handles=handles, loc="outside lower center", ncols=len(handles), fontsize="x-small",
                   frameon=False)
    return fig


def _nice_round(value: float) -> float:
    """1, 2 or 5 times a power of ten just below ``value`` (for a quiver key)."""
    if not np.isfinite(value) or value <= 0:
        return 0.1
    exp = np.floor(np.log10(value))
    lead = value / 10**exp
    return float(max(m for m in (1.0, 2.0, 5.0) if m <= lead) * 10**exp)


# ----------------------------------------------------------------- divergence and vorticity
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
    coords = _Coords.from_frame(frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    fig, axes = _figure(2, height_in=_map_height_in(coords, X, Y, 2, extra_in=2.0))
    panels = [("(a) divergence ∇·u", divergence_s, divergence_z), ("(b) vorticity ∂v/∂x − ∂u/∂y", vorticity_s,
                                                                      vorticity_z)]
    thresholds = (z_threshold, z_threshold) if np.isscalar(z_threshold) else tuple(z_threshold)
    handles: dict[str, Any] = {}
    for ax, (title, value, z), threshold in zip(axes, panels, thresholds):
        coords.decorate(ax)
        ax.set_title(title, loc="left")
        if value is None:
            ax.text(0.5, 0.5, divergence_note or "not available", ha="center", va="center", wrap=True,
                    transform=ax.transAxes, fontsize="small")
            ax.set_xlim(np.min(X), np.max(X))
            ax.set_ylim(np.min(Y), np.max(Y))
            continue
        for h in _signed_panel(fig, ax, X, Y, np.asarray(value, float), np.asarray(z, float), threshold,
                               title.split()[1]) + _hatch_unsupported(ax, X, Y, support):
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
    coords = _Coords.from_frame(frame, sample[:1])
    extent = np.vstack([sample, _ellipse_extent(releases, ellipse_times_s)])
    if field is not None:
        extent = np.vstack([extent, _grid_corners(field)])
    fig, (ax,) = _figure(height_in=_map_height_in(coords, *coords.xy(extent), 1, extra_in=1.0))
    if field is not None:
        _light_arrows(ax, coords, field)
    handles = []
    if area_m is not None:
        handles.append(_draw_polygon(ax, coords, np.asarray(area_m, float), area_label))
    for i, rel in enumerate(releases):
        handles += _draw_release(ax, coords, rel, ellipse_times_s, i)
    _draw_places(ax, coords, places)
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


def _grid_corners(field: Mapping[str, np.ndarray]) -> np.ndarray:
    x, y = np.asarray(field["x_m"], float), np.asarray(field["y_m"], float)
    return np.array([[x.min(), y.min()], [x.max(), y.max()]])


def _light_arrows(ax: Any, coords: _Coords, field: Mapping[str, np.ndarray]) -> None:
    X, Y = coords.grid(field["x_m"], field["y_m"])
    mean = np.asarray(field["mean_m_s"], float)
    step = max(1, int(round(max(mean.shape[:2]) / 18)))
    ax.quiver(X[::step, ::step], Y[::step, ::step], mean[::step, ::step, 0], mean[::step, ::step, 1],
              color="0.65", angles="uv", pivot="middle", width=0.003, zorder=0)


def _draw_release(ax: Any, coords: _Coords, rel: Mapping[str, Any], ellipse_times_s: Sequence[float],
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


def plot_area_probability(curves: Sequence[Mapping[str, Any]], *, area_label: str = "target area",
                          threshold: float | None = None, time_label: str = "time since release (h)") -> Figure:
    """Probability of being inside an area against time, one line per scenario.

    Each curve is ``{"label", "times_s" (nt,), "probability" (nt,)}``.  With
    ``threshold`` a dotted line is drawn and the first time each curve reaches
    it is marked.
    """
    fig, (ax,) = _figure(height_in=3.6)
    for i, curve in enumerate(curves):
        t_h = np.asarray(curve["times_s"], float) / 3600.0
        p = np.asarray(curve["probability"], float)
        ax.plot(t_h, p, color=GREYS[i % len(GREYS)], linestyle=LINESTYLES[i % len(LINESTYLES)],
                marker=MARKERS[i % len(MARKERS)], markevery=max(1, len(p) // 8), markersize=4,
                label=str(curve["label"]))
        if threshold is not None and np.any(p >= threshold):
            k = int(np.argmax(p >= threshold))
            ax.plot(t_h[k], p[k], marker="*", color="black", markersize=11, linestyle="none")
            ax.annotate(f"{t_h[k]:.3g} h", (t_h[k], p[k]), xytext=(4, -12), textcoords="offset points",
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
                        n_forecasts: Sequence[int] | None = None) -> Figure:
    """Skill, separation and ellipse coverage against forecast horizon, with baselines.

    ``skill`` is the Liu & Weisberg (2011) score (1 perfect, 0 no skill),
    ``separation_m`` the median separation (m), ``coverage_*`` the fraction of
    observed end points inside the 50 %/95 % ellipses.  ``baselines`` maps a
    name (e.g. "persistence") to ``{"skill", "separation_m"}``.  With
    ``n_forecasts`` the coverage carries Wilson 95 % intervals.
    """
    h = np.asarray(horizons_s, float) / 3600.0
    fig, (ax_s, ax_d, ax_c) = _figure(3, height_in=3.5, width_in=WIDTH_IN + 1.2)
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
    _coverage_panel(ax_c, h, coverage_50, coverage_95, n_forecasts)
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
                    n: Sequence[int] | None) -> None:
    for nominal, values, marker, style in ((0.5, cov50, "o", "-"), (0.95, cov95, "s", "--")):
        values = np.asarray(values, float)
        ax.axhline(nominal, color="0.6", linestyle=":", linewidth=1.0)
        ax.plot(h, values, color="0.1", marker=marker, linestyle=style, label=f"{nominal:.0%} ellipse")
        if n is not None:
            lo, hi = wilson_interval(np.round(values * np.asarray(n, float)), np.asarray(n, float))
            ax.fill_between(h, lo, hi, color="0.5", alpha=0.2, linewidth=0)
    ax.set_ylim(0.0, 1.02)
    ax.set_ylabel("observed fraction inside (–)")
    ax.legend(fontsize="x-small", loc="lower right", title="dotted: nominal", title_fontsize="x-small")


# ----------------------------------------------------------------- fitting
def plot_elbo(steps: Sequence[float], elbo: Sequence[float], *, n_observations: int | None = None,
              stopped_at: int | None = None) -> Figure:
    """The evidence lower bound during fitting: whole run and the final half.

    ``elbo`` in nats (per observation when ``n_observations`` is given, so runs
    of different size compare).  The left panel shows the shortfall from the
    best value on a log scale (how fast the fit converged); the right one the
    final half on a linear scale (the plateau early stopping acted on).
    """
    steps, elbo = np.asarray(steps, float), np.asarray(elbo, float)
    unit = "nats"
    if n_observations:
        elbo, unit = elbo / n_observations, "nats per observation"
    fig, (ax_all, ax_end) = _figure(2, height_in=3.3)
    shortfall = np.nanmax(elbo) - elbo
    keep = shortfall > 0
    ax_all.semilogy(steps[keep], shortfall[keep], color="0.1", linewidth=1.0)
    half = len(steps) // 2
    ax_end.plot(steps[half:], elbo[half:], color="0.1", linewidth=1.0)
    ax_all.set_ylabel(f"best ELBO − ELBO ({unit})")
    ax_end.set_ylabel(f"ELBO ({unit})")
    for ax, title in ((ax_all, "(a) shortfall from the best (log)"), (ax_end, "(b) final half")):
        ax.set_xlabel("optimiser step (–)")
        ax.set_title(title, loc="left")
        ax.grid(True, color="0.9")
        if stopped_at is not None:
            ax.axvline(stopped_at, color="0.4", linestyle="--", linewidth=0.9, label="early stop")
    if stopped_at is not None:
        ax_end.legend(fontsize="x-small")
    return fig
