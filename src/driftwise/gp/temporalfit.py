"""The fit's time-varying options: which constituents and slow part to model, their starting values, the report.

``driftwise.fit(tides=..., slow_time_scale_s=...)`` reads them through :func:`temporal_choice`;
:func:`temporal_start` turns the choice and the data into a :class:`~driftwise.gp.temporal.TemporalStart`
(starting scales, time origin, the slow part's space–time inducing points), and :func:`temporal_report` is the
``temporal`` object of ``driftwise fit --json``.
"""

from __future__ import annotations

import dataclasses
import json
import math
from typing import Any

import numpy as np

from ..errors import InputError
from .constituents import angular_frequency_rad_s, parse_constituents
from .initial import initial_inducing
from .temporal import TemporalKernel, TemporalStart

__all__ = ["MAX_TEMPORAL_INDUCING", "TemporalChoice", "slow_start_scale_s", "temporal_choice", "temporal_report",
           "temporal_start"]

MAX_TEMPORAL_INDUCING = 48   # default spatial inducing points of a time-varying fit: F = M·d·(1 + 2C) + M_s·d values
AMPLITUDE_SHARE = 0.5        # starting velocity scale of each harmonic and of the slow part, × the RMS velocity
ONE_DAY_S = 86400.0


@dataclasses.dataclass(frozen=True)
class TemporalChoice:
    """Validated time-varying options: ``tides`` (constituent names), ``slow`` ("off", "auto" = learned from its
    starting value, or "fixed") and the fixed time scale ``slow_time_scale_s`` (s) when "fixed"."""

    tides: tuple[str, ...] = ()
    slow: str = "off"
    slow_time_scale_s: float | None = None

    @property
    def is_steady(self) -> bool:
        return not self.tides and self.slow == "off"

    def to_json(self) -> str:
        """'' when steady (so a steady fit's configuration is what it always was), else canonical JSON."""
        return "" if self.is_steady else json.dumps(dataclasses.asdict(self), sort_keys=True)


def temporal_choice(tides, slow_time_scale_s) -> TemporalChoice:
    """Check ``tides`` (names, a comma list or "none") and ``slow_time_scale_s`` (None: no slow part; "auto":
    learned from a starting value; a positive number of seconds: fixed) → TemporalChoice."""
    names = parse_constituents(tides if tides is not None else (), what="tides")
    if slow_time_scale_s is None or (isinstance(slow_time_scale_s, str) and slow_time_scale_s.lower() == "none"):
        return TemporalChoice(names)
    if isinstance(slow_time_scale_s, str) and slow_time_scale_s.lower() == "auto":
        return TemporalChoice(names, "auto")
    try:
        value = float(slow_time_scale_s)
    except (TypeError, ValueError):
        raise InputError(f"slow time scale must be None, 'auto' or a positive number of seconds, "
                         f"got {slow_time_scale_s!r}") from None
    if not (math.isfinite(value) and value > 0.0):
        raise InputError(f"slow time scale must be a positive number of seconds, got {slow_time_scale_s!r}")
    return TemporalChoice(names, "fixed", value)


def slow_start_scale_s(choice: TemporalChoice, span_s: float, omegas_rad_s) -> float:
    """T to start from: the fixed value, else max(span/4, twice the longest modelled period, 1 day), so that the
    slow part starts slower than every harmonic it sits beside."""
    if choice.slow == "fixed":
        return float(choice.slow_time_scale_s)
    longest = max((2.0 * math.pi / w for w in omegas_rad_s), default=0.0)
    return max(span_s / 4.0, 2.0 * longest, ONE_DAY_S)


def constituent_frequencies(choice: TemporalChoice, frame) -> tuple[float, ...]:
    """ω_c (rad/s) for the chosen constituents; "inertial" at the latitude of the lon/lat frame's centre."""
    latitude = getattr(frame, "lat0_deg", None) if getattr(frame, "is_geographic", False) else None
    return tuple(angular_frequency_rad_s(name, latitude) for name in choice.tides)


def temporal_start(choice_json: str, batch, frame, *, n_inducing: int, length_scale_m: float,
                   velocity_scale_m_s: float, seed: int) -> TemporalStart:
    """The starting point of a time-varying kernel for the observations ``batch`` (with times).

    t₀ = the first observation time (s on the track file's axis); ω_c from :func:`constituent_frequencies`;
    every further part's velocity scale ½ × ``velocity_scale_m_s``; the slow part (when chosen) with the time
    scale of :func:`slow_start_scale_s` and M_s = ``n_inducing`` space–time inducing points, the k-means centres
    of the observations in (x/ℓ, (t − t₀)/T) at the starting ℓ = ``length_scale_m`` and T.
    """
    choice = TemporalChoice(**json.loads(choice_json))
    time = np.asarray(batch.time_s, dtype=np.float64)
    origin = float(time.min())
    omegas = constituent_frequencies(choice, frame)
    extra = {}
    if choice.slow != "off":
        scale = slow_start_scale_s(choice, float(time.max()) - origin, omegas)
        scaled = np.column_stack([np.asarray(batch.position_m) / length_scale_m, (time - origin) / scale])
        centres = initial_inducing(scaled, n_inducing, seed=seed + 1)
        extra = {"slow_inducing_m": centres[:, :-1] * length_scale_m, "slow_inducing_time_s": centres[:, -1] * scale,
                 "slow_time_scale_s": scale}
    return TemporalStart(choice.tides, omegas, origin, choice.slow != "off", choice.slow != "fixed",
                         harmonic_velocity_scale_m_s=AMPLITUDE_SHARE * velocity_scale_m_s,
                         slow_velocity_scale_m_s=AMPLITUDE_SHARE * velocity_scale_m_s, **extra)


def _scales(hyper: dict, prefix: str) -> dict[str, float]:
    return {key[len(prefix):]: value for key, value in hyper.items() if key.startswith(prefix)}


def temporal_report(kernel) -> dict[str, Any]:
    """The ``temporal`` object of ``driftwise fit --json``: components, time origin, phase reference, and per
    constituent its period and learned scales; the slow part's scales and time scale (learned or fixed)."""
    if not isinstance(kernel, TemporalKernel):
        return {"components": ["steady"]}
    hyper = kernel.hyperparameters()
    constituents = {name: {"period_s": 2.0 * math.pi / omega, "omega_rad_s": omega,
                           "hyperparameters": _scales(hyper, f"{name}_")}
                    for name, omega in zip(kernel.constituents, kernel.omegas_rad_s)}
    description = kernel.describe()
    report = {"components": ["steady", *kernel.constituents] + (["slow"] if kernel.has_slow else []),
              "time_origin_s": kernel.time_origin_s, "phase_reference": description["phase_reference"],
              "constituents": constituents}
    if kernel.has_slow:
        slow = _scales(hyper, "slow_")
        report["slow"] = {"time_scale_s": slow.pop("time_scale_s"), "time_kernel": "matern32",
                          "time_scale_learned": kernel.learn_slow_time_scale, "hyperparameters": slow}
    return report
