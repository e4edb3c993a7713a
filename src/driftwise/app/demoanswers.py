"""The demo's many-release answers in Mirren Bay: connectivity between three sites and back-tracking a find.

* **connect** — three invented sites (Hallow Reef, the Kestle Point outfall zone, the Aldous Flats shellfish
  bed), each seeded with a few releases over its area; P[source, destination, t] over three days
  (``dynamics.connectivity``), written as CF NetCDF, CSV and JSON, with the matrix and map figures;
* **backtrack** — an invented find: one particle released at a known place and time is moved through the
  *true* flow of the invented bay (``app.bay.DemoBay``, Euler–Maruyama with the bay's K), observed with a
  position error; the fitted model is then asked where and when it was released (``dynamics.backtrack``),
  and the answer is set against the truth (distance, inside the 90 % region or not).

Sites and the release are given in metres of the frame the demo data were generated in and moved into the
model's frame with :func:`scenarios.sites_in_frame`, like the spread scenarios.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..data.synthetic import simulate_drifters
from ..data.utctime import default_start_time_s, iso_utc
from ..data.windows import output_times_s
from ..dynamics.backtrack import Finds, backtrack_from_field, hpd_levels
from ..dynamics.connectivity import connect_from_field
from ..dynamics.sites import Site
from ..files import CAUTION
from ..products.backtrackfiles import backtrack_to_dict, write_backtrack
from ..products.connectfiles import write_connect
from ..products.plotconnect import plot_backtrack, plot_connect_map, plot_connect_matrix
from ..units import format_duration
from .bay import DemoScenario
from .job import Job
from .job import fitted_field as _field
from .scenarios import HOUR_S, OUTFALL_M, SHELLFISH_BED, SHELLFISH_BED_M, sites_in_frame

# Sites in metres of the generator's frame (app.bay.DemoScenario).  The reef lies on the gyre's northern rim,
# the outfall zone is a 1.6 km square around the Kestle Point diffuser, the bed is the spread scenarios' own.
REEF_M = ((-2600.0, 5200.0), (-800.0, 5000.0), (-600.0, 6400.0), (-2400.0, 6700.0))
OUTFALL_ZONE_M = tuple((OUTFALL_M[0] + dx, OUTFALL_M[1] + dy) for dx, dy in
                       ((-800.0, -800.0), (800.0, -800.0), (800.0, 800.0), (-800.0, 800.0)))
DEMO_SITES_M = (("Hallow Reef", REEF_M), ("Kestle Point outfall zone", OUTFALL_ZONE_M),
                (SHELLFISH_BED, SHELLFISH_BED_M))

# The invented find: released here, found FIND_AGE_S later where the true flow carried it.
LOST_AT_M = (-4500.0, -500.0)
FIND_AGE_S = 30 * HOUR_S
FIND_SD_M = 150.0                     # stated position accuracy of the find (s.d. per axis)
FIND_SEED = 17
BACKTRACK_BOX_M = ((-11000.0, -10000.0), (11000.0, 10000.0))   # candidate region (corners), generator frame


def demo_sites(frame: Any) -> tuple[Site, ...]:
    """The three connectivity sites as ``Site`` polygons in the model's frame."""
    return tuple(Site(name, sites_in_frame(frame, polygon)) for name, polygon in DEMO_SITES_M)


TIDAL_TRANSPORT_NOTE = ("The fitted model varies with the tide, and the material is propagated through the full "
                        "time-varying field from its own release time: the tidal excursions to and fro, and any net "
                        "drift they cause, are in the answer.")


def step_connect(job: Job) -> str:
    field, s = _field(job), job.settings
    sites = demo_sites(field.frame)
    times = output_times_s(s.connect_horizon_s, s.connect_every_s)
    result = connect_from_field(field, sites, times, per_site=s.connect_per_site, step_s=HOUR_S, seed=s.seed,
                                start_time_s=default_start_time_s(field.data_summary))
    for suffix, what in ((".nc", "CF NetCDF"), (".csv", "CSV"), (".json", "JSON")):
        path = write_connect(result, job.out / f"connect{suffix}")
        job.add_file(path, f"connectivity between the three sites, P[source, destination, time] ({what})")
    job.add_figure(plot_connect_matrix(result), "connect_matrix.png", "Connectivity matrix: the highest "
                   "probability over three days that material released in a source site is inside a destination.",
                   "connect")
    job.add_figure(plot_connect_map(result), "connect_map.png", "The three sites and the mean paths of each "
                   "source's material.", "connect")
    job.state["connect"] = result
    job.summary["connect"] = [connect_table(result, s)]
    if _field(job).is_time_varying:
        job.summary["connect"][0]["notes"].insert(0, TIDAL_TRANSPORT_NOTE)
    peak = result.probability.max(-1)
    i, j = np.unravel_index(int(np.argmax(np.where(np.eye(len(sites), dtype=bool), -1.0, peak))), peak.shape)
    return (f"{len(sites)} sites × {result.per_site} releases, {format_duration(times[-1])}; strongest link "
            f"{result.names[i]} → {result.names[j]} peak {peak[i, j]:.3f}")


def connect_table(result: Any, s: Any) -> dict:
    """The report's table: per source and destination, the peak and final probability and the first passage."""
    rows = []
    for i, src in enumerate(result.names):
        for j, dst in enumerate(result.names):
            first = result.first_passage_s[i, j]
            rows.append([src, dst, float(result.probability[i, j].max()), float(result.probability[i, j, -1]),
                         None if np.isnan(first) else first / HOUR_S])
    notes = [f"Each site is seeded with {result.per_site} releases (scrambled Sobol points, each carrying its "
             "share of the site's area as covariance) and propagated by Gaussian moments; the probability is the "
             "exact Gaussian polygon mass averaged over the releases.", CAUTION]
    if result.outside_support is not None:
        notes.insert(1, f"Largest share of a source's material outside the data support: "
                        f"{100 * float(result.outside_support.max()):.0f} %.")
    return {"name": "Connectivity between Hallow Reef, the Kestle Point outfall zone and the Aldous Flats bed",
            "description": f"Material released at once over each site, followed for "
                           f"{s.connect_horizon_s / HOUR_S:g} h with outputs every {s.connect_every_s / HOUR_S:g} h.",
            "method": f"{result.method}, {len(result.names) * result.per_site} releases",
            "columns": ["source", "destination", "peak probability (–)", "probability at the end (–)",
                        f"first time ≥ {result.threshold:g} (h)"],
            "rows": rows, "formats": [None, None, "probability", "probability", "hours"], "notes": notes}


def simulated_find(frame: Any, start_time_s: float) -> tuple[Finds, np.ndarray, float]:
    """(the find, the true release point (2,) m in the model's frame, the true release time s): one particle
    from LOST_AT_M through the invented bay's true flow (tide included, on the data's clock) with its K (Euler–Maruyama, 5-min steps), plus a
    position error of FIND_SD_M, FIND_AGE_S after ``start_time_s``."""
    scenario = DemoScenario()
    table = simulate_drifters(scenario.bay, [LOST_AT_M], duration_s=FIND_AGE_S, fix_interval_s=FIND_AGE_S,
                              diffusivity_m2_s=scenario.diffusivity_m2_s, position_error_m=FIND_SD_M,
                              seed=FIND_SEED, substeps=int(FIND_AGE_S / 300.0), start_times_s=start_time_s)
    found_bay = table[["x_m", "y_m"]].to_numpy()[-1]
    found, truth = sites_in_frame(frame, [found_bay, LOST_AT_M])
    return Finds(found[None, :], np.array([start_time_s + FIND_AGE_S]), np.array([FIND_SD_M])), truth, start_time_s


def step_backtrack(job: Job) -> str:
    field, s = _field(job), job.settings
    finds, truth, true_time = simulated_find(field.frame, default_start_time_s(field.data_summary))
    corners = sites_in_frame(field.frame, BACKTRACK_BOX_M)
    region = (*corners.min(0), *corners.max(0))
    # candidate release times every backtrack_every_s from one step before the find back over the window: a
    # release at the find time itself would only say "it was released where it was found"
    lags = np.sort(finds.time_s.min() - output_times_s(s.backtrack_window_s, s.backtrack_every_s)[1:])
    result = backtrack_from_field(field, finds, region, s.backtrack_spacing_m, lags, step_s=HOUR_S)
    for suffix in (".nc", ".json") + ((".geojson",) if field.frame.kind == "lonlat" else ()):
        path = write_backtrack(result, job.out / f"backtrack{suffix}")
        job.add_file(path, f"back-tracking of the simulated find: release probability map, 50/90 % regions, "
                           f"most probable release ({suffix[1:]})")
    job.add_figure(plot_backtrack(result, truth_m=truth), "backtrack_map.png", "Where was the simulated find "
                   "released? Release probability over all candidate times, the 50 % (solid) and 90 % (dashed) "
                   "regions, the most probable point and (circle) the true release of the simulation.", "backtrack")
    comparison = truth_comparison(result, truth, true_time)
    job.state["backtrack"] = result
    job.summary["backtrack"] = [backtrack_table(result, comparison, s)]
    if _field(job).is_time_varying:
        job.summary["backtrack"][0]["notes"].insert(0, TIDAL_TRANSPORT_NOTE)
    return (f"{len(result.x_m) * len(result.y_m)} candidates × {len(lags)} times; most probable release "
            f"{comparison['distance_m'] / 1000:.2f} km from the truth, truth "
            f"{'inside' if comparison['truth_inside_90'] else 'outside'} the 90 % region")


def truth_comparison(result: Any, truth_m: np.ndarray, true_time_s: float) -> dict:
    """Distance (m) from the most probable release point to the truth, the time error (s), and whether the true
    release cell lies in the 50 % and 90 % highest-probability regions of the release-point map."""
    x, y, t = result.most_probable
    ix = int(np.argmin(np.abs(result.x_m - truth_m[0])))
    iy = int(np.argmin(np.abs(result.y_m - truth_m[1])))
    level_50, level_90 = hpd_levels(result.marginal, (0.5, 0.9))
    cell = float(result.marginal[iy, ix])
    return {"distance_m": float(np.hypot(x - truth_m[0], y - truth_m[1])), "time_error_s": float(t - true_time_s),
            "truth_inside_50": cell >= level_50, "truth_inside_90": cell >= level_90,
            "truth_m": [float(v) for v in truth_m], "truth_time_s": float(true_time_s)}


def backtrack_table(result: Any, comparison: dict, s: Any) -> dict:
    """The report's table of the back-tracking scenario: the answer beside the truth of the simulation."""
    summary = backtrack_to_dict(result)
    best = summary["most_probable"]
    origin = result.time_origin_utc
    when = (lambda t: iso_utc(origin, t)) if origin else (lambda t: f"{t:.6g} s")  # noqa: E731
    rows = [["release point (m, model frame)", "({:.0f}, {:.0f})".format(*best["position_m"]),
             "({:.0f}, {:.0f})".format(*comparison["truth_m"])],
            ["release time", when(best["time_s"]), when(comparison["truth_time_s"])],
            ["distance most probable → true (km)", f"{comparison['distance_m'] / 1000:.2f}", ""],
            ["release time error (h)", f"{comparison['time_error_s'] / HOUR_S:+.0f}", ""],
            ["50 % region area (km²)", f"{summary['region_50']['area_m2'] / 1e6:.3g}",
             "inside" if comparison["truth_inside_50"] else "outside"],
            ["90 % region area (km²)", f"{summary['region_90']['area_m2'] / 1e6:.3g}",
             "inside" if comparison["truth_inside_90"] else "outside"]]
    return {"name": "Back-tracking a simulated find",
            "description": f"An object lost at a known place drifted for {FIND_AGE_S / HOUR_S:g} h through the "
                           f"invented bay's true flow (with its K) and was found with a {FIND_SD_M:g} m position "
                           f"error. Candidate releases: a {s.backtrack_spacing_m:g} m grid over the bay and every "
                           f"{s.backtrack_every_s / HOUR_S:g} h from {s.backtrack_every_s / HOUR_S:g} h to "
                           f"{s.backtrack_window_s / HOUR_S:g} h before the find, under a uniform prior.",
            "method": f"{result.method}, {len(result.x_m) * len(result.y_m)} candidate points × "
                      f"{len(result.release_times_s)} candidate times",
            "columns": ["quantity", "back-tracked", "truth of the simulation"], "rows": rows,
            "truth_comparison": comparison,
            "notes": ["The truth is known only because the find was simulated; a real find has no such check.",
                      CAUTION]}
