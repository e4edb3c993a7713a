"""The training loop: closed-form q updates, determinism, checkpoint/resume, NaN handling, the CLI.

Outside references: the optimal q accumulated over chunks must equal the
one-batch closed form (Titsias 2009, eq. 10: Λ = I + Φᵀ R⁻¹ Φ is a sum over
observations), natural parameters must invert like numpy's dense inverse, and
plateau detection is checked on hand-made histories.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

import driftwise
from driftwise.data.synthetic import TaylorGreen, simulate_drifters
from driftwise.data.tracks import tracks_from_frame
from driftwise.errors import InputError
from driftwise.gp import field as fld
from driftwise.gp import training as fitmod
from driftwise.gp import variational as var
from driftwise.gp.schedule import Checkpoint, Schedule


@pytest.fixture(scope="module")
def table():
    """12 drifters, 4 h of fixes every 10 min in Taylor–Green cells: 288 velocity observations."""
    starts = np.random.default_rng(3).uniform(0.0, 2000.0, (12, 2))
    return simulate_drifters(TaylorGreen(0.2, 1000.0), starts, duration_s=4 * 3600.0, fix_interval_s=600.0,
                             diffusivity_m2_s=1.0, position_error_m=5.0, seed=3)


@pytest.fixture(scope="module")
def tracks(table):
    return tracks_from_frame(table)


SMALL = dict(inducing=12, position_error_m=5.0, progress=False)


# ------------------------------------------------------------------- closed-form q pieces
def test_natural_parameters_invert_like_numpy():
    rng = np.random.default_rng(0)
    size = 10
    sqrt = np.tril(0.3 * rng.standard_normal((size, size)), -1) + np.diag(rng.uniform(0.3, 1.5, size))
    mean = rng.standard_normal(size)
    lam, eta = var.natural_from_q(mean, sqrt)
    cov = sqrt @ sqrt.T
    np.testing.assert_allclose(lam, np.linalg.inv(cov), rtol=1e-10, atol=1e-10)  # numpy dense inverse
    np.testing.assert_allclose(eta, np.linalg.solve(cov, mean), rtol=1e-10, atol=1e-10)
    mean2, sqrt2 = var.q_from_natural(lam, eta)
    np.testing.assert_allclose(mean2, mean, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(np.asarray(sqrt2) @ np.asarray(sqrt2).T, cov, rtol=1e-9, atol=1e-10)
    assert np.allclose(np.triu(np.asarray(sqrt2), 1), 0.0, rtol=0.0, atol=0.0)


def test_chunked_optimal_q_equals_one_batch_closed_form(tracks, monkeypatch):
    obs = driftwise.velocity_observations(tracks, position_error_m=5.0)
    batch = fld.batch_from_observations(obs)
    z = fitmod.initial_inducing(np.asarray(batch.position_m), 10, seed=0)
    params = fld.init_params("helmholtz", 2, z, velocity_scale_m_s=0.15, length_scale_m=600.0,
                             diffusivity_m2_s=1.0, noise_floor_m_s=0.01)
    whole = fld.optimal_q(params, batch)
    monkeypatch.setattr(var, "CHUNK", 96)  # three chunks
    assert len(var.chunks(obs.n)) > 2
    chunked = var.exact_q(params, batch, jitter_multiple=fld.JITTER_MULTIPLE)
    # Titsias (2009): Λ = I + Σ_n Φ_nᵀ R_n⁻¹ Φ_n, η = Σ_n Φ_nᵀ R_n⁻¹ y_n, so chunk sums must agree.
    np.testing.assert_allclose(chunked.q_mean, whole.q_mean, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(chunked.q_sqrt @ chunked.q_sqrt.T, whole.q_sqrt @ whole.q_sqrt.T, rtol=1e-8, atol=1e-12)
    e_whole = float(fld.elbo(whole, batch, obs.n))
    e_chunk = var.full_elbo(chunked, batch, jitter_multiple=fld.JITTER_MULTIPLE)
    assert e_chunk == pytest.approx(e_whole, rel=1e-10, abs=1e-8)


def test_plateau_rule():
    assert not fitmod.plateau_reached((), 100) and not fitmod.plateau_reached((-50.0,), 100)
    assert not fitmod.plateau_reached((-500.0, -400.0), 100)       # gained 100 nats > 1e-4 · max(400, 100)
    assert fitmod.plateau_reached((-500.0, -499.99), 100)          # gained 0.01 < 0.05
    assert fitmod.plateau_reached((-500.0, -510.0), 100)           # got worse
    assert fitmod.plateau_reached((10.0, 10.005), 100)             # near-zero ELBO: the floor N · 1e-4 = 0.01 applies
    assert not fitmod.plateau_reached((10.0, 10.02), 100)


def test_auto_schedule_uses_all_data_with_exact_q_when_it_fits():
    config = fitmod.check_options("helmholtz", "squared-exponential", 16, 0,
                                   Schedule(steps=10, batch_size=100, learning_rate=0.05, patience=5), 10.0)
    small, large = fitmod.resolve_rows(config, 1600), fitmod.resolve_rows(config, 1601)   # 16 × batch 100
    assert (small.batch_size, small.q_update, small.subsample) == (1600, "natural", 0)
    assert (large.batch_size, large.q_update, large.subsample) == (1600, "natural", 1600)
    minibatch = fitmod.resolve_rows(dataclasses.replace(config, q_update="adam"), 1601)
    assert (minibatch.batch_size, minibatch.q_update, minibatch.subsample) == (100, "adam", 0)


def test_large_n_fits_hyperparameters_on_a_subsample_then_q_on_all_data(tracks):
    """288 observations > 16 × 16: the hyperparameters are those of an all-rows fit to the 256 subsampled
    rows, and q is then Titsias-optimal for all 288 (the returned ELBO equals the exact-q ELBO on all)."""
    from driftwise.gp.variational import exact_q, full_elbo

    field = driftwise.fit(tracks, schedule=Schedule(steps=8, patience=1000, batch_size=16), **SMALL)
    data = fitmod.prepare_data(tracks, SMALL["position_error_m"])
    assert data.n == 288 and field.fit_info["hyperparameter_rows"] == 256
    rows = fitmod.subsample_rows(data.n, 256, 0)
    obs = data.obs
    subset = dataclasses.replace(obs, **{name: getattr(obs, name)[rows] for name in
                                         ("position_m", "velocity_m_s", "dt_s", "time_s", "track_index")})
    alone = driftwise.fit(subset, schedule=Schedule(steps=8, patience=1000, batch_size=256), **SMALL)
    np.testing.assert_allclose(field.params.kernel.divergence_free.base.log_length_scale_m,
                               alone.params.kernel.divergence_free.base.log_length_scale_m, rtol=1e-9)
    best = exact_q(field.params, data.batch, jitter_multiple=field.jitter_multiple)
    assert field.fit_info["elbo"] == pytest.approx(full_elbo(best, data.batch, jitter_multiple=field.jitter_multiple),
                                                   rel=1e-12)


def test_initial_inducing_is_seeded_kmeans():
    points = np.random.default_rng(1).uniform(0.0, 1000.0, (500, 2))
    a = fitmod.initial_inducing(points, 20, seed=4)
    b = fitmod.initial_inducing(points, 20, seed=4)
    c = fitmod.initial_inducing(points, 20, seed=5)
    np.testing.assert_array_equal(a, b)
    assert a.shape == (20, 2) and not np.array_equal(a, c)
    assert np.all((a > 0.0) & (a < 1000.0))
    few = fitmod.initial_inducing(points[:5], 20, seed=0)   # fewer distinct places than M
    assert few.shape == (5, 2)


# ------------------------------------------------------------------------ the loop
class _HardKill(BaseException):
    """Stands in for SIGKILL: nothing in fit() may catch it, so only the periodic checkpoint survives."""


@pytest.mark.parametrize("q_update, stop, saved_step", [
    ("natural", KeyboardInterrupt, 11),   # Ctrl-C: fit() saves the state it reached
    ("adam", _HardKill, 10),              # killed: resume from the last periodic checkpoint (every 5 steps here)
])
def test_resume_after_interrupt_ends_at_the_same_elbo(tracks, tmp_path, monkeypatch, q_update, stop, saved_step):
    options = dict(SMALL, schedule=Schedule(steps=16, patience=1000, batch_size=16, q_update=q_update), seed=7)  # 288 > 16 × 16: minibatches
    straight = driftwise.fit(tracks, **options)
    checkpoint = tmp_path / "run.ckpt.npz"
    real_advance = fitmod.advance

    def stop_at_11(state, *args, **kwargs):
        if state.step == 11:
            raise stop
        return real_advance(state, *args, **kwargs)

    monkeypatch.setattr(fitmod, "advance", stop_at_11)
    with pytest.raises(stop):
        driftwise.fit(tracks, checkpoint=Checkpoint(checkpoint, every_steps=5), **options)
    monkeypatch.setattr(fitmod, "advance", real_advance)
    with np.load(checkpoint, allow_pickle=False) as saved:
        assert json.loads(str(saved["meta"]))["step"] == saved_step
    resumed = driftwise.fit(tracks, checkpoint=Checkpoint(checkpoint, resume=True, every_steps=5), **options)
    a, b = straight.fit_info, resumed.fit_info
    assert a["steps"] == b["steps"] == 16
    assert b["elbo"] == pytest.approx(a["elbo"], rel=1e-6, abs=1e-6)
    np.testing.assert_allclose(b["elbo_history"], a["elbo_history"], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(resumed.params.q_mean, straight.params.q_mean, rtol=1e-8, atol=1e-10)


def test_same_seed_same_fit_and_checkpoint_mismatch_is_refused(tracks, tmp_path):
    options = dict(SMALL, schedule=Schedule(steps=6, patience=1000, batch_size=16))
    a = driftwise.fit(tracks, seed=1, **options)
    b = driftwise.fit(tracks, seed=1, checkpoint=Checkpoint(tmp_path / "c.npz"), **options)
    assert a.fit_info["elbo"] == pytest.approx(b.fit_info["elbo"], rel=1e-12, abs=0.0)
    with pytest.raises(InputError, match="different fit"):
        driftwise.fit(tracks, seed=2, checkpoint=Checkpoint(tmp_path / "c.npz", resume=True), **options)


def test_converges_early_on_a_plateau_and_records_history(tracks):
    field = driftwise.fit(tracks, schedule=Schedule(steps=400, patience=5), **SMALL)
    info = field.fit_info
    assert info["converged"] and info["steps"] < 400 and info["steps"] % 5 == 0
    assert len(info["elbo_history"]) == info["steps"]
    history = np.asarray(info["elbo_history"])
    assert np.all(np.isfinite(history)) and history[-1] > history[0]
    assert info["decorrelation_time_source"] == "length_scale/rms_speed"
    assert field.decorrelation_time_s == pytest.approx(info["length_scale_m"] / info["rms_speed_m_s"], rel=1e-12)
    assert field.data_summary["n_tracks"] == 12 and field.data_summary["n_observations"] == 12 * 24
    checks, n = info["plateau_checks"], 12 * 24
    assert len(checks) == info["steps"] // 5
    assert checks[-1] - checks[-2] < 1e-4 * max(abs(checks[-2]), n)
    assert all(b - a >= 1e-4 * max(abs(a), n) for a, b in zip(checks[:-2], checks[1:-1]))
    # The reported ELBO is the exact bound at the exact q: at least the last check's value (1e-9 slack).
    assert info["elbo"] >= checks[-1] - 1e-9 * abs(checks[-1])


def test_learned_inducing_points_move_and_stay_finite(tracks):
    fixed = driftwise.fit(tracks, schedule=Schedule(steps=3, patience=1000), **SMALL)
    moved = driftwise.fit(tracks, schedule=Schedule(steps=3, patience=1000, learn_inducing=True), **SMALL)
    shift = np.abs(np.asarray(moved.params.inducing_m) - np.asarray(fixed.params.inducing_m))
    assert np.all(np.isfinite(shift)) and shift.max() > 1.0       # metres
    assert np.isfinite(moved.fit_info["elbo"])


def _loop_parts(tracks, **overrides):
    """The pieces fit() builds before its loop: data, config, initial state, Z scale."""
    options = dict(steps=10, batch_size=1024, learning_rate=0.04, patience=5, q_update="adam", natural_step=0.5)
    options.update(overrides)
    data = fitmod.prepare_data(tracks, 5.0)
    config = fitmod.check_options("helmholtz", "squared-exponential", 12, 0, Schedule(**options), 5.0)
    config = dataclasses.replace(config, fingerprint=data.fingerprint)
    state, z_scale = fitmod.start_state(data, config, learning_rate=options["learning_rate"], checkpoint=None)
    return data, config, state, z_scale


def test_the_compiled_step_flags_a_non_finite_elbo(tracks):
    data, config, state, z_scale = _loop_parts(tracks)
    names = fitmod.trainable_names("adam", False)
    good = fitmod.optimiser_step(state.params, state.opt_state, data.batch, float(data.n), 1.0, z_scale, names=names,
                        q_update="adam", jitter_multiple=fld.JITTER_MULTIPLE)
    assert bool(good[3]) and np.isfinite(float(good[2]))
    broken = dataclasses.replace(state.params, log_noise_floor_m_s=state.params.log_noise_floor_m_s * np.nan)
    bad = fitmod.optimiser_step(broken, state.opt_state, data.batch, float(data.n), 1.0, z_scale, names=names,
                       q_update="adam", jitter_multiple=fld.JITTER_MULTIPLE)
    assert not bool(bad[3])


def _fake_step(outcomes, seen):
    """A stand-in for the compiled step: records (jitter, learning rate), succeeds per ``outcomes``."""
    def step(params, opt_state, batch, n_total, gamma, z_scale, *, names, q_update, jitter_multiple):
        seen.append((jitter_multiple, float(opt_state.hyperparams["learning_rate"])))
        return params, opt_state, -1.0, outcomes(len(seen))
    return step


def test_non_finite_step_is_retried_with_more_jitter_then_a_smaller_step(tracks, monkeypatch):
    data, config, state, z_scale = _loop_parts(tracks)
    seen = []
    monkeypatch.setattr(fitmod, "optimiser_step", _fake_step(lambda n: n > 2, seen))   # two failures, then success
    new = fitmod.advance(state, data, config, z_scale)
    assert seen == [(1e6, 0.04), (1e8, 0.04), (1e10, 0.02)]
    assert new.step == 1 and new.history == (-1.0,) and new.jitter_multiple == 1e10
    assert float(new.opt_state.hyperparams["learning_rate"]) == pytest.approx(0.02, rel=1e-12, abs=0.0)


def test_persistent_non_finite_step_raises_a_clear_error(tracks, monkeypatch):
    data, config, state, z_scale = _loop_parts(tracks)
    seen = []
    monkeypatch.setattr(fitmod, "optimiser_step", _fake_step(lambda n: False, seen))
    with pytest.raises(RuntimeError, match="non-finite at step 0 after 6 retries"):
        fitmod.advance(state, data, config, z_scale)
    assert len(seen) == 7 and max(j for j, _ in seen) == fitmod.MAX_JITTER_MULTIPLE
    assert seen[-1][1] == pytest.approx(0.04 / 8, rel=1e-12, abs=0.0)


def test_bad_options_and_data_are_input_errors(tracks):
    with pytest.raises(InputError, match="unknown kernel"):
        driftwise.fit(tracks, "swirly", **SMALL)
    with pytest.raises(InputError, match="inducing must be an integer"):
        driftwise.fit(tracks, inducing=0, progress=False)
    with pytest.raises(InputError, match="at least 3 velocity observations"):
        driftwise.fit(tracks.select([tracks.unique_ids[0]]).__class__(
            track_id=tracks.track_id[:3], time_s=tracks.time_s[:3], position_m=tracks.position_m[:3]), **SMALL)
    with pytest.raises(InputError, match="Tracks or Observations"):
        driftwise.fit(np.zeros((5, 2)), **SMALL)


def test_progress_is_plain_lines_not_a_bar_when_not_a_terminal(tracks, capsys):
    # captured stderr is not a terminal: at most a plain line every 5 s (driftwise.progress), never a redrawn bar
    driftwise.fit(tracks, schedule=Schedule(steps=2), progress=True, inducing=12, position_error_m=5.0)
    captured = capsys.readouterr()
    assert captured.out == "" and "\r" not in captured.err
    assert all(line.startswith("driftwise fit: step ") and "elapsed" in line
               for line in captured.err.splitlines() if "driftwise fit" in line)


# ------------------------------------------------------------------------ the command line
@pytest.fixture(scope="module")
def tracks_csv(table, tmp_path_factory):
    path = tmp_path_factory.mktemp("cli") / "tracks.csv"
    table.to_csv(path, index=False)
    return path


def test_cli_fit_json_contract(tracks_csv, tmp_path, run_cli):
    out = tmp_path / "model.npz"
    code, stdout, err = run_cli("fit", tracks_csv, "--out", out, "--inducing", "12", "--position-error", "5m",
                                "--kernel", "divergence-free", "--no-calibrate", "--json")
    assert code == 0, err
    report = json.loads(stdout)
    for key in ("kernel", "n_tracks", "n_observations", "elbo", "hyperparameters", "diffusivity_m2_s",
                "decorrelation_time_s"):
        assert key in report
    assert report["kernel"] == "divergence-free" and report["n_tracks"] == 12 and report["n_observations"] == 12 * 24
    assert report["decorrelation_time_source"] == "length_scale/rms_speed"
    model = driftwise.load(out)
    assert model.diffusivity_m2_s == pytest.approx(report["diffusivity_m2_s"], rel=1e-12)
    assert model.fit_info["elbo"] == pytest.approx(report["elbo"], rel=1e-12)
    assert not (tmp_path / "model.ckpt.npz").exists()  # the checkpoint goes once the model is written


def test_cli_fit_human_summary(tracks_csv, tmp_path, run_cli):
    code, stdout, _ = run_cli("fit", tracks_csv, "--out", tmp_path / "m.npz", "--inducing", "12", "--position-error", "5m", "--no-calibrate",
                            "--quiet")
    assert code == 0
    assert "helmholtz kernel" in stdout and "wrote" in stdout and "decorrelation time" in stdout


@pytest.mark.parametrize("argv, message", [
    (["--inducing", "0"], "--inducing must be a positive integer"),
    (["--position-error", "ten"], "--position-error"),
    (["--position-error=-1mm"], "--position-error must be ≥ 0"),
    (["--kernel", "swirly"], "invalid choice"),
    (["--seed", "-1"], "--seed must be a non-negative integer"),
])
def test_cli_fit_bad_options_exit_2(tracks_csv, tmp_path, run_cli, argv, message):
    code, stdout, err = run_cli("fit", tracks_csv, "--out", tmp_path / "m.npz", *argv)
    assert code == 2 and stdout == "" and message in err and "Traceback" not in err


def test_cli_fit_missing_tracks_file_exits_2(tmp_path, run_cli):
    code, _, err = run_cli("fit", tmp_path / "none.csv", "--out", tmp_path / "m.npz")
    assert code == 2 and "none.csv" in err and "Traceback" not in err
