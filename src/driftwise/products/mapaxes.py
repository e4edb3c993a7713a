"""Map axes for driftwise figures: what the axes show, and the furniture every map shares.

Positions arrive in metres of the model's local frame.  A metric frame is drawn
in kilometres with equal aspect; a lon/lat frame (``frame.kind == "lonlat"``)
is drawn in longitude/latitude with the aspect 1/cos φ₀ that makes ground
distances equal in both directions, and a kilometre scale bar.  Also here:
figure sizing without blank bands, hatching of poorly supported cells, named
sites, hatched polygons and light background arrows.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from matplotlib.figure import Figure

WIDTH_IN = 7.2
LINESTYLES = ("-", "--", "-.", ":")
MARKERS = ("o", "s", "^", "D", "v", "P")
GREYS = ("0.0", "0.35", "0.55", "0.2")

__all__ = [
    "WIDTH_IN",
    "MapCoords",
    "draw_places",
    "draw_polygon",
    "draw_tracks",
    "figure_note",
    "grid_corners",
    "hatch_unsupported",
    "light_arrows",
    "map_height_in",
    "new_figure",
    "nice_round",
    "release_text",
    "unique_in_order",
]


@dataclass(frozen=True)
class MapCoords:
    """Maps local metric positions to what the axes show (km or lon/lat)."""

    to_lonlat: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None
    lat0_deg: float = 0.0

    @classmethod
    def from_frame(cls, frame: Any, sample_m: np.ndarray | None = None) -> "MapCoords":
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

    def scale_bar(self, ax: Any) -> Any:
        """A kilometre bar (1-2-5 length, about a fifth of the width) in the lower right of a lon/lat map.

        Its length in longitude is km / (111.32 cos φ₀) degrees: the WGS 84 equatorial
        degree of longitude, 2πa/360 = 111.32 km, shrunk by the cosine of the latitude.
        """
        from matplotlib.font_manager import FontProperties
        from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

        ax.autoscale_view()
        x0, x1 = ax.get_xlim()
        deg_per_km = 1.0 / (111.32 * max(np.cos(np.radians(self.lat0_deg)), 1e-3))
        km = nice_round(abs(x1 - x0) / deg_per_km / 5.0)
        bar = AnchoredSizeBar(ax.transData, km * deg_per_km, f"{km:g} km", "lower right", pad=0.4, sep=3,
                              frameon=True, size_vertical=0, fontproperties=FontProperties(size="x-small"))
        bar.patch.set_alpha(0.8)
        ax.add_artist(bar)
        return bar

    def grid(self, x_m: np.ndarray, y_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        gx, gy = np.meshgrid(np.asarray(x_m, float), np.asarray(y_m, float))
        return self.xy(np.stack([gx, gy], axis=-1))

    def decorate(self, ax: Any) -> None:
        if self.geographic:
            ax.set_xlabel("longitude (° E)")
            ax.set_ylabel("latitude (° N)")
            ax.set_aspect(self.aspect)
            self.scale_bar(ax)
        else:
            ax.set_xlabel("x, local frame (km)")
            ax.set_ylabel("y, local frame (km)")
            ax.set_aspect("equal")


def new_figure(ncols: int = 1, *, height_in: float = 4.6, width_in: float = WIDTH_IN) -> tuple[Figure, list[Any]]:
    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    axes = fig.subplots(1, ncols, squeeze=False)[0]
    return fig, list(axes)


def map_height_in(coords: "MapCoords", X: np.ndarray, Y: np.ndarray, ncols: int, *, extra_in: float) -> float:
    """Figure height that fits ``ncols`` equal-aspect map panels of the extent of X, Y without blank bands."""
    width = max(float(np.nanmax(X) - np.nanmin(X)), 1e-12)
    height = float(np.nanmax(Y) - np.nanmin(Y)) * coords.aspect
    panel_in = (WIDTH_IN - 0.9 * ncols) / ncols
    return float(np.clip(panel_in * height / width + extra_in, 2.6, 8.5))


def hatch_unsupported(ax: Any, X: np.ndarray, Y: np.ndarray, support: np.ndarray | None) -> list[Any]:
    """Hatch grid cells outside the data support; return a legend handle when drawn."""
    if support is None or np.all(support):
        return []
    from matplotlib.patches import Patch

    cs = ax.contourf(X, Y, (~np.asarray(support, bool)).astype(float), levels=[0.5, 1.5], colors="none",
                     hatches=["///"])
    cs.set_hatchcolor("0.3")
    cs.set_hatch_linewidth(0.7)
    return [Patch(facecolor="none", edgecolor="0.3", hatch="///", label="little data (posterior ≈ prior)")]


def draw_tracks(ax: Any, coords: MapCoords, position_m: np.ndarray, track: np.ndarray, **style: Any) -> None:
    x, y = coords.xy(position_m)
    for key in unique_in_order(track):
        sel = track == key
        ax.plot(x[sel], y[sel], **style)


def unique_in_order(values: np.ndarray) -> list[Any]:
    _, first = np.unique(values, return_index=True)
    return [values[i] for i in np.sort(first)]


def draw_places(ax: Any, coords: MapCoords, places: Sequence[Mapping[str, Any]] | None) -> None:
    """Named sites ``{"label", "xy_m" (2,)}`` as a black-and-white cross with a haloed label."""
    import matplotlib.patheffects as effects

    halo = [effects.withStroke(linewidth=2.5, foreground="white")]
    for place in places or ():
        x, y = coords.xy(np.asarray(place["xy_m"], float)[None, :2])
        ax.plot(x, y, marker="X", color="black", markeredgecolor="white", markersize=9, linestyle="none",
                zorder=6)
        ax.annotate(str(place["label"]), (x[0], y[0]), xytext=(6, -10), textcoords="offset points",
                    fontsize="x-small", zorder=6, path_effects=halo)


def draw_polygon(ax: Any, coords: MapCoords, polygon_m: np.ndarray, label: str) -> Any:
    from matplotlib.patches import Patch

    ring = np.vstack([polygon_m, polygon_m[:1]])
    x, y = coords.xy(ring)
    patch = ax.fill(x, y, facecolor="none", edgecolor="0.1", hatch="..", linewidth=0)[0]
    patch.set_hatchcolor("0.35")
    ax.plot(x, y, color="0.1", linewidth=1.4)
    return Patch(facecolor="none", edgecolor="0.1", hatch="..", linewidth=1.4, label=label)


def nice_round(value: float) -> float:
    """1, 2 or 5 times a power of ten just below ``value`` (for a quiver key)."""
    if not np.isfinite(value) or value <= 0:
        return 0.1
    exp = np.floor(np.log10(value))
    lead = value / 10**exp
    return float(max(m for m in (1.0, 2.0, 5.0) if m <= lead) * 10**exp)


# ----------------------------------------------------------------- divergence and vorticity
def grid_corners(field: Mapping[str, np.ndarray]) -> np.ndarray:
    x, y = np.asarray(field["x_m"], float), np.asarray(field["y_m"], float)
    return np.array([[x.min(), y.min()], [x.max(), y.max()]])


def light_arrows(ax: Any, coords: MapCoords, field: Mapping[str, np.ndarray]) -> float:
    """The fitted mean flow ``{"x_m", "y_m", "mean_m_s" (ny, nx, 2)}`` as light grey arrows, with a speed key.

    The key (lower left, inside the map) is an arrow of a 1-2-5 speed near the 90th percentile
    of the drawn speeds; returns that speed (m/s).
    """
    X, Y = coords.grid(field["x_m"], field["y_m"])
    mean = np.asarray(field["mean_m_s"], float)
    step = max(1, int(round(max(mean.shape[:2]) / 18)))
    u, v = mean[::step, ::step, 0], mean[::step, ::step, 1]
    q = ax.quiver(X[::step, ::step], Y[::step, ::step], u, v, color="0.55", angles="uv", pivot="middle",
                  width=0.003, zorder=0)
    ref = nice_round(float(np.nanpercentile(np.hypot(u, v), 90)))
    ax.quiverkey(q, 0.05, 0.035, ref, f"{ref:g} m/s mean flow", labelpos="E", coordinates="axes", color="0.3",
                 fontproperties={"size": "x-small"})
    return ref


def release_text(release_time: str | None, what: str = "release") -> str:
    """``"release: 2024-06-05T06:00Z"``, or a plain statement that no clock time was given."""
    if release_time:
        return f"{what}: {release_time}"
    return f"{what} time not given: times count from the {what}"


def figure_note(fig: Figure, text: str, *, width: int = 110) -> Any:
    """A boxed note under the axes (a title-only legend, so constrained layout makes room for it)."""
    import textwrap

    legend = fig.legend(handles=[], title="\n".join(textwrap.wrap(text, width)), loc="outside lower center",
                        title_fontsize="small", frameon=True, alignment="left")
    legend.get_frame().set_edgecolor("0.1")
    legend.get_frame().set_linewidth(1.2)
    return legend
