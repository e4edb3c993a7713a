"""CF trajectory NetCDF files (featureType = trajectory) as one row per fix.

Layouts (CF Conventions 1.8, §9.3 and appendix H.4): the multidimensional
array (H.4.1: positions on (trajectory, obs); time on (trajectory, obs) in the
incomplete form, on (obs) or a ``time(time)`` coordinate in the orthogonal
form), the single trajectory (H.4.2: no trajectory dimension), the contiguous
ragged array (H.4.3: a count variable whose ``sample_dimension`` names the obs
dimension) and the indexed ragged array (H.4.4: an index variable whose
``instance_dimension`` names the trajectory dimension).

Which variables are the positions does not depend on their names.  A variable
on the observation dimension(s) is taken, in this order of precedence, as

1. longitude/latitude by ``standard_name`` (``longitude``, ``latitude``), or
   x/y in a projection by ``projection_x_coordinate``/``projection_y_coordinate``;
2. longitude/latitude by ``units``: ``degrees_east`` and the aliases CF §4.2
   accepts (``degree_east``, ``degree_E``, ``degrees_E``, ``degreeE``,
   ``degreesE``), ``degrees_north`` and the §4.1 aliases;
3. x/y by ``axis`` = ``X``/``Y`` (with units that say metres or degrees);
4. by name: lon/longitude, lat/latitude, x/x_m, y/y_m.

Positions must be placeable in degrees or metres: x/y need length units
(m, km, …; the name ``x_m``/``y_m`` counts as metres); without units, or with
plain ``degrees`` (rotated-pole coordinates, CF §4.1–4.2), the file is refused
naming the variable.  A time on the observation dimension(s) is CF-decoded;
a plain number is seconds, or is scaled by its units (``h``, ``min``, ``d``).

Missing values (``_FillValue``/``missing_value``, NaN, NaT): an observation
whose time and positions are all missing is padding (the unused slots of the
multidimensional layout, CF §9.3.2) and is skipped with a notice; an
observation with some but not all of them missing is a masked fix and is
dropped with a warning that gives the count and the first observation index
(it is not refused: one bad sensor sample should not stop a whole file).
Errors found later in the rows of this table name the trajectory and
observation index, not a spreadsheet row (:meth:`CFTable.naming_observations`).
"""

from __future__ import annotations

from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
import pandas as pd

from .trackfile import TrackError
from .trackqc import QCAction, plural

LON_UNITS = frozenset(u.lower() for u in ("degrees_east", "degree_east", "degree_E", "degrees_E", "degreeE",
                                          "degreesE"))  # CF 1.8 §4.2
LAT_UNITS = frozenset(u.lower() for u in ("degrees_north", "degree_north", "degree_N", "degrees_N", "degreeN",
                                          "degreesN"))  # CF 1.8 §4.1
PLAIN_DEGREES = frozenset(("degree", "degrees", "deg"))
LENGTH_UNITS_M = {"m": 1.0, "meter": 1.0, "meters": 1.0, "metre": 1.0, "metres": 1.0,
                  "km": 1000.0, "kilometer": 1000.0, "kilometers": 1000.0, "kilometre": 1000.0, "kilometres": 1000.0}
DURATION_UNITS_S = {"s": 1.0, "sec": 1.0, "secs": 1.0, "second": 1.0, "seconds": 1.0, "min": 60.0,
                    "minute": 60.0, "minutes": 60.0, "h": 3600.0, "hr": 3600.0, "hrs": 3600.0, "hour": 3600.0,
                    "hours": 3600.0, "d": 86400.0, "day": 86400.0, "days": 86400.0}
_BY_STANDARD_NAME = {"longitude": "lon", "latitude": "lat", "projection_x_coordinate": "x",
                     "projection_y_coordinate": "y", "time": "time", "altitude": "z", "height": "z"}
_BY_NAME = {"lon": "lon", "longitude": "lon", "lat": "lat", "latitude": "lat", "x": "x", "x_m": "x",
            "y": "y", "y_m": "y", "z": "z", "z_m": "z", "time": "time"}
_WHAT = {"lon": "longitude", "lat": "latitude", "x": "x position", "y": "y position"}


@dataclass(frozen=True)
class CFTable:
    """The fixes of a CF trajectory file and where each came from.

    ``frame``: one row per kept fix with columns ``track_id``, ``time``,
    ``lon``/``lat`` (degrees) and/or ``x``/``y`` (metres), optional ``z``,
    then the other observation variables under their own names.
    ``trajectory``, ``observation``: (n,) int64 indices of each row in the file
    (for the ragged layout ``observation`` is the index along the sample dimension).
    ``variables``: table column -> the NetCDF variable it came from.
    """

    frame: pd.DataFrame
    notices: tuple[QCAction, ...]
    trajectory: np.ndarray
    observation: np.ndarray
    ragged: bool
    variables: dict[str, str]

    def place(self, row: int) -> str:
        """Where table row ``row`` (2 = first fix, as :class:`TrackError` counts) is in the file."""
        k = row - 2
        if self.ragged:
            return f"observation index {self.observation[k]}"
        return f"trajectory index {self.trajectory[k]}, observation index {self.observation[k]}"

    @contextmanager
    def naming_observations(self) -> Iterator[None]:
        """Re-raise a TrackError about a table row as one naming the trajectory/observation index."""
        try:
            yield
        except TrackError as err:
            if err.row is None or not 0 <= err.row - 2 < self.observation.size:
                raise
            column = self.variables.get(err.column, err.column)
            raise TrackError(err.file, err.problem, column=column, where=self.place(err.row)) from None


def read_netcdf_frame(path: Path, file: str) -> CFTable:
    """Read a CF trajectory file (see the module docstring); a TrackError names what cannot be read."""
    import xarray as xr  # a third-party import kept lazy: `driftwise --help` should not pay for it

    try:
        ds = xr.open_dataset(path, decode_timedelta=False)
    except Exception as err:  # xarray raises many types for unreadable files
        raise TrackError(file, f"is not a readable NetCDF file ({type(err).__name__}: {err})") from None
    with ds:
        feature = str(ds.attrs.get("featureType", "trajectory"))
        if feature.lower() != "trajectory":
            raise TrackError(file, f"has featureType {feature!r}; driftwise reads CF trajectory files")
        for attribute, reader in (("sample_dimension", _ragged_table), ("instance_dimension", _indexed_table)):
            found = [name for name, v in ds.variables.items() if attribute in v.attrs]
            if found:
                return reader(ds, found[0], file)
        return _multidim_table(ds, file)


# ---------------------------------------------------------------- which variable is what
def _role_of(name: str, attrs: dict) -> tuple[str, int, str] | None:
    """``(role, rank, how)`` of one variable: rank 0 standard_name, 1 units, 2 axis, 3 name (lower wins)."""
    standard = str(attrs.get("standard_name", "")).strip()
    units = str(attrs.get("units", "")).strip().lower()
    axis = str(attrs.get("axis", "")).strip().upper()
    if standard in _BY_STANDARD_NAME:
        return _BY_STANDARD_NAME[standard], 0, f"standard_name {standard!r}"
    if units in LON_UNITS or units in LAT_UNITS:
        return ("lon" if units in LON_UNITS else "lat"), 1, f"units {attrs['units']!r}"
    if axis in ("X", "Y", "T"):
        return {"X": "x", "Y": "y", "T": "time"}[axis], 2, f"axis {axis!r}"
    if name.lower() in _BY_NAME:
        return _BY_NAME[name.lower()], 3, "its name"
    return None


def _assign_roles(ds, names: list[str]) -> dict[str, tuple[str, int, str]]:
    """role -> (variable name, rank, how) for the best-ranked variable of each role among ``names``."""
    best: dict[str, tuple[tuple, str, int, str]] = {}
    for order, name in enumerate(names):
        found = _role_of(name, ds[name].attrs)
        if found is None:
            continue
        role, rank, how = found
        key = (rank, _BY_NAME.get(name.lower()) != role, order)
        if role not in best or key < best[role][0]:
            best[role] = (key, name, rank, how)
    return {role: (name, rank, how) for role, (_, name, rank, how) in best.items()}


def _position_scale(ds, role: str, found: tuple[str, int, str], file: str) -> float:
    """The factor to degrees (lon/lat) or metres (x/y) for a position variable, or a TrackError naming it."""
    name, rank, how = found
    raw = str(ds[name].attrs.get("units", "")).strip()
    units = raw.lower()
    if role in ("lon", "lat"):
        if units in (LON_UNITS if role == "lon" else LAT_UNITS) or (rank in (0, 3) and units in PLAIN_DEGREES | {""}):
            return 1.0
        raise TrackError(file, f"variable {name!r} is a {_WHAT[role]} by {how} but has units {raw!r}; expected "
                         f"{'degrees_east' if role == 'lon' else 'degrees_north'} (CF §4.1–4.2)", column=name)
    if units in LENGTH_UNITS_M:
        return LENGTH_UNITS_M[units]
    if units == "" and name.lower() in ("x_m", "y_m"):
        return 1.0
    if units in PLAIN_DEGREES:
        problem = (f"has units {raw!r}, which CF §4.1–4.2 reserve for rotated-pole coordinates; driftwise needs "
                   f"true longitude/latitude (units degrees_east/degrees_north) or metres")
    elif units == "":
        problem = "has no units, so its positions cannot be placed in metres or degrees"
    else:
        problem = f"has units {raw!r}, which are neither a length (m, km) nor degrees_east/degrees_north"
    raise TrackError(file, f"variable {name!r} ({_WHAT[role]} by {how}) {problem}; set its units attribute to "
                     "'m' or to 'degrees_east'/'degrees_north'", column=name)


def _positions(ds, roles: dict, file: str) -> dict[str, tuple[str, float]]:
    """role -> (variable, scale) for the horizontal positions (lon/lat when both pairs are there; the other
    pair stays an extra column); a TrackError if no usable pair is there."""
    pairs = [p for p in (("lon", "lat"), ("x", "y")) if all(r in roles for r in p)]
    lone = [r for r in ("lon", "lat", "x", "y") if r in roles and not any(r in p for p in pairs)]
    if not pairs:
        have = ", ".join(f"{roles[r][0]!r} ({_WHAT[r]} by {roles[r][2]})" for r in lone) or "none"
        raise TrackError(file, "has no pair of position variables (longitude and latitude, or x and y) on the "
                         f"observation dimension; found {have}")
    return {role: (roles[role][0], _position_scale(ds, role, roles[role], file)) for role in pairs[0]}


def _time_values(ds, name: str, file: str) -> np.ndarray:
    """The time variable's values: datetime64 as decoded, or float seconds (scaled by plain duration units)."""
    var = ds[name]
    if var.dtype.kind == "M":
        return var.values
    raw = str(var.attrs.get("units", var.encoding.get("units", ""))).strip()
    if var.dtype.kind not in "iuf":
        calendar = var.attrs.get("calendar", var.encoding.get("calendar", "standard"))
        raise TrackError(file, f"time variable {name!r} (units {raw!r}, calendar {calendar!r}) cannot be read as "
                         "times of the standard (Gregorian) calendar", column=name)
    if raw and raw.lower() not in DURATION_UNITS_S:
        raise TrackError(file, f"time variable {name!r} has units {raw!r}, which are neither a readable "
                         "'<unit> since <date>' nor a duration (s, min, h, d)", column=name)
    return var.values.astype(np.float64) * DURATION_UNITS_S.get(raw.lower(), 1.0)


def _trajectory_ids(ds, name: str | None, n: int, file: str) -> np.ndarray:
    """(n,) the trajectory ids as text: from the ``cf_role = trajectory_id`` variable, else 0, 1, …"""
    if name is None:
        return np.array([str(i) for i in range(n)], dtype=object)
    values = np.atleast_1d(ds[name].values)
    if values.dtype.kind == "S":
        values = np.char.decode(values, "utf-8")
    if values.dtype.kind in "SU" and (values.ndim == 2 or (n == 1 and values.size > 1)):  # char arrays
        values = np.array(["".join(map(str, row)) for row in values.reshape(n, -1)])
    if values.shape != (n,):
        raise TrackError(file, f"the trajectory id variable {name!r} has shape {values.shape}; expected one id "
                         f"for each of the {n} trajectories", column=name)
    return np.array([str(v).strip() for v in values], dtype=object)


def _track_id_variable(ds) -> str | None:
    return next((name for name, v in ds.variables.items() if v.attrs.get("cf_role") == "trajectory_id"), None)


# ---------------------------------------------------------------- layouts
def _ragged_table(ds, count_name: str, file: str) -> CFTable:
    count_var = ds[count_name]
    obs_dim = count_var.attrs["sample_dimension"]
    counts = np.asarray(count_var.values, dtype=np.int64)
    if counts.sum() != ds.sizes.get(obs_dim, -1):
        raise TrackError(file, f"the row sizes in {count_name!r} add up to {counts.sum()} fixes but dimension "
                         f"{obs_dim!r} has {ds.sizes.get(obs_dim)}")
    trajectory = np.repeat(np.arange(counts.size, dtype=np.int64), counts)
    return _sample_table(ds, obs_dim, count_name, trajectory, counts.size, file)


def _indexed_table(ds, index_name: str, file: str) -> CFTable:
    """The indexed ragged array (CF H.4.4): each observation's trajectory index in the variable whose
    ``instance_dimension`` attribute names the trajectory dimension; observations in any order."""
    var = ds[index_name]
    n_traj = ds.sizes.get(str(var.attrs["instance_dimension"]))
    if var.ndim != 1 or n_traj is None:
        raise TrackError(file, f"the index variable {index_name!r} must be one-dimensional and its "
                         f"instance_dimension {var.attrs['instance_dimension']!r} a dimension of the file")
    index = np.asarray(var.values, dtype=np.float64)
    bad = ~np.isfinite(index) | (index < 0) | (index >= n_traj) | (index != np.round(index))
    if bad.any():
        k = int(np.argmax(bad))
        raise TrackError(file, f"the trajectory index {index[k]:g} is not one of the {n_traj} trajectories "
                         f"(0…{n_traj - 1})", where=f"observation index {k}", column=index_name)
    return _sample_table(ds, var.dims[0], index_name, index.astype(np.int64), n_traj, file)


def _sample_table(ds, obs_dim: str, skip: str | None, trajectory: np.ndarray, n_traj: int, file: str) -> CFTable:
    """The table of the variables on the sample dimension ``obs_dim`` (but ``skip``), fix k in trajectory
    ``trajectory[k]``: the ragged layouts and the single trajectory."""
    names = [n for n, v in ds.variables.items() if v.dims == (obs_dim,) and n != skip]
    ids = _trajectory_ids(ds, _track_id_variable(ds), n_traj, file)[trajectory]
    columns, missing, sources = _columns(ds, names, file, lambda values: values)
    observation = np.arange(trajectory.size, dtype=np.int64)
    return _drop_missing({"track_id": ids, **columns}, missing, trajectory, observation, file, ragged=True,
                         sources=sources)


def _single_table(ds, file: str) -> CFTable:
    """A single trajectory (CF H.4.2): no trajectory dimension, time and positions on one dimension."""
    positional = [n for n, v in ds.variables.items() if v.ndim == 1 and _is_position(n, v.attrs)]
    if not positional:
        raise TrackError(file, "is not a CF trajectory file driftwise understands: no count variable with "
                         "'sample_dimension', no index variable with 'instance_dimension' and no position "
                         "variables on (trajectory, obs) or on one observation dimension")
    obs_dim = ds[positional[0]].dims[0]
    return _sample_table(ds, obs_dim, None, np.zeros(ds.sizes[obs_dim], dtype=np.int64), 1, file)


def _is_position(name: str, attrs: dict) -> bool:
    return (_role_of(name, attrs) or ("",))[0] in ("lon", "lat", "x", "y")


def _multidim_table(ds, file: str) -> CFTable:
    two_d = [n for n, v in ds.variables.items() if v.ndim == 2 and v.attrs.get("cf_role") != "trajectory_id"]
    positional = [n for n in two_d if _is_position(n, ds[n].attrs)]
    if not positional:
        return _single_table(ds, file)
    traj_dim, obs_dim = ds[positional[0]].dims
    shape = (ds.sizes[traj_dim], ds.sizes[obs_dim])
    names = [n for n, v in ds.variables.items() if v.dims == (traj_dim, obs_dim) and n in two_d]
    names += [n for n, v in ds.variables.items() if v.dims == (obs_dim,) and (_role_of(n, v.attrs) or ("",))[0]
              == "time"]
    columns, missing, sources = _columns(ds, names, file, lambda values: np.broadcast_to(values, shape).reshape(-1))
    trajectory, observation = (a.reshape(-1) for a in np.indices(shape, dtype=np.int64))
    ids = _trajectory_ids(ds, _track_id_variable(ds), shape[0], file)[trajectory]
    return _drop_missing({"track_id": ids, **columns}, missing, trajectory, observation, file, ragged=False,
                         sources=sources)


def _columns(ds, names: list[str], file: str, flat) -> tuple[dict[str, np.ndarray], np.ndarray, dict[str, str]]:
    """Table columns from the observation variables ``names``, the (k, n) missing-value mask of time and
    the horizontal positions, and column -> variable (``flat`` turns a variable's values into (n,) values)."""
    roles = _assign_roles(ds, names)
    if "time" not in roles:
        raise TrackError(file, "has no time variable on the observation dimension (looked for standard_name "
                         "'time', axis 'T' or the name 'time')")
    positions = _positions(ds, roles, file)
    time_name = roles["time"][0]
    time = flat(_time_values(ds, time_name, file))
    columns, sources = {"time": time}, {"time": time_name}
    for role, (name, scale) in positions.items():
        columns[role], sources[role] = flat(ds[name].values).astype(np.float64) * scale, name
    if "z" in roles:
        columns["z"], sources["z"] = flat(ds[roles["z"][0]].values), roles["z"][0]
    for name in names:
        if name not in sources.values():
            column = name if name not in columns else f"{name}_variable"
            columns[column], sources[column] = flat(ds[name].values), name
    missing = np.vstack([pd.isna(columns["time"])] + [np.isnan(columns[r]) for r in positions])
    return columns, missing, sources


def _drop_missing(columns: dict, missing: np.ndarray, trajectory: np.ndarray, observation: np.ndarray, file: str,
                  *, ragged: bool, sources: dict[str, str]) -> CFTable:
    """Skip padding (everything missing) and drop masked fixes (some missing), with a QC action for each."""
    padding = missing.all(axis=0)
    masked = missing.any(axis=0) & ~padding
    notices = []
    if padding.any() and not ragged:
        n = int(padding.sum())
        notices.append(QCAction("padding", n, f"{file}: skipped {plural(n, 'empty observation slot')} (time and "
                                "position all missing: the padding of the multidimensional layout)"))
    if ragged:
        masked |= padding
    if masked.any():
        n, first = int(masked.sum()), int(np.argmax(masked))
        where = f"observation index {observation[first]}" if ragged else \
            f"trajectory index {trajectory[first]}, observation index {observation[first]}"
        notices.append(QCAction("masked_fixes", n, f"{file}: dropped {plural(n, 'fix')} whose time or position is "
                                f"missing (fill value), first at {where}", "warning"))
    keep = ~(padding | masked)
    frame = pd.DataFrame({k: np.asarray(v)[keep] for k, v in columns.items()})
    return CFTable(frame, tuple(notices), trajectory[keep], observation[keep], ragged, sources)
