"""The verification step test: size it, run it, judge it against the prediction."""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np

from protocol.messages import ExperimentKind

from .. import analysis
from ..plan import LoopPlan, Plan
from ..stand import Stand
from .experiment import Experiment, ids
from .results import Progress, ProgressFn, Stage, finite, quiet


@dataclass(frozen=True)
class StepPlan:
    """A step test's size and timing (board time, s)."""

    step: float
    step_at_s: float
    duration_s: float


def plan_step(stand: Stand, lp: LoopPlan, plan: Plan, cand, step: float | None,
              cand_period_s: float | None) -> StepPlan:
    """Size and time a step test for a candidate.

    The step is the asked size capped at the relay target (the default when none is asked).
    The test lasts three predicted settling times (ten rise times when the model predicts no
    settling, five relay periods when it predicts neither: a poor fit; common practice, no
    source), within the plan's experiment limit. A rate step integrates into an angle (height):
    it is kept small enough for that to stay within half the angle (height) limit over the test.
    """
    axis_i, loop_i = ids(lp)
    cap = plan.relay_target * plan.limits.threshold(axis_i, loop_i)
    step = cap if step is None else min(step, cap)
    pred = cand.predicted
    rise = pred.rise_s if math.isfinite(pred.rise_s) else float("nan")
    if math.isfinite(pred.settling_s):
        settle = pred.settling_s
    elif math.isfinite(rise):
        settle = 10 * max(rise, 0.01)
    else:
        period = cand_period_s if cand_period_s and math.isfinite(cand_period_s) else 0.2
        settle = 5.0 * period
    step_at = max(0.1, 0.2 * settle)
    duration = min(step_at + max(3.0 * settle, 5 * rise if math.isfinite(rise) else 0.0),
                   plan.max_experiment_s)
    outer = "heave" if lp.axis == "heave" else "angle"
    if lp.loop == "rate" and outer in stand.info.axes.get(lp.axis, ()):
        outer_limit = plan.limits.heave_m if lp.axis == "heave" else plan.limits.angle_rad
        step = min(step, 0.5 * outer_limit / max(duration - step_at, 1e-3))
    return StepPlan(step, step_at, duration)


def judge_step(measured: dict, predicted: dict, plan: Plan, noise_std: float | None,
               step: float) -> tuple[list[str], float]:
    """The verdict on a step test's metrics beside the prediction. Pure.

    Parameters
    ----------
    measured, predicted : dict
        ``{"overshoot", "rise_s", ...}`` (None where not reached).
    plan : Plan
        ``verify_overshoot_margin`` and ``verify_time_factor``.
    noise_std : float or None
        The loop's measurement noise; what the loop does by itself moves a small step's peak
        and final value by about its deviation, so the overshoot margin widens by
        2 sigma/step (common practice, no source).
    step : float
        The step's size.

    Returns
    -------
    (list of str, float)
        The problems found (none: passed) and the overshoot allowance used.
    """
    allowance = (2.0 * float(noise_std) / abs(step)
                 if noise_std and noise_std > 0 and step else 0.0)
    problems = []
    if measured["overshoot"] is None or measured["rise_s"] is None:
        problems.append("the step response never reached the new setpoint")
    else:
        margin = plan.verify_overshoot_margin + allowance
        pred_os = predicted["overshoot"] or 0.0  # None: the model predicts no overshoot
        if measured["overshoot"] > pred_os + margin:
            problems.append(f"overshoot {measured['overshoot']:.0%} exceeds the predicted "
                            f"{pred_os:.0%} by more than {margin:.0%}"
                            + (f" (the margin {plan.verify_overshoot_margin:.0%} plus "
                               f"{allowance:.0%} for the measurement's own spread)"
                               if allowance else ""))
        pr = predicted["rise_s"]
        f = plan.verify_time_factor
        if pr and not (pr / f <= measured["rise_s"] <= pr * f):
            problems.append(f"rise time {measured['rise_s']:.3g} s is outside "
                            f"[{pr / f:.3g}, {pr * f:.3g}] s around the predicted {pr:.3g} s")
    return problems, allowance


def verify_step(stand: Stand, lp: LoopPlan, plan: Plan, cand, *, setpoint: float,
                step: float | None = None, noise_std: float | None = None,
                cand_period_s: float | None = None, progress: ProgressFn = quiet,
                stop: threading.Event | None = None, exp_id: str | None = None) -> dict:
    """Step test with the applied gains; the measured metrics beside the prediction.

    The metrics are taken on a zero-phase smoothed response when the measurement noise is known,
    so noise peaks do not count as overshoot. Returns the verification record (``passed``,
    ``problems``, ``measured``, ``predicted_metrics``, the predicted curve, ``experiment``).
    """
    sp = plan_step(stand, lp, plan, cand, step, cand_period_s)
    pred = cand.predicted
    exp = Experiment(stand, lp, plan, ExperimentKind.STEP, exp_id or f"{lp.axis}-{lp.loop}-verify",
                     {"amplitude": sp.step, "setpoint": setpoint, "step_at_s": sp.step_at_s,
                      "duration_s": sp.duration_s},
                     reference=setpoint if lp.loop == "heave" else None, stop=stop)
    progress(Progress(Stage.VERIFY, f"{lp.key}: step of {sp.step:.3g} with the new gains",
                      lp.key))
    with exp:
        exp.start(amplitude=sp.step, setpoint=setpoint, step_at_s=sp.step_at_s,
                  duration_s=sp.duration_s + 1.0)
        exp.run_for(sp.duration_s, 60 + 10 * sp.duration_s)
    stand.check_kill()
    cols = exp.loop_columns()
    t = (cols["time_us"] - cols["time_us"][0]) * 1e-6
    y = cols["measurement"]
    after = t >= sp.step_at_s
    before = ~after
    y0 = (float(np.mean(y[before][-max(1, int(0.5 * before.sum())):])) if before.any()
          else setpoint)
    met = analysis.step_metrics(t[after] - sp.step_at_s, y[after], y0, setpoint + sp.step,
                                noise_std=noise_std if noise_std and noise_std > 0 else None)
    measured = {"overshoot": finite(met.overshoot), "rise_s": finite(met.rise_s),
                "settling_s": finite(met.settling_s), "iae": finite(met.iae)}
    predicted = {"overshoot": finite(pred.overshoot), "rise_s": finite(pred.rise_s),
                 "settling_s": finite(pred.settling_s), "iae": finite(pred.iae_setpoint * sp.step)}
    problems, allowance = judge_step(measured, predicted, plan, noise_std, sp.step)
    received, missing, _ = exp.missing_samples()
    lost = exp.samples_problem("step")
    if lost:
        problems.append(lost)
    curve = {"t_s": [float(x) for x in pred.t_s],
             "y": [float(setpoint + sp.step * v) for v in pred.y_setpoint],
             "t_offset_s": sp.step_at_s}
    result = {"step": sp.step, "setpoint": setpoint, "step_at_s": sp.step_at_s,
              "measured": measured, "overshoot_allowance": allowance, "metrics": measured,
              "predicted_metrics": predicted, "predicted": curve, "passed": not problems,
              "problems": problems, "experiment": exp.exp_id, "exp_id": exp.exp_id,
              "samples": received, "samples_missing": missing}
    exp.finish(result)
    return result
