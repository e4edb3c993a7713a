"""The one registry of forecast methods: name ↔ strategy object, defaults and help text.

The command line's ``--method`` choices, :func:`driftwise.dynamics.spread.spread_from_field`, the
scores, the report and the test sweeps all read :data:`METHODS`.  A moment method is integrated by
RK4 (default step :data:`DEFAULT_RK4_STEP_S`); the ensemble is Euler–Maruyama with its own step.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from ..errors import InputError
from .ensemble import EulerMaruyama
from .moments import RK4, GaussHermite, Linearize, SphericalCubature, Unscented

__all__ = ["MethodSpec", "METHODS", "DEFAULT_METHOD", "DEFAULT_PARTICLES", "default_ensemble_step_s",
           "default_moment_step_s", "flow_time_scale_s", "method_name", "make_method"]

DEFAULT_METHOD = "cubature"
# The ensemble's defaults: a 3-release, 1-day forecast in about 30 s on an idle 2-core machine (measured with
# tests/benchmarks/bench_everyday.py); its Monte Carlo error is reported with every forecast: with 2,000
# particles the standard error of a variance is √(2/N) ≈ 3 % of it, of the mean 2 % of the spread's σ.
DEFAULT_PARTICLES = 2_000
ENSEMBLE_MAX_STEP_S = 300.0
STEPS_PER_FLOW_TIME = 20
RK4_STEPS_PER_FLOW_TIME = 4     # default_moment_step_s


@dataclass(frozen=True)
class MethodSpec:
    """One forecast method: its name, strategy class, how to build it, and a one-line description."""

    name: str
    kind: type
    build: Callable[[int, int], Any]        # (particles, gauss_hermite_order) -> strategy object
    help: str
    ensemble: bool = False


METHODS: dict[str, MethodSpec] = {spec.name: spec for spec in (
    MethodSpec("cubature", SphericalCubature, lambda n, order: SphericalCubature(),
               "third-degree spherical-radial cubature, 2d points (Arasaratnam & Haykin 2009)"),
    MethodSpec("unscented", Unscented, lambda n, order: Unscented(),
               "unscented transform, 2d + 1 points (Julier & Uhlmann 1997)"),
    MethodSpec("gauss-hermite", GaussHermite, lambda n, order: GaussHermite(int(order)),
               "Gauss–Hermite product rule, order^d points"),
    MethodSpec("linearize", Linearize, lambda n, order: Linearize(),
               "linearization about the mean (extended-Kalman moments; Maybeck 1982)"),
    MethodSpec("ensemble", EulerMaruyama, lambda n, order: EulerMaruyama(int(n)),
               "Euler–Maruyama particles (Kloeden & Platen 1992), the Monte Carlo baseline", ensemble=True),
)}


def method_name(method: Any) -> str:
    """The registry name of a strategy object, e.g. ``SphericalCubature()`` → ``"cubature"``."""
    for spec in METHODS.values():
        if isinstance(method, spec.kind):
            return spec.name
    raise InputError(f"method: expected one of {', '.join(METHODS)} (a moments or ensemble method object), "
                     f"got {method!r}")


def make_method(name: str, *, particles: int = DEFAULT_PARTICLES, step_s: float | None = None,
                gauss_hermite_order: int = 3) -> tuple[Any, Any]:
    """(strategy, integrator) for a registry ``name``; ``step_s`` is the RK4 or Euler–Maruyama step (s).

    Moment methods get ``RK4(step_s)`` (default RK4()); the ensemble gets ``EulerMaruyama(particles,
    step_s)`` and no integrator.
    """
    if name not in METHODS:
        raise InputError(f"method: unknown {name!r}; use one of {', '.join(METHODS)}")
    if step_s is not None and not float(step_s) > 0:
        raise InputError(f"step_s must be > 0 seconds, got {step_s!r}")
    spec = METHODS[name]
    if spec.ensemble:
        if not (isinstance(particles, (int, np.integer)) and particles >= 2):
            raise InputError(f"particles must be an integer >= 2, got {particles!r}")
        method = spec.build(particles, gauss_hermite_order)
        return (method if step_s is None else EulerMaruyama(int(particles), step_s=float(step_s))), None
    return spec.build(particles, gauss_hermite_order), RK4() if step_s is None else RK4(step_s=float(step_s))


def flow_time_scale_s(field: Any) -> float | None:
    """The flow's time scale (s): the fit's length scale over its RMS speed (``fit_info`` ``length_scale_m`` /
    ``rms_speed_m_s``), else the field's ``decorrelation_time_s``; None when neither is a positive number."""
    info = getattr(field, "fit_info", None) or {}
    length, speed = info.get("length_scale_m"), info.get("rms_speed_m_s")
    scale = length / speed if length and speed else getattr(field, "decorrelation_time_s", None)
    return float(scale) if scale is not None and np.isfinite(scale) and scale > 0 else None


def default_ensemble_step_s(field: Any, longest_s: float = ENSEMBLE_MAX_STEP_S) -> float:
    """The ensemble's default Euler–Maruyama step (s): ``longest_s`` (5 min), or 1/20 of the flow's time scale
    (:func:`flow_time_scale_s`) when that is shorter, so the step resolves the flow at any scale (a tank's cells are
    crossed in seconds).  Euler–Maruyama's weak error is O(h) (Kloeden & Platen 1992, §14.1), here h·|∇u| ≲ 1/20.
    """
    scale = flow_time_scale_s(field)
    return float(longest_s) if scale is None else float(min(longest_s, scale / STEPS_PER_FLOW_TIME))


def default_moment_step_s(field: Any, longest_s: float) -> float:
    """The default RK4 step (s) of the moment methods: ``longest_s`` (the command's own default: 10 min for a
    forecast, 1 h for connectivity and back-tracking), or 1/:data:`RK4_STEPS_PER_FLOW_TIME` of the flow's time scale
    T = ℓ/U (:func:`flow_time_scale_s`) when that is shorter.

    A field of length scale ℓ and speed U has velocity gradients of order U/ℓ = 1/T, so a step of T/4 turns or
    shears a particle cloud by about a quarter radian: RK4's phase error on a rotation is (ωh)⁵/120 per step
    (the series of e^{iωh} against the scheme's polynomial), 8·10⁻⁶ rad at ωh = ¼, and the step stays inside
    RK4's stability bound |λ|h ≤ 1.39 of the moment equations (:data:`driftwise.dynamics.transitionstep.STABLE_TURN`)
    for gradients up to 5.6/T.  Ocean fields (T of 8 h to days: the demo bay 8.2 h, a shelf 2.3 d) keep the longest
    step; a 1-m tank (T ≈ 3 s) gets 0.8 s where 1 h was unstable (connect stopped with "integration diverged")."""
    scale = flow_time_scale_s(field)
    return float(longest_s) if scale is None else float(min(longest_s, scale / RK4_STEPS_PER_FLOW_TIME))
