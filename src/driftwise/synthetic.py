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
- :class:`DemoBay` — the invented Mirren Bay: a wind-driven gyre plus a river outflow.
- :class:`ABCFlow` — the 3-D Arnold–Beltrami–Childress flow (Dombre et al. 1986, J. Fluid
  Mech. 167, 353), ``velocity(xyz) -> (n, 3)``, ``vorticity(xyz) -> (n, 3)`` (= k u: Beltrami).

:func:`simulate_drifters` integrates dx = u(x) dt + √(2K) dW by Euler–Maruyama
(Kloeden & Platen 1992, Numerical Solution of Stochastic Differential
Equations, §9.1) in 2-D or 3-D and adds GPS noise to the fixes; :func:`random_walk` gives
exact Brownian tracks in 2-D or 3-D.  ``python -m driftwise.synthetic --out
demo_data`` regenerates the bundled demo files byte for byte.
"""

from __future__ import annotations

import argparse
import math
from dataclasses import dataclass
from pathlib import Path

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
class DemoBay:
    """Mirren Bay (invented): a clockwise wind-driven gyre plus the Aldous river's outflow.

    Metres in a local frame centred on the bay (x east, y north); the bay is
    about 20 km across, the harbour of Port Aldous sits at the river mouth in
    the south-east.  The gyre is divergence-free; the river is a curl-free
    source, so the surface flow diverges near the mouth.
    """

    gyre_peak_speed_m_s: float = -0.22
    gyre_radius_m: float = 5000.0
    gyre_center_m: tuple[float, float] = (-1000.0, 1500.0)
    river_peak_speed_m_s: float = 0.15
    river_width_m: float = 2500.0
    river_mouth_m: tuple[float, float] = (6000.0, -5500.0)

    @property
    def gyre(self) -> GaussianGyre:
        return GaussianGyre(self.gyre_peak_speed_m_s, self.gyre_radius_m, self.gyre_center_m)

    @property
    def river(self) -> PotentialSources:
        strength = self.river_peak_speed_m_s * self.river_width_m * _HALF_E
        return PotentialSources((self.river_mouth_m,), (strength,), self.river_width_m)

    def velocity(self, xy) -> np.ndarray:
        return self.gyre.velocity(xy) + self.river.velocity(xy)

    def divergence(self, xy) -> np.ndarray:
        return self.river.divergence(xy)

    def vorticity(self, xy) -> np.ndarray:
        return self.gyre.vorticity(xy)


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

    Between fixes dx = u(x) dt + √(2K) dW is stepped by Euler–Maruyama with
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
        for _ in range(substeps):
            noise = np.sqrt(2 * diffusivity_m2_s * h)[:, None] * rng.standard_normal((k, dim))
            x = x + field.velocity(x) * h[:, None] + noise
        path[:, j] = x
    fixes = path + position_error_m * rng.standard_normal(path.shape)
    width = max(3, len(str(k)))
    table = pd.DataFrame({"track_id": np.repeat([f"{track_prefix}{i + 1:0{width}d}" for i in range(k)], m),
                          "time_s": times.reshape(-1)}
                         | {f"{axis}_m": fixes[..., i].reshape(-1) for i, axis in enumerate("xyz"[:dim])})
    if frame is not None:
        table["lon"], table["lat"] = frame.to_lonlat(fixes[..., :2].reshape(-1, 2))
    return table


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


# ---------------------------------------------------------------- the demo
@dataclass(frozen=True)
class DemoScenario:
    """The bundled demo campaign in Mirren Bay (every number here is invented)."""

    bay: DemoBay = DemoBay()
    lon0_deg: float = -9.0
    lat0_deg: float = 44.0
    n_releases: int = 70
    # release i (0-based) is held out when i % 7 is 2, 4 or 6: 30 held-out and 40 fit tracks.
    # Thirty held-out tracks, not ten: starts on one track share their future, so a 95 %
    # coverage measured on ten tracks has a standard error near 0.05 (skill.clustered_coverage_se).
    holdout_modulus: int = 7
    holdout_residues: tuple[int, ...] = (2, 4, 6)
    release_radius_m: float = 8500.0
    release_window_s: float = 12 * 3600.0
    duration_s: float = 3 * 86400.0
    fix_interval_s: float = 3600.0
    time_jitter_s: float = 90.0
    diffusivity_m2_s: float = 5.0
    position_error_m: float = 10.0
    substeps: int = 12
    campaign_start: str = "2024-06-03T06:00:00Z"
    seed: int = 20240603

    def releases_m(self) -> np.ndarray:
        """(n, 2) release points filling the bay's interior: a sunflower spiral (Vogel 1979, Math. Biosci. 44)."""
        i = np.arange(self.n_releases)
        r = self.release_radius_m * np.sqrt((i + 0.5) / self.n_releases)
        theta = i * math.pi * (3 - math.sqrt(5))
        return np.stack([r * np.cos(theta), r * np.sin(theta)], axis=-1)


def demo_tables(scenario: DemoScenario = DemoScenario()) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(fit, holdout) tables with columns track_id, time (ISO-8601 UTC), lon, lat."""
    from .frame import Frame

    rng = np.random.default_rng(scenario.seed)
    start = pd.Timestamp(scenario.campaign_start).timestamp()
    offsets = 60.0 * np.round(rng.uniform(0, scenario.release_window_s, scenario.n_releases) / 60.0)
    table = simulate_drifters(
        scenario.bay, scenario.releases_m(), duration_s=scenario.duration_s, fix_interval_s=scenario.fix_interval_s,
        diffusivity_m2_s=scenario.diffusivity_m2_s, position_error_m=scenario.position_error_m,
        seed=scenario.seed + 1, substeps=scenario.substeps, start_times_s=start + offsets,
        time_jitter_s=scenario.time_jitter_s, frame=Frame("lonlat", scenario.lon0_deg, scenario.lat0_deg),
        track_prefix="MB-")
    out = pd.DataFrame({
        "track_id": table["track_id"],
        "time": pd.to_datetime(table["time_s"], unit="s", utc=True).dt.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "lon": table["lon"].map("{:.6f}".format), "lat": table["lat"].map("{:.6f}".format)})
    number = out["track_id"].str.slice(3).astype(int) - 1
    held = (number % scenario.holdout_modulus).isin(scenario.holdout_residues).to_numpy()
    return out.loc[~held].reset_index(drop=True), out.loc[held].reset_index(drop=True)


def write_demo_data(out_dir, scenario: DemoScenario = DemoScenario()) -> list[Path]:
    """Write bay_fit.csv, bay_holdout.csv and README.md into ``out_dir`` (atomically); return the paths."""
    from .io import atomic_write, atomic_write_text

    out = Path(out_dir)
    fit, holdout = demo_tables(scenario)
    paths = []
    for name, table in (("bay_fit.csv", fit), ("bay_holdout.csv", holdout)):
        paths.append(atomic_write(out / name, lambda tmp, t=table: t.to_csv(tmp, index=False, lineterminator="\n")))
    paths.append(atomic_write_text(out / "README.md", _demo_readme(scenario, fit, holdout)))
    return paths


def _demo_readme(s: DemoScenario, fit: pd.DataFrame, holdout: pd.DataFrame) -> str:
    bay = s.bay
    return f"""# Demo data: Mirren Bay (invented)

Everything here is **invented**: Mirren Bay, the harbour of Port Aldous and the Aldous river do not exist,
and no instrument recorded these fixes. They are simulated drifters for trying driftwise out.

- `bay_fit.csv` — {fit.track_id.nunique()} tracks, {len(fit)} fixes (fit the flow with these).
- `bay_holdout.csv` — {holdout.track_id.nunique()} other tracks, {len(holdout)} fixes (score forecasts on these).

Columns: `track_id`, `time` (ISO-8601, UTC), `lon`, `lat` (degrees, WGS 84). The bay is placed at sea
around {abs(s.lat0_deg):g}°{"N" if s.lat0_deg >= 0 else "S"} {abs(s.lon0_deg):g}°{"W" if s.lon0_deg < 0 else "E"}; the true flow below is written in metres of the
azimuthal-equidistant frame centred there (x east, y north), `driftwise.Frame("lonlat", {s.lon0_deg:g}, {s.lat0_deg:g})`.
`read_tracks` centres its own frame on the data, so compare positions through lon/lat.

## True parameters
- Flow (steady): `driftwise.synthetic.DemoBay()` =
  - a wind-driven gyre, divergence-free, Gaussian streamfunction: peak speed {abs(bay.gyre_peak_speed_m_s):g} m/s
    ({"clockwise" if bay.gyre_peak_speed_m_s < 0 else "counter-clockwise"}) at {bay.gyre_radius_m:g} m from its centre ({bay.gyre_center_m[0]:g} m, {bay.gyre_center_m[1]:g} m);
  - the Aldous river outflow at Port Aldous, curl-free Gaussian source: peak speed {bay.river_peak_speed_m_s:g} m/s
    at {bay.river_width_m:g} m from the mouth ({bay.river_mouth_m[0]:g} m, {bay.river_mouth_m[1]:g} m) — divergent near the mouth.
- Eddy diffusivity K = {s.diffusivity_m2_s:g} m²/s; GPS position error {s.position_error_m:g} m (standard deviation per component).
- {s.n_releases} releases on a sunflower spiral within {s.release_radius_m:g} m of the bay centre, at random minutes in
  the first {s.release_window_s / 3600:g} h after {s.campaign_start}; fixes every {s.fix_interval_s:g} s
  (± up to {s.time_jitter_s:g} s) for {s.duration_s / 86400:g} days; release i (from 0) is held out when i mod {s.holdout_modulus} is in {set(s.holdout_residues)}.
- Euler–Maruyama with {s.substeps} steps per fix interval; seed {s.seed}.

## Regenerate
    python -m driftwise.synthetic --out demo_data
gives these files byte for byte.
"""


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m driftwise.synthetic",
                                     description="Regenerate the invented Mirren Bay demo data.")
    parser.add_argument("--out", default="demo_data", help="folder to write into (default demo_data)")
    args = parser.parse_args(argv)
    for path in write_demo_data(args.out):
        print(path)
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
