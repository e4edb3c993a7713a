"""The demo's tide: what the fit made of Mirren Bay's M2 tide, set against the generator's truth.

* **ellipses** — the fitted constituent's amplitude fields (a_c, b_c) and their joint posterior at points on a
  grid over the data (``FlowField.harmonic_posterior``), turned into tidal current ellipses with posterior s.d.
  (:func:`driftwise.diagnostics.tidalellipse.tidal_ellipses`), drawn as a map and tabulated beside the ellipses of
  the generator's own amplitude fields (``app.bay.DemoBay.tide_amplitudes``);
* **phases** — the posterior mean flow at four phases of the constituent (ω t = 0°, 90°, 180°, 270° on the data's
  clock, in the cycle nearest the middle of the data), one panel each on shared scales;
* **residual spectrum** — the steady fit that ``--temporal auto`` tested before choosing the tide (the fit step's
  ``TemporalDecision.steady_field``) and the tidal fit, each as the variance one harmonic explains in its residual velocities against period
  (:func:`driftwise.data.residualspectrum.residual_periodogram`): the steady fit leaves the tide's peak, the
  tidal fit should not.
"""

from __future__ import annotations

import math
from typing import Any

import jax.numpy as jnp
import numpy as np

from ..data.frame import Frame
from ..data.observations import velocity_observations
from ..data.residualspectrum import residual_periodogram
from ..data.utctime import iso_utc
from ..diagnostics.grid import field_extent_m
from ..diagnostics.tidalellipse import tidal_ellipses
from ..products.plotphases import plot_field_phases
from ..products.plottide import plot_residual_spectrum, plot_tidal_ellipses
from ..units import format_duration
from .bay import DemoScenario
from .job import Job, Unavailable, fitted_field
from .scenarios import HOUR_S, sites_in_frame

PHASES_DEG = (0.0, 90.0, 180.0, 270.0)
NEAR_DATA_M = 1500.0          # ellipses and phase maps are shown only this close to an observation
_PARAMETERS = ("semi_major_m_s", "semi_minor_m_s", "inclination_deg", "phase_deg")


def true_amplitudes(frame: Any, centres_m: np.ndarray) -> np.ndarray:
    """The generator's tide (a_u, a_v, b_u, b_v) m/s at ``centres_m`` (n, 2) of the model's frame, as vectors on
    the model frame's axes: positions and directions moved from the generator's frame through lon/lat (the
    Jacobian of the map between the two frames by 1 m differences)."""
    scenario = DemoScenario()
    centres_m = np.asarray(centres_m, float).reshape(-1, 2)
    if getattr(frame, "kind", "metric") == "lonlat":
        generator = Frame("lonlat", scenario.lon0_deg, scenario.lat0_deg)
        gen = generator.from_lonlat(*frame.to_lonlat(centres_m))
    else:
        gen = centres_m
    a, b = scenario.bay.tide_amplitudes(gen)
    base = sites_in_frame(frame, gen)
    jac = np.stack([sites_in_frame(frame, gen + np.eye(2)[k]) - base for k in range(2)], axis=-1)  # (n, 2, 2)
    return np.concatenate([np.einsum("nij,nj->ni", jac, a), np.einsum("nij,nj->ni", jac, b)], axis=-1)


def ellipse_centres(field: Any, across: int) -> np.ndarray:
    """(n, 2) m: a square grid of ``across`` points along the longer side of the data's extent, kept within
    :data:`NEAR_DATA_M` of an observation."""
    lo, hi = field_extent_m(field)
    step = float(np.max(hi - lo)) / max(across - 1, 1)
    axes = [lo[k] + 0.5 * ((hi[k] - lo[k]) % step) + step * np.arange(int((hi[k] - lo[k]) // step) + 1)
            for k in range(2)]
    gx, gy = np.meshgrid(*axes)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    return points[field.distance_to_data_m(points) <= NEAR_DATA_M]


def harmonic_amplitudes(field: Any, constituent: str, centres_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Posterior mean (n, 4) m/s and covariance (n, 4, 4) m²/s² of (a_u, a_v, b_u, b_v) at ``centres_m``."""
    pairs = [field.harmonic_posterior(jnp.asarray(x), constituent) for x in centres_m]
    return np.stack([np.asarray(m) for m, _ in pairs]), np.stack([np.asarray(c) for _, c in pairs])


def compare_ellipses(fitted: Any, truth: Any) -> dict:
    """Fit against truth per parameter: median and largest absolute difference (angles wrapped: inclination
    modulo 180°, phase modulo 360°), and the rms of the true semi-major axis for scale."""
    out = {}
    for name in _PARAMETERS:
        diff = np.asarray(getattr(fitted, name)) - np.asarray(getattr(truth, name))
        if name.endswith("_deg"):
            turn = 180.0 if name.startswith("inclination") else 360.0
            diff = (diff + 0.5 * turn) % turn - 0.5 * turn
        key = name.replace("_m_s", "").replace("_deg", "")
        unit = "_deg" if name.endswith("_deg") else "_m_s"
        out[f"median_abs_error_{key}{unit}"] = float(np.median(np.abs(diff)))
        out[f"max_abs_error_{key}{unit}"] = float(np.max(np.abs(diff)))
    out["rms_true_semi_major_m_s"] = float(np.sqrt(np.mean(np.asarray(truth.semi_major_m_s) ** 2)))
    return out


def ellipse_table(constituent: str, centres_m: np.ndarray, fitted: Any, truth: Any, comparison: dict,
                  rows: int = 8) -> dict:
    """The report's table: fitted ellipses (± posterior s.d.) beside the truth at up to ``rows`` points."""
    pick = np.unique(np.linspace(0, len(centres_m) - 1, min(rows, len(centres_m))).round().astype(int))
    body = []
    for i in pick:
        body.append([f"({centres_m[i, 0] / 1000:.1f}, {centres_m[i, 1] / 1000:.1f})"]
                    + [f"{getattr(fitted, p)[i]:.3f} ± {getattr(fitted, p.replace('_m_s', '_sd_m_s'))[i]:.3f} "
                       f"/ {getattr(truth, p)[i]:.3f}" for p in _PARAMETERS[:2]]
                    + [f"{getattr(fitted, p)[i]:.0f} ± {getattr(fitted, p.replace('_deg', '_sd_deg'))[i]:.0f} "
                       f"/ {getattr(truth, p)[i]:.0f}" for p in _PARAMETERS[2:]])
    c = comparison
    return {"name": f"{constituent} tidal current ellipses: the fit against the generator's truth",
            "description": f"At {len(centres_m)} points of a grid over the data (within "
                           f"{NEAR_DATA_M / 1000:g} km of an observation); {len(pick)} of them below. Each cell: "
                           "fitted ± posterior s.d. / true.",
            "method": "posterior of the amplitude fields (a, b) of the fitted harmonic part; ellipse parameters "
                      "from the rotary components (Gonella 1972; Prandle 1982), s.d. by the delta method",
            "columns": ["point (x, y) km, model frame", "semi-major (m/s)", "semi-minor (m/s; < 0 clockwise)",
                        "inclination (° from x, counter-clockwise)", "phase (° after t = 0)"],
            "rows": body, "comparison": c,
            "notes": [(f"Over all {len(centres_m)} points, median |fit − truth|: semi-major "
                       f"{c['median_abs_error_semi_major_m_s']:.3f} m/s, semi-minor "
                       f"{c['median_abs_error_semi_minor_m_s']:.3f} m/s (the true semi-major axis has rms "
                       f"{c['rms_true_semi_major_m_s']:.3f} m/s), inclination "
                       f"{c['median_abs_error_inclination_deg']:.1f}°, phase {c['median_abs_error_phase_deg']:.1f}°."),
                      ("Directions are on the axes of the model's local frame (azimuthal equidistant about the "
                       "data's centre); the phase is that of cos ωt with t in seconds since 1970-01-01T00:00Z.")]}


def phase_times_s(constituent_omega_rad_s: float, time_s: np.ndarray) -> np.ndarray:
    """The four times (s) at which ωt ≡ 0°, 90°, 180°, 270° (mod 360°) in the cycle starting nearest before the
    median of ``time_s``."""
    middle = float(np.median(time_s))
    start = middle - math.fmod(constituent_omega_rad_s * middle, 2.0 * math.pi) / constituent_omega_rad_s
    return start + np.radians(PHASES_DEG) / constituent_omega_rad_s


def phase_fields(field: Any, times_s: np.ndarray, cells_across: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(x_m, y_m, means (k, ny, nx, 2) m/s) over the data's extent at each time; NaN away from the data."""
    lo, hi = field_extent_m(field)
    step = float(np.max(hi - lo)) / max(cells_across - 1, 1)
    x = np.arange(lo[0], hi[0] + 0.5 * step, step)
    y = np.arange(lo[1], hi[1] + 0.5 * step, step)
    gx, gy = np.meshgrid(x, y)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    far = field.distance_to_data_m(points) > NEAR_DATA_M
    means = []
    for t in times_s:
        mean, _ = field.predict(points, np.full(points.shape[0], t))
        mean[far] = np.nan
        means.append(mean.reshape(y.size, x.size, 2))
    return x, y, np.stack(means)


def residual_spectra(steady: Any, tidal: Any, tracks: Any, periods_s: np.ndarray, position_error_m: float):
    """The residual periodograms (before, after) of the steady and the time-varying fit on the fit tracks."""
    obs = velocity_observations(tracks, position_error_m=position_error_m)
    out = []
    for model in (steady, tidal):
        mean, _ = model.predict(obs.position_m, obs.time_s)          # a steady model ignores the times
        out.append(residual_periodogram(obs.velocity_m_s - mean, obs.time_s, obs.track_index, periods_s))
    return tuple(out)


def spectrum_table(constituent: str, period_s: float, before: Any, after: Any) -> dict:
    """The report's table: residual variance and the variance a harmonic at the constituent's period explains."""
    k = int(np.argmin(np.abs(before.periods_s - period_s)))
    rows = [[name, p.residual_variance_m2_s2, float(p.variance_m2_s2[k]), float(p.threshold_m2_s2[k]),
             100.0 * float(p.variance_m2_s2[k]) / p.residual_variance_m2_s2]
            for name, p in (("steady fit", before), ("tidal fit", after))]
    return {"name": f"Residual spectrum at {constituent}: before and after modelling the tide",
            "description": f"Residual velocities of the fit tracks under a steady fit and under the fit with "
                           f"{constituent}; a per-track least-squares harmonic at the period "
                           f"({format_duration(period_s)}) and the variance it explains.",
            "method": "pooled floating-mean least-squares periodogram (Lomb 1976; Scargle 1982), threshold of "
                      "its F-test at one period under white noise, p = 0.01",
            "columns": ["fit", "residual variance (m²/s²)", f"explained at {constituent} (m²/s²)",
                        "1 % threshold (m²/s²)", "share of the residual variance (%)"],
            "rows": rows, "spectrum": {"before": before.to_dict(), "after": after.to_dict()}, "notes": []}


def step_tide(job: Job) -> str:
    field, s = fitted_field(job), job.settings
    if not field.constituents:
        raise Unavailable("the fitted model has no tidal constituent (a steady fit)")
    constituent, omega = next(iter(field.constituents.items()))
    period = 2.0 * math.pi / omega
    tracks = job.state["fit_tracks"]
    centres = ellipse_centres(field, s.ellipses_across)
    fitted = tidal_ellipses(*harmonic_amplitudes(field, constituent, centres))
    truth = tidal_ellipses(true_amplitudes(field.frame, centres))
    comparison = compare_ellipses(fitted, truth)
    job.add_figure(plot_tidal_ellipses(centres, fitted, constituent=constituent, period_s=period, frame=field.frame,
                                       data_position_m=tracks.position_m), "tide_ellipses.png",
                   f"Fitted {constituent} tidal current ellipses; the radius shows the current at t = 0 "
                   "(1970-01-01T00:00Z on the data's clock), grey where the semi-major axis is below two s.d.", "tide")
    times = phase_times_s(omega, tracks.time_s)
    x, y, means = phase_fields(field, times, s.phase_cells_across)
    origin = field.data_summary.get("time_origin_utc")
    labels = [f"ωt = {p:g}°" + (f" ({iso_utc(origin, t)})" if origin else f" (t = {t:.0f} s)")
              for p, t in zip(PHASES_DEG, times)]
    job.add_figure(plot_field_phases(x, y, means, labels, frame=field.frame, data_position_m=tracks.position_m,
                                     title=f"The fitted flow at four phases of {constituent}"), "tide_phases.png",
                   f"Posterior mean flow at four phases of {constituent}, a quarter period "
                   f"({format_duration(period / 4)}) apart, within {NEAR_DATA_M / 1000:g} km of the data.", "tide")
    steady = job.state["steady_field"]
    periods = np.union1d(np.geomspace(3 * HOUR_S, 36 * HOUR_S, 40), [period])
    before, after = residual_spectra(steady, field, tracks, periods, s.position_error_m)
    job.add_figure(plot_residual_spectrum(before, after, constituents={constituent: period},
                                          labels=("steady fit", f"fit with {constituent}")), "tide_spectrum.png",
                   "Variance one harmonic explains in the residual velocities of the fit tracks, against period: "
                   f"the steady fit --temporal auto tested (M = {np.asarray(steady.params.inducing_m).shape[0]}, "
                   f"{steady.fit_info.get('steps')} steps) and the fit with {constituent}.", "tide")
    tables = [ellipse_table(constituent, centres, fitted, truth, comparison),
              spectrum_table(constituent, period, before, after)]
    job.summary["tide"] = tables
    k = int(np.argmin(np.abs(periods - period)))
    return (f"{constituent}: {len(centres)} ellipses, median |Δ semi-major| "
            f"{comparison['median_abs_error_semi_major_m_s']:.3f} m/s; residual variance at {constituent} "
            f"{before.variance_m2_s2[k]:.2g} → {after.variance_m2_s2[k]:.2g} m²/s²")
