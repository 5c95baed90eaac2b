"""Holding a loop still: the noise and trim check, and the heave axis's lift-off."""

from __future__ import annotations

import math
import threading

import numpy as np

from protocol.messages import Axis, ExperimentKind, Loop

from ..errors import WorkflowError
from ..plan import LoopPlan, Plan
from ..stand import Stand
from .experiment import Experiment, current_measurement, full_rate_telemetry, ids, wait
from .results import Progress, ProgressFn, Stage, quiet

HOLD_S = {"rate": 0.5, "angle": 1.0, "heave": 2.0}
LIFT_S = 4.0


def hold_seconds(lp: LoopPlan) -> float:
    """How long the hold lasts: longer for slower loops (the heave axis holds longest)."""
    return HOLD_S["heave"] if lp.axis == "heave" else HOLD_S[lp.loop]


def noise_check(stand: Stand, lp: LoopPlan, plan: Plan, progress: ProgressFn = quiet,
                stop: threading.Event | None = None, exp_id: str | None = None) -> dict:
    """Hold the loop at its setpoint with the current gains; measure noise and trim.

    ``noise_std`` is estimated from successive differences (std(diff(y))/sqrt(2)), which ignores
    the slow closed-loop motion (common practice, no source); ``trim`` is the mean controller
    output over the second half of the hold (past the start transient). The heave loop holds the
    height the frame is at. Returns ``{"noise_std", "trim", "setpoint", "samples"}``.
    """
    axis_i, loop_i = ids(lp)
    setpoint = 0.0
    if lp.loop == "heave":
        full_rate_telemetry(stand, loop_i)
        wait(stand, stop, 0.1)
        setpoint = current_measurement(stand, axis_i, loop_i) or 0.0
    hold_s = hold_seconds(lp)
    exp = Experiment(stand, lp, plan, ExperimentKind.HOLD, exp_id or f"{lp.axis}-{lp.loop}-hold",
                     {"setpoint": setpoint, "duration_s": hold_s},
                     reference=setpoint if lp.loop == "heave" else None, stop=stop)
    progress(Progress(Stage.NOISE, f"{lp.key}: holding {hold_s:g} s to measure noise and trim",
                      lp.key))
    with exp:
        exp.start(setpoint=setpoint, duration_s=hold_s + 5.0)
        exp.run_for(hold_s)
    stand.check_kill()
    cols = exp.loop_columns()
    y, u = cols["measurement"], cols["output"]
    if len(y) < 20:
        exp.finish({"error": "too few samples"})
        raise WorkflowError(f"{lp.key}: the hold gave only {len(y)} samples; check telemetry")
    received, missing, _ = exp.missing_samples()
    lost = exp.samples_problem("hold")
    if lost:
        exp.finish({"error": lost})
        raise WorkflowError(f"{lp.key}: {lost}")
    half = len(y) // 2
    # successive differences of samples one tick apart only (samples lost on the link would
    # add the loop's motion over the gap to the noise)
    t_half = cols["time_us"][half:]
    dy = np.diff(y[half:])[np.rint(np.diff(t_half) * stand.info.loop_rate_hz * 1e-6) == 1]
    if dy.size < 10:
        exp.finish({"error": "too few consecutive samples"})
        raise WorkflowError(f"{lp.key}: the hold gave only {dy.size} pairs of consecutive "
                            "samples; check the link")
    noise = float(np.std(dy) / math.sqrt(2))
    trim = float(np.mean(u[half:]))
    result = {"noise_std": noise, "trim": trim, "setpoint": setpoint, "samples": int(len(y)),
              "samples_missing": missing}
    exp.finish(result)
    progress(Progress(Stage.NOISE, f"{lp.key}: noise {noise:.3g}, trim {trim:.3g}", lp.key,
                      data=result))
    return result


def lift_off(stand: Stand, plan: Plan, progress: ProgressFn = quiet,
             stop: threading.Event | None = None, for_loop: str = "heave") -> float | None:
    """Lift the frame off the heave rail's bottom stop before identifying the heave loops.

    A frame resting on the stop cannot be identified (the stop clamps its motion): the height
    loop (current gains) is stepped up by half the heave limit; the board then holds the new
    height between experiments. Returns the height reached, or None when the frame was already
    clear of the stop (or the board has no height loop).
    """
    axis_i, loop_i = int(Axis.HEAVE), int(Loop.HEAVE)
    if "heave" not in stand.info.axes.get("heave", ()):
        return None
    lp = LoopPlan("heave", "heave")
    full_rate_telemetry(stand, loop_i)
    wait(stand, stop, 0.1)
    height = current_measurement(stand, axis_i, loop_i)
    lift = 0.5 * plan.limits.heave_m
    if height is None or height >= lift:
        return None
    progress(Progress(Stage.INFO, f"heave: lifting the frame {lift:.2f} m off the bottom stop",
                      lp.key))
    exp = Experiment(stand, lp, plan, ExperimentKind.STEP, f"heave-{for_loop}-lift",
                     {"amplitude": lift, "setpoint": height, "step_at_s": 0.2,
                      "duration_s": LIFT_S}, reference=height, stop=stop)
    with exp:
        exp.start(amplitude=lift, setpoint=height, step_at_s=0.2, duration_s=LIFT_S)
        exp.run_for(LIFT_S, 60 + 10 * LIFT_S)
    stand.check_kill()
    reached = current_measurement(stand, axis_i, loop_i)
    exp.finish({"from_m": height, "by_m": lift, "reached_m": reached})
    stand.log_event("lift_off", from_m=height, by_m=lift)
    return reached
