"""The relay experiment: amplitude ramp, bias centring and convergence, supervised on line.

The pure :class:`RelaySupervisor` decides from the samples so far (wait, adjust the relay,
converged, fail); this module only carries its decisions to the board and, once converged,
names the analysed window as an :class:`AnalysisInput`.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from protocol.messages import Axis, DeviceState, ExperimentKind
from protocol.timing import sampling_delay_s

from ..errors import WorkflowError
from ..logbook.records import MAX_BRIDGED_FRACTION, MAX_GAP_TICKS, AnalysisInput, bridge_gaps
from ..plan import LoopPlan, Plan
from ..analysis.supervisor import RelaySupervisor
from ..stand import Stand
from .experiment import Experiment, ids
from .results import Progress, ProgressFn, Stage, quiet


@dataclass
class RelayRun:
    """A converged relay: what the analysis reads, the supervisor's summary, the other axes'
    motion, the recorded columns, and the experiment (its log gets the analysis later)."""

    analysis_input: AnalysisInput
    relay: dict
    cross_coupling: dict
    columns: dict
    experiment: Any  # Experiment

    @property
    def exp_id(self) -> str:
        return self.experiment.exp_id


HEADROOM_MARGIN = 0.05  # share of the output limit kept free beyond bias + amplitude


def relay_ceiling(stand: Stand, lp: LoopPlan, inner_amplitude: float | None,
                  trim: float = 0.0) -> float:
    """The largest relay amplitude for a loop: the plan's ``max_amplitude``, else half the
    loop's output limit; an outer relay (it commands the inner loop's setpoint) at most 1.5
    times the swing the inner loop's own relay reached with half the actuator — a larger one
    would saturate the actuator and the oscillation would no longer be the linear loop's
    (common practice, no source)."""
    out_limit = stand.session.values.get(f"{lp.axis}.{lp.loop}.out_limit", 1.0)
    ceiling = lp.max_amplitude if lp.max_amplitude is not None else 0.5 * out_limit
    if inner_amplitude and lp.max_amplitude is None:
        ceiling = min(ceiling, 1.5 * inner_amplitude)
    if lp.loop == "rate":
        # the relay drives the actuator: bias +/- amplitude must stay inside the controller's
        # output range (out_limit around the feed-forward ff), or the clipped top (a heave rail
        # with little thrust margin) is not the relay the analysis assumes (common practice,
        # no source)
        ff = stand.session.values.get(f"{lp.axis}.{lp.loop}.ff", 0.0)
        headroom = (1.0 - HEADROOM_MARGIN) * out_limit - abs(trim - ff)
        if headroom <= 0:
            raise WorkflowError(f"{lp.key}: the trim {trim:.3g} leaves no room in the output "
                                f"range +/-{out_limit:g} for a relay: the loop needs almost "
                                "all of its actuator to hold still (check the stand's balance "
                                "or the thrust margin)")
        ceiling = min(ceiling, headroom)
    return ceiling


def relay_experiment(stand: Stand, lp: LoopPlan, plan: Plan, *, trim: float, hysteresis: float,
                     setpoint: float, inner_amplitude: float | None = None,
                     noise_std: float = 0.0, progress: ProgressFn = quiet,
                     stop: threading.Event | None = None,
                     exp_id: str | None = None) -> RelayRun:
    """Run the relay with amplitude ramp and bias centring until the oscillation converges.

    Raises
    ------
    WorkflowError
        The supervisor gave up (no switching, no convergence), the board ended the relay, no
        telemetry arrived, or samples were lost inside the analysed periods.
    KillTripped, Cancelled
        A kill or the operator's stop.
    """
    axis_i, loop_i = ids(lp)
    threshold = plan.limits.threshold(axis_i, loop_i)
    target = plan.relay_target * threshold
    out_limit = stand.session.values.get(f"{lp.axis}.{lp.loop}.out_limit", 1.0)
    ceiling = relay_ceiling(stand, lp, inner_amplitude, trim)
    sup = RelaySupervisor(amplitude=0.2 * ceiling, bias=trim, target=target, ceiling=ceiling,
                          noise_std=max(float(noise_std), 0.0),
                          # precision periods end well inside the board's duration limit
                          max_record_s=0.4 * plan.max_experiment_s)
    exp = Experiment(stand, lp, plan, ExperimentKind.RELAY, exp_id or f"{lp.axis}-{lp.loop}-relay",
                     {"amplitude": sup.amplitude, "hysteresis": hysteresis, "bias": trim,
                      "setpoint": setpoint, "target_amplitude": target, "ceiling": ceiling},
                     reference=setpoint if lp.loop == "heave" else None, stop=stop)
    decision = None
    adjustments: list[dict] = []
    bad_before = stand.link.stats.bad_frames
    progress(Progress(Stage.RAMP, f"{lp.key}: relay starts at amplitude {sup.amplitude:.3g} "
                      f"(target oscillation {target:.3g})", lp.key,
                      data={"amplitude": sup.amplitude, "target": target}))
    exp.error_context["adjustments"] = adjustments
    with exp:
        tag = exp.start(amplitude=sup.amplitude, hysteresis=hysteresis, bias=trim,
                        setpoint=setpoint, duration_s=plan.max_experiment_s)
        started = time.monotonic()
        while True:
            exp.wait(0.03)
            cols = exp.loop_columns()
            t_us = cols["time_us"]
            if len(t_us) < 3:
                if time.monotonic() - started > 10:
                    raise WorkflowError(f"{lp.key}: no telemetry arrived during the relay")
                continue
            if stand.state != DeviceState.RUNNING and time.monotonic() - started > 1.0:
                raise WorkflowError(f"{lp.key}: the board ended the relay before it "
                                    f"converged (duration limit {plan.max_experiment_s:g} s?)")
            t_s = (t_us - t_us[0]) * 1e-6
            decision = sup.decide(t_s, cols["measurement"], cols["output"], cols["relay"])
            if decision.action == "adjust":
                stand.session.adjust(tag, decision.amplitude, hysteresis, decision.bias)
                adjustments.append({"t_s": float(t_s[-1]), "amplitude": decision.amplitude,
                                    "bias": decision.bias, "why": decision.reason})
                progress(Progress(Stage.RAMP, f"{lp.key}: oscillation "
                                  f"{decision.amplitude_seen:.3g} -> relay amplitude "
                                  f"{decision.amplitude:.3g}, bias {decision.bias:.3g}",
                                  lp.key, data={"amplitude": decision.amplitude,
                                                "bias": decision.bias,
                                                "seen": decision.amplitude_seen}))
            elif decision.action == "converged":
                break
            elif decision.action == "fail":
                raise WorkflowError(f"{lp.key}: {decision.reason}")
            else:
                rec = (f", converged, recording period {decision.periods_recorded + 1}"
                       if decision.reason == "recording" else "")
                progress(Progress(Stage.RELAY, f"{lp.key}: relay running, period "
                                  f"{decision.period_s:.3g} s, amplitude "
                                  f"{decision.amplitude_seen:.3g}{rec}", lp.key,
                                  data={"period_s": decision.period_s,
                                        "seen": decision.amplitude_seen}))
            if t_s[-1] > plan.max_experiment_s:
                raise WorkflowError(f"{lp.key}: no converged oscillation within "
                                    f"{plan.max_experiment_s:g} s")
    stand.check_kill()
    cols = stand.buffer.columns()
    sel_axis = (cols["axis"] == axis_i) & (cols["loop"] == loop_i)
    t_axis = cols["time_us"][sel_axis]
    a, b = decision.window
    rate = stand.info.loop_rate_hz
    win = np.arange(a, b + 1)
    br = bridge_gaps(t_axis[win], cols["measurement"][sel_axis][win],
                     cols["output"][sel_axis][win], 1e6 / rate)
    if br.bridged > MAX_BRIDGED_FRACTION * br.t_us.size or br.longest_gap_ticks > MAX_GAP_TICKS:
        bad = stand.link.stats.bad_frames - bad_before
        cause = (f"the host rejected {bad} damaged frame(s) (CRC or framing errors) meanwhile: "
                 "check the cable, its shielding and the baud rate" if bad else
                 "no damaged frames arrived, so the host or the link did not keep up: use a "
                 "faster link, or a slower simulation clock for the mock")
        msg = (f"{lp.key}: {br.bridged} of {br.t_us.size} samples of the analysed periods were "
               f"lost on the link (longest gap {br.longest_gap_ticks} ticks; at most "
               f"{MAX_BRIDGED_FRACTION:.0%} and {MAX_GAP_TICKS} ticks can be bridged); {cause}.")
        exp.finish({"error": msg, "relay": {"adjustments": adjustments}})
        raise WorkflowError(msg)
    ai = AnalysisInput(
        axis=axis_i, loop=loop_i, t_start_us=int(t_axis[a]), t_end_us=int(t_axis[b]),
        amplitude=decision.amplitude, hysteresis=hysteresis, bias=decision.bias,
        setpoint=setpoint, sample_time_s=1.0 / rate, sampling_delay_s=sampling_delay_s(rate),
        controller=lp.controller, ms_target=lp.ms_target,
        # an angle (height) is the integral of the rate its inner loop holds
        integrating=True if lp.loop in ("angle", "heave") else None,
        # the window starts at a rising edge of the running relay, never at rest
        at_rest=False,
        output_limit=stand.session.values.get(f"{lp.axis}.{lp.loop}.out_limit"),
        # the output deviation the measurement noise may cause (bounds kp and the derivative
        # filter; see agent/analysis/tuning.py)
        max_output_noise=plan.output_noise_fraction * out_limit)
    summary = {"periods_after_ramp": decision.periods_after_ramp,
               "periods_recorded": decision.periods_recorded,
               "amplitude_seen": decision.amplitude_seen, "period_s": decision.period_s,
               "adjustments": adjustments, "note": str(decision.reason),
               "final_amplitude": decision.amplitude, "final_bias": decision.bias,
               "target_amplitude": target, "samples": int(br.t_us.size),
               "samples_bridged": br.bridged}
    return RelayRun(ai, summary, cross_coupling(cols, axis_i, ai), cols, exp)


def cross_coupling(cols: dict, axis_i: int, window: AnalysisInput) -> dict:
    """Half peak-to-peak of every other axis during the analysed periods, relative to the
    relay axis's (common practice, no source: a quick look at how decoupled the axes are)."""
    t = cols["time_us"]
    inwin = (t >= window.t_start_us) & (t <= window.t_end_us)
    main = inwin & (cols["axis"] == axis_i)
    if not main.any():
        return {}
    ref = np.ptp(cols["measurement"][main]) / 2
    out = {}
    for ax in np.unique(cols["axis"][inwin]).astype(int):
        if ax == axis_i:
            continue
        sel = inwin & (cols["axis"] == ax)
        amp = np.ptp(cols["measurement"][sel]) / 2
        out[Axis(ax).name.lower()] = {"amplitude": float(amp),
                                      "ratio": float(amp / ref) if ref > 0 else None}
    return out
