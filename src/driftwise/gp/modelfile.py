"""Model files: one ``.npz`` per fitted field (arrays + JSON metadata), never a pickle.


Members: every array leaf of the field's parameters as ``params.<path>`` and ``metadata``, a 0-d
unicode array holding JSON (schema version, kernel, hyperparameters with units, frame, data summary,
fit record, driftwise version, SHA-256 of the arrays).  ``driftwise.save`` / ``driftwise.load``.

Steady fields are written as schema version 1, exactly as before.  Time-varying fields
(:mod:`driftwise.gp.temporal`) are schema version 2: the same members plus the slow part's inducing
arrays, and ``kernel.temporal`` in the metadata (constituents, ω_c, periods, time origin t₀ in s on the
track file's axis, the phase reference, whether there is a slow part and whether its time scale was
learned).  A reader of version 1 refuses them with a clear message instead of misreading them.
"""

from __future__ import annotations

import hashlib
import json
import zipfile
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError
from ..files import atomic_write
from ..version import __version__
from .background import describe as describe_background
from .field import FlowField, init_params
from .temporal import TemporalStart

MODEL_FORMAT = "driftwise-model"
MODEL_SCHEMA_VERSION = 1            # steady fields
TEMPORAL_SCHEMA_VERSION = 2         # time-varying fields
READABLE_SCHEMA_VERSIONS = (MODEL_SCHEMA_VERSION, TEMPORAL_SCHEMA_VERSION)
_KERNEL_STRUCTURE = {
    "helmholtz": "K = K_df(σ₁, ℓ₁) + K_cf(σ₂, ℓ₂): independent divergence-free and curl-free parts",
    "divergence-free": "K_df(r) = ℓ²/(λ(d−1)) (H_k(r) − tr H_k(r) I)",
    "curl-free": "K_cf(r) = −(ℓ²/λ) H_k(r)",
    "independent": "K(r) = k(r) I",
}
_UNIT_SUFFIXES = (("_m2_s", "m2/s"), ("_m_s", "m/s"), ("_per_s", "1/s"), ("_m", "m"), ("_s", "s"))


def _structure(field) -> str:
    text = _KERNEL_STRUCTURE[field.kernel_family]
    if field.params.kernel.backgrounds():
        text += "; plus K_b(x, y), a background flow: uniform velocity and linear field about centre_m"
    if field.is_time_varying:
        text = (f"steady part: {text}; plus per constituent c: K_c(x - x') cos(omega_c (t - t')) (amplitude fields "
                "a_c, b_c of the same family); plus the slow part K_s(x - x') k_T(t - t') (Matern-3/2 in t) if present")
    return text


class ModelFileError(InputError):
    """A model file that cannot be read: missing, truncated, corrupted, foreign or of another schema."""


def _param_arrays(params) -> dict:
    """``params.<path>`` → numpy array for every leaf of a FieldParams pytree."""
    flat, _ = jax.tree_util.tree_flatten_with_path(params)
    return {"params" + jax.tree_util.keystr(path): np.asarray(leaf) for path, leaf in flat}


def arrays_sha256(arrays: dict) -> str:
    """SHA-256 over the arrays in name order: name, dtype, shape and the C-ordered bytes of each."""
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

    hyper = field.hyperparameters
    kernel = {"family": field.kernel_family, "base": field.kernel_base, "dim": field.dim,
              "n_inducing": int(field.params.n_inducing), "structure": _structure(field),
              "parametrisation": "log of each positive hyperparameter; whitened q(w) = N(m, SSᵀ)",
              "background": describe_background(field.params.kernel.backgrounds())}
    if field.is_time_varying:
        kernel["temporal"] = field.params.kernel.describe()
    return {
        "format": MODEL_FORMAT, "driftwise_version": __version__,
        "schema_version": TEMPORAL_SCHEMA_VERSION if field.is_time_varying else MODEL_SCHEMA_VERSION,
        "kernel": kernel,
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
    arrays = _param_arrays(field.params)
    meta = model_metadata(field, arrays)
    text = json.dumps(meta, allow_nan=False, sort_keys=True, default=float)

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as handle:
            np.savez_compressed(handle, metadata=np.array(text), **arrays)

    return atomic_write(path, write)


def _open_model_npz(path: Path):
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
    if version not in READABLE_SCHEMA_VERSIONS:
        raise ModelFileError(f"{path}: model schema version {version!r}, but this driftwise reads versions "
                             f"{', '.join(map(str, READABLE_SCHEMA_VERSIONS))}; refit the model or use the matching "
                             "driftwise release")
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

    kernel = meta.get("kernel")
    try:
        background = kernel.get("background") or {"choice": "none", "centre_m": None}   # none before the background
        temporal = kernel.get("temporal")
        if temporal is not None:
            temporal = TemporalStart.from_description(temporal, arrays.get("params.slow_inducing_m"),
                                                      arrays.get("params.slow_inducing_time_s"))
        template = init_params(kernel["family"], int(kernel["dim"]), arrays["params.inducing_m"],
                               velocity_scale_m_s=1.0, length_scale_m=1.0, base=kernel["base"],
                               background=background["choice"], centre_m=background["centre_m"], temporal=temporal)
    except (KeyError, TypeError, ValueError, AttributeError, InputError) as err:
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


