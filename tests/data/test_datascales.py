"""The data's own scales and the defaults derived from them (driftwise.datascales).

The synthetic sets are straight tracks at constant speed radiating from a centre, so every
measured scale has a closed form (step = speed × Δt, extent = 2 × speed × duration × |cos|…);
the derived defaults are checked against the rules of the module docstring worked by hand.
"""

from __future__ import annotations

import numpy as np
import pytest

from driftwise.data import datascales as ds
from driftwise.data.tracks import Tracks
from driftwise.errors import InputError


def radial_tracks(n_tracks, n_fixes, *, step_s, speed_m_s, dim=2, durations=None):
    """``n_tracks`` straight tracks from the origin at evenly spaced angles, one fix every ``step_s``."""
    ids, times, positions = [], [], []
    for k in range(n_tracks):
        m = n_fixes if durations is None else int(durations[k] / step_s) + 1
        t = step_s * np.arange(m)
        angle = 2.0 * np.pi * k / n_tracks
        x = np.zeros((m, dim))
        x[:, 0], x[:, 1] = speed_m_s * t * np.cos(angle), speed_m_s * t * np.sin(angle)
        ids += [f"T{k:03d}"] * m
        times.append(t)
        positions.append(x)
    return Tracks(track_id=np.array(ids, dtype=object), time_s=np.concatenate(times),
                  position_m=np.concatenate(positions))


@pytest.fixture(scope="module")
def tank():
    """1 m tank: 8 tracks at 1 mm/s, 2 Hz for 10 min (3-D), steps of 0.5 mm."""
    return ds.data_scales(radial_tracks(8, 1201, step_s=0.5, speed_m_s=1e-3, dim=3))


@pytest.fixture(scope="module")
def ocean():
    """Ocean: 8 drifters at 0.1 m/s, 30 min fixes for 10 days, steps of 180 m."""
    return ds.data_scales(radial_tracks(8, 481, step_s=1800.0, speed_m_s=0.1))


def test_tank_scales(tank):
    """Δt 0.5 s, D 600 s, step 0.5 mm, speed 1 mm/s, extent 2 × 0.6 m (angles 0 and π); rtol 1e-9."""
    assert (tank.n_tracks, tank.n_fixes, tank.dim) == (8, 8 * 1201, 3)
    np.testing.assert_allclose([tank.sampling_interval_s, tank.median_duration_s, tank.max_duration_s,
                                tank.median_step_m, tank.median_speed_m_s], [0.5, 600.0, 600.0, 5e-4, 1e-3],
                               rtol=1e-9)
    np.testing.assert_allclose(tank.extent_m, [1.2, 1.2, 0.0], rtol=1e-9, atol=1e-12)
    # lags: geomspace(2Δt = 1 s, D/3 = 200 s, 5) = 1, 3.76, 14.1, 53.2, 200 s → multiples of 0.5 s
    assert tank.calibration_lags_s == (1.0, 4.0, 14.0, 53.0, 200.0)
    assert tank.horizons_s == (50.0, 100.0, 200.0)           # D/12, D/6, D/3
    assert tank.map_spacing_m == pytest.approx(0.02)           # 1.2 m / 80 = 15 mm → 1-2-5 step 20 mm
    lo, hi = tank.diffusivity_bounds_m2_s                      # s²/Δt = 2.5e-7/0.5 = 5e-7 m²/s
    assert lo == pytest.approx(5e-12) and hi == pytest.approx(5e-4)
    assert 1e-5 > lo and 1e-5 < hi                              # the tank's K = 1e-5 m²/s lies inside
    assert tank.decorrelation_time_bounds_s == (0.05, 30 * 86400.0)


def test_ocean_scales(ocean):
    """Δt 30 min, D 10 d, step 180 m, speed 0.1 m/s, extent 2 × 86.4 km; rtol 1e-9."""
    np.testing.assert_allclose([ocean.sampling_interval_s, ocean.median_duration_s, ocean.median_step_m,
                                ocean.median_speed_m_s], [1800.0, 864000.0, 180.0, 0.1], rtol=1e-9)
    np.testing.assert_allclose(ocean.extent_m, [172800.0, 172800.0], rtol=1e-9)
    # lags: geomspace(1 h, 80 h, 5) = 1, 2.99, 8.94, 26.7, 80 h → multiples of 30 min: 1, 3, 9, 26.5, 80 h
    assert ocean.calibration_lags_s == (3600.0, 10800.0, 32400.0, 95400.0, 288000.0)
    assert ocean.horizons_s == (20 * 3600.0, 40 * 3600.0, 80 * 3600.0)
    assert ocean.map_spacing_m == pytest.approx(2000.0)        # 172.8 km / 80 = 2.16 km → 2 km
    assert ocean.diffusivity_bounds_m2_s == pytest.approx((1e-5 * 18.0, 1e3 * 18.0))


def test_hourly_three_day_tracks_keep_the_old_horizons():
    """Hourly fixes over 3 days (the demo's campaign): horizons 6, 12, 24 h (the former fixed defaults),
    lags 2, 4, 7, 13, 24 h (geomspace(2 h, 24 h, 5) = 2, 3.72, 6.93, 12.9, 24 h rounded)."""
    scales = ds.data_scales(radial_tracks(5, 73, step_s=3600.0, speed_m_s=0.2))
    assert scales.horizons_s == (6 * 3600.0, 12 * 3600.0, 24 * 3600.0)
    assert scales.calibration_lags_s == tuple(h * 3600.0 for h in (2, 4, 7, 13, 24))


def test_durations_median_and_max():
    scales = ds.data_scales(radial_tracks(3, 0, step_s=10.0, speed_m_s=1.0, durations=[100.0, 400.0, 1000.0]))
    assert (scales.median_duration_s, scales.max_duration_s) == (400.0, 1000.0)


def test_short_tracks_still_give_lags_on_fixes():
    """Tracks of 3 fixes (D = 2Δt): D/3 < 2Δt, so one lag of Δt and horizons of Δt."""
    scales = ds.data_scales(radial_tracks(4, 3, step_s=60.0, speed_m_s=1.0))
    assert scales.calibration_lags_s == (60.0,)
    assert scales.horizons_s == (60.0,)


def test_no_pair_of_fixes_is_refused():
    with pytest.raises(InputError, match="no track has two fixes"):
        ds.data_scales(radial_tracks(3, 1, step_s=60.0, speed_m_s=1.0))


def test_implausible_position_error_is_refused(tank, ocean):
    with pytest.raises(InputError, match=r"--position-error 10 m is larger than the typical step .*0\.5 mm"):
        ds.check_position_error(10.0, tank)
    ds.check_position_error(4e-4, tank)
    ds.check_position_error(10.0, ocean)


def test_horizon_shorter_than_sampling_is_refused(ocean, tank):
    with pytest.raises(InputError, match=r"--horizons: 48 s is shorter than the sampling interval .*30 min"):
        ds.check_horizons([48.0, 86400.0], ocean)
    ds.check_horizons([48.0], tank)
    ds.check_horizons([1800.0], ocean)




def test_nice_step():
    assert [ds.nice_step(v) for v in (0.015, 2.16, 340.0, 0.0)] == [0.02, 2.0, 500.0, 1.0]


def test_resolve_horizons():
    tracks = radial_tracks(5, 73, step_s=3600.0, speed_m_s=0.2)
    assert ds.resolve_horizons(None, tracks) == [6 * 3600.0, 12 * 3600.0, 24 * 3600.0]
    assert ds.resolve_horizons([7200.0], tracks) == [7200.0]
    with pytest.raises(InputError, match="--horizons: give positive durations"):
        ds.resolve_horizons([0.0], tracks)
    with pytest.raises(InputError, match="shorter than the sampling interval"):
        ds.resolve_horizons([60.0], tracks)
