"""The invented release scenarios of the demo, in Mirren Bay (nothing here exists).

* a **fuel spill** at the harbour mouth of Port Aldous: one release with an initial spread;
* a **continuous outfall** at Kestle Point, modelled as one release per hour: at clock time T
  after the discharge began, the water released so far is the equal-weight mixture of the
  parcels' Gaussians, so its share inside an area is the mean of the parcels' probabilities
  (:func:`outfall_share`) and its shape is the mixture's density (:func:`plume_snapshot`);
* the **Aldous Flats shellfish bed**, the area whose exposure both scenarios forecast.

Sites are given in metres of the frame the demo data were generated in
(:class:`driftwise.app.bay.DemoScenario`: azimuthal equidistant about 9° W, 44° N) and
converted through lon/lat into a model's own frame by :func:`sites_in_frame`.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from ..data.frame import Frame
from ..data.utctime import default_start_time_s
from ..dynamics.adequacy import spread_adequacy
from ..dynamics.spread import Release, spread_from_field
from .bay import DemoScenario

HOUR_S = 3600.0

# Sites of the invented scenarios, in metres of the frame the demo data were generated in
# (driftwise.app.bay.DemoScenario: AEQD centred at 9° W, 44° N); converted to lon/lat and
# then into the fitted model's own frame, so they stay put whatever frame the fit chooses.
HARBOUR_MOUTH_M = (5200.0, -4800.0)          # just off the river mouth of Port Aldous
OUTFALL_M = (4500.0, 5500.0)                  # the (invented) Kestle Point outfall, north-east shore
SHELLFISH_BED_M = ((-7400.0, -4600.0), (-4300.0, -4700.0), (-3900.0, -2300.0), (-6900.0, -1700.0))
SHELLFISH_BED = "Aldous Flats shellfish bed"
OUTFALL_SD_M = 30.0                           # initial spread of each hourly parcel at the diffuser


def sites_in_frame(frame: Any, xy_bay_m: Any) -> np.ndarray:
    """Sites given in the generator's frame (synthetic.DemoScenario) → the model's frame, metres (n, 2)."""

    scenario = DemoScenario()
    lon, lat = Frame("lonlat", scenario.lon0_deg, scenario.lat0_deg).to_lonlat(np.atleast_2d(xy_bay_m))
    return frame.from_lonlat(lon, lat) if getattr(frame, "kind", "metric") == "lonlat" else np.atleast_2d(xy_bay_m)




def site_places(frame: Any) -> list[dict]:
    """The two release sites of the scenarios, in the model's frame (for the maps)."""
    harbour, outfall = sites_in_frame(frame, [HARBOUR_MOUTH_M, OUTFALL_M])
    return [{"label": "Port Aldous harbour mouth", "xy_m": harbour}, {"label": "Kestle Point outfall", "xy_m": outfall}]


def forecast_scenarios(field: Any, settings: Any) -> tuple[Any, Any, np.ndarray, np.ndarray]:
    """Forecast the spill and the outfall's hourly parcels in ``field``, in one batched call.

    ``settings`` gives ``every_s``, ``horizon_s``, ``outfall_hours``, ``spill_sd_m`` and
    ``threshold`` (demo.DemoSettings).  Returns (spill, plume, times_s, outfall starts_s):
    two ``spread.Spread`` with P(inside the shellfish bed) at every output time.
    """

    s = settings
    harbour, outfall = sites_in_frame(field.frame, [HARBOUR_MOUTH_M, OUTFALL_M])
    times = s.every_s * np.arange(int(round(s.horizon_s / s.every_s)) + 1)
    starts = HOUR_S * np.arange(s.outfall_hours)
    base = default_start_time_s(getattr(field, "data_summary", None))   # the data's end on an absolute axis
    releases = [Release(harbour, start_time_s=base, cov0_m2=s.spill_sd_m**2 * np.eye(2), name="fuel spill")]
    releases += [Release(outfall, start_time_s=base + t0, cov0_m2=OUTFALL_SD_M**2 * np.eye(2),
                         name=f"outfall +{t0 / HOUR_S:g} h") for t0 in starts]
    both = spread_from_field(field, releases, times, polygon_m=sites_in_frame(field.frame, SHELLFISH_BED_M),
                             threshold=s.threshold)
    return release_subset(both, [0]), release_subset(both, range(1, len(releases))), times, starts


def release_subset(forecast: Any, rows: Any) -> Any:
    """The forecast of some of its releases only (every per-release array sliced alike)."""
    rows = list(rows)
    pick = lambda a: None if a is None else np.asarray(a)[rows]  # noqa: E731
    arrival = forecast.first_arrival_s
    return dataclasses.replace(
        forecast, releases=tuple(forecast.releases[r] for r in rows), means=pick(forecast.means),
        covs=pick(forecast.covs), mean_lonlat=pick(forecast.mean_lonlat), semi_axes_m=pick(forecast.semi_axes_m),
        orientation_deg=pick(forecast.orientation_deg), probability=pick(forecast.probability),
        first_arrival_s=None if arrival is None else tuple(arrival[r] for r in rows))


def outfall_share(probability: np.ndarray, times_s: np.ndarray, starts_s: np.ndarray) -> np.ndarray:
    """Expected share of the discharged water inside the area at clock times ``times_s`` since the outfall started.

    Parcel i (released at ``starts_s[i]``) is inside with probability p_i(T − t_i) (its own clock);
    the discharge so far is the equal-weight mixture of the released parcels, so the share is the mean
    of p_i over the parcels with t_i ≤ T.  ``probability`` (R, T) on the release-relative ``times_s``.
    Returns (T,); the outputs must be on a grid that contains every start time.
    """
    return np.array([np.mean(present_probabilities(probability, times_s, starts_s, clock)) for clock in times_s])


def present_probabilities(probability: np.ndarray, times_s: np.ndarray, starts_s: np.ndarray,
                          clock_s: float) -> np.ndarray:
    """p_i(T − t_i) for the parcels already released at clock time T = ``clock_s`` (each at its own age)."""
    released = np.flatnonzero(starts_s <= clock_s + 1e-9)
    ages = clock_s - starts_s[released]
    idx = np.minimum(np.searchsorted(times_s, ages - 1e-9), times_s.size - 1)
    return probability[released, idx]


def plume_snapshot(plume: Any, clock_s: float, starts_s: np.ndarray) -> dict:
    """The parcels present ``clock_s`` after the outfall started: their means (R, 2) and covariances (R, 2, 2)."""
    times = plume.times_s
    idx = [(r, int(np.argmin(np.abs(times - (clock_s - t0))))) for r, t0 in enumerate(starts_s) if t0 <= clock_s + 1e-9]
    rows, ks = zip(*idx)
    return {"label": f"{clock_s / HOUR_S:g} h after the start ({len(rows)} parcels)",
            "time_label": f"{clock_s / HOUR_S:g} h",
            "means_m": plume.means[list(rows), list(ks), :2], "covariances_m2": plume.covs[list(rows), list(ks), :2, :2]}


def snapshot_clocks(times_s: np.ndarray) -> list[float]:
    """Three output times spread over the horizon (a quarter, five eighths, the end)."""
    horizon = float(times_s[-1])
    return sorted({float(times_s[np.argmin(np.abs(times_s - f * horizon))]) for f in (0.25, 0.625, 1.0)})


def _lonlat_or_xy(forecast: Any, r: int, k: int) -> list[Any]:
    if forecast.mean_lonlat is not None:
        return [round(float(v), 5) for v in forecast.mean_lonlat[r, k]]
    return [float(v) for v in forecast.means[r, k, :2]]


def _table_hours(times_s: np.ndarray) -> list[int]:
    wanted = [0, 3, 6, 12, 18, 24, 36, 48]
    return [k for k, t in enumerate(times_s) if round(t / HOUR_S, 6) in wanted]


def spill_table(spill: Any, s: Any) -> dict:
    """The report's table of the spill (a ``spread.Spread`` of one release) at round hours; ``s`` the settings."""
    level = spill.levels.index(0.95)
    geo = spill.mean_lonlat is not None
    rows = [[spill.times_s[k] / HOUR_S, *_lonlat_or_xy(spill, 0, k), *spill.semi_axes_m[0, k, level],
             spill.probability[0, k]] for k in _table_hours(spill.times_s)]
    arrival = spill.first_arrival_s[0]
    return {"name": "Fuel spill at the Port Aldous harbour mouth",
            "description": f"An instantaneous release at the harbour mouth with an initial spread of "
                           f"{s.spill_sd_m:g} m (s.d.), followed for {s.horizon_s / HOUR_S:g} h.",
            "method": f"{spill.method} (Gaussian moment matching on the fitted SDE)",
            "columns": ["time since release (h)", "mean lon (°)" if geo else "mean x (m)",
                        "mean lat (°)" if geo else "mean y (m)", "95 % ellipse semi-major (m)",
                        "95 % ellipse semi-minor (m)", f"P(inside {SHELLFISH_BED}) (–)"],
            "rows": rows, "formats": ["hours"] + (["degrees"] * 2 if geo else ["metres"] * 2) + ["metres"] * 2
            + ["probability"],
            "notes": [f"The probability first reaches {s.threshold:g} "
                      + ("never within the horizon." if arrival is None else f"{arrival / HOUR_S:g} h after the release.")]}


def outfall_table(plume: Any, share: np.ndarray, times: np.ndarray, starts: np.ndarray, s: Any) -> dict:
    """The report's table of the outfall on the clock since the discharge began; ``s`` the settings."""
    rows = [[times[k] / HOUR_S, int(np.sum(starts <= times[k] + 1e-9)), share[k],
             float(np.max(present_probabilities(plume.probability, times, starts, times[k])))]
            for k in _table_hours(times)]
    return {"name": "Continuous outfall at Kestle Point",
            "description": f"Discharge for {s.outfall_hours} h modelled as one release per hour (each with a "
                           f"{OUTFALL_SD_M:g} m initial spread), each followed for "
                           f"{s.horizon_s / HOUR_S:g} h.",
            "method": f"{plume.method}, {len(plume.releases)} releases in one batched call",
            "columns": ["time since the outfall started (h)", "parcels released (–)",
                        f"expected share inside {SHELLFISH_BED} (–)",
                        "highest single-parcel P(inside) (–)"],
            "rows": rows, "formats": ["hours", None, "probability", "probability"],
            "notes": ["The share is the mean, over the parcels released so far, of each parcel's probability of "
                      "being inside the bed: the mixture of the parcels' Gaussians."]}


def gaussian_checks(field: Any, spill: Any, plume: Any, tables: list[dict], *, particles: int = 1000) -> dict:
    """Is one Gaussian a fair summary?  The spill and the oldest outfall parcel against a small ensemble at the
    last output time (:func:`driftwise.dynamics.adequacy.spread_adequacy`): {"spill": …, "outfall": …}.

    Each verdict goes into its report table (``tables``: the spill's, the outfall's): a poor summary as an
    alert, a fair one as a note, and the numbers under ``gaussian_check``.
    """
    checks = {"spill": spread_adequacy(field, spill, 0, particles=particles),
              "outfall": spread_adequacy(field, plume, 0, particles=particles)}
    for table, (name, note) in zip(tables, gaussian_check_notes(checks).items()):
        table.setdefault("alerts" if checks[name].poor else "notes", []).append(note)
        table["gaussian_check"] = checks[name].to_dict()
    return checks


def gaussian_check_notes(checks: dict) -> dict:
    """Report text per scenario: the check's sentence, naming which release was checked."""
    return {"spill": checks["spill"].sentence("the spill"),
            "outfall": checks["outfall"].sentence("the oldest outfall parcel")}


def check_figure_options(checks: dict, spill: Any, plume: Any) -> dict:
    """Keyword arguments of the spread figures: the release (discharge start) time as ISO-8601 UTC when the
    model knows its time origin, the checks' boxed notes, and the spill's check particles."""
    notes, check = gaussian_check_notes(checks), checks["spill"]
    spill_start, plume_start = ((f.start_times_utc or [None])[0] for f in (spill, plume))
    return {"spill": {"note": notes["spill"], "particles_m": check.samples_m, "release_time": spill_start,
                      "particles_label": f"{check.particles} simulated particles at {check.time_s / HOUR_S:g} h "
                                         "(ensemble check)"},
            "outfall": {"note": notes["outfall"], "release_time": plume_start},
            "area": {"release_time": spill_start if spill_start == plume_start else None}}


def area_curves(spill: Any, times_s: np.ndarray, share: np.ndarray) -> list[dict]:
    """The two curves of the area figure, each with its own quantity and clock (so never on one axis)."""
    return [{"label": "fuel spill", "times_s": spill.times_s, "probability": spill.probability[0],
             "xlabel": "time since the spill (h)", "ylabel": "probability inside the bed (–)"},
            {"label": "outfall", "times_s": times_s, "probability": share,
             "xlabel": "time since the outfall started (h)", "ylabel": "expected share of the water inside (–)"}]
