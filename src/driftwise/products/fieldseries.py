"""The gridded product of a time-varying field (``driftwise map`` of a model with tides or a slow part).

One NetCDF-4 file: the variables of the steady map (:func:`driftwise.products.writers.field_grid_dataset`: velocity
mean and s.d., divergence and vorticity mean and s.d., support) along a CF ``time`` dimension (CF-1.11 §4.4:
``standard_name: time``, ``axis: T``, units ``seconds since …``), and per tidal constituent c the current-ellipse
maps ``c_semi_major_m_s``, ``c_semi_minor_m_s``, ``c_inclination_deg``, ``c_phase_deg`` with their posterior s.d.
(``…_sd_…``; :mod:`driftwise.diagnostics.tidalellipse`) on (y_m, x_m).

Time axis: a model fitted to ISO-8601 times has ``seconds since 1970-01-01T00:00:00Z`` (its own axis).  A model
fitted to relative times has no calendar date; its axis is written as ``seconds since 1970-01-01T00:00:00Z`` as
well, because CF requires a reference time, and the variable's ``comment`` and the global ``time_axis`` attribute say
that the date is only the zero of the tracks' own clock.

Slices at instants carry ``cell_methods: time: point``; the time mean over the data's span is one slice at the
span's middle with ``time_bnds`` (the span) and ``cell_methods: time: mean`` (CF-1.11 §7.3–7.4).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from ..data.utctime import UNIX_EPOCH_UTC, cf_time_units, iso_utc
from ..diagnostics.grid import ellipse_grid, field_grid
from ..diagnostics.tidalellipse import TidalEllipses
from ..diagnostics.timewindow import at_time, data_span_s, span_average
from ..files import atomic_write
from .plots import save_figure
from .plottide import plot_tidal_ellipses
from .writers import field_grid_dataset, grid_variables

__all__ = ["FieldSeries", "ellipse_figures", "field_series", "field_series_dataset", "write_field_series"]

ELLIPSE_QUANTITIES = (  # (attribute of TidalEllipses, variable suffix, units, long name)
    ("semi_major", "semi_major", "m s-1", "semi-major axis (greatest current speed) of the tidal current ellipse"),
    ("semi_minor", "semi_minor", "m s-1", ("semi-minor axis of the tidal current ellipse (positive: the current "
                                           "turns counter-clockwise, negative: clockwise)")),
    ("inclination", "inclination", "degree", ("inclination of the tidal current ellipse's major axis, "
                                              "counter-clockwise from east, in [0, 180)")),
    ("phase", "phase", "degree", ("phase of the tidal current ellipse: lag of the greatest current along the "
                                  "inclination after t = 0 of the model's time axis, in [0, 360)")))


@dataclasses.dataclass(frozen=True)
class FieldSeries:
    """Grids of one time-varying field at times ``times_s`` (T,) s on the model's axis, with the ellipses.

    grids          T :class:`~driftwise.diagnostics.grid.FieldGrid` on the same nodes
    time_mean_s    (start, end) s when the single grid is the time mean over that span, else None
    time_origin_utc the model's time origin (ISO-8601) or None for relative times
    ellipses       {constituent: TidalEllipses with (n_y · n_x,) values}; periods_s {constituent: period s}
    """

    grids: tuple
    times_s: np.ndarray
    time_mean_s: tuple[float, float] | None
    time_origin_utc: str | None
    ellipses: dict
    periods_s: dict


def _time_coordinate(series: FieldSeries) -> dict:
    attrs = {"standard_name": "time", "axis": "T", "units": cf_time_units(UNIX_EPOCH_UTC), "calendar": "standard",
             "units_metadata": "leap_seconds: none", "coverage_content_type": "coordinate",
             "long_name": "valid time of the map"}
    if series.time_origin_utc is None:
        attrs["comment"] = ("the tracks had relative times: the reference date is only the zero of their own clock "
                            "(no calendar date is known)")
    if series.time_mean_s is not None:
        attrs["bounds"] = "time_bnds"
        attrs["long_name"] = "middle of the averaging period"
    return attrs


def _ellipse_variables(series: FieldSeries, like: dict) -> dict:
    """(y_m, x_m) ellipse maps per constituent; ``like`` holds grid_mapping/coordinates attributes to copy."""
    shape = series.grids[0].supported.shape
    out = {}
    for name, ellipses in series.ellipses.items():
        period = float(series.periods_s[name])
        for field, suffix, units, text in ELLIPSE_QUANTITIES:
            unit = "m_s" if units == "m s-1" else "deg"
            mean_name, sd_name = f"{name}_{suffix}_{unit}", f"{name}_{suffix}_sd_{unit}"
            common = {"units": units, "coverage_content_type": "modelResult", "constituent": name,
                      "constituent_period_s": period, **like}
            out[mean_name] = (("y_m", "x_m"), getattr(ellipses, f"{field}_{unit}").reshape(shape),
                              {**common, "long_name": f"{name} {text}", "ancillary_variables": sd_name})
            out[sd_name] = (("y_m", "x_m"), getattr(ellipses, f"{field}_sd_{unit}").reshape(shape),
                            {**common, "long_name": f"posterior standard deviation (delta method) of the {name} {text}"})
    return out


def field_series_dataset(series: FieldSeries):
    """The time-varying field's grids as one xarray Dataset (module docstring), CF-1.11 and ACDD-1.3."""
    first = field_grid_dataset(series.grids[0])
    method = "time: mean" if series.time_mean_s is not None else "time: point"
    data = {}
    for name, _, attrs in grid_variables(series.grids[0]):
        stacked = np.stack([np.asarray(values) for grid in series.grids
                            for n, values, _ in grid_variables(grid) if n == name])
        data[name] = (("time", "y_m", "x_m"), stacked, {**first[name].attrs, "cell_methods": method})
    like = {key: first[name].attrs[key] for key in ("grid_mapping",) if key in first[name].attrs}
    data |= _ellipse_variables(series, like)
    coords = {"time": ("time", np.asarray(series.times_s, np.float64), _time_coordinate(series))}
    if series.time_mean_s is not None:
        data["time_bnds"] = (("time", "nv"), np.asarray([series.time_mean_s], np.float64), {})
    dataset = first.drop_vars([n for n, _, _ in grid_variables(series.grids[0])]).assign(data).assign_coords(coords)
    dataset.attrs |= _time_attributes(series)
    geo = "lon_deg" in first.variables
    for name in data:
        if geo and name != "time_bnds":
            dataset[name].encoding["coordinates"] = "lon_deg lat_deg"
    dataset["time"].encoding["_FillValue"] = None
    if "time_bnds" in dataset.variables:
        dataset["time_bnds"].encoding["_FillValue"] = None
    return dataset


def _time_attributes(series: FieldSeries) -> dict:
    times = np.asarray(series.times_s, np.float64)
    low, high = series.time_mean_s if series.time_mean_s is not None else (times.min(), times.max())
    attrs = {"time_axis": "seconds since 1970-01-01T00:00:00Z (ISO-8601 track times)" if series.time_origin_utc
             else "the tracks' own clock in seconds (relative times; the 1970-01-01 reference is only its zero)",
             "tidal_constituents": " ".join(series.ellipses) or "none",
             "time_slices": ("one slice: the time mean over the data's time span (time_bnds), the mean over that "
                             "span of the velocity, divergence and vorticity posteriors")
             if series.time_mean_s is not None else "the field at each listed instant"}
    if series.time_origin_utc is not None:
        attrs |= {"time_coverage_start": iso_utc(series.time_origin_utc, float(low)),
                  "time_coverage_end": iso_utc(series.time_origin_utc, float(high))}
    return attrs


def write_field_series(series: FieldSeries, path) -> Path:
    """Write :func:`field_series_dataset` as NetCDF-4 (h5netcdf engine), atomically."""
    dataset = field_series_dataset(series)
    return atomic_write(path, lambda tmp: dataset.to_netcdf(tmp, engine="h5netcdf"))


def field_series(field, *, spacing_m: float | None = None, times_s=None) -> FieldSeries:
    """Grid a time-varying ``field`` at ``times_s`` (s on its time axis), or, when None, its time mean over the
    data's time span (:func:`driftwise.diagnostics.timewindow.span_average`); with the tidal ellipses of every
    constituent on the same nodes (:func:`driftwise.diagnostics.grid.ellipse_grid`)."""
    if times_s is None:
        span = data_span_s(field)
        grids = (field_grid(field, spacing_m=spacing_m, window=span_average(field, *span)),)
        times, mean_span = np.array([0.5 * (span[0] + span[1])]), span
    else:
        times, mean_span = np.asarray(times_s, np.float64).reshape(-1), None
        grids = tuple(field_grid(field, spacing_m=spacing_m, window=at_time(t)) for t in times)
    periods = {name: 2.0 * np.pi / omega for name, omega in field.constituents.items()}
    return FieldSeries(grids, times, mean_span, field.data_summary.get("time_origin_utc"),
                       ellipse_grid(field, grids[0]), periods)


def ellipse_figures(series: FieldSeries, folder, *, per_side: int = 15, data_position_m=None) -> list[Path]:
    """One PNG of tidal current ellipses per constituent (:func:`plottide.plot_tidal_ellipses`) on every k-th grid
    node, k chosen so that at most ``per_side`` ellipses lie along the longer side; returns the paths written."""
    grid = series.grids[0]
    step = max(1, int(np.ceil(max(grid.supported.shape) / per_side)))
    gx, gy = np.meshgrid(grid.x_m, grid.y_m)
    keep = np.zeros(grid.supported.shape, dtype=bool)
    keep[::step, ::step] = True
    centres = np.column_stack([gx[keep], gy[keep]])
    paths = []
    for name, ellipses in series.ellipses.items():
        chosen = TidalEllipses(*(np.asarray(value)[keep.ravel()] for value in ellipses.__dict__.values()))
        figure = plot_tidal_ellipses(centres, chosen, constituent=name, period_s=series.periods_s[name],
                                     frame=grid.frame, data_position_m=data_position_m)
        paths.append(save_figure(figure, Path(folder) / f"tidal_ellipses_{name}.png"))
    return paths
