"""Velocity observations from fixes: finite differences at segment midpoints, with their noise model.

For consecutive fixes (t₀, x₀), (t₁, x₁) of one track, Δt = t₁ − t₀,

    position  x̄ = (x₀ + x₁)/2,      time  t̄ = (t₀ + t₁)/2,      velocity  y = (x₁ − x₀)/Δt.

If the particle moves as dx = u(x) dt + √(2K) dW (a random walk of eddy
diffusivity K about the flow; Einstein 1905, Ann. Phys. 17, 549, gives the
variance 2KΔt of each displacement component) and each fix carries
independent position noise of standard deviation σ_pos per component, then

    y = u(x̄) + ε,     Var ε = R_n = (2K/Δt + 2σ_pos²/Δt² + σ₀²) I

per component, σ₀² collecting the rest (unresolved velocity variance).  The
first term is ``random_walk_coefficient_s_inv · K``, the second
``position_noise_var_m2_s2``; keeping them apart lets a fit learn K from the
spread of velocities over different Δt.  Neighbouring observations of a track
share a fix, so their errors correlate (covariance −σ_pos²/(Δt_n Δt_{n+1}));
the diagonal R_n ignores that.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

# The fewest velocity observations a fit accepts.  A track of m fixes gives m − 1 observations.
# Counting argument (necessary, not sufficient): three observations in 2-D carry six velocity
# components, as many numbers as the default Helmholtz fit learns hyperparameters (two velocity
# scales, two length scales, K and σ₀); with fewer numbers than hyperparameters the data cannot
# determine them all.
MIN_FIT_OBSERVATIONS = 3


@dataclass(frozen=True, eq=False)
class Observations:
    """Finite-difference velocity observations (see the module docstring).

    Shapes: ``position_m`` (n, d) segment midpoints, ``velocity_m_s`` (n, d),
    ``dt_s`` (n,) segment durations, ``time_s`` (n,) midpoint times,
    ``track_index`` (n,) the index of the track in ``Tracks.unique_ids``;
    ``position_error_m`` σ_pos, the standard deviation of each fix per component.  A jax pytree
    (registered in :mod:`driftwise.gp.field`, so that reading tracks does not import jax).
    """

    position_m: np.ndarray
    velocity_m_s: np.ndarray
    dt_s: np.ndarray
    time_s: np.ndarray
    track_index: np.ndarray
    position_error_m: float

    @property
    def n(self) -> int:
        return int(self.dt_s.shape[0])

    @property
    def dim(self) -> int:
        return int(self.position_m.shape[1])

    @property
    def random_walk_coefficient_s_inv(self) -> np.ndarray:
        """(n,) 2/Δt in 1/s: multiplies the diffusivity K (m²/s) to give the random-walk variance (m²/s²)."""
        return 2.0 / self.dt_s

    @property
    def position_noise_var_m2_s2(self) -> np.ndarray:
        """(n,) 2σ_pos²/Δt² in m²/s²: the velocity variance per component caused by position error."""
        return 2.0 * self.position_error_m**2 / self.dt_s**2

    def noise_variance_m2_s2(self, diffusivity_m2_s: float, floor_m2_s2: float = 0.0) -> np.ndarray:
        """(n,) R_n per component: 2K/Δt + 2σ_pos²/Δt² + σ₀².

        K = ``diffusivity_m2_s`` (m²/s), σ₀² = ``floor_m2_s2`` (m²/s²).
        """
        return self.random_walk_coefficient_s_inv * diffusivity_m2_s + self.position_noise_var_m2_s2 + floor_m2_s2



def velocity_observations(tracks, *, position_error_m: float = 10.0) -> Observations:
    """Finite-difference velocities of consecutive fixes within each track of ``tracks`` (a Tracks).

    ``position_error_m`` is σ_pos (m), the standard deviation of one fix per
    component (10 m suits a consumer GPS, common practice).  Returns n = fixes −
    tracks observations.
    """
    if not (np.isfinite(position_error_m) and position_error_m >= 0):

        raise InputError(f"position error must be a finite number of metres ≥ 0, not {position_error_m!r}")
    index = tracks.track_index
    same = index[1:] == index[:-1]
    t, x = tracks.time_s, tracks.position_m
    dt = (t[1:] - t[:-1])[same]
    dx = (x[1:] - x[:-1])[same]
    return Observations(
        position_m=(0.5 * (x[1:] + x[:-1]))[same],
        velocity_m_s=dx / dt[:, None],
        dt_s=dt,
        time_s=(0.5 * (t[1:] + t[:-1]))[same],
        track_index=index[:-1][same],
        position_error_m=float(position_error_m),
    )
