"""A time-varying field at a few instants: speed and arrows on a grid, one panel per instant, shared scales.

Plain arrays in, a :class:`matplotlib.figure.Figure` out (Agg, no pyplot state), written with
:func:`driftwise.products.plots.save_figure`.  Used for the field at four phases of a tide: the panels share
the speed colour scale and the arrow scale, so the flood, the ebb and the slack between compare at a glance.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from .mapaxes import WIDTH_IN, MapCoords, nice_round

__all__ = ["plot_field_phases"]


def plot_field_phases(x_m: Any, y_m: Any, means_m_s: Any, labels: Sequence[str], *, frame: Any = None,
                      data_position_m: Any = None, title: str = "The fitted flow at four tidal phases") -> Figure:
    """Posterior mean velocity at k instants on one grid: ``x_m`` (nx,), ``y_m`` (ny,) metres of the local
    frame, ``means_m_s`` (k, ny, nx, 2) m/s, ``labels`` (k,) the panel titles; two panels per row.

    Colour: speed |v| (m/s) from 0 to the largest over all panels; arrows on one common scale with a key of a
    1-2-5 speed near the 90th percentile.  ``data_position_m`` (n, 2) observation points, drawn faintly.
    """
    means = np.asarray(means_m_s, dtype=float)
    k = means.shape[0]
    if len(labels) != k:
        raise ValueError(f"plot_field_phases: {k} fields but {len(labels)} labels")
    coords = MapCoords.from_frame(frame, np.array([[np.mean(x_m), np.mean(y_m)]]))
    X, Y = coords.grid(x_m, y_m)
    speed = np.hypot(means[..., 0], means[..., 1])
    top = float(np.nanmax(speed)) if np.any(np.isfinite(speed)) else 1.0
    rows = (k + 1) // 2
    height = float(np.ptp(Y)) * coords.aspect / max(float(np.ptp(X)), 1e-12)
    fig = Figure(figsize=(WIDTH_IN, float(np.clip(rows * (WIDTH_IN / 2 - 0.6) * height + 1.2, 3.0, 11.0))),
                 layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, 2, squeeze=False).ravel())
    step = max(1, round(max(means.shape[1:3]) / 14))
    ref = nice_round(float(np.nanpercentile(speed[:, ::step, ::step], 90)))
    scale = ref / (0.06 * max(float(np.ptp(X)), 1e-12))     # the key arrow spans about 6 % of a panel's width
    data = None if data_position_m is None else np.asarray(data_position_m, float).reshape(-1, 2)
    mesh = None
    for ax, mean, s, label in zip(axes, means, speed, labels):
        mesh = ax.pcolormesh(X, Y, s, shading="nearest", cmap="viridis", vmin=0.0, vmax=top)
        if data is not None:
            ax.plot(*coords.xy(data), ",", color="0.85", linestyle="none")
        q = ax.quiver(X[::step, ::step], Y[::step, ::step], mean[::step, ::step, 0], mean[::step, ::step, 1],
                      color="white", angles="uv", pivot="middle", scale=scale, scale_units="x", width=0.005)
        ax.quiverkey(q, 0.08, 0.05, ref, f"{ref:g} m/s", labelpos="E", coordinates="axes", color="black",
                     fontproperties={"size": "x-small"})
        ax.set_title(label, fontsize="small")
        coords.decorate(ax)
    for ax in axes[k:]:
        ax.set_visible(False)
    fig.colorbar(mesh, ax=list(axes[:k]), shrink=0.8, label="speed (m/s)")
    fig.suptitle(title, fontsize="medium")
    return fig
