"""driftwise: flow fields with honest uncertainty from particle trajectories.

Fit a vector-field Gaussian process to drifter fixes, forecast how a release
spreads by moment matching on the implied Itô SDE, check divergence and
vorticity constraints, and score forecasts against held-out tracks.

The package is built in layers whose imports point down only (DEVELOPERS.md draws them):
``errors``/``units``/``files``/``version`` (ground floor) < ``data`` < ``gp`` < ``dynamics``
< ``diagnostics`` < ``products`` < ``app``.  The names below are the public API.

Importing the package is light: the public names are loaded on first use (PEP 562 module
``__getattr__``), so ``driftwise --help`` and ``driftwise inspect`` never load jax.  The GP linear
algebra needs float64, so 64-bit jax is switched on here before jax is first imported (the
``JAX_ENABLE_X64`` variable jax reads at import), or at once when jax is already loaded; XLA's YNNPACK fusions
are switched off the same way (see ``YNN_OFF``).
"""

from __future__ import annotations

import importlib
import os
import sys
from typing import Any

from .errors import InputError
from .version import __version__

if "jax" in sys.modules:
    sys.modules["jax"].config.update("jax_enable_x64", True)
else:
    os.environ["JAX_ENABLE_X64"] = "True"

# XLA's CPU backend (jaxlib 0.10.2) hands some dot fusions to YNNPACK, which failed at run time ("YNNPACK operation
# failed", and a segmentation fault inside pytest) on a 3-D forecast with 256 inducing points; with YNNPACK fusions
# off that forecast runs and the 5,000-fix fit is as fast (18.9 s against 20.1 s, back to back).  The flag is read
# when jax creates its CPU backend, so it is set here, before any computation; a user's own setting wins.
YNN_OFF = "--xla_cpu_experimental_ynn_fusion_type="
if "ynn_fusion_type" not in os.environ.get("XLA_FLAGS", ""):
    os.environ["XLA_FLAGS"] = " ".join(filter(None, (os.environ.get("XLA_FLAGS", ""), YNN_OFF)))

# public name -> (module, attribute)
_LAZY = {"read_tracks": ("driftwise.data.tracks", "read_tracks"), "Tracks": ("driftwise.data.tracks", "Tracks"),
         "Frame": ("driftwise.data.tracks", "Frame"), "TrackError": ("driftwise.data.tracks", "TrackError"),
         "velocity_observations": ("driftwise.data.tracks", "velocity_observations"),
         "Observations": ("driftwise.data.tracks", "Observations"),
         "fit": ("driftwise.gp.training", "fit"), "save": ("driftwise.gp.modelfile", "save_model"),
         "load": ("driftwise.gp.modelfile", "load_model"), "FlowField": ("driftwise.gp.field", "FlowField")}

__all__ = ["InputError", "__version__",
           "read_tracks", "Tracks", "Frame", "TrackError", "velocity_observations", "Observations",
           "fit", "save", "load", "FlowField"]


def __getattr__(name: str) -> Any:
    """Load a public name on first use and keep it (PEP 562)."""
    if name not in _LAZY:
        raise AttributeError(f"module 'driftwise' has no attribute {name!r}")
    module, attribute = _LAZY[name]
    value = getattr(importlib.import_module(module), attribute)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
