"""Which time-varying components a fit needs: fit steady, test its residuals for time structure, refit.

``--temporal auto`` (the default of ``driftwise fit``):

1. fit the steady field v̄(x) as always (:func:`driftwise.dynamics.transitionfit.fit_by_likelihood`);
2. take its residual velocities along the tracks, r_n = u_n − E[v̄(x_n)] (m/s), at the finite-difference velocity
   observations u_n (segment midpoints x_n, times t_n on the track file's axis) — after a fit through the
   transitions, r_n = u_n − the chord velocity the field predicts between the two fixes
   (:func:`~driftwise.dynamics.transitionstep.chord_velocities`), the quantity that fit matched —, weighted by 1 / R_n with
   R_n = 2K/Δt_n + 2σ_pos²/Δt_n² + σ₀² the fit's own noise variance (m²/s²);
3. test them with :func:`driftwise.data.residualspectrum.detect_time_structure`: per-track harmonic regression at
   every candidate constituent (the tides M2, S2, N2, K1, O1; ``inertial`` too for lon/lat tracks away from the
   equator) and for slow change, F-tests under correlated residual noise, Bonferroni over the tests at
   family-wise level α = 0.01;
4. when components are significant *and* explain at least ``MIN_SHARE`` (5 %) of the residual variance beside the
   other selected components, refit with them: ``tides`` = the significant constituents, a learned slow part
   (``slow_time_scale_s="auto"``) when the slow test is significant.  Otherwise the steady field stands.

The share floor is a relevance rule of our own: with thousands of residuals an F-test also flags the small
leakage of a strong tide into nearby frequencies that moving drifters see (the demo bay's M2 tide sampled along
tracks gave the inertial frequency F = 1.6, adjusted p = 1e-5, 2.9 % of the residual variance).  A component
under 5 % of the residual variance has an amplitude under about a third of the residual s.d.; it is reported
("significant but below the share floor"), not modelled.

The per-track regression is a few small least-squares problems per track (and a grid of noise models), so on
steady data the extra cost over today's fit is one batch prediction and that test.  ``--temporal steady`` fits
steady, runs the same test and warns (:class:`TemporalWarning`, one line naming the period and the option that
models it) when the residuals hold time structure.  Components given explicitly (``tides``, ``slow_time_scale_s``)
are fitted as given, without the test.  The decision is stored in the field's ``fit_info["temporal_choice"]``,
so the model file carries it.
"""

from __future__ import annotations

import dataclasses
import json
import math
import warnings
from pathlib import Path
from typing import Any

from ..data.observations import velocity_observations
from ..data.residualspectrum import SLOW, TemporalEvidence, detect_time_structure, steady_warning, typical_span_s
from ..errors import InputError
from ..files import plain
from ..gp import field as fld
from ..gp.constituents import INERTIAL, MIN_INERTIAL_LATITUDE_DEG, angular_frequency_rad_s
from ..gp.schedule import Checkpoint, Schedule
from ..gp.temporalfit import temporal_choice, temporal_report
from ..gp.training import fit
from ..progress import Stopwatch
from ..units import format_duration
from .transitionfit import LikelihoodChoice, fit_by_likelihood
from .transitions import transition_set
from .transitionstep import chord_velocities

__all__ = ["ALPHA", "MIN_SHARE", "PRINCIPAL_ORDER", "TEMPORAL_MODES", "TemporalDecision", "TemporalWarning", "candidate_periods_s",
           "fit_temporal", "residual_evidence", "temporal_checkpoint_path", "temporal_fit_report"]

PRINCIPAL_ORDER = ("M2", "K1", "S2", "O1", "N2")   # equilibrium-tide amplitudes, largest first
MIN_SHARE = 0.05   # least share of the residual variance a significant component must explain to be modelled
ALPHA = 0.01   # family-wise level of the residual tests (Bonferroni over the components examined)
TEMPORAL_MODES = {
    "auto": "fit steady, test the residual velocities along the tracks for tidal/inertial periodicity and slow "
            "change, and refit with the components they support (default)",
    "steady": "a steady field only; warns when its residuals hold time structure",
}


class TemporalWarning(UserWarning):
    """A steady fit whose residuals hold periodic or slow time structure."""


@dataclasses.dataclass(frozen=True)
class TemporalDecision:
    """How the time-varying components were chosen.

    ``mode``: "auto", "steady" or "given"; ``tides`` the constituents fitted; ``slow`` "off", "auto" (learned)
    or "fixed"; ``reason`` one sentence; ``evidence`` the residual test (None when components were given);
    ``warning`` the steady-fit warning (or None); ``steady_field`` the steady fit whose residuals were tested
    (None when components were given; not part of :meth:`to_dict`), for a before/after comparison.
    """

    mode: str
    tides: tuple[str, ...]
    slow: str
    reason: str
    evidence: TemporalEvidence | None = None
    warning: str | None = None
    steady_field: Any = dataclasses.field(default=None, compare=False, repr=False)

    @property
    def components(self) -> list[str]:
        return ["steady", *self.tides] + ([SLOW] if self.slow != "off" else [])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: mode, components, reason, warning and the evidence of every tested component."""
        return plain({"mode": self.mode, "components": self.components, "reason": self.reason,
                      "warning": self.warning,
                      "evidence": None if self.evidence is None else self.evidence.to_dict()})


def candidate_periods_s(frame, span_s: float = math.inf, *, rayleigh: float = 1.0) -> dict[str, float]:
    """The constituents the residual test examines, {name: period s}.

    Every tide of :data:`~driftwise.gp.constituents.CONSTITUENTS`, and ``inertial`` (2π / 2Ω|sin φ|) when the tracks
    are lon/lat at a latitude φ where it is defined, taken in the order of their equilibrium-tide amplitudes
    M2 > K1 > S2 > O1 > N2 (Doodson 1921; from memory), inertial last.  A constituent that tracks of span ``span_s``
    cannot separate from one kept before it (Rayleigh criterion span ≥ rayleigh / |f₁ − f₂|, common practice) is
    left out: in short records the principal constituent stands for its group (M2 for S2 and N2 in 2-day tracks).
    """
    latitude = getattr(frame, "lat0_deg", None) if getattr(frame, "is_geographic", False) else None
    names = list(PRINCIPAL_ORDER)
    if latitude is not None and abs(latitude) >= MIN_INERTIAL_LATITUDE_DEG:
        names.append(INERTIAL)
    kept: dict[str, float] = {}
    for name in names:
        period = 2.0 * math.pi / angular_frequency_rad_s(name, latitude)
        if all(span_s * abs(1.0 / period - 1.0 / other) >= rayleigh for other in kept.values()):
            kept[name] = period
    return kept


def residual_evidence(field: fld.FlowField, tracks, *, alpha: float = ALPHA) -> TemporalEvidence:
    """The residual test (module docstring, steps 2–3) of a steady ``field`` on the ``tracks`` it was fitted to, at
    the constituents of :func:`candidate_periods_s` for the tracks' typical span."""
    obs = velocity_observations(tracks, position_error_m=field.position_error_m or 0.0)
    if field.fit_info.get("likelihood") == "transitions":      # compared with the chords it was fitted to
        mean = chord_velocities(field, transition_set(obs))
    else:
        mean, _ = field.predict(obs.position_m)
    noise = obs.noise_variance_m2_s2(field.diffusivity_m2_s, field.noise_floor_m_s ** 2)
    periods = candidate_periods_s(tracks.frame, typical_span_s(obs.time_s, obs.track_index))
    return detect_time_structure(obs.velocity_m_s - mean, obs.time_s, obs.track_index, periods, alpha=alpha,
                                 weights=1.0 / noise)


def _significance_text(evidence: TemporalEvidence) -> str:
    """'M2 (F = 41.2, adjusted p = 3e-09 < 0.01, ...)' for each significant component, or the nearest miss."""
    found = [c for c in evidence.components if c.significant]
    if found:
        return "; ".join(f"{c.name} (F = {c.f_statistic:.3g}, adjusted p = {c.p_adjusted:.2g} < {evidence.alpha:g}, "
                         f"{100 * c.variance_fraction:.3g} % of the residual variance"
                         + ("" if _relevant(c) else f": below the {100 * MIN_SHARE:g} % share floor, not modelled")
                         + ")" for c in found)
    tested = [c for c in evidence.components if c.status == "tested"]
    if not tested:
        return "no component could be tested (tracks too short)"
    best = min(tested, key=lambda c: c.p_adjusted)
    return f"none significant: the strongest, {best.name}, has adjusted p = {best.p_adjusted:.2g} ≥ {evidence.alpha:g}"


def _relevant(component) -> bool:
    """A significant component is modelled only when it explains at least MIN_SHARE of the residual variance."""
    return component.variance_fraction >= MIN_SHARE


def _decide(mode: str, evidence: TemporalEvidence, likelihood: str, frame) -> TemporalDecision:
    """The decision after the steady fit and its residual test."""
    chosen = [c.name for c in evidence.components if c.significant and _relevant(c)]
    tides = tuple(name for name in chosen if name != SLOW)
    slow = "auto" if SLOW in chosen else "off"
    what = _significance_text(evidence)
    left_out = [name for name in candidate_periods_s(frame) if name not in {c.name for c in evidence.components}]
    if left_out:
        what += (f" ({', '.join(left_out)} not tested: not separable from the principal constituents in tracks of "
                 f"{format_duration(evidence.typical_span_s)}, Rayleigh criterion)")
    if mode == "steady":
        return TemporalDecision(mode, (), "off", f"steady asked for; residual test: {what}", evidence,
                                steady_warning(evidence))
    if not chosen:
        return TemporalDecision(mode, (), "off", f"the steady fit's residuals show no time structure to model: {what}",
                                evidence)
    if likelihood == "transitions":
        return TemporalDecision(mode, (), "off", f"kept steady because the transition likelihood needs a steady "
                                f"model, although the residuals hold {what}", evidence, steady_warning(evidence))
    return TemporalDecision(mode, tides, slow, f"the steady fit's residuals hold {what}", evidence)


def temporal_checkpoint_path(path: Path) -> Path:
    """Where the refit with time-varying components keeps its checkpoint, beside the steady fit's ``path``."""
    path = Path(path)
    return path.with_name(path.name.removesuffix(".npz") + ".temporal.npz")


def _with_record(field: fld.FlowField, decision: TemporalDecision) -> fld.FlowField:
    """The field with ``fit_info["temporal_choice"]`` = the decision (so the model file carries it)."""
    meta = json.loads(field.metadata_json)
    meta.setdefault("fit", {})["temporal_choice"] = decision.to_dict()
    return dataclasses.replace(field, metadata_json=json.dumps(meta, sort_keys=True))


def fit_temporal(tracks, kernel: str, *, temporal: str = "auto", tides=(), slow_time_scale_s=None,
                 likelihood: str = "auto", inducing: int | None = None, seed: int = 0,
                 position_error_m: float | None = None, checkpoint: Checkpoint | None = None, quiet: bool = False,
                 background: str = "linear", schedule: Schedule | None = None, alpha: float = ALPHA,
                 timing_s: dict[str, float] | None = None
                 ) -> tuple[fld.FlowField, LikelihoodChoice | None, TemporalDecision]:
    """Fit ``tracks`` with the time-varying components ``temporal`` calls for (module docstring).

    ``temporal`` ∈ :data:`TEMPORAL_MODES`; ``tides``/``slow_time_scale_s`` as in :func:`driftwise.fit`: when
    either is given, those components are fitted (mode "given"), and "steady" with them is refused.  Other
    options as in :func:`~driftwise.dynamics.transitionfit.fit_by_likelihood`.  Returns (field, the likelihood
    choice of the steady fit or None for a time-varying field, :class:`TemporalDecision`); a forced steady fit
    whose residuals hold time structure also issues a :class:`TemporalWarning`.
    """
    if temporal not in TEMPORAL_MODES:
        raise InputError(f"temporal: use one of {', '.join(TEMPORAL_MODES)}, got {temporal!r}")
    given = temporal_choice(tides, slow_time_scale_s)
    if not given.is_steady and temporal == "steady":
        raise InputError("--temporal steady contradicts --tides/--slow-time-scale; drop one of them")
    schedule = Schedule() if schedule is None else schedule
    common = {"inducing": inducing, "seed": seed, "position_error_m": position_error_m, "background": background}
    clock = Stopwatch(timing_s)
    if not given.is_steady:
        _warn_unresolved_tides(tracks, given.tides)
        field = fit(tracks, kernel, checkpoint=checkpoint, progress=not quiet, tides=given.tides, schedule=schedule,
                    slow_time_scale_s=slow_time_scale_s, timing_s=clock.laps, **common)
        decision = TemporalDecision("given", given.tides, given.slow, "components given explicitly")
        return _with_record(field, decision), None, decision
    field, choice = fit_by_likelihood(tracks, kernel, likelihood, checkpoint=checkpoint, quiet=quiet, schedule=schedule,
                                      timing_s=clock.laps, **common)
    with clock("residual_test"):
        decision = dataclasses.replace(_decide(temporal, residual_evidence(field, tracks, alpha=alpha), likelihood,
                                               tracks.frame), steady_field=field)
    if decision.warning:
        warnings.warn(decision.warning, TemporalWarning, stacklevel=2)
    if decision.tides or decision.slow != "off":
        stage = None if checkpoint is None else dataclasses.replace(
            checkpoint, path=temporal_checkpoint_path(checkpoint.path))
        with clock("temporal_fit"):
            field = fit(tracks, kernel, checkpoint=stage, progress=not quiet, tides=decision.tides, schedule=schedule,
                        slow_time_scale_s="auto" if decision.slow == "auto" else None, timing_s={}, **common)
        if stage is not None:
            stage.path.unlink(missing_ok=True)
        choice = None
    return _with_record(field, decision), choice, decision


def _warn_unresolved_tides(tracks, tides) -> None:
    """A TemporalWarning per given constituent whose period P exceeds the span T of the tracks' times: over T < P
    cos/sin(ωt) cannot be told from a constant (Rayleigh criterion against frequency 0, T ≥ 1/f), so its amplitude
    fields trade off against the steady flow and are not identified."""
    span_s = float(tracks.time_s.max() - tracks.time_s.min())
    periods = candidate_periods_s(tracks.frame)
    for name in tides:
        if name in periods and span_s < periods[name]:
            warnings.warn(f"tides {name}: the tracks span {format_duration(span_s)}, less than the {name} period "
                          f"{format_duration(periods[name])}, so {name} cannot be told from the steady flow "
                          f"(Rayleigh criterion): its amplitude fields are not identified; drop {name} or give tracks "
                          f"spanning at least {format_duration(periods[name])}", TemporalWarning, stacklevel=3)


def temporal_fit_report(field: fld.FlowField, decision: TemporalDecision) -> dict[str, Any]:
    """The ``temporal`` object of ``driftwise fit --json``: the fitted components with their periods (s) and learned
    scales (:func:`~driftwise.gp.temporalfit.temporal_report`), and how they were chosen (mode, reason, the
    evidence of every tested component: F, degrees of freedom, p, adjusted p against α, variance explained)."""
    report = temporal_report(field.params.kernel)
    periods = {name: c["period_s"] for name, c in report.get("constituents", {}).items()}
    return plain({**report, "periods_s": periods, **decision.to_dict(), "components": report["components"]})
