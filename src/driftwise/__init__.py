"""driftwise: flow fields with honest uncertainty from particle trajectories.

Fit a vector-field Gaussian process to drifter fixes, forecast how a release
spreads by moment matching on the implied Itô SDE, check divergence and
vorticity constraints, and score forecasts against held-out tracks.

The package is built in layers whose imports point down only (DEVELOPERS.md draws them):
``errors``/``units``/``files``/``version`` (ground floor) < ``data`` < ``gp`` < ``dynamics``
< ``diagnostics`` < ``products`` < ``app``.  The names below are the public API.
"""

from __future__ import annotations

import jax

jax.config.update("jax_enable_x64", True)

from .data.tracks import Frame, Observations, TrackError, Tracks, read_tracks, velocity_observations  # noqa: E402
from .errors import InputError  # noqa: E402
from .gp.field import FlowField  # noqa: E402
from .gp.modelfile import load_model as load  # noqa: E402
from .gp.modelfile import save_model as save
from .gp.training import fit  # noqa: E402
from .version import __version__  # noqa: E402

__all__ = ["InputError", "__version__",
           "read_tracks", "Tracks", "Frame", "TrackError", "velocity_observations", "Observations",
           "fit", "save", "load", "FlowField"]
