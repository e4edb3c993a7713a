"""driftwise: flow fields with honest uncertainty from particle trajectories.

Fit a vector-field Gaussian process to drifter fixes, forecast how a release
spreads by moment matching on the implied Itô SDE, check divergence and
vorticity constraints, and score forecasts against held-out tracks.
"""

from __future__ import annotations

import jax

jax.config.update("jax_enable_x64", True)

__version__ = "0.1.0"

from .errors import InputError  # noqa: E402
from .tracks import (Frame, Observations, Tracks, TrackError, read_tracks,  # noqa: E402
                     velocity_observations)
from .field import FlowField  # noqa: E402
from .fit import fit  # noqa: E402  (the function shadows the submodule name; import helpers from driftwise.fit)
from .io import load_model as load  # noqa: E402

__all__ = ["InputError", "__version__",
           "read_tracks", "Tracks", "Frame", "TrackError", "velocity_observations", "Observations",
           "fit", "load", "FlowField"]
