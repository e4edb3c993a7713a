"""Invented flows and drifters for tests and the demo (numpy only, deterministic seeds).

Analytic steady 2-D velocity fields, each a small frozen dataclass with
``velocity(xy) -> (n, 2)`` m/s, ``divergence(xy) -> (n,)`` and
``vorticity(xy) -> (n,)`` in 1/s (ω = ∂v/∂x − ∂u/∂y), for ``xy`` of shape
(n, 2) in metres:

- :class:`UniformFlow` — constant velocity.
- :class:`LambOseenVortex` — u_θ = Γ/(2πr) (1 − exp(−r²/r_c²)) (Oseen 1912,
  Ark. Mat. Astron. Fys. 7; Lamb 1932, Hydrodynamics, 6th ed., §334a).
- :class:`TaylorGreen` — the steady cell flow u = U sin kx cos ky,
  v = −U cos kx sin ky (Taylor & Green 1937, Proc. R. Soc. A 158, 499).
- :class:`GaussianGyre` — divergence-free eddy with a Gaussian streamfunction.
- :class:`PotentialSources` — curl-free v = ∇φ, φ a sum of Gaussian bumps.
- :class:`Mixture` — (1 − w)·a + w·b of two fields.
- :class:`LinearFlow` — u = U + G (x − x₀): uniform, divergence, rotation and strain
  (the linear fit to drifter clusters of Molinari & Kirwan 1975, J. Phys. Oceanogr. 5).
- :class:`PulsingGyre` — a :class:`GaussianGyre` whose strength follows a + b cos ω t (a tidal gyre; it
  reverses for part of each cycle when |b| > |a|), ``velocity_at(xy, t_s)``: time-dependent.
- :class:`ABCFlow` — the 3-D Arnold–Beltrami–Childress flow (Dombre et al. 1986, J. Fluid
  Mech. 167, 353), ``velocity(xyz) -> (n, 3)``, ``vorticity(xyz) -> (n, 3)`` (= k u: Beltrami).

:func:`simulate_drifters` integrates dx = u(x) dt + √(2K) dW by Euler–Maruyama
(Kloeden & Platen 1992, Numerical Solution of Stochastic Differential
Equations, §9.1) in 2-D or 3-D and adds GPS noise to the fixes; :func:`random_walk` gives
exact Brownian tracks in 2-D or 3-D; :func:`in_periodic_box` folds tracks in a periodic flow
back into one period box, cutting each where it crosses a face.  The invented demo bay built from these
pieces is :mod:`driftwise.app.bay`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

_HALF_E = math.exp(0.5)


def _xy(xy) -> np.ndarray:
    xy = np.asarray(xy, dtype=np.float64)
    if xy.shape[-1] != 2:
        raise ValueError(f"positions must have shape (n, 2), got {xy.shape}")
    return xy


@dataclass(frozen=True)
class UniformFlow:
    """u = ``velocity_m_s`` everywhere."""

    velocity_m_s: tuple[float, float]

    def velocity(self, xy) -> np.ndarray:
        return np.broadcast_to(np.asarray(self.velocity_m_s, float), _xy(xy).shape).copy()

    def divergence(self, xy) -> np.ndarray:
        return np.zeros(_xy(xy).shape[:-1])

    def vorticity(self, xy) -> np.ndarray:
        return np.zeros(_xy(xy).shape[:-1])


@dataclass(frozen=True)
class LambOseenVortex:
    """Lamb–Oseen vortex: u_θ(r) = Γ/(2πr)(1 − e^{−r²/r_c²}), ω = Γ/(π r_c²) e^{−r²/r_c²}, ∇·u = 0.

    ``circulation_m2_s`` Γ (positive: counter-clockwise), ``core_radius_m`` r_c,
    ``center_m`` the axis.  The far field is the point vortex Γ/(2πr).
    """

    circulation_m2_s: float
    core_radius_m: float
    center_m: tuple[float, float] = (0.0, 0.0)

    def velocity(self, xy) -> np.ndarray:
        d = _xy(xy) - np.asarray(self.center_m)
        s = np.sum(d * d, axis=-1) / self.core_radius_m**2
        # u_θ / r = Γ/(2π r_c²) · (1 − e^{−s})/s, finite at s = 0
        ratio = np.where(s > 1e-12, -np.expm1(-s) / np.where(s > 1e-12, s, 1.0), 1.0 - 0.5 * s)
        omega = self.circulation_m2_s / (2 * math.pi * self.core_radius_m**2) * ratio
        return np.stack([-omega * d[..., 1], omega * d[..., 0]], axis=-1)

    def divergence(self, xy) -> np.ndarray:
        return np.zeros(_xy(xy).shape[:-1])

    def vorticity(self, xy) -> np.ndarray:
        d = _xy(xy) - np.asarray(self.center_m)
        s = np.sum(d * d, axis=-1) / self.core_radius_m**2
        return self.circulation_m2_s / (math.pi * self.core_radius_m**2) * np.exp(-s)


@dataclass(frozen=True)
class TaylorGreen:
    """Steady Taylor–Green cells: u = U sin kx cos ky, v = −U cos kx sin ky, k = π/L.

    ``velocity_scale_m_s`` U, ``length_scale_m`` L, the side of one square cell.
    ∇·u = 0 and ω = 2Uk sin kx sin ky.
    """

    velocity_scale_m_s: float
    length_scale_m: float

    def velocity(self, xy) -> np.ndarray:
        kx, ky = np.moveaxis(math.pi / self.length_scale_m * _xy(xy), -1, 0)
        u = self.velocity_scale_m_s
        return np.stack([u * np.sin(kx) * np.cos(ky), -u * np.cos(kx) * np.sin(ky)], axis=-1)

    def divergence(self, xy) -> np.ndarray:
        return np.zeros(_xy(xy).shape[:-1])

    def vorticity(self, xy) -> np.ndarray:
        k = math.pi / self.length_scale_m
        kx, ky = np.moveaxis(k * _xy(xy), -1, 0)
        return 2 * self.velocity_scale_m_s * k * np.sin(kx) * np.sin(ky)


@dataclass(frozen=True)
class GaussianGyre:
    """Divergence-free eddy from ψ = Ψ₀ e^{−r²/2R²}, u = (∂ψ/∂y, −∂ψ/∂x), Ψ₀ = V R e^{1/2}.

    ``peak_speed_m_s`` V is reached at r = ``radius_m`` R; V > 0 turns
    counter-clockwise.  ω = −∇²ψ = (V e^{1/2}/R)(2 − r²/R²) e^{−r²/2R²}.
    """

    peak_speed_m_s: float
    radius_m: float
    center_m: tuple[float, float] = (0.0, 0.0)

    def _parts(self, xy):
        d = _xy(xy) - np.asarray(self.center_m)
        q = np.sum(d * d, axis=-1) / self.radius_m**2
        return d, q, self.peak_speed_m_s * _HALF_E / self.radius_m * np.exp(-0.5 * q)

    def velocity(self, xy) -> np.ndarray:
        d, _, g = self._parts(xy)
        return np.stack([-g * d[..., 1], g * d[..., 0]], axis=-1)

    def divergence(self, xy) -> np.ndarray:
        return np.zeros(_xy(xy).shape[:-1])

    def vorticity(self, xy) -> np.ndarray:
        _, q, g = self._parts(xy)
        return g * (2.0 - q)


@dataclass(frozen=True)
class PotentialSources:
    """Curl-free flow u = ∇φ, φ(x) = −Σᵢ qᵢ exp(−|x − pᵢ|²/2w²).

    ``positions_m`` (m, 2) the centres pᵢ, ``strengths_m2_s`` (m,) qᵢ (positive: a
    source, flow outwards; peak speed qᵢ e^{−1/2}/w at distance w), ``width_m`` w.
    ∇·u = ∇²φ = Σ qᵢ/w² (2 − r²/w²) e^{−r²/2w²}, ω = 0.
    """

    positions_m: tuple[tuple[float, float], ...]
    strengths_m2_s: tuple[float, ...]
    width_m: float

    def _each(self, xy):
        d = _xy(xy)[..., None, :] - np.asarray(self.positions_m, dtype=np.float64)
        q = np.sum(d * d, axis=-1) / self.width_m**2
        return d, q, np.asarray(self.strengths_m2_s, dtype=np.float64) / self.width_m**2 * np.exp(-0.5 * q)

    def velocity(self, xy) -> np.ndarray:
        d, _, g = self._each(xy)
        return np.sum(g[..., None] * d, axis=-2)

    def divergence(self, xy) -> np.ndarray:
        _, q, g = self._each(xy)
        return np.sum(g * (2.0 - q), axis=-1)

    def vorticity(self, xy) -> np.ndarray:
        return np.zeros(_xy(xy).shape[:-1])


@dataclass(frozen=True)
class Mixture:
    """(1 − ``weight_b``)·a + ``weight_b``·b, e.g. a 70/30 blend of a divergent and a rotational flow."""

    a: object
    b: object
    weight_b: float

    def velocity(self, xy) -> np.ndarray:
        return (1 - self.weight_b) * self.a.velocity(xy) + self.weight_b * self.b.velocity(xy)

    def divergence(self, xy) -> np.ndarray:
        return (1 - self.weight_b) * self.a.divergence(xy) + self.weight_b * self.b.divergence(xy)

    def vorticity(self, xy) -> np.ndarray:
        return (1 - self.weight_b) * self.a.vorticity(xy) + self.weight_b * self.b.vorticity(xy)


@dataclass(frozen=True)
class LinearFlow:
    """u = U + G (x − x₀) with G = ½ [[δ + n, s − ω], [s + ω, δ − n]] (Molinari & Kirwan 1975).

    ``divergence_per_s`` δ = u_x + v_y, ``vorticity_per_s`` ω = v_x − u_y, ``normal_strain_per_s``
    n = u_x − v_y, ``shear_strain_per_s`` s = v_x + u_y; ``velocity_m_s`` U at ``center_m`` x₀.
    """

    divergence_per_s: float = 0.0
    vorticity_per_s: float = 0.0
    normal_strain_per_s: float = 0.0
    shear_strain_per_s: float = 0.0
    velocity_m_s: tuple[float, float] = (0.0, 0.0)
    center_m: tuple[float, float] = (0.0, 0.0)

    @property
    def gradient_per_s(self) -> np.ndarray:
        """G = ∂u_i/∂x_j (2, 2) in 1/s."""
        d, w, n, s = self.divergence_per_s, self.vorticity_per_s, self.normal_strain_per_s, self.shear_strain_per_s
        return 0.5 * np.array([[d + n, s - w], [s + w, d - n]])

    def velocity(self, xy) -> np.ndarray:
        return np.asarray(self.velocity_m_s, float) + (_xy(xy) - np.asarray(self.center_m)) @ self.gradient_per_s.T

    def divergence(self, xy) -> np.ndarray:
        return np.full(_xy(xy).shape[:-1], float(self.divergence_per_s))

    def vorticity(self, xy) -> np.ndarray:
        return np.full(_xy(xy).shape[:-1], float(self.vorticity_per_s))


@dataclass(frozen=True)
class PulsingGyre:
    """v(x, t) = (a + b cos ω t) u_g(x), u_g a :class:`GaussianGyre`: steady part a u_g, a harmonic of
    amplitude fields (b u_g, 0) in phase with cos ω t (t in s on the tracks' time axis); divergence-free.

    ``steady_factor`` a, ``harmonic_factor`` b, ``omega_rad_s`` ω.
    """

    gyre: GaussianGyre
    steady_factor: float
    harmonic_factor: float
    omega_rad_s: float

    def strength(self, t_s) -> np.ndarray:
        """a + b cos ω t."""
        return self.steady_factor + self.harmonic_factor * np.cos(self.omega_rad_s * np.asarray(t_s, float))

    def velocity_at(self, xy, t_s) -> np.ndarray:
        """(n, 2) m/s at positions (n, 2) m and times (n,) or scalar s."""
        factor = np.broadcast_to(self.strength(t_s), _xy(xy).shape[:-1])
        return factor[..., None] * self.gyre.velocity(xy)

    def divergence(self, xy) -> np.ndarray:
        return np.zeros(_xy(xy).shape[:-1])


def _velocity(field, x: np.ndarray, t_s: np.ndarray) -> np.ndarray:
    """u(x, t) of a time-dependent field (``velocity_at``), else the steady u(x)."""
    return field.velocity_at(x, t_s) if hasattr(field, "velocity_at") else field.velocity(x)


@dataclass(frozen=True)
class ABCFlow:
    """Arnold–Beltrami–Childress flow in a box of side L (Dombre et al. 1986, J. Fluid Mech. 167, 353):

        u = U (A sin kz + C cos ky,  B sin kx + A cos kz,  C sin ky + B cos kx),   k = 2π/L,

    steady, divergence-free and Beltrami (∇ × u = k u); chaotic streamlines for A = √3, B = √2,
    C = 1 (Dombre et al.'s standard case).  ``xyz`` (n, 3) m → (n, 3) m/s.
    """

    speed_m_s: float = 1.0
    box_m: float = 2.0 * math.pi
    a: float = math.sqrt(3.0)
    b: float = math.sqrt(2.0)
    c: float = 1.0

    def velocity(self, xyz) -> np.ndarray:
        p = np.asarray(xyz, dtype=np.float64) * (2.0 * math.pi / self.box_m)
        x, y, z = p[..., 0], p[..., 1], p[..., 2]
        u = np.stack([self.a * np.sin(z) + self.c * np.cos(y), self.b * np.sin(x) + self.a * np.cos(z),
                      self.c * np.sin(y) + self.b * np.cos(x)], axis=-1)
        return self.speed_m_s * u

    def divergence(self, xyz) -> np.ndarray:
        return np.zeros(np.asarray(xyz).shape[:-1])

    def vorticity(self, xyz) -> np.ndarray:
        """∇ × u = k u (1/s × m/s per component), (n, 3)."""
        return (2.0 * math.pi / self.box_m) * self.velocity(xyz)


# ---------------------------------------------------------------- drifters
def simulate_drifters(field, starts_m, *, duration_s: float, fix_interval_s: float, diffusivity_m2_s: float,
                      position_error_m: float, seed: int, substeps: int = 10, start_times_s=0.0,
                      time_jitter_s: float = 0.0, frame=None, track_prefix: str = "D") -> pd.DataFrame:
    """Drifters released at ``starts_m`` (k, d), d = 2 or 3, in ``field``; one row per fix.

    Between fixes dx = u(x, t) dt + √(2K) dW (u(x) for a steady field) is stepped by Euler–Maruyama with
    ``substeps`` equal steps (Kloeden & Platen 1992, eq. 9.1.1; strong order ½,
    order 1 when K = 0).  Fix j of a track is at start + j·``fix_interval_s``
    plus whole-second jitter uniform in ±``time_jitter_s`` (j ≥ 1; keep it below
    half the interval).  Each fix gets independent Gaussian error of
    ``position_error_m`` per component.  ``start_times_s``: scalar or (k,).
    Columns: track_id, time_s, x_m, y_m (z_m in 3-D), and lon, lat when a lon/lat ``frame`` is given.
    """
    rng = np.random.default_rng(seed)
    starts = np.array(starts_m, dtype=np.float64)
    dim = starts.shape[-1] if starts.ndim == 2 else 2
    x = starts.reshape(-1, dim)
    k, m = x.shape[0], int(math.floor(duration_s / fix_interval_s + 1e-9)) + 1
    jitter = np.rint(rng.uniform(-time_jitter_s, time_jitter_s, (k, m))) if time_jitter_s > 0 else np.zeros((k, m))
    jitter[:, 0] = 0.0
    times = np.broadcast_to(np.asarray(start_times_s, float), (k,))[:, None] + fix_interval_s * np.arange(m) + jitter
    path = np.empty((k, m, dim))
    path[:, 0] = x
    for j in range(1, m):
        h = (times[:, j] - times[:, j - 1]) / substeps
        for i in range(substeps):
            noise = np.sqrt(2 * diffusivity_m2_s * h)[:, None] * rng.standard_normal((k, dim))
            x = x + _velocity(field, x, times[:, j - 1] + i * h) * h[:, None] + noise
        path[:, j] = x
    fixes = path + position_error_m * rng.standard_normal(path.shape)
    width = max(3, len(str(k)))
    table = pd.DataFrame({"track_id": np.repeat([f"{track_prefix}{i + 1:0{width}d}" for i in range(k)], m),
                          "time_s": times.reshape(-1)}
                         | {f"{axis}_m": fixes[..., i].reshape(-1) for i, axis in enumerate("xyz"[:dim])})
    if frame is not None:
        table["lon"], table["lat"] = frame.to_lonlat(fixes[..., :2].reshape(-1, 2))
    return table


def in_periodic_box(table: pd.DataFrame, box_m: float, *, min_fixes: int = 6) -> pd.DataFrame:
    """The fixes of ``table`` folded into one period box [0, ``box_m``)^d of a periodic flow: every position
    modulo ``box_m``, and a track cut into pieces wherever a fix lies in another period cell than the one
    before (a particle that leaves through one face of a periodic tank enters through the opposite one; a
    tracker sees a new particle).  Pieces get ids ``<track_id>.<k>`` (k counts pieces over the table); pieces with fewer than ``min_fixes``
    fixes are dropped.  Row order and the other columns are kept."""
    axes = [c for c in ("x_m", "y_m", "z_m") if c in table.columns]
    cell = np.floor(table[axes].to_numpy() / box_m).astype(np.int64)
    ids = table["track_id"].to_numpy()
    new_piece = np.ones(len(table), bool)
    new_piece[1:] = (ids[1:] != ids[:-1]) | np.any(cell[1:] != cell[:-1], axis=1)
    piece = np.cumsum(new_piece) - 1
    folded = table.copy()
    folded[axes] = table[axes].to_numpy() - cell * box_m
    folded["track_id"] = [f"{t}.{k}" for t, k in zip(ids, piece)]
    size = np.bincount(piece)
    return folded[size[piece] >= min_fixes].reset_index(drop=True)


def random_walk(n_tracks: int, n_fixes: int, *, fix_interval_s: float, diffusivity_m2_s: float, seed: int,
                dim: int = 2, position_error_m: float = 0.0, drift_m_s=None) -> pd.DataFrame:
    """Exact Brownian tracks: each step adds drift·Δt + N(0, 2KΔt) per component (Einstein 1905).

    Columns track_id, time_s, x_m, y_m (and z_m when ``dim`` = 3); fixes carry
    N(0, ``position_error_m``²) noise per component; all tracks start at the origin at t = 0.
    """
    rng = np.random.default_rng(seed)
    drift = np.zeros(dim) if drift_m_s is None else np.asarray(drift_m_s, float)
    steps = drift * fix_interval_s + math.sqrt(2 * diffusivity_m2_s * fix_interval_s) * \
        rng.standard_normal((n_tracks, n_fixes - 1, dim))
    path = np.concatenate([np.zeros((n_tracks, 1, dim)), np.cumsum(steps, axis=1)], axis=1)
    path += position_error_m * rng.standard_normal(path.shape)
    table = {"track_id": np.repeat([f"W{i + 1:05d}" for i in range(n_tracks)], n_fixes),
             "time_s": np.tile(fix_interval_s * np.arange(n_fixes, dtype=float), n_tracks)}
    for i, axis in enumerate("xyz"[:dim]):
        table[f"{axis}_m"] = path[..., i].reshape(-1)
    return pd.DataFrame(table)
