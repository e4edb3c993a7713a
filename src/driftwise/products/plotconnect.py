"""Figures of connectivity (matrix and map) and back-tracking (release-probability map)."""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.figure import Figure

from ..data.utctime import iso_utc
from ..files import CAUTION
from .backtrackfiles import region_polygons
from .mapaxes import MapCoords, draw_polygon, figure_note, map_height_in, new_figure

__all__ = ["plot_connect_matrix", "plot_connect_map", "plot_backtrack"]


def plot_connect_matrix(result: Any) -> Figure:
    """The peak over the horizon of P[source, destination, t] as a shaded matrix, each cell labelled with its
    value and the first time it reaches the threshold."""
    n = len(result.sites)
    fig, (ax,) = new_figure(height_in=min(8.0, 2.4 + 0.45 * n), width_in=min(9.0, 3.6 + 0.55 * n))
    final = result.probability.max(-1)
    image = ax.imshow(final, vmin=0.0, vmax=max(float(final.max()), 1e-9), cmap="Blues")
    fig.colorbar(image, ax=ax, label=f"peak probability within {result.times_s[-1] / 86400:.3g} d")
    ax.set_xticks(range(n), result.names, rotation=45, ha="right", fontsize="x-small")
    ax.set_yticks(range(n), result.names, fontsize="x-small")
    ax.set_xlabel("destination")
    ax.set_ylabel("source")
    if n <= 12:
        for i in range(n):
            for j in range(n):
                first = result.first_passage_s[i, j]
                text = f"{final[i, j]:.2g}" + ("" if np.isnan(first) else f"\n{first / 86400:.2g} d")
                ax.text(j, i, text, ha="center", va="center", fontsize="xx-small",
                        color="white" if final[i, j] > 0.6 * final.max() else "black")
    ax.set_title(f"Connectivity ({result.method}): peak probability,\nfirst time ≥ {result.threshold:g}",
                 fontsize="small")
    figure_note(fig, CAUTION, width=int(40 + 6 * n))
    return fig


def plot_connect_map(result: Any) -> Figure:
    """Sites and the path of each source's centre of mass over the horizon."""
    pts = np.concatenate([s.polygon_m for s in result.sites] + [result.centroid_m.reshape(-1, 2)])
    coords = MapCoords.from_frame(result.frame, pts[:1])
    fig, (ax,) = new_figure(height_in=map_height_in(coords, *coords.xy(pts), 1, extra_in=1.4))
    for i, site in enumerate(result.sites):
        draw_polygon(ax, coords, site.polygon_m, site.name)
        cx, cy = coords.xy(site.polygon_m.mean(0)[None])
        ax.annotate(site.name, (cx[0], cy[0]), fontsize="x-small", ha="center")
        px, py = coords.xy(result.centroid_m[i])
        ax.plot(px, py, "-", linewidth=1.2, label=f"{site.name}: centre of the released material")
        ax.plot(px[-1:], py[-1:], "o", color=ax.lines[-1].get_color(), markersize=3)
    coords.decorate(ax)
    ax.legend(fontsize="xx-small", loc="best")
    ax.set_title(f"Sites and where their material goes ({result.times_s[-1] / 86400:.3g} d)", fontsize="small")
    figure_note(fig, CAUTION)
    return fig


def plot_backtrack(result: Any, truth_m: Any = None) -> Figure:
    """Release-point probability (all candidate times) with the 50/90 % regions, the finds and the most
    probable release point; ``truth_m (2,)``: the true release point of a simulated find, when known."""
    coords = MapCoords.from_frame(result.frame, np.array([[result.x_m[0], result.y_m[0]]]))
    X, Y = coords.grid(result.x_m, result.y_m)
    fig, (ax,) = new_figure(height_in=map_height_in(coords, X, Y, 1, extra_in=1.4))
    density = result.marginal / result.cell_area_m2 * 1e6
    mesh = ax.pcolormesh(X, Y, density, cmap="Greys", shading="nearest")
    fig.colorbar(mesh, ax=ax, label="release probability per km²")
    for share, style in ((0.5, "-"), (0.9, "--")):
        for poly in region_polygons(result, share):
            rx, ry = coords.xy(np.asarray(poly[0]))
            ax.plot(rx, ry, style, color="tab:red", linewidth=1.2)
        ax.plot([], [], style, color="tab:red", label=f"{100 * share:g} % region")
    fx, fy = coords.xy(result.finds.position_m)
    ax.plot(fx, fy, "*", color="tab:blue", markersize=10, label="find(s)")
    x, y, t = result.most_probable
    bx, by = coords.xy(np.array([[x, y]]))
    when = iso_utc(result.time_origin_utc, t) if result.time_origin_utc else f"t = {t:.6g} s"
    ax.plot(bx, by, "X", color="black", markersize=8, label=f"most probable release ({when})")
    if truth_m is not None:
        tx, ty = coords.xy(np.asarray(truth_m, float).reshape(1, 2))
        ax.plot(tx, ty, "o", markerfacecolor="none", markeredgecolor="tab:green", markersize=9,
                markeredgewidth=1.5, label="true release (simulation)")
    coords.decorate(ax)
    ax.legend(fontsize="xx-small", loc="best")
    ax.set_title("Where was it released? (uniform prior over region and window)", fontsize="small")
    figure_note(fig, CAUTION)
    return fig
