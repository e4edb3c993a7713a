"""The whole driftwise job on the bundled, invented Mirren Bay: ``driftwise demo``.

Steps, each timed and recorded in ``summary.json`` and the report:

1. **data** — read the fit and held-out tracks (``demo_data/``; regenerated with
   :mod:`driftwise.app.bay` when the folder is not beside the package), inspect them;
2. **fit** — a Helmholtz (divergence-free + curl-free) field; the model file and ELBO trace;
   **calibrate** — K and τ from the fit tracks' transitions, as ``driftwise fit`` does by default;
3. **map** — the field on a grid (mean, s.d., divergence, vorticity, data support) as NetCDF;
4. **check** — kernel-family evidence and the divergence-free / curl-free verdict;
5. **spread** — two invented scenarios: a fuel spill at the harbour mouth of Port Aldous
   and a continuous outfall modelled as hourly releases, each with the probability of
   reaching the (invented) Aldous Flats shellfish bed;
6. **score** — skill and calibration on the held-out tracks, against baselines;
7. **connect** / **backtrack** — connectivity between three invented sites over three days and the
   back-tracking of a simulated find, set against its truth (:mod:`driftwise.app.demoanswers`);

then the figures, ``report.html`` and ``summary.json``, and a short digest on stdout.
A step whose library piece is missing or fails is recorded as such and the rest runs on:
the demo never invents a number it did not compute.
"""

from __future__ import annotations

import json
import math
import sys
import time
import warnings
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..data.tracks import in_model_frame, inspect_summary, read_tracks
from ..diagnostics.grid import field_grid
from ..diagnostics.skill import score
from ..diagnostics.verdict import check
from ..dynamics.calibrate import calibrate
from ..dynamics.temporalchoice import fit_temporal
from ..errors import InputError
from ..files import CAUTION, atomic_write_text, plain
from ..gp.modelfile import save_model
from ..gp.schedule import Schedule
from ..products.plots import (
    plot_area_probability,
    plot_divergence_vorticity,
    plot_elbo,
    plot_mean_field,
    plot_plume,
    plot_release_spread,
    plot_tracks,
    skill_figure,
)
from ..products.report import digest, write_report
from ..products.writers import write_field_grid, write_score_csv, write_spread
from ..units import format_diffusivity, format_duration, format_estimate
from ..version import __version__
from .bay import DemoScenario, write_demo_data
from .demoanswers import step_backtrack, step_connect
from .demotide import step_tide
from .job import Job, Unavailable, environment, one_line_warnings, progress_bar
from .job import fitted_field as _field
from .scenarios import (
    HOUR_S,
    SHELLFISH_BED,
    SHELLFISH_BED_M,
    area_curves,
    check_figure_options,
    forecast_scenarios,
    gaussian_checks,
    outfall_share,
    outfall_table,
    plume_snapshot,
    site_places,
    sites_in_frame,
    snapshot_clocks,
    spill_table,
)


@dataclass(frozen=True)
class DemoSettings:
    """Sizes of the demo job, chosen to finish in about two minutes on two cores.

    The bay is about 22 km across and the fitted length scales are 3–6 km, so 64 inducing
    points (one per ~2.8 km) resolve the flow; the family comparison only ranks the four
    kernels, so it uses 32.  ``fast()`` shrinks everything for tests and the tutorial's quick mode.
    """

    inducing: int = 64
    fit_steps: int = 60
    family_inducing: int = 32
    family_steps: int = 40
    horizon_s: float = 48 * HOUR_S
    every_s: float = HOUR_S
    outfall_hours: int = 24
    spill_sd_m: float = 150.0
    threshold: float = 0.1
    grid_cells_across: int = 40
    skill_horizons_s: tuple[float, ...] = (6 * HOUR_S, 12 * HOUR_S, 24 * HOUR_S)
    max_skill_starts: int | None = 720
    calibration_starts: int = 100
    connect_horizon_s: float = 72 * HOUR_S
    connect_every_s: float = 3 * HOUR_S
    connect_per_site: int = 16
    backtrack_window_s: float = 48 * HOUR_S
    backtrack_every_s: float = 6 * HOUR_S
    backtrack_spacing_m: float = 1250.0
    seed: int = 0
    position_error_m: float = DemoScenario().position_error_m   # the campaign's stated GPS accuracy, as a user gives it
    ellipses_across: int = 8
    phase_cells_across: int = 22

    @classmethod
    def fast(cls) -> "DemoSettings":
        return cls(inducing=32, fit_steps=40, family_inducing=24, family_steps=30, horizon_s=24 * HOUR_S,
                   every_s=2 * HOUR_S, outfall_hours=6, grid_cells_across=20,
                   skill_horizons_s=(6 * HOUR_S, 12 * HOUR_S), max_skill_starts=60, calibration_starts=50,
                   connect_per_site=8, connect_every_s=6 * HOUR_S, backtrack_spacing_m=2000.0)


def demo_data_dir(out: Path) -> Path:
    """The bundled ``demo_data`` folder, or a fresh copy regenerated (deterministically) under ``out``."""
    here = Path(__file__).resolve()
    for candidate in (here.parents[2] / "demo_data", Path.cwd() / "demo_data"):
        if (candidate / "bay_fit.csv").is_file() and (candidate / "bay_holdout.csv").is_file():
            return candidate
    write_demo_data(out / "demo_data")
    return out / "demo_data"


# ----------------------------------------------------------------- 1. data
def step_data(job: Job) -> str:
    folder = demo_data_dir(job.out)
    fit_tracks = read_tracks(folder / "bay_fit.csv")
    heldout = read_tracks(folder / "bay_holdout.csv")
    job.state.update(fit_tracks=fit_tracks, heldout=heldout, data_dir=folder)
    summaries = {name: inspect_summary(t) for name, t in (("fit", fit_tracks), ("heldout", heldout))}
    job.summary["data"] = {name: _data_table(s) for name, s in summaries.items()}
    job.summary["data"]["qc"] = [{"action": f"{name} set: {a['name']}", "count": a["count"], "detail": a["message"]}
                                 for name, s in summaries.items() for a in s.get("qc", [])]
    job.state["inspect"] = summaries
    return (f"{fit_tracks.n_tracks} fit tracks ({fit_tracks.n_fixes} fixes), "
            f"{heldout.n_tracks} held-out tracks ({heldout.n_fixes} fixes) from {folder}")


def _data_table(s: dict) -> dict:
    """The inspect summary reduced to what a reader of the report needs, units in the names."""
    out = {"file": s.get("source"), "n_tracks": s.get("n_tracks"), "n_fixes": s.get("n_fixes")}
    t = s.get("time", {})
    if t.get("start_iso"):
        out["first fix (UTC)"], out["last fix (UTC)"] = t["start_iso"], t["end_iso"]
    out["time_span_s"] = t.get("span_s")
    out["median_sampling_interval_s"] = s.get("sampling_interval_s", {}).get("median")
    speed = s.get("speed_m_s", {})
    out["median_speed_m_s"], out["95th_percentile_speed_m_s"] = speed.get("p50"), speed.get("p95")
    frame = s.get("frame", {})
    if frame.get("kind") == "lonlat":
        lat, lon = frame["lat0_deg"], frame["lon0_deg"]
        out["frame"] = ("lon/lat degrees, projected to a local azimuthal-equidistant frame centred at "
                        f"{abs(lat):.4f}° {'N' if lat >= 0 else 'S'}, {abs(lon):.4f}° {'E' if lon >= 0 else 'W'}")
    else:
        out["frame"] = "metres in a local frame"
    return out


def figure_tracks(job: Job) -> None:

    fit_tracks, heldout = job.state["fit_tracks"], job.state["heldout"]
    frame = fit_tracks.frame
    held_m = in_model_frame(heldout, frame).position_m
    places = site_places(frame)
    job.add_figure(plot_tracks(fit_tracks.position_m, fit_tracks.track_id, frame=frame, heldout_position_m=held_m,
                               heldout_track=heldout.track_id, places=places,
                               area_m=sites_in_frame(frame, SHELLFISH_BED_M), area_label=SHELLFISH_BED,
                               title="Mirren Bay drifters (invented data)"),
                   "tracks.png", "The drifter tracks: fit set and held-out set, with the scenario sites.", "data")


# ----------------------------------------------------------------- 2. fit
def step_fit(job: Job) -> str:
    s = job.settings
    # As `driftwise fit` by default (--temporal auto): a steady fit, its residuals tested for tides and slow change,
    # and a refit with what they hold (the bay's M2 tide).
    field, _, decision = fit_temporal(job.state["fit_tracks"], "helmholtz", temporal="auto", likelihood="velocities",
                                      inducing=s.inducing, seed=s.seed, quiet=not job.progress,
                                      position_error_m=s.position_error_m, schedule=Schedule(steps=s.fit_steps))
    path = job.out / "model.npz"
    save_model(field, path)
    job.add_file(path, "the fitted Helmholtz model (npz without pickles + JSON metadata; driftwise.load)")
    job.state["field"] = field
    job.state["steady_field"] = decision.steady_field     # the steady fit auto tested: the tide step's "before"
    info = field.fit_info
    data = field.data_summary
    job.summary["fit"] = {
        "kernel": field.kernel_family, "base_kernel": field.kernel_base,
        "n_tracks": data.get("n_tracks"), "n_observations": data.get("n_observations"),
        "n_inducing": int(np.asarray(field.params.inducing_m).shape[0]),
        "elbo": info.get("elbo"), "elbo_per_observation": info.get("elbo_per_observation"),
        "optimiser_steps": info.get("steps"), "converged": info.get("converged"),
        "diffusivity_m2_s": field.diffusivity_m2_s, "decorrelation_time_s": field.decorrelation_time_s,
        "hyperparameters": _group_hyperparameters(field.hyperparameters),
        "temporal": decision.to_dict(),
        "notes": [f"The decorrelation time τ comes from {info.get('decorrelation_time_source', 'the fit')} "
                  "(Taylor 1921: diffusivity = velocity variance × Lagrangian time scale)."],
    }
    history = info.get("elbo_history") or []
    if history:

        n_obs = data.get("n_observations")
        job.add_figure(plot_elbo(np.arange(1, len(history) + 1), np.asarray(history, float), n_observations=n_obs,
                                 final_elbo=info.get("elbo"), converged=info.get("converged")),
                       "elbo.png", f"The evidence lower bound while fitting ({info.get('elbo_history_kind', '')}).",
                       "fit")
    return (f"helmholtz, {' + '.join(decision.components)} (--temporal auto), "
            f"M = {job.summary['fit']['n_inducing']}, K = {field.diffusivity_m2_s:.3g} m²/s, "
            f"τ = {format_duration(field.decorrelation_time_s)}, {info.get('steps')} steps")


def _group_hyperparameters(h: dict[str, float]) -> dict[str, Any]:
    """``divergence_free_length_scale_m`` → {"divergence_free": {"length_scale_m": …}}; others stay flat."""
    out: dict[str, Any] = {}
    for name, value in h.items():
        part = next((p for p in ("divergence_free", "curl_free") if name.startswith(p + "_")), None)
        if part:
            out.setdefault(part.replace("_", "-") + " part", {})[name[len(part) + 1:]] = float(value)
        elif name != "diffusivity_m2_s":  # shown once, with the decorrelation time, in the fit table
            out[name] = float(value)
    return out


def _true_diffusivity_m2_s() -> float:
    return float(DemoScenario().diffusivity_m2_s)


def step_calibrate(job: Job) -> str:
    """K and τ from the fit tracks' transitions (as ``driftwise fit`` does by default); the model is saved again."""
    field = _field(job)
    if field.is_time_varying:
        return _keep_fitted_transport(job, field)
    before = (field.diffusivity_m2_s, field.decorrelation_time_s)
    field = calibrate(field, job.state["fit_tracks"], max_starts=job.settings.calibration_starts)
    job.state["field"] = field
    save_model(field, job.out / "model.npz")
    info = field.fit_info
    record = info.get("calibration", {})
    fit = job.summary["fit"]
    fit.update(diffusivity_m2_s=field.diffusivity_m2_s, decorrelation_time_s=field.decorrelation_time_s,
               diffusivity_before_calibration_m2_s=before[0], decorrelation_time_before_calibration_s=before[1])
    truth = _true_diffusivity_m2_s()
    fit["notes"] = [f"K and τ were calibrated by maximising the likelihood of {record.get('n_transitions', 'the')} "
                    "observed displacements between fixes of the fit tracks under the moment-propagated Gaussian "
                    f"transition (before: K = {before[0]:.3g} m²/s, τ = {format_duration(before[1])} from the "
                    "length scale over the RMS speed, Taylor 1921)."]
    if truth > 0:
        fit["notes"].append(f"The invented data were simulated with K = {truth:g} m²/s (demo_data/README.md), "
                            "so the estimate can be checked against the truth.")
    tau_at_bound = bool(record.get("at_bound", {}).get("decorrelation_time_s"))
    if tau_at_bound:
        fit["notes"].append("τ reached the upper end of its search range: over the calibration lags the error of "
                            "the fitted velocity acts as if frozen along each path (its spread grows as Σt², "
                            "Taylor 1921), so a longer τ would fit as well.")
    return (f"K {before[0]:.3g} → {field.diffusivity_m2_s:.3g} m²/s, "
            f"τ {format_duration(before[1])} → {format_duration(field.decorrelation_time_s)}"
            + (" (upper bound: velocity error frozen over the lags)" if tau_at_bound else ""))


def _keep_fitted_transport(job: Job, field: Any) -> str:
    """A time-varying fit keeps the fit's own K and τ: the report says why and what they are."""
    fit = job.summary["fit"]
    fit["notes"] = [(
        "K and τ were not recalibrated from the fit tracks' transitions: for a time-varying model the transition "
        "likelihood integrates the moment equations from every start's own time, which took far longer than the "
        "whole demo's budget (a reduced run had not finished 50 starts after 13 min on a loaded 2-core machine). "
        f"K = {format_diffusivity(field.diffusivity_m2_s)} is the fit's own estimate (the random-walk term 2K/Δt "
        f"of the velocity noise in the ELBO) and τ = {format_duration(field.decorrelation_time_s)} the length "
        "scale over the RMS speed (Taylor 1921).")]
    truth = _true_diffusivity_m2_s()
    if truth > 0:
        fit["notes"].append(f"The invented data were simulated with K = {truth:g} m²/s (demo_data/README.md), "
                            "so the estimate can be checked against the truth.")
    return (f"K = {format_diffusivity(field.diffusivity_m2_s)} and τ = {format_duration(field.decorrelation_time_s)} "
            "kept from the fit (time-varying model: not recalibrated from transitions)")


# ----------------------------------------------------------------- 3. map
STEADY_PART_NOTE = ("The map (field.png, field.nc, field.csv, physics.png) and the physics check use the steady part "
                    "v̄ of the tidal model, the flow averaged over the tidal cycle: the gridded products and the "
                    "divergence/vorticity posteriors here take a steady field. The tide itself is in the Tide "
                    "section; the spread, score, connect and backtrack forecasts use the full time-varying field.")


def step_map(job: Job) -> str:
    field = _field(job)
    if field.is_time_varying:
        job.summary.setdefault("fit", {}).setdefault("notes", []).append(STEADY_PART_NOTE)
    grid = field_grid(field.steady_part(), cells_across=job.settings.grid_cells_across)
    job.state["grid"] = grid
    written = _write_map(job, grid)

    sd = np.sqrt(np.sum(np.asarray(grid.std_m_s) ** 2, axis=-1) / 2.0)
    obs = job.state["fit_tracks"].position_m
    job.add_figure(plot_mean_field(grid.x_m, grid.y_m, grid.mean_m_s, sd, frame=field.frame, support=grid.supported,
                                   data_position_m=obs),
                   "field.png", "Posterior mean velocity and its standard deviation"
                   + (" of the steady part (the tidal average)" if field.is_time_varying else "") + "; hatched where the data "
                   "hardly constrain the field (posterior variance above half the prior).", "fit")
    return f"{grid.x_m.size} × {grid.y_m.size} grid at {grid.x_m[1] - grid.x_m[0]:g} m" + (
        f"; wrote {written}" if written else "")


def _write_map(job: Job, grid: Any) -> str:
    """The gridded field as CF NetCDF and CSV (the writers of ``driftwise map``)."""
    names = []
    for suffix, what in ((".nc", "CF NetCDF"), (".csv", "CSV")):
        path = write_field_grid(grid, job.out / f"field{suffix}")
        job.add_file(path, f"gridded mean velocity, s.d., divergence, vorticity and data support ({what})")
        names.append(path.name)
    return ", ".join(names)


# ----------------------------------------------------------------- 4. check
def step_check(job: Job) -> str:
    field, s = _field(job), job.settings
    result = check(job.state["fit_tracks"], model=field.steady_part(), inducing=s.family_inducing, steps=s.family_steps,
                   seed=s.seed, progress=job.progress, position_error_m=s.position_error_m)
    job.state["check"] = result
    job.summary["check"] = _check_summary(result)
    if field.is_time_varying:
        job.summary["check"]["reading"] += " " + STEADY_PART_NOTE

    path = job.out / "check.json"
    atomic_write_text(path, json.dumps(plain(result), indent=1, allow_nan=False) + "\n")
    job.add_file(path, "kernel-family evidence, divergence/vorticity tests, Helmholtz split and the verdict")
    v = result["verdict"]
    split = result.get("helmholtz_split", {})
    return (f"divergence-free: {v['answers']['divergence_free']}, curl-free: "
            f"{v['answers']['curl_free']}; divergent share "
            f"{format_estimate(result['divergent_variance_fraction'], split.get('std'))}")


def _check_summary(result: dict) -> dict:
    """The check result arranged for the report: verdict with reasons, family table, test statistics."""
    families = {name: {k: v for k, v in row.items() if not isinstance(v, dict)}
                for name, row in result.get("families", {}).items()}
    reasons = result["verdict"].get("reasons", {})
    if isinstance(reasons, dict):
        reasons = [f"{key.replace('_', '-')}: {text}" for key, texts in reasons.items() for text in texts]
    stats = {"divergent_variance_fraction": result.get("divergent_variance_fraction")}
    for q in ("divergence", "vorticity"):
        stats[q] = {k: result.get(q, {}).get(k) for k in ("significant_area_fraction", "max_abs_z", "z_critical",
                                                          "n_cells")}
    split = result.get("helmholtz_split", {})
    stats["divergent share s.d."] = split.get("std")
    stats["divergent share 90 % interval"] = split.get("interval_90")
    return {"verdict": {"divergence_free": result["verdict"]["divergence_free"],
                        "curl_free": result["verdict"]["curl_free"], "reasons": reasons,
                        "rule": result["verdict"].get("rule")},
            "families": families, "reading": result.get("evidence", {}).get("reading", "")
            + " (Truth of the invented bay: a divergence-free gyre plus a curl-free river outflow, so the flow "
              "is neither divergence-free nor curl-free.)",
            "statistics": stats, "tested_model": result.get("tested_model")}


def figure_physics(job: Job) -> str:
    """Divergence and vorticity on the map grid; outlined where |z| passes the check's corrected threshold."""

    grid = job.state.get("grid")
    if grid is None:
        raise Unavailable("needs the gridded field from the map step")
    check = job.state.get("check", {})
    z_div = check.get("divergence", {}).get("z_critical")
    z_vort = check.get("vorticity", {}).get("z_critical")
    corrected = [z is not None and math.isfinite(z) for z in (z_div, z_vort)]
    thresholds = tuple(z if ok else 1.96 for z, ok in zip((z_div, z_vort), corrected))
    how = ("the smallest |z| the Benjamini–Hochberg test of the check rejected, per quantity" if all(corrected)
           else "the Benjamini–Hochberg critical |z| where the check rejected; elsewhere pointwise |z| ≥ 1.96, "
                "which is not corrected for multiple testing")
    reasons = getattr(grid, "reasons", {}) or {}
    div = None if "divergence" in reasons else grid.divergence_s
    fig = plot_divergence_vorticity(grid.x_m, grid.y_m, div, None if div is None else div / grid.divergence_std_s,
                                    grid.vorticity_s, grid.vorticity_s / grid.vorticity_std_s,
                                    frame=job.state["field"].frame, z_threshold=thresholds,
                                    support=grid.supported, divergence_note=reasons.get("divergence", ""))
    job.add_figure(fig, "physics.png", "Posterior mean divergence and vorticity; thick outline: significant "
                   f"regions ({how}); dashed contours are negative values.", "check")
    return "outline at |z| ≥ " + ", ".join(f"{z:.2f}" for z in thresholds)


# ----------------------------------------------------------------- 5. spread
def step_spread(job: Job) -> str:
    field, s = _field(job), job.settings
    frame = field.frame
    spill, plume, times, starts = forecast_scenarios(field, s)
    bed = sites_in_frame(frame, SHELLFISH_BED_M)
    for name, forecast in (("spill", spill), ("outfall", plume)):
        for suffix in (".json", ".csv", ".geojson") if frame.kind == "lonlat" else (".json", ".csv"):
            path = write_spread(forecast, job.out / f"spread_{name}{suffix}")
            job.add_file(path, f"{name} forecast: means, covariances, ellipses, P(inside the shellfish bed)")
    share = outfall_share(plume.probability, times, starts)
    job.summary["spread"] = [spill_table(spill, s), outfall_table(plume, share, times, starts, s)]
    checks = gaussian_checks(field, spill, plume, job.summary["spread"])
    job.state.update(spill=spill, plume=plume, bed=bed, share=share, times=times, starts=starts, checks=checks)
    _spread_figures(job)
    arrival = spill.first_arrival_s[0]
    return (f"spill P(bed) max {spill.probability[0].max():.2f}, first ≥ {s.threshold:g} "
            + ("never" if arrival is None else f"at {arrival / HOUR_S:g} h")
            + f"; outfall share max {np.nanmax(share):.2f}")


def _spread_figures(job: Job) -> None:

    spill, plume, bed, grid = job.state["spill"], job.state["plume"], job.state["bed"], job.state.get("grid")
    frame = job.state["field"].frame
    background = None if grid is None else {"x_m": grid.x_m, "y_m": grid.y_m, "mean_m_s": grid.mean_m_s}
    places = site_places(frame)
    rel = lambda f, r, label: {"label": label, "times_s": f.times_s, "mean_m": f.means[r],  # noqa: E731
                               "covariance_m2": f.covs[r]}
    horizon_h = spill.times_s[-1] / HOUR_S
    spill_times = [t * HOUR_S for t in (6, 12, 24, 48) if t <= horizon_h]
    extra = check_figure_options(job.state["checks"], spill, plume)
    job.add_figure(plot_release_spread([rel(spill, 0, "fuel spill, mean path")], ellipse_times_s=spill_times,
                                       frame=frame, field=background, area_m=bed, area_label=SHELLFISH_BED,
                                       places=places, title="Fuel spill", **extra["spill"]),
                   "spread_spill.png", "Fuel spill: mean path with 50 % (shaded) and 95 % (dashed) ellipses; "
                   "grey arrows are the fitted mean flow" + (" averaged over the tide (the forecast itself "
                   "uses the time-varying flow)." if job.state["field"].is_time_varying else "."), "spread")
    snaps = [plume_snapshot(plume, clock, job.state["starts"]) for clock in snapshot_clocks(plume.times_s)]
    job.add_figure(plot_plume(snaps, frame=frame, field=background, area_m=bed, area_label=SHELLFISH_BED,
                              places=places, title="Outfall plume (hourly parcels as one mixture)", **extra["outfall"]),
                   "spread_outfall.png", "Outfall plume at three times after the discharge started: the regions "
                   "holding 50 % (shaded) and 95 % (line) of the discharged water, from the mixture of the hourly "
                   "parcels' Gaussians.", "spread")
    curves = area_curves(spill, job.state["times"], job.state["share"])
    job.add_figure(plot_area_probability(curves, area_label="the shellfish bed", threshold=job.settings.threshold,
                                         title=f"Reaching the {SHELLFISH_BED}", **extra["area"]),
                   "area_probability.png", f"Probability of reaching the {SHELLFISH_BED} against time; "
                   "the star marks the first time the threshold is reached.", "spread")


# ----------------------------------------------------------------- 6. score
def step_score(job: Job) -> str:
    field, s = _field(job), job.settings
    heldout = in_model_frame(job.state["heldout"], field.frame)
    result = score(field, heldout, horizons_s=s.skill_horizons_s, max_starts=s.max_skill_starts,
                         fit_tracks=in_model_frame(job.state["fit_tracks"], field.frame)).to_dict()
    job.summary["skill"] = result
    path = job.out / "skill.json"

    atomic_write_text(path, json.dumps(plain(result), indent=1, allow_nan=False) + "\n")
    job.add_file(path, "forecast skill per horizon: separation, Liu–Weisberg skill, coverage, log score, baselines")
    write_score_csv(result, job.out / "skill.csv")
    job.add_file(job.out / "skill.csv", "the same scores as a table (CSV)")

    job.add_figure(skill_figure(result), "skill.png",
                   "Skill, median separation and ellipse coverage on the held-out tracks, against persistence and "
                   "no-motion baselines; shaded: ±1.96 standard errors of the coverage with the forecast starts "
                   "clustered by track.", "skill")
    k = len(result["horizons_s"]) - 1
    return (f"{result['horizons_s'][k] / HOUR_S:g} h: skill {result['skill'][k]:.2f} "
            f"(persistence {result['baselines']['persistence']['skill'][k]:.2f}), "
            f"95 % coverage {result['coverage_95'][k]:.2f} ± {result['coverage_95_se'][k]:.2f}")


# ----------------------------------------------------------------- JSON

# ----------------------------------------------------------------- the job
STEPS: tuple[tuple[str, str, Callable[[Job], str]], ...] = (
    ("data", "data", step_data),
    ("fit", "fit", step_fit),
    ("calibrate", "fit", step_calibrate),
    ("map", "fit", step_map),
    ("tide", "tide", step_tide),
    ("check", "check", step_check),
    ("physics figure", "check", figure_physics),
    ("spread", "spread", step_spread),
    ("score", "skill", step_score),
    ("connect", "connect", step_connect),
    ("backtrack", "backtrack", step_backtrack),
)

DESCRIPTION = ("The whole driftwise job on invented data: drifters in Mirren Bay, a fictional coastal bay with a "
               "wind-driven gyre and the outflow of the (equally fictional) Aldous river at Port Aldous. "
               "Fit a flow field with uncertainty, check its physics, forecast a fuel spill and an outfall plume "
               "reaching a shellfish bed, link three sites, back-track a find, and score forecasts on tracks the fit "
               "never saw.")


def run_demo(out_dir: str | Path = "driftwise-demo", *, quiet: bool = False, settings: DemoSettings | None = None,
             command: str | None = None, figures_dir: str | Path | None = None, stream: Any = None) -> dict:
    """Run the demo into ``out_dir``; write figures, products, ``summary.json`` and ``report.html``.

    Figures go to ``figures_dir`` (default ``out_dir/figures``).  Prints the digest on ``stream``
    (default stdout); progress bars appear only on a terminal and never with ``quiet``; warnings
    are collected (one line each) into the digest and the report.  Returns the summary dict.
    """
    out = Path(out_dir)
    figures = out / "figures" if figures_dir is None else Path(figures_dir)
    _prepare_out(out, figures)
    job = Job(out, settings or DemoSettings(), progress=not quiet, figures_dir=figures)
    start = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        bar = progress_bar(len(STEPS), quiet)
        for name, section, fn in STEPS:
            bar.set_description(f"driftwise demo: {name}")
            ok = job.run(name, section, fn)
            if name == "data" and ok:
                job.run("tracks figure", "data", figure_tracks)
            bar.update(1)
        bar.close()
    summary = _assemble(job, time.perf_counter() - start, one_line_warnings(caught), command)
    _write_outputs(job, summary)
    print(digest(summary, out), file=stream or sys.stdout)
    return summary


def _prepare_out(out: Path, figures: Path) -> None:
    for folder in (out, figures):
        if folder.exists() and not folder.is_dir():
            raise InputError(f"{folder}: exists and is not a folder; give a folder for the demo's outputs")
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as err:
            raise InputError(f"{folder}: cannot create the output folder ({err.strerror})") from None








def _assemble(job: Job, wall_s: float, warning_lines: list[str], command: str | None) -> dict:

    summary = {
        "title": "driftwise demo: Mirren Bay (invented data)",
        "created_utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "driftwise_version": __version__,
        "command": command or "driftwise demo --out " + str(job.out),
        "caution": CAUTION,
        "job": {"description": DESCRIPTION, "wall_time_s": round(wall_s, 2), "steps": job.steps},
        **job.summary,
        "figures": job.figures, "files": job.files, "warnings": warning_lines, "missing": job.missing,
        "settings": plain(job.settings.__dict__),
        "environment": environment(),
    }
    return plain(summary)





def _write_outputs(job: Job, summary: dict) -> None:

    files = summary["files"]
    files += [{"path": "summary.json", "description": "every number of this run (the report is made from it)"},
              {"path": "report.html", "description": "the report: one self-contained HTML file, open in a browser"}]
    atomic_write_text(job.out / "summary.json", json.dumps(summary, indent=1, allow_nan=False) + "\n")
    write_report(summary, job.out / "report.html")
