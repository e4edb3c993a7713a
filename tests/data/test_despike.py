"""Isolated spikes in the fixes (driftwise.data.trackqc._despike): dropped, named, and nothing else dropped.

References beside the checks:
* the false-alarm rate on clean tracks: for white Gaussian noise the distance δ of a fix from the line through its
  neighbours is, per axis, normal with variance σ²(1 + w² + (1 − w)²) (w the interpolation weight; Einstein 1905
  for the random walk's share, which adds 2K·Δt·w(1 − w)); |δ| in 2-D is then Rayleigh-distributed, whose tail
  scipy.stats.rayleigh gives — the chance that a clean fix passes the default threshold is computed from it;
* the scale: 1.4826 × median absolute value is the normal s.d. (Hampel 1974, JASA 69, 383).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats

from driftwise.data import synthetic
from driftwise.data.trackqc import SPIKE_LIMIT
from driftwise.data.tracks import TrackWarning, read_tracks, tracks_from_frame


def _walks(seed: int, n_tracks: int = 20, n_fixes: int = 200) -> pd.DataFrame:
    return synthetic.random_walk(n_tracks, n_fixes, fix_interval_s=3600.0, diffusivity_m2_s=1.0, seed=seed,
                                 position_error_m=20.0)


def test_clean_random_walks_lose_no_fix():
    # The threshold is SPIKE_LIMIT robust s.d. of δ; under Gaussian noise (random walk + white noise) the chance
    # that one of the 3,960 interior fixes exceeds it is below 1e-40 (Rayleigh tail), so none may be dropped.
    # With unit-scale Rayleigh |δ| the file's scale is 1.4826 × its median, so the threshold sits at
    # SPIKE_LIMIT × 1.4826 × median(Rayleigh) = 17.5 scale units: P = exp(−17.5²/2) ≈ 1e-66 per fix.
    tail = scipy.stats.rayleigh.sf(SPIKE_LIMIT * 1.4826 * scipy.stats.rayleigh.median())
    assert 3960 * tail < 1e-40
    for seed in range(10):
        table = _walks(seed)
        with _no_spike_warning():
            tracks = tracks_from_frame(table)
        assert tracks.n_fixes == len(table)


class _no_spike_warning:
    """Fails when a spike warning is raised inside (other warnings pass through)."""

    def __enter__(self):
        import warnings
        self._catch = warnings.catch_warnings(record=True)
        self._seen = self._catch.__enter__()
        warnings.simplefilter("always")
        return self

    def __exit__(self, *exc):
        self._catch.__exit__(*exc)
        spikes = [w for w in self._seen if "isolated spike" in str(w.message)]
        assert not spikes, spikes[0].message
        return False


def test_injected_spikes_are_dropped_and_named(tmp_path):
    table = _walks(3)
    rng = np.random.default_rng(0)
    # 12 interior fixes, none adjacent to another or to a track end, moved by 1-5 km (50-250 σ)
    interior = [i for i in range(len(table)) if 2 <= i % 200 <= 197 and i % 4 == 0]
    picked = np.sort(rng.choice(interior, 12, replace=False))
    angle = rng.uniform(0, 2 * np.pi, 12)
    size = rng.uniform(1000.0, 5000.0, 12)
    table.loc[picked, "x_m"] += size * np.cos(angle)
    table.loc[picked, "y_m"] += size * np.sin(angle)
    path = tmp_path / "spiky.csv"
    table.to_csv(path, index=False)
    with pytest.warns(TrackWarning, match=r"dropped 12 isolated spikes .* first in track 'W\d+' at .* \(row "
                                          rf"{picked[0] + 2}, [\d.]+ km off\)"):
        tracks = read_tracks(path)
    assert tracks.n_fixes == len(table) - 12
    kept = set(zip(tracks.track_id.tolist(), np.round(tracks.time_s, 6).tolist()))
    for i in picked:
        assert (table.track_id[i], round(float(table.time_s[i]), 6)) not in kept
    # 0 turns it off
    assert read_tracks(path, spike_limit=0).n_fixes == len(table)


def test_a_drifter_circling_an_eddy_core_at_coarse_fixes_is_kept():
    # Lamb–Oseen vortex (Oseen 1912): r_c = 2 km and a peak swirl of 0.4 m/s, fixes every 3 h: near the core a
    # drifter turns by about 120° between fixes, far more than anywhere else in the file, at every fix.
    gamma = 0.4 * 2 * np.pi * 2000.0 / (1 - np.exp(-1.0))
    field = synthetic.LambOseenVortex(circulation_m2_s=gamma, core_radius_m=2000.0)
    starts = np.array([[2000.0, 0.0], [1500.0, 500.0]] + [[x, y] for x in (-30e3, 30e3) for y in (-30e3, 0.0, 30e3)])
    table = synthetic.simulate_drifters(field, starts, duration_s=3 * 3600.0 * 40, fix_interval_s=3 * 3600.0,
                                        diffusivity_m2_s=1.0, position_error_m=10.0, seed=4)
    with _no_spike_warning():
        tracks = tracks_from_frame(table)
    assert tracks.n_fixes == len(table)


@pytest.mark.parametrize("value", ["-1", "nan", "1"])   # 1: a careless factor that would drop 10 % of a clean file
def test_a_bad_spike_limit_exits_2(run_cli, write_file, value):
    path = write_file("t.csv", "track_id,time_s,x_m,y_m\na,0,0,0\na,60,1,1\na,120,2,2\n")
    code, out, err = run_cli("inspect", path, "--spike-limit", value)
    assert code == 2 and "--spike-limit" in err and "Traceback" not in err
