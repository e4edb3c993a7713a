"""Model files: one npz (allow_pickle=False) + JSON metadata, atomic, and clear errors on bad files.

The reference for a round trip is the field itself: a loaded model must predict
bit-for-bit what the saved one did.  Every unreadable file must raise
ModelFileError (an InputError) naming the file, and the command line must exit 2
without a traceback.
"""

from __future__ import annotations

import dataclasses
import io
import json
import zipfile

import numpy as np
import pytest

import driftwise
from driftwise.data.frame import Frame
from driftwise.errors import InputError
from driftwise.gp import field as fld
from driftwise.gp.modelfile import MODEL_SCHEMA_VERSION, ModelFileError, arrays_sha256, load_model, save_model


def _field(family="helmholtz", frame=None, seed=0):
    """A FlowField with non-trivial q (random mean, random lower-triangular S) and a fit record."""
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.0, 5000.0, (12, 2))
    params = fld.init_params(family, 2, z, velocity_scale_m_s=0.2, length_scale_m=1500.0,
                             diffusivity_m2_s=3.0, noise_floor_m_s=0.02)
    size = params.q_mean.shape[0]
    sqrt = np.tril(0.1 * rng.standard_normal((size, size)), -1) + np.diag(rng.uniform(0.2, 0.9, size))
    params = dataclasses.replace(params, q_mean=rng.standard_normal(size), q_sqrt_raw=fld.q_sqrt_raw_from(sqrt))
    return fld.FlowField.from_params(
        params, frame=frame or Frame(), decorrelation_time_s=4321.0, position_error_m=10.0,
        data_summary={"n_tracks": 3, "n_observations": 40, "extent_m": {"min": [0, 0], "max": [5000, 5000]}},
        fit_info={"elbo": 12.5, "elbo_history": [1.0, 2.0, 12.5], "decorrelation_time_source": "length_scale/rms_speed"})


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    path = tmp_path_factory.mktemp("models") / "model.npz"
    field = _field()
    save_model(field, path)
    return field, path


def _points():
    return np.random.default_rng(5).uniform(-500.0, 5500.0, (25, 2))


@pytest.mark.parametrize("family", ["helmholtz", "divergence-free", "curl-free", "independent"])
def test_round_trip_predicts_identically(tmp_path, family):
    field = _field(family)
    path = driftwise.save(field, tmp_path / "m.npz")
    loaded = driftwise.load(path)
    mean0, cov0 = field.predict(_points())
    mean1, cov1 = loaded.predict(_points())
    # Same float64 arrays in, same computation: equal to round-off (rtol 1e-12, atol 0).
    np.testing.assert_allclose(mean1, mean0, rtol=1e-12, atol=0.0)
    np.testing.assert_allclose(cov1, cov0, rtol=1e-12, atol=1e-18)
    assert loaded.kernel_family == family
    assert loaded.hyperparameters == pytest.approx(field.hyperparameters, rel=1e-15, abs=0.0)
    assert loaded.decorrelation_time_s == pytest.approx(4321.0, rel=1e-15, abs=0.0)
    assert json.loads(loaded.metadata_json) == json.loads(field.metadata_json)


def test_lonlat_frame_survives(tmp_path):
    frame = Frame("lonlat", -9.0, 44.0)
    loaded = load_model(save_model(_field(frame=frame), tmp_path / "geo.npz"))
    assert loaded.frame == frame
    lon, lat = loaded.frame.to_lonlat(np.array([[0.0, 0.0]]))
    np.testing.assert_allclose([lon[0], lat[0]], [-9.0, 44.0], rtol=0.0, atol=1e-9)


def test_file_is_plain_npz_with_documented_metadata(saved):
    field, path = saved
    with np.load(path, allow_pickle=False) as npz:
        meta = json.loads(str(npz["metadata"]))
        names = [n for n in npz.files if n != "metadata"]
        arrays = {n: npz[n] for n in names}
    assert meta["format"] == "driftwise-model" and meta["schema_version"] == MODEL_SCHEMA_VERSION
    assert meta["driftwise_version"] == driftwise.__version__
    assert meta["kernel"]["family"] == "helmholtz" and meta["kernel"]["dim"] == 2 and meta["kernel"]["n_inducing"] == 12
    assert "K_df" in meta["kernel"]["structure"] and meta["kernel"]["base"] == "squared-exponential"
    assert meta["hyperparameter_units"]["diffusivity_m2_s"] == "m2/s"
    assert meta["hyperparameter_units"]["divergence_free_length_scale_m"] == "m"
    assert meta["hyperparameter_units"]["curl_free_velocity_scale_m_s"] == "m/s"
    assert meta["frame"] == {"kind": "metric"} and meta["units"]["velocity"] == "m/s"
    assert meta["data_summary"]["n_observations"] == 40
    assert meta["fit"]["elbo_history"] == [1.0, 2.0, 12.5]
    assert meta["checksum_sha256"] == arrays_sha256(arrays)
    assert "params.inducing_m" in names and "params.q_sqrt_raw" in names
    assert all(a.dtype == np.float64 for a in arrays.values())


def test_write_is_atomic_and_keeps_the_old_file_on_failure(tmp_path, monkeypatch):
    path = tmp_path / "m.npz"
    save_model(_field(seed=1), path)
    before = path.read_bytes()

    def broken(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(np, "savez_compressed", broken)
    with pytest.raises(OSError, match="disk full"):
        save_model(_field(seed=2), path)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.npz"]  # no temporary left behind


# ---------------------------------------------------------------------------- bad files
def _rewrite(path, target, *, metadata=None, arrays_edit=None):
    """Copy the npz at ``path`` to ``target`` with edited metadata and/or arrays (without updating the checksum)."""
    with np.load(path, allow_pickle=False) as npz:
        members = {n: npz[n] for n in npz.files}
    meta = json.loads(str(members.pop("metadata")))
    if metadata:
        metadata(meta)
    if arrays_edit:
        arrays_edit(members)
    np.savez(target, metadata=np.array(json.dumps(meta)), **members)
    return target


def _bad_files(path, tmp):
    data = path.read_bytes()
    flipped = bytearray(data)
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        info = archive.getinfo("params.q_sqrt_raw.npy")
    start = info.header_offset + 100 + info.compress_size // 2  # well inside the member's compressed bytes
    for k in range(start, start + 64):
        flipped[k] ^= 0xFF
    cases = {
        "missing": (tmp / "nope.npz", "no such model file"),
        "empty": (tmp / "empty.npz", "empty"),
        "truncated": (tmp / "truncated.npz", "truncated"),
        "corrupted": (tmp / "corrupted.npz", "corrupted"),
        "csv_renamed": (tmp / "tracks.npz", "not a driftwise model file"),
        "random_npz": (tmp / "random.npz", "without driftwise metadata"),
        "foreign_metadata": (tmp / "foreign.npz", "not a driftwise model"),
        "wrong_schema": (tmp / "schema.npz", "schema version 99"),
        "checksum": (tmp / "checksum.npz", "checksum mismatch"),
        "object_array": (tmp / "object.npz", "cannot be read"),
    }
    cases["empty"][0].write_bytes(b"")
    cases["truncated"][0].write_bytes(data[: len(data) // 2])
    cases["corrupted"][0].write_bytes(bytes(flipped))
    cases["csv_renamed"][0].write_text("track_id,time_s,x_m,y_m\nA,0,0,0\nA,60,5,5\n")
    np.savez(cases["random_npz"][0], a=np.arange(3), b=np.ones((2, 2)))
    np.savez(cases["foreign_metadata"][0], metadata=np.array(json.dumps({"format": "someone-else"})))
    _rewrite(path, cases["wrong_schema"][0], metadata=lambda m: m.update(schema_version=99))
    _rewrite(path, cases["checksum"][0], arrays_edit=lambda a: a["params.q_mean"].__setitem__(0, 7.0))
    np.savez(cases["object_array"][0], metadata=np.array(json.dumps({"format": "driftwise-model"})),
             evil=np.array([{"x": 1}], dtype=object), allow_pickle=True)
    return cases


CASES = ["missing", "empty", "truncated", "corrupted", "csv_renamed", "random_npz", "foreign_metadata",
         "wrong_schema", "checksum", "object_array"]


@pytest.fixture(scope="module")
def bad_files(saved, tmp_path_factory):
    return _bad_files(saved[1], tmp_path_factory.mktemp("bad"))


@pytest.mark.parametrize("case", CASES)
def test_bad_file_raises_model_file_error_naming_file_and_problem(bad_files, case):
    path, problem = bad_files[case]
    with pytest.raises(ModelFileError) as info:
        load_model(path)
    assert isinstance(info.value, InputError)
    assert str(path) in str(info.value) and problem in str(info.value)


@pytest.mark.parametrize("case", ["truncated", "corrupted", "csv_renamed", "wrong_schema", "checksum"])
def test_bad_model_on_the_command_line_exits_2_without_traceback(bad_files, run_cli, case):
    path, problem = bad_files[case]
    code, out, err = run_cli("spread", path, "--release", "0,0", "--horizon", "1h", "--every", "1h")
    assert code == 2
    assert out == ""
    assert "Traceback" not in err and problem in err and str(path) in err
