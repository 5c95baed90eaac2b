"""Tuning candidates from an identification, each judged on the identified loop model.

Rules offered per controller type (the user chooses the type, the tool recommends a rule):

=============  ============================================================================
``pi``         ziegler_nichols, tyreus_luyben, amigo, ms_constrained
``pid``        ziegler_nichols, tyreus_luyben, astrom_hagglund, amigo, ms_constrained
``pd``         astrom_hagglund, ms_constrained
=============  ============================================================================

Robustness over models: a relay record pins the loop near its oscillation frequency, not at low
frequency, where models that fit the record almost equally well can differ (an integrator or a
slow lag). The ``ms_constrained`` design therefore enforces the Ms bound on the chosen model
and on every other fitted model the record cannot tell from it (misfit beyond the noise at
most 2x the chosen model's, see ``_plausible_models``); the IAE is judged on the chosen
model. For plants outside the model families the Ms on the real loop can still exceed the
target (tests/bench/identify.py measures it).

Ultimate-point rules use ``Identification.best`` (loop basis); AMIGO uses the FOPDT fit (or the
integrating model) on the loop basis; ``ms_constrained`` is designed on the chosen loop model
(:mod:`agent.analysis.design`). The recommendation is ``ms_constrained`` when its design
succeeded, else AMIGO, else the candidate with the smallest Ms.

For every candidate: Ms, gain and phase margins (:mod:`agent.analysis.robustness`), predicted
set-point and load steps (:mod:`agent.analysis.predict`), gains in parallel and standard form,
the board's discrete coefficients (:mod:`agent.analysis.controller`), an integrator limit and a
set-point weight.

Derivative filter: ``tf_s = Td/10`` (common practice, no source), never below one sample.
Measurement noise: with ``max_output_noise`` (the output deviation the measurement noise may
cause; the workflow allows a tenth of the actuator range) and the identified noise deviation,
every candidate's derivative filter is lengthened until its noise gain
(:func:`agent.analysis.controller.noise_gain`) keeps the output noise within that bound, and
``ms_constrained`` is designed under the same bound (it also limits kp). A rule whose kp alone
exceeds it keeps its gains, with a note, and is not recommended. Each candidate reports
``output_noise``, the output deviation its gains make of the identified noise.
Set-point weight: 1 for the ultimate-point rules (their published form); the AMIGO PID rule's
own weight; otherwise the largest-benefit weight in {1, 0.8, ..., 0} that keeps the predicted
overshoot at or below 10 % with the smallest set-point IAE.
Integrator limit (anti-windup by clamping the integral term, Åström & Hägglund 2006): the
actuator limit when given, else twice the larger of the measured trim and the relay amplitude
(common practice, no source).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .controller import discretize, filter_for_noise, noise_gain, standard_form
from .design import ms_constrained_design
from .identify import Identification
from .predict import StepPrediction, predict_step
from .robustness import margins, sensitivity_peak
from .rules import (
    amigo,
    amigo_setpoint_weight,
    astrom_hagglund_phase_margin,
    tyreus_luyben,
    ziegler_nichols,
)

__all__ = ["RULES", "Candidate", "TuningResult", "make_candidate", "tune"]

RULES = {
    "pi": ("ziegler_nichols", "tyreus_luyben", "amigo", "ms_constrained"),
    "pid": ("ziegler_nichols", "tyreus_luyben", "astrom_hagglund", "amigo", "ms_constrained"),
    "pd": ("astrom_hagglund", "ms_constrained"),
}

SOURCES = {
    "ziegler_nichols": "Ziegler & Nichols (1942), Trans. ASME 64",
    "tyreus_luyben": "Tyreus & Luyben (1992), Ind. Eng. Chem. Res. 31(11)",
    "astrom_hagglund": "Åström & Hägglund (1984), Automatica 20(5), phase margin 45°",
    "amigo": "Åström & Hägglund (2004, PID; 2006, PI)",
    "ms_constrained": "Garpinger, Hägglund & Åström (2014), J. Process Control 24(5)",
}


@dataclass(frozen=True)
class Candidate:
    """One tuning candidate, parallel-form gains of the board's controller plus its appraisal."""

    rule: str
    controller: str
    kp: float
    ki: float
    kd: float
    tf_s: float
    b: float
    ms: float
    gm: float
    pm_deg: float
    predicted: StepPrediction
    discrete: dict
    i_limit: float
    source: str = ""
    notes: tuple[str, ...] = field(default_factory=tuple)
    output_noise: float = float("nan")  # output deviation caused by the measurement noise

    @property
    def standard(self) -> dict:
        """The gains in standard form (see :func:`agent.analysis.controller.standard_form`)."""
        return standard_form(self.kp, self.ki, self.kd, self.tf_s)

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        return {
            "rule": self.rule, "controller": self.controller, "source": self.source,
            "parallel": {"kp": float(self.kp), "ki": float(self.ki), "kd": float(self.kd),
                         "tf_s": float(self.tf_s)},
            "standard": self.standard,
            "kp": float(self.kp), "ki": float(self.ki), "kd": float(self.kd),
            "tf_s": float(self.tf_s), "b": float(self.b), "ms": float(self.ms),
            "gm": float(self.gm), "pm_deg": float(self.pm_deg),
            "predicted": self.predicted.to_dict(), "discrete": dict(self.discrete),
            "i_limit": float(self.i_limit), "notes": list(self.notes),
            "output_noise": float(self.output_noise),
        }


@dataclass(frozen=True)
class TuningResult:
    """All candidates and the name of the recommended rule."""

    candidates: tuple[Candidate, ...]
    recommended: str
    controller: str = "pi"
    ms_target: float = 1.4
    notes: tuple[str, ...] = field(default_factory=tuple)

    def get(self, rule: str) -> Candidate:
        """The candidate of one rule.

        Parameters
        ----------
        rule : str
            The rule's name, e.g. ``"ms_constrained"``.

        Returns
        -------
        Candidate

        Raises
        ------
        KeyError
            When no candidate came from that rule.
        """
        for c in self.candidates:
            if c.rule == rule:
                return c
        raise KeyError(rule)

    @property
    def recommended_candidate(self) -> Candidate:
        """The candidate named by ``recommended``."""
        return self.get(self.recommended)

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        return {"controller": self.controller, "ms_target": float(self.ms_target),
                "recommended": self.recommended, "notes": list(self.notes),
                "candidates": [c.to_dict() for c in self.candidates]}


@dataclass(frozen=True)
class _Gains:
    kp: float
    ki: float
    kd: float
    tf_s: float
    b: float


def _choose_b(model, g: _Gains, sample_time_s: float) -> float:
    if g.ki <= 0:
        return 1.0
    best = None
    fallback = None
    for b in (1.0, 0.8, 0.6, 0.4, 0.2, 0.0):
        pr = predict_step(model, _Gains(g.kp, g.ki, g.kd, g.tf_s, b), sample_time_s)
        if not np.isfinite(pr.iae_setpoint):
            continue
        if fallback is None or pr.overshoot < fallback[0]:
            fallback = (pr.overshoot, b)
        if pr.overshoot <= 0.10 and (best is None or pr.iae_setpoint < best[0]):
            best = (pr.iae_setpoint, b)
    if best is not None:
        return best[1]
    return fallback[1] if fallback else 1.0


def make_candidate(rule: str, controller: str, model, kp: float, ki: float, kd: float,
                   tf_s: float, b: float, sample_time_s: float, i_limit: float,
                   notes: tuple[str, ...] = (), noise_std: float = float("nan")) -> Candidate:
    """Appraise gains on ``model`` (loop basis) and wrap them as a :class:`Candidate`
    (``noise_std``: the measurement noise, for ``output_noise``).

    Parameters
    ----------
    rule, controller : str
        Name of the rule and controller structure.
    model
        Loop model the gains are appraised on.
    kp, ki, kd, tf_s, b : float
        Gains, derivative filter time (s) and set-point weight.
    sample_time_s : float
        The board's sample time.
    i_limit : float
        Integrator clamp (output units).
    notes : tuple of str
        Remarks shown with the candidate.
    noise_std : float
        Measurement noise (standard deviation).

    Returns
    -------
    Candidate
    """
    ms = sensitivity_peak(model, kp, ki, kd, tf_s)[0]
    gm, pm, _, _ = margins(model, kp, ki, kd, tf_s)
    pred = predict_step(model, _Gains(kp, ki, kd, tf_s, b), sample_time_s)
    disc = discretize(kp, ki, kd, tf_s, b, sample_time_s, i_limit)
    return Candidate(rule, controller, float(kp), float(ki), float(kd), float(tf_s), float(b),
                     float(ms), float(gm), float(pm), pred, disc, float(i_limit),
                     SOURCES.get(rule, ""), tuple(notes),
                     float(noise_gain(kp, kd, tf_s, sample_time_s) * noise_std))


def _fopdt_for_amigo(ident: Identification) -> tuple[float, float, float, bool]:
    ts_half = 0.5 * ident.sample_time_s
    chosen = ident.model
    if chosen.integrating:
        p = chosen.params
        # lags lumped into the dead time (common practice, no source)
        lag = chosen.family.residence_time(p)
        return p["K"], 0.0, p["L"] + ts_half + lag, True
    fo = ident.models.get("fopdt")
    p = fo.params
    K, T, L = p["K"], p["T"], p["L"] + ts_half
    if T > 50 * ident.cycles.period_s:
        return K / T, 0.0, L, True  # indistinguishable from an integrator
    return K, T, L, False


def _plausible_models(ident: Identification) -> tuple:
    """Other fitted models that the record cannot tell from the chosen one, on the loop basis.

    A model's misfit is its residual in excess of the measurement noise,
    ``sqrt(rmse^2 - noise^2)`` (white noise adds in quadrature). A model is plausible when its
    misfit is at most twice the chosen model's (three times for an integrating model when the
    chosen one is not), or below half a noise deviation plus 0.2 % of the amplitude (two fits
    that both reach the noise). Common practice, no source; calibrated on
    tests/bench/identify.py (README.md)."""
    amp = ident.cycles.amplitude
    sig = float(ident.noise_std) if np.isfinite(ident.noise_std) else 0.0

    def misfit(m) -> float:
        return float(np.sqrt(max(m.rmse ** 2 - sig ** 2, 0.0)))

    floor = 0.5 * sig + 0.002 * amp
    limit = max(2.0 * misfit(ident.model), floor)
    # an integrator the record cannot rule out is the dangerous alternative (integral action
    # designed for a slow lag destabilises an integrating loop at low frequency): wider bound
    limit_int = max(3.0 * misfit(ident.model), floor)
    out = []
    for k, m in ident.models.items():
        if k == ident.model.kind or not np.isfinite(m.rmse) or m.params["K"] <= 0:
            continue
        lim = limit_int if m.integrating and not ident.model.integrating else limit
        if misfit(m) <= lim:
            out.append(m.with_delay(m.params["L"] + 0.5 * ident.sample_time_s, "loop"))
    return tuple(out)


def tune(ident: Identification, controller: str = "pi", ms_target: float = 1.4,
         sample_time_s: float = 0.001, output_limit: float | None = None,
         max_output_noise: float | None = None) -> TuningResult:
    """Tuning candidates for ``controller`` in {"pi", "pd", "pid"} from an identification.

    ``max_output_noise``: the output deviation the identified measurement noise may cause
    (None: no bound); see the module docstring.

    Parameters
    ----------
    ident : Identification
        Result of :func:`agent.analysis.identify`.
    controller : {"pi", "pd", "pid"}
        Controller structure.
    ms_target : float
        Bound on the maximum sensitivity of the designed candidates.
    sample_time_s : float
        The board's loop sample time.
    output_limit : float, optional
        The loop's output limit (sizes the integrator clamp).
    max_output_noise : float, optional
        Bound on the output deviation caused by the measurement noise.

    Returns
    -------
    TuningResult

    Raises
    ------
    ValueError
        For an unknown controller type, ``ms_target <= 1``, a non-positive sample time or a
        non-positive ``max_output_noise``.
    """
    controller = str(controller).lower()
    if controller not in RULES:
        raise ValueError(f"Unknown controller type {controller!r}; expected 'pi', 'pd' or 'pid'.")
    if not ms_target > 1.0:
        raise ValueError(f"ms_target is {ms_target}; expected a maximum sensitivity above 1 "
                         "(1.4 is a robust default, 2.0 an aggressive one).")
    if not sample_time_s > 0:
        raise ValueError(f"sample_time_s is {sample_time_s}; expected the loop's sample time (s).")
    if max_output_noise is not None and not max_output_noise > 0:
        raise ValueError(f"max_output_noise is {max_output_noise}; expected a positive output "
                         "deviation (or None for no bound).")
    model = ident.model_loop
    ku, tu = ident.best.ku, ident.best.tu_s
    sigma = float(ident.noise_std) if np.isfinite(ident.noise_std) else 0.0
    gain_max = (float(max_output_noise) / sigma
                if max_output_noise is not None and sigma > 0 else None)
    d = ident.relay_amplitude if np.isfinite(ident.relay_amplitude) else 0.0
    trim = abs(ident.bias_estimate) if ident.bias_estimate is not None else 0.0
    i_limit = float(output_limit) if output_limit else 2.0 * max(trim, d)
    cands: list[Candidate] = []
    notes: list[str] = []

    def tf_rule(kp, kd):
        if kd <= 0:
            return 0.0
        tf = max(kd / kp / 10.0, sample_time_s)
        if gain_max is not None:
            need = filter_for_noise(kp, kd, sample_time_s, gain_max)
            if np.isfinite(need):
                tf = max(tf, need)
        return tf

    for rule in RULES[controller]:
        try:
            if rule == "ziegler_nichols":
                kp, ki, kd = ziegler_nichols(ku, tu, controller)
                tf_s, b = tf_rule(kp, kd), 1.0
            elif rule == "tyreus_luyben":
                kp, ki, kd = tyreus_luyben(ku, tu, controller)
                tf_s, b = tf_rule(kp, kd), 1.0
            elif rule == "astrom_hagglund":
                kp, ki, kd = astrom_hagglund_phase_margin(ku, tu, controller)
                tf_s, b = tf_rule(kp, kd), 1.0
            elif rule == "amigo":
                K, T, L, integ = _fopdt_for_amigo(ident)
                kp, ki, kd = amigo(K, T, L, controller, integrating=integ)
                tf_s = tf_rule(kp, kd)
                if controller == "pid":
                    b = amigo_setpoint_weight(0.0 if integ else L / (L + T))
                else:
                    b = _choose_b(model, _Gains(kp, ki, kd, tf_s, 1.0), sample_time_s)
            else:  # ms_constrained
                des = ms_constrained_design(model, controller, ms_target, sample_time_s,
                                            min_tf_s=sample_time_s,
                                            extra_models=_plausible_models(ident),
                                            noise_gain_max=gain_max)
                if not des.success and des.kp <= 0:
                    notes.append(f"ms_constrained: {des.message}")
                    continue
                kp, ki, kd, tf_s = des.kp, des.ki, des.kd, des.tf_s
                b = _choose_b(model, _Gains(kp, ki, kd, tf_s, 1.0), sample_time_s)
                if not des.success:
                    notes.append(f"ms_constrained: {des.message}")
        except ValueError as exc:
            notes.append(f"{rule}: {exc}")
            continue
        c_notes = ()
        if gain_max is not None and abs(kp) >= gain_max:
            c_notes = (f"kp alone turns the measurement noise ({sigma:.3g}) into an output "
                       f"deviation of {abs(kp) * sigma:.3g}, above the {max_output_noise:.3g} "
                       "allowed; not recommended",)
            notes.append(f"{rule}: {c_notes[0]}")
        cands.append(make_candidate(rule, controller, model, kp, ki, kd, tf_s, b,
                                    sample_time_s, i_limit, c_notes, sigma))
    if not cands:
        raise ValueError("No tuning candidate could be computed from this identification.")
    quiet = [c for c in cands if gain_max is None or abs(c.kp) < gain_max] or cands
    names = [c.rule for c in quiet]
    rec = None
    if "ms_constrained" in names:
        c = quiet[names.index("ms_constrained")]
        if c.ms <= ms_target * 1.02 and c.predicted.settled:
            rec = "ms_constrained"
    if rec is None and "amigo" in names:
        rec = "amigo"
    if rec is None:
        rec = min(quiet, key=lambda c: c.ms).rule
    return TuningResult(tuple(cands), rec, controller, float(ms_target), tuple(notes))
