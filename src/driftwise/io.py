"""File formats: model files and product writers, all written atomically.

Every writer goes through :func:`atomic_write`: the bytes land in a temporary
file in the destination folder, are flushed to disk, and replace the target by
``os.replace`` — a reader never sees a half-written file and an interrupted
write never destroys the previous version.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Callable

from .cfproducts import CAUTION, crs_attributes, discovery_attributes, spread_dataset
from .errors import InputError
from .spreadgeojson import spread_geojson
from .utctime import iso_utc


def atomic_write(path: str | os.PathLike, write: Callable[[Path], None]) -> Path:
    """Call ``write(tmp_path)`` and atomically rename the result onto ``path``.

    ``write`` receives a temporary path in the same folder (same filesystem, so the
    rename is atomic) and must create the file there.  The folder is created if needed.
    """
    target = Path(path)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(f"{target}: cannot create the output folder ({err.strerror})") from None
    if target.is_dir():
        raise InputError(f"{target}: is a folder; give a file name to write")
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp" + target.suffix, dir=target.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        write(tmp)
        with open(tmp, "rb+") as handle:
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o666 & ~_current_umask())  # mkstemp makes 0600; give the usual permissions
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()
    return target


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    return atomic_write(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


# ---------------------------------------------------------------- spread products (spread.py)
SPREAD_SUFFIXES = (".json", ".csv", ".nc", ".geojson")


def _floats(array) -> list:
    """Nested lists of floats with NaN/inf as None (JSON has no NaN)."""
    import numpy as np

    values = np.asarray(array, dtype=np.float64)
    return np.where(np.isfinite(values), values, None).tolist() if values.ndim else (
        float(values) if np.isfinite(values) else None)


def spread_to_dict(spread) -> dict:
    """The JSON contract of a Spread: ``method``, ``time_origin_utc`` (ISO-8601 of the model's time zero, or
    None), ``releases`` (each ``name``, ``start`` (d,) m, ``start_time_s``, ``times_s`` (T,) since the release,
    ``mean`` (T, d) m, ``covariance`` (T, d, d) m², ``ellipses`` per level with ``bearing_deg`` (clockwise
    from north) and ``angle_ccw_from_east_deg``, ``start_time_utc``/``times_utc`` when the time origin is
    known, ``mean_lonlat``/``start_lonlat`` for a lon/lat model, ``probability_inside`` and
    ``first_arrival_s`` with a polygon)."""
    releases = [_release_dict(spread, r) for r in range(len(spread.releases))]
    out = {"method": spread.method, "dimension": spread.dim,
           "frame": spread.frame.to_dict() if spread.frame is not None else None,
           "time_origin_utc": spread.time_origin_utc,
           "units": {"times_s": "s since the release", "mean": "m (local frame)", "covariance": "m2",
                     "mean_lonlat": "degrees (lon, lat, WGS84)", "times_utc": "ISO-8601 UTC",
                     "bearing_deg": "degrees clockwise from north (true north for a lon/lat model, else local +y), "
                                    "in [0, 180): the major axis has no sense",
                     "angle_ccw_from_east_deg": "degrees counter-clockwise from local +x (east), in (-90, 90]"},
           "releases": releases}
    if spread.polygon_m is not None:
        out["polygon_m"] = _floats(spread.polygon_m)
        out["threshold"] = spread.threshold
    return out


def _release_dict(spread, r: int) -> dict:
    rel = spread.releases[r]
    entry = {"name": rel.name, "start": _floats(rel.start_m), "start_time_s": rel.start_time_s,
             "times_s": _floats(spread.times_s), "mean": _floats(spread.means[r]), "covariance": _floats(spread.covs[r])}
    if spread.time_origin_utc is not None:
        entry["start_time_utc"], entry["times_utc"] = spread.start_times_utc[r], spread.times_utc(r)
    if spread.mean_lonlat is not None:
        entry["start_lonlat"] = _floats(spread.mean_lonlat[r, 0])
        entry["mean_lonlat"] = _floats(spread.mean_lonlat[r])
    bearing, angle = _floats(spread.bearing_deg[r]), _floats(spread.orientation_deg[r])
    entry["ellipses"] = [{"level": level, "semi_major_m": _floats(spread.semi_axes_m[r, :, i, 0]),
                          "semi_minor_m": _floats(spread.semi_axes_m[r, :, i, 1]),
                          "bearing_deg": bearing, "angle_ccw_from_east_deg": angle}
                         for i, level in enumerate(spread.levels)]
    if spread.probability is not None:
        entry["probability_inside"] = _floats(spread.probability[r])
    if spread.first_arrival_s is not None:
        arrival = spread.first_arrival_s[r]
        entry["first_arrival_s"] = arrival
        if spread.time_origin_utc is not None:
            entry["first_arrival_utc"] = None if arrival is None else iso_utc(spread.time_origin_utc,
                                                                              rel.start_time_s + arrival)
    return entry


def write_spread_json(spread, path) -> Path:
    """Write :func:`spread_to_dict` as one JSON object (atomically)."""
    import json

    return atomic_write_text(path, json.dumps(spread_to_dict(spread), allow_nan=False, indent=1) + "\n")


def _spread_rows(spread):
    from .tracks import csv_safe_text   # a leading = + - @ in a text cell gets a ' (formula injection)

    axes_names = "xyz"[: spread.dim]
    pairs = [(i, j) for i in range(spread.dim) for j in range(i, spread.dim)]
    absolute = spread.time_origin_utc is not None
    header = ["release", "start_time_s", "time_s"] + (["start_time_utc", "time_utc"] if absolute else [])
    header += [f"{a}_m" for a in axes_names] + [f"cov_{axes_names[i]}{axes_names[j]}_m2" for i, j in pairs]
    header += ["semi_major_50_m", "semi_minor_50_m", "semi_major_95_m", "semi_minor_95_m", "bearing_deg",
               "angle_ccw_from_east_deg"]
    header += ["lon_deg", "lat_deg"] if spread.mean_lonlat is not None else []
    header += ["probability_inside"] if spread.probability is not None else []
    i50, i95 = spread.levels.index(0.5), spread.levels.index(0.95)
    bearing = spread.bearing_deg
    yield header
    for r, rel in enumerate(spread.releases):
        stamps = spread.times_utc(r) if absolute else None
        for t, time_s in enumerate(spread.times_s):
            row = [csv_safe_text(rel.name), rel.start_time_s, float(time_s)]
            row += [spread.start_times_utc[r], stamps[t]] if absolute else []
            row += list(spread.means[r, t]) + [spread.covs[r, t, i, j] for i, j in pairs]
            row += list(spread.semi_axes_m[r, t, i50]) + list(spread.semi_axes_m[r, t, i95])
            row += [bearing[r, t], spread.orientation_deg[r, t]]
            row += list(spread.mean_lonlat[r, t]) if spread.mean_lonlat is not None else []
            row += [spread.probability[r, t]] if spread.probability is not None else []
            yield [cell if isinstance(cell, str) else repr(float(cell)) for cell in row]


def write_spread_csv(spread, path) -> Path:
    """One row per release and output time: release, start_time_s, time_s[, start_time_utc, time_utc (ISO-8601,
    when the model knows its time origin)], x_m, y_m[, z_m], the upper covariance entries (m²), semi-axes of the
    50 % and 95 % ellipses (m), bearing_deg (clockwise from north) and angle_ccw_from_east_deg, lon/lat when known."""
    import csv
    import io as _io

    buffer = _io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerows(_spread_rows(spread))
    return atomic_write_text(path, buffer.getvalue())


def write_spread_netcdf(spread, path) -> Path:
    """Write :func:`cfproducts.spread_dataset` (a CF trajectory file) as NetCDF-4 (h5netcdf engine), atomically."""
    dataset = spread_dataset(spread)
    return atomic_write(path, lambda tmp: dataset.to_netcdf(tmp, engine="h5netcdf"))


def write_spread_geojson(spread, path) -> Path:
    """Write :func:`spread_geojson` (ellipse polygons at each level and mean paths), atomically."""
    import json

    return atomic_write_text(path, json.dumps(spread_geojson(spread), allow_nan=False) + "\n")


def write_spread(spread, path) -> Path:
    """Write a Spread as JSON, CSV, NetCDF or GeoJSON chosen by the suffix of ``path``."""
    writers = {".json": write_spread_json, ".csv": write_spread_csv, ".nc": write_spread_netcdf,
               ".geojson": write_spread_geojson}
    suffix = Path(path).suffix.lower()
    if suffix not in writers:
        raise InputError(f"{path}: unknown output format {suffix!r}; use one of {', '.join(SPREAD_SUFFIXES)}")
    return writers[suffix](spread, path)


# ---------------------------------------------------------------- model files (fit.py)
MODEL_FORMAT = "driftwise-model"
MODEL_SCHEMA_VERSION = 1
_KERNEL_STRUCTURE = {
    "helmholtz": "K = K_df(σ₁, ℓ₁) + K_cf(σ₂, ℓ₂): independent divergence-free and curl-free parts",
    "divergence-free": "K_df(r) = ℓ²/(λ(d−1)) (H_k(r) − tr H_k(r) I)",
    "curl-free": "K_cf(r) = −(ℓ²/λ) H_k(r)",
    "independent": "K(r) = k(r) I",
}
_UNIT_SUFFIXES = (("_m2_s", "m2/s"), ("_m_s", "m/s"), ("_m", "m"), ("_s", "s"))


class ModelFileError(InputError):
    """A model file that cannot be read: missing, truncated, corrupted, foreign or of another schema."""


def _param_arrays(params) -> dict:
    """``params.<path>`` → numpy array for every leaf of a FieldParams pytree."""
    import jax
    import numpy as np

    flat, _ = jax.tree_util.tree_flatten_with_path(params)
    return {"params" + jax.tree_util.keystr(path): np.asarray(leaf) for path, leaf in flat}


def arrays_sha256(arrays: dict) -> str:
    """SHA-256 over the arrays in name order: name, dtype, shape and the C-ordered bytes of each."""
    import hashlib

    import numpy as np

    digest = hashlib.sha256()
    for name in sorted(arrays):
        value = np.ascontiguousarray(arrays[name])
        digest.update(f"{name}|{value.dtype.str}|{value.shape}|".encode())
        digest.update(value.tobytes())
    return digest.hexdigest()


def _unit_of(name: str) -> str:
    return next((unit for suffix, unit in _UNIT_SUFFIXES if name.endswith(suffix)), "1")


def model_metadata(field, arrays: dict) -> dict:
    """The JSON metadata of a model file (schema version 1)."""
    from . import __version__

    hyper = field.hyperparameters
    return {
        "format": MODEL_FORMAT, "schema_version": MODEL_SCHEMA_VERSION, "driftwise_version": __version__,
        "kernel": {"family": field.kernel_family, "base": field.kernel_base, "dim": field.dim,
                   "n_inducing": int(field.params.n_inducing), "structure": _KERNEL_STRUCTURE[field.kernel_family],
                   "parametrisation": "log of each positive hyperparameter; whitened q(w) = N(m, SSᵀ)"},
        "hyperparameters": hyper, "hyperparameter_units": {name: _unit_of(name) for name in hyper},
        "decorrelation_time_s": field.decorrelation_time_s, "position_error_m": field.position_error_m,
        "jitter_multiple": field.jitter_multiple, "frame": field.frame_dict, "units": field.units,
        "data_summary": field.data_summary, "fit": field.fit_info,
        "arrays": {name: {"shape": list(value.shape), "dtype": value.dtype.str} for name, value in arrays.items()},
        "checksum_sha256": arrays_sha256(arrays),
    }


def save_model(field, path) -> Path:
    """Write ``field`` (a FlowField) to one ``.npz`` file, atomically.

    Members: every array leaf of ``field.params`` as ``params.<path>`` and ``metadata``, a
    0-d unicode array holding the JSON of :func:`model_metadata` (schema version, kernel,
    hyperparameters with units, frame, data summary, fit record, driftwise version and
    the SHA-256 of the arrays).  Nothing is pickled; :func:`load_model` reads it back.
    """
    import json

    import numpy as np

    arrays = _param_arrays(field.params)
    meta = model_metadata(field, arrays)
    text = json.dumps(meta, allow_nan=False, sort_keys=True, default=float)

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as handle:
            np.savez_compressed(handle, metadata=np.array(text), **arrays)

    return atomic_write(path, write)


def _open_model_npz(path: Path):
    import zipfile

    import numpy as np

    if not path.exists():
        raise ModelFileError(f"{path}: no such model file")
    if path.is_dir():
        raise ModelFileError(f"{path}: is a folder, not a model file")
    with open(path, "rb") as handle:
        head = handle.read(8)
    if not zipfile.is_zipfile(path):
        if not head:
            raise ModelFileError(f"{path}: the model file is empty")
        if head.startswith(b"PK"):
            raise ModelFileError(f"{path}: the model file is truncated or damaged (its npz archive index is missing)")
        raise ModelFileError(f"{path}: not a driftwise model file (not an npz archive; is it a CSV or another format?)")
    try:
        return np.load(path, allow_pickle=False)
    except Exception as err:  # a damaged zip raises many types
        raise ModelFileError(f"{path}: the model file is damaged and cannot be opened ({type(err).__name__})") from None


def _read_model_file(path: Path) -> tuple[dict, dict]:
    """(metadata, arrays) from a model file, every failure a ModelFileError naming the problem."""
    import json

    with _open_model_npz(path) as npz:
        if "metadata" not in npz.files:
            raise ModelFileError(f"{path}: an npz archive without driftwise metadata (a foreign file?)")
        try:
            members = {name: npz[name] for name in npz.files}
        except Exception as err:  # CRC mismatch, bad npy header, zlib error
            raise ModelFileError(f"{path}: the model file is corrupted; an array cannot be read "
                                 f"({type(err).__name__}: {err})") from None
    try:
        meta = json.loads(str(members.pop("metadata")))
    except (ValueError, TypeError):
        raise ModelFileError(f"{path}: the model metadata is not valid JSON (corrupted file)") from None
    if not isinstance(meta, dict) or meta.get("format") != MODEL_FORMAT:
        raise ModelFileError(f"{path}: an npz archive that is not a driftwise model (no '{MODEL_FORMAT}' marker)")
    version = meta.get("schema_version")
    if version != MODEL_SCHEMA_VERSION:
        raise ModelFileError(f"{path}: model schema version {version!r}, but this driftwise reads version "
                             f"{MODEL_SCHEMA_VERSION}; refit the model or use the matching driftwise release")
    _check_model_arrays(path, meta, members)
    return meta, members


def _check_model_arrays(path: Path, meta: dict, arrays: dict) -> None:
    listed = meta.get("arrays")
    if not isinstance(listed, dict) or set(listed) != set(arrays):
        raise ModelFileError(f"{path}: the arrays in the file do not match those its metadata lists")
    for name, value in arrays.items():
        if list(value.shape) != listed[name].get("shape") or value.dtype.str != listed[name].get("dtype"):
            raise ModelFileError(f"{path}: array {name} has shape {value.shape} and dtype {value.dtype.str}, "
                                 f"but the metadata says {listed[name]}")
    if arrays_sha256(arrays) != meta.get("checksum_sha256"):
        raise ModelFileError(f"{path}: checksum mismatch; the arrays were altered or corrupted after writing")


def _params_from_arrays(path: Path, meta: dict, arrays: dict):
    import jax
    import jax.numpy as jnp
    import numpy as np

    from .field import init_params

    kernel = meta.get("kernel")
    try:
        template = init_params(kernel["family"], int(kernel["dim"]), arrays["params.inducing_m"],
                               velocity_scale_m_s=1.0, length_scale_m=1.0, base=kernel["base"])
    except (KeyError, TypeError, ValueError) as err:
        raise ModelFileError(f"{path}: the kernel description {kernel!r} cannot be rebuilt "
                             f"({type(err).__name__}: {err})") from None
    flat, treedef = jax.tree_util.tree_flatten_with_path(template)
    names = ["params" + jax.tree_util.keystr(p) for p, _ in flat]
    if sorted(names) != sorted(arrays):
        raise ModelFileError(f"{path}: the stored parameters do not fit a {kernel['family']} kernel in "
                             f"{kernel['dim']}-D")
    leaves = []
    for name, (_, leaf) in zip(names, flat):
        value = arrays[name]
        if value.shape != np.shape(leaf) or not np.all(np.isfinite(value)):
            raise ModelFileError(f"{path}: parameter {name} has the wrong shape or non-finite values")
        leaves.append(jnp.asarray(value, dtype=jnp.float64))
    return jax.tree_util.tree_unflatten(treedef, leaves)


def load_model(path):
    """Read a model file written by :func:`save_model` → FlowField (``driftwise.load``).

    Raises :class:`ModelFileError` (an InputError: exit 2 on the command line) naming the
    file and the problem for a missing, empty, truncated, corrupted, checksum-mismatched,
    foreign or wrong-schema file.  Never unpickles.
    """
    from .field import FlowField

    path = Path(path)
    meta, arrays = _read_model_file(path)
    params = _params_from_arrays(path, meta, arrays)
    try:
        field = FlowField.from_params(params, frame=meta["frame"], data_summary=meta["data_summary"],
                                      decorrelation_time_s=meta["decorrelation_time_s"],
                                      position_error_m=meta["position_error_m"], fit_info=meta.get("fit") or None,
                                      jitter_multiple=float(meta["jitter_multiple"]))
        field.frame  # validates the frame description
    except (KeyError, TypeError, ValueError) as err:
        raise ModelFileError(f"{path}: incomplete model metadata ({type(err).__name__}: {err})") from None
    return field


# ---------------------------------------------------------------- gridded field (physics.py, `driftwise map`)
FIELD_GRID_SUFFIXES = (".nc", ".csv")
SUPPORT_MEANING = "unsupported supported"
_GEO_NAMES = {  # CF standard names, checked against the table bundled with compliance-checker (v93); the
    # table has no divergence of sea-water velocity, so divergence carries a long_name only
    "eastward": "eastward_sea_water_velocity", "northward": "northward_sea_water_velocity",
    "vorticity": "ocean_relative_vorticity"}


def _grid_variables(grid) -> list[tuple[str, object, dict]]:
    """(name, (n_y, n_x) array, CF attributes) of every gridded quantity, in output order."""
    import numpy as np

    geo = grid.lon_deg is not None
    out = []
    for c, comp in enumerate(grid.components):
        what = "true-east" if comp == "eastward" else "true-north" if comp == "northward" else f"local-frame {comp}"
        for kind, values in (("", grid.mean_m_s[..., c]), ("_std", grid.std_m_s[..., c])):
            attrs = {"units": "m s-1", "long_name": f"posterior {'standard deviation' if kind else 'mean'} of the "
                                                     f"{what} velocity component", "coverage_content_type": "modelResult"}
            if geo:
                attrs["standard_name"] = _GEO_NAMES[comp] + (" standard_error" if kind else "")
            out.append((f"{comp}_velocity{kind}_m_s", values, attrs))
    for quantity, mean, std, text in (("divergence", grid.divergence_s, grid.divergence_std_s, "divergence ∇·u"),
                                      ("vorticity", grid.vorticity_s, grid.vorticity_std_s,
                                       "relative vorticity ∂v/∂x − ∂u/∂y")):
        for kind, values in (("", mean), ("_std", std)):
            attrs = {"units": "s-1", "long_name": f"posterior {'standard deviation' if kind else 'mean'} of the {text}",
                     "coverage_content_type": "modelResult"}
            if geo and quantity in _GEO_NAMES:
                attrs["standard_name"] = _GEO_NAMES[quantity] + (" standard_error" if kind else "")
            if quantity in grid.reasons:
                attrs["comment"] = "identically zero: " + grid.reasons[quantity]
            out.append((f"{quantity}{kind}_per_s", values, attrs))
    out.append(("variance_ratio", grid.variance_ratio, {
        "units": "1", "long_name": "posterior over prior velocity variance, tr(posterior cov)/tr(prior cov)",
        "coverage_content_type": "qualityInformation"}))
    out.append(("supported", grid.supported.astype("int8"), {
        "long_name": "data support: 1 where the posterior velocity variance is below half the prior variance",
        "flag_values": np.array([0, 1], dtype="int8"), "flag_meanings": SUPPORT_MEANING,
        "coverage_content_type": "qualityInformation"}))
    return out


def field_grid_dataset(grid):
    """A physics.FieldGrid as an xarray Dataset with CF-1.11 and ACDD-1.3 attributes (dims y_m, x_m).

    Coordinates x_m, y_m (projection_x/y_coordinate, m, increasing, no _FillValue); for a lon/lat
    model also 2-D auxiliary lon_deg, lat_deg (named in each variable's ``coordinates`` attribute)
    and a ``crs`` grid mapping (azimuthal_equidistant on WGS 84; CF-1.11 appendix F).
    """
    import json

    import numpy as np
    import xarray as xr

    dims = ("y_m", "x_m")           # coordinate variables named as their dimensions (CF-1.11 §1.3)
    coords = {axis: (axis, np.asarray(getattr(grid, axis), float), {
                  "standard_name": f"projection_{axis[0]}_coordinate", "units": "m", "axis": axis[0].upper(),
                  "long_name": f"{axis[0]} ({'east' if axis[0] == 'x' else 'north'}) in the model's local metric frame",
                  "coverage_content_type": "coordinate"}) for axis in ("x_m", "y_m")}
    data = {name: (dims, np.asarray(values), attrs) for name, values, attrs in _grid_variables(grid)}
    frame = grid.frame.to_dict() if hasattr(grid.frame, "to_dict") else dict(grid.frame or {})
    geo = grid.lon_deg is not None
    if geo:
        for name, values, axis in (("lon_deg", grid.lon_deg, "longitude"), ("lat_deg", grid.lat_deg, "latitude")):
            coords[name] = (dims, values, {"standard_name": axis, "units": f"degrees_{'east' if name[1] == 'o' else 'north'}",
                                           "long_name": f"{axis} (WGS 84)", "coverage_content_type": "coordinate"})
        data["crs"] = ((), np.int32(0), crs_attributes(frame))
        for name, _, attrs in _grid_variables(grid):
            data[name][2]["grid_mapping"] = "crs"
    attrs = discovery_attributes(
        "driftwise gridded flow field",
        "Posterior of a Gaussian-process fit to drifter tracks on a regular grid: mean velocity and its standard "
        "deviation, divergence and relative vorticity with their standard deviations (exact GP derivatives), "
        "and a data-support mask.", "ocean currents, drifter, surface velocity, divergence, vorticity, uncertainty",
        lonlat=(grid.lon_deg, grid.lat_deg) if geo else None)
    attrs.update(kernel_family=grid.kernel_family, frame=json.dumps(frame, sort_keys=True),
                 grid_spacing_m=float(grid.x_m[1] - grid.x_m[0]) if len(grid.x_m) > 1 else 0.0,
                 comment="Posterior of a Gaussian-process fit to drifter tracks; derivatives are exact for the GP. "
                         + CAUTION)
    dataset = xr.Dataset(data, coords=coords, attrs=attrs)
    for name in ("x_m", "y_m", "lon_deg", "lat_deg"):
        if name in dataset.variables:
            dataset[name].encoding["_FillValue"] = None        # no _FillValue on coordinates (CF-1.11 §2.5.1)
    if geo:   # name only the auxiliary coordinates (CF-1.11 §5)
        for name, _, _ in _grid_variables(grid):
            dataset[name].encoding["coordinates"] = "lon_deg lat_deg"
    return dataset


def write_field_grid_netcdf(grid, path) -> Path:
    """Write :func:`field_grid_dataset` as NetCDF-4 (h5netcdf engine), atomically."""
    dataset = field_grid_dataset(grid)
    return atomic_write(path, lambda tmp: dataset.to_netcdf(tmp, engine="h5netcdf"))


def write_field_grid_csv(grid, path) -> Path:
    """One row per grid node: x_m, y_m[, lon_deg, lat_deg], then the NetCDF variables' columns."""
    import csv
    import io as _io

    import numpy as np

    gx, gy = np.meshgrid(np.asarray(grid.x_m, float), np.asarray(grid.y_m, float))
    columns = [("x_m", gx), ("y_m", gy)]
    if grid.lon_deg is not None:
        columns += [("lon_deg", grid.lon_deg), ("lat_deg", grid.lat_deg)]
    columns += [(name, values) for name, values, _ in _grid_variables(grid)]
    buffer = _io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([name for name, _ in columns])
    flat = [np.asarray(values).ravel() for _, values in columns]
    for row in zip(*flat):
        writer.writerow([str(int(v)) if isinstance(v, np.integer) else repr(float(v)) for v in row])
    return atomic_write_text(path, buffer.getvalue())


def write_field_grid(grid, path) -> Path:
    """Write a physics.FieldGrid as NetCDF (``.nc``) or CSV (``.csv``), chosen by the suffix of ``path``."""
    writers = {".nc": write_field_grid_netcdf, ".csv": write_field_grid_csv}
    suffix = Path(path).suffix.lower()
    if suffix not in writers:
        raise InputError(f"{path}: unknown gridded-field format {suffix!r}; use one of {', '.join(FIELD_GRID_SUFFIXES)}")
    return writers[suffix](grid, path)
