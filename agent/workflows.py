"""Workflows shared by the CLI and the TUI: noise/trim check, relay autotune, verify, apply, cascade.

Every workflow takes a ``Stand`` (connected, cautions confirmed, log open), reports progress
through ``progress(Progress)`` callbacks and honours ``stop`` (a threading.Event the operator sets
to end the run gently). Kills are not gentle: any kill — device trip, host monitor, operator key,
link loss — raises ``KillTripped`` out of the running workflow within one poll (20 ms).

Timing is the device's: durations and convergence are judged on the telemetry's device time, so
the same workflow runs against hardware, a real-time mock or an accelerated one.
"""

from __future__ import annotations

import atexit
import contextlib
import math
import multiprocessing
import signal
import sys
import threading
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field, replace
from typing import Any, Callable

import numpy as np

from protocol import messages as m
from protocol.messages import Axis, DeviceState, ExperimentKind, KillReason, Loop

from . import analysis
from .link import LinkError
from .plan import LoopPlan, Plan, check_against_device
from .relayramp import RelaySupervisor
from .session import SessionError
from .stand import KillTripped, Stand

POLL_S = 0.02
HOLD_S = {"rate": 0.5, "angle": 1.0, "heave": 2.0}
SAMPLING_DELAY_TICKS = 1.5  # zero-order hold (1/2 tick) + output applied on the next tick (1)
GAIN_KEYS = ("kp", "ki", "kd", "tf", "b", "i_limit")


from .errors import Cancelled, WorkflowError  # noqa: E402  (re-exported)


@dataclass(frozen=True)
class Progress:
    stage: str  # connect | noise | ramp | relay | analysis | apply | verify | rollback | done | info
    message: str
    loop: str | None = None  # "roll.rate"
    fraction: float | None = None  # of the whole run, when known
    data: dict = field(default_factory=dict)


ProgressFn = Callable[[Progress], None]


def _quiet(_: Progress) -> None:
    pass


@dataclass
class LoopResult:
    key: str
    axis: str
    loop: str
    controller: str
    status: str = "pending"  # tuned | applied | verified | rolled_back | failed | killed | skipped
    noise_std: float = float("nan")
    trim: float = float("nan")
    hysteresis: float = 0.0
    relay: dict = field(default_factory=dict)
    identification: Any = None  # analysis.Identification
    tuning: Any = None  # analysis.TuningResult
    chosen: Any = None  # analysis.Candidate
    previous_gains: dict = field(default_factory=dict)
    applied_gains: dict = field(default_factory=dict)
    verification: dict | None = None
    cross_coupling: dict = field(default_factory=dict)
    experiments: list = field(default_factory=list)
    message: str = ""
    bandwidth_rad_s: float = float("nan")
    first_try: dict | None = None  # the recommended gains' failed step, when a fallback ran

    def all_candidates(self) -> list:
        """The tuning's candidates, plus the chosen one when it came from elsewhere (the robust
        fallback tried after a missed step), so that ``chosen`` always names one of them."""
        cands = list(self.tuning.candidates) if self.tuning is not None else []
        if self.chosen is not None and self.chosen.rule not in {c.rule for c in cands}:
            cands.append(self.chosen)
        return cands

    def to_dict(self, session_path: str | None = None) -> dict:
        ident = self.identification
        d: dict[str, Any] = {"loop": self.key, "axis": self.axis, "level": self.loop,
                             "controller": self.controller, "status": self.status,
                             "message": self.message, "noise_std": _f(self.noise_std),
                             "trim": _f(self.trim), "hysteresis": _f(self.hysteresis),
                             "relay": self.relay, "cross_coupling": self.cross_coupling,
                             "experiments": self.experiments, "session": session_path}
        if ident is not None:
            d["ultimate_gain"] = _f(ident.best.ku)
            d["ultimate_period_s"] = _f(ident.best.tu_s)
            d["ultimate_basis"] = ident.best.basis
            d["ultimate_method"] = ident.best.method
            d["model"] = {"kind": ident.model.kind,
                          "parameters": {k: _f(v) for k, v in ident.model.params.items()},
                          "normalized_delay": _f(ident.model.normalized_delay),
                          "rmse": _f(ident.model.rmse)}
        if self.tuning is not None:
            d["candidates"] = [{"rule": c.rule, "kp": _f(c.kp), "ki": _f(c.ki), "kd": _f(c.kd),
                                "tf_s": _f(c.tf_s), "b": _f(c.b), "ms": _f(c.ms),
                                "gm": _f(c.gm), "pm_deg": _f(c.pm_deg),
                                "output_noise": _f(c.output_noise)}
                               for c in self.all_candidates()]
            d["recommended"] = self.tuning.recommended
        if self.chosen is not None:
            d["chosen"] = self.chosen.rule
        d["previous_gains"] = self.previous_gains
        d["applied_gains"] = self.applied_gains
        d["verification"] = ({k: v for k, v in self.verification.items() if k != "predicted"}
                             if self.verification else None)  # the curve stays in the log
        d["bandwidth_rad_s"] = _f(self.bandwidth_rad_s)
        if self.first_try is not None:
            d["first_try"] = self.first_try
        return d


def _f(x) -> float | None:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


@dataclass
class StandResult:
    loops: list[LoopResult]
    cascade: list[dict] = field(default_factory=list)
    outcome: str = "ok"  # ok | failed | killed | cancelled
    message: str = ""
    session_path: str | None = None
    kills: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"outcome": self.outcome, "message": self.message, "session": self.session_path,
                "loops": [lr.to_dict(self.session_path) for lr in self.loops],
                "cascade": self.cascade, "kills": self.kills}


# ---------------------------------------------------------------------------- helpers


def _ids(lp: LoopPlan) -> tuple[int, int]:
    return int(Axis[lp.axis.upper()]), int(Loop[lp.loop.upper()])


def _threshold(stand: Stand, lp: LoopPlan, limits) -> float:
    axis_i, loop_i = _ids(lp)
    return limits.threshold(axis_i, loop_i)


def _kill_params(plan: Plan) -> dict:
    lim = plan.limits
    return {"kill_angle_rad": lim.angle_rad, "kill_rate_rad_s": lim.rate_rad_s,
            "kill_heave_m": lim.heave_m, "kill_saturation_s": lim.saturation_s}


def _wait(stand: Stand, stop: threading.Event | None, seconds: float) -> None:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        stand.check_kill()
        if stop is not None and stop.is_set():
            raise Cancelled("stopped by the operator")
        time.sleep(POLL_S)


def _device_elapsed(stand: Stand, axis_i: int) -> float:
    cols = stand.buffer.axis(axis_i)
    t = cols["time_us"]
    return float((t[-1] - t[0]) * 1e-6) if len(t) > 1 else 0.0


def _run_for_device_time(stand: Stand, stop, axis_i: int, seconds: float,
                         wall_timeout_s: float) -> None:
    """Wait until the buffer holds ``seconds`` of device time for the axis."""
    deadline = time.monotonic() + wall_timeout_s
    while _device_elapsed(stand, axis_i) < seconds:
        _wait(stand, stop, POLL_S)
        if time.monotonic() > deadline:
            raise WorkflowError(f"the board sent too little telemetry ({_device_elapsed(stand, axis_i):.2f} s "
                                f"of device time in {wall_timeout_s:.0f} s); check the link")


def _start_experiment_log(stand: Stand, exp_id: str, meta: dict):
    if stand.log is None:
        return None
    exp = stand.log.experiment(exp_id, meta)
    stand.experiment_log = exp
    return exp


def _end_experiment_log(stand: Stand, exp, result: dict | None = None) -> None:
    stand.experiment_log = None
    if exp is None:
        return
    try:
        if result is not None:
            exp.result(result)
        exp.close()
    except Exception as exc:
        stand.emit("warning", f"experiment log write failed: {exc}")


def _meta(stand: Stand, lp: LoopPlan, kind: str, **extra) -> dict:
    axis_i, loop_i = _ids(lp)
    rate = stand.info.loop_rate_hz
    return {"kind": kind, "axis": axis_i, "loop": loop_i, "axis_name": lp.axis,
            "loop_name": lp.loop, "sample_time_s": 1.0 / rate,
            "sampling_delay_s": SAMPLING_DELAY_TICKS / rate, **extra}


def current_measurement(stand: Stand, axis_i: int, loop_i: int) -> float | None:
    """The latest measurement the board reported for an axis and loop level, or None."""
    for _, tel in reversed(stand.buffer.live):
        for s in tel.axes:
            if s.axis == axis_i and s.loop == loop_i:
                return float(s.measurement)
    return None


def _configure_telemetry(stand: Stand, lp: LoopPlan) -> None:
    axis_i, loop_i = _ids(lp)
    rate = stand.info.loop_rate_hz  # one sample per tick: the analysis assumes the loop's grid
    axes = [int(Axis[a.upper()]) for a in stand.info.axes]
    stand.session.telemetry(rate, axes, loop_i)


IDLE_TELEMETRY_HZ = 50


def _idle_telemetry(stand: Stand, lp: LoopPlan) -> None:
    """Between experiments a slow stream is enough for the live view; it also leaves the host
    CPU to the analysis instead of decoding telemetry nobody records."""
    try:
        if stand.link.lost_reason is None:
            axes = [int(Axis[a.upper()]) for a in stand.info.axes]
            stand.session.telemetry(IDLE_TELEMETRY_HZ, axes, _ids(lp)[1])
    except (SessionError, LinkError):
        pass


def _end_run(stand: Stand, tag: int, lp: LoopPlan) -> None:
    """An experiment is over (done, failed or killed): monitor off, board told, logging off."""
    if stand.monitor is not None:
        stand.monitor.active = False
    _stop_quietly(stand, tag)
    stand.stop_recording()
    _idle_telemetry(stand, lp)


def _stop_quietly(stand: Stand, tag: int) -> None:
    try:
        if stand.link.lost_reason is None:
            stand.session.stop_experiment(tag)
    except (SessionError, LinkError):
        pass


# ---------------------------------------------------------------------------- noise and trim


def noise_check(stand: Stand, lp: LoopPlan, plan: Plan, progress: ProgressFn = _quiet,
                stop: threading.Event | None = None, exp_id: str | None = None) -> dict:
    """Hold the loop at its setpoint with the current gains; measure noise and trim.

    noise_std is estimated from successive differences (std(diff(y))/sqrt(2)), which ignores the
    slow closed-loop motion (common practice, no source); trim is the mean controller output."""
    axis_i, loop_i = _ids(lp)
    _configure_telemetry(stand, lp)
    setpoint = 0.0
    if lp.loop == "heave":
        _wait(stand, stop, 0.1)
        setpoint = current_measurement(stand, axis_i, loop_i) or 0.0
    hold_s = HOLD_S["heave"] if lp.axis == "heave" else HOLD_S[lp.loop]
    exp_id = exp_id or f"{lp.axis}-{lp.loop}-hold"
    exp = _start_experiment_log(stand, exp_id, _meta(stand, lp, "hold", setpoint=setpoint,
                                                     duration_s=hold_s))
    stand.buffer.start()
    progress(Progress("noise", f"{lp.key}: holding {hold_s:g} s to measure noise and trim",
                      lp.key))
    tag = stand.session.start_experiment(kind=ExperimentKind.HOLD, axis=axis_i, loop=loop_i,
                                         setpoint=setpoint, duration_s=hold_s + 5.0,
                                         **_kill_params(plan))
    try:
        _run_for_device_time(stand, stop, axis_i, hold_s, 30 + 10 * hold_s)
    finally:
        _stop_quietly(stand, tag)
        stand.stop_recording()
    stand.check_kill()
    cols = stand.buffer.axis(axis_i)
    y = cols["measurement"][cols["loop"] == loop_i]
    u = cols["output"][cols["loop"] == loop_i]
    if len(y) < 20:
        _end_experiment_log(stand, exp, {"error": "too few samples"})
        raise WorkflowError(f"{lp.key}: the hold gave only {len(y)} samples; check telemetry")
    half = len(y) // 2  # second half: past the start transient
    noise = float(np.std(np.diff(y[half:])) / math.sqrt(2))
    trim = float(np.mean(u[half:]))
    result = {"noise_std": noise, "trim": trim, "setpoint": setpoint, "samples": int(len(y))}
    _end_experiment_log(stand, exp, result)
    progress(Progress("noise", f"{lp.key}: noise {noise:.3g}, trim {trim:.3g}", lp.key,
                      data=result))
    return result


def lift_off(stand: Stand, plan: Plan, progress: ProgressFn = _quiet,
             stop: threading.Event | None = None) -> float | None:
    """Heave axis: a frame resting on the rail's bottom stop cannot be identified (the stop
    clamps its motion). Step the height loop (current gains) up by half the heave limit first;
    the board then holds the new height between experiments. Returns the height reached, or
    None when the frame was already clear of the stop."""
    axis_i, loop_i = int(Axis.HEAVE), int(Loop.HEAVE)
    if "heave" not in stand.info.axes.get("heave", ()):
        return None
    stand.session.telemetry(stand.info.loop_rate_hz, [axis_i], loop_i)
    _wait(stand, stop, 0.1)
    height = current_measurement(stand, axis_i, loop_i)
    lift = 0.5 * plan.limits.heave_m
    if height is None or height >= lift:
        return None
    progress(Progress("info", f"heave: lifting the frame {lift:.2f} m off the bottom stop",
                      "heave.heave"))
    duration = 4.0
    tag = stand.session.start_experiment(kind=ExperimentKind.STEP, axis=axis_i, loop=loop_i,
                                         amplitude=lift, setpoint=height, step_at_s=0.2,
                                         duration_s=duration, **_kill_params(plan))
    stand.buffer.start()
    try:
        _run_for_device_time(stand, stop, axis_i, duration, 60 + 10 * duration)
    finally:
        _end_run(stand, tag, LoopPlan("heave", "heave"))
    stand.check_kill()
    stand.log_event("lift_off", from_m=height, by_m=lift)
    return current_measurement(stand, axis_i, loop_i)


# ---------------------------------------------------------------------------- relay


def relay_experiment(stand: Stand, lp: LoopPlan, plan: Plan, *, trim: float, hysteresis: float,
                     setpoint: float, inner_amplitude: float | None = None,
                     noise_std: float = 0.0,
                     progress: ProgressFn = _quiet,
                     stop: threading.Event | None = None, exp_id: str | None = None) -> dict:
    """Run the relay with amplitude ramp and bias centring until the oscillation converges.
    Returns the analysis input (window and relay parameters), the supervisor's summary and the
    experiment log handle's id."""
    axis_i, loop_i = _ids(lp)
    threshold = _threshold(stand, lp, plan.limits)
    target = plan.relay_target * threshold
    out_limit = stand.session.values.get(f"{lp.axis}.{lp.loop}.out_limit", 1.0)
    ceiling = lp.max_amplitude if lp.max_amplitude is not None else 0.5 * out_limit
    if inner_amplitude and lp.max_amplitude is None:
        # An outer relay commands the inner loop's setpoint. A swing larger than the one the
        # inner loop's own relay reached with half the actuator would saturate the actuator and
        # the oscillation would no longer be the linear loop's (common practice, no source).
        ceiling = min(ceiling, 1.5 * inner_amplitude)
    sup = RelaySupervisor(amplitude=0.2 * ceiling, bias=trim, target=target, ceiling=ceiling,
                          noise_std=max(float(noise_std), 0.0),
                          # precision periods end well inside the board's duration limit
                          max_record_s=0.4 * plan.max_experiment_s)
    exp_id = exp_id or f"{lp.axis}-{lp.loop}-relay"
    exp = _start_experiment_log(stand, exp_id, _meta(
        stand, lp, "relay", amplitude=sup.amplitude, hysteresis=hysteresis, bias=trim,
        setpoint=setpoint, target_amplitude=target, ceiling=ceiling))
    stand.buffer.start()
    progress(Progress("ramp", f"{lp.key}: relay starts at amplitude {sup.amplitude:.3g} "
                      f"(target oscillation {target:.3g})", lp.key,
                      data={"amplitude": sup.amplitude, "target": target}))
    if stand.monitor is not None:
        if lp.loop == "heave":
            stand.monitor.set_reference(axis_i, loop_i, setpoint)
        stand.monitor.active = True
    tag = stand.session.start_experiment(
        kind=ExperimentKind.RELAY, axis=axis_i, loop=loop_i, amplitude=sup.amplitude,
        hysteresis=hysteresis, bias=trim, setpoint=setpoint, duration_s=plan.max_experiment_s,
        **_kill_params(plan))
    started = time.monotonic()
    decision = None
    adjustments = []
    try:
        try:
            while True:
                _wait(stand, stop, 0.03)
                cols = stand.buffer.axis(axis_i)
                sel = cols["loop"] == loop_i
                t_us = cols["time_us"][sel]
                if len(t_us) < 3:
                    if time.monotonic() - started > 10:
                        raise WorkflowError(f"{lp.key}: no telemetry arrived during the relay")
                    continue
                if stand.state != DeviceState.RUNNING and time.monotonic() - started > 1.0:
                    raise WorkflowError(f"{lp.key}: the board ended the relay before it converged "
                                        f"(duration limit {plan.max_experiment_s:g} s?)")
                t_s = (t_us - t_us[0]) * 1e-6
                decision = sup.decide(t_s, cols["measurement"][sel], cols["output"][sel],
                                      cols["relay"][sel])
                if decision.action == "adjust":
                    stand.session.adjust(tag, decision.amplitude, hysteresis, decision.bias)
                    adjustments.append({"t_s": float(t_s[-1]), "amplitude": decision.amplitude,
                                        "bias": decision.bias, "why": decision.reason})
                    progress(Progress("ramp", f"{lp.key}: oscillation {decision.amplitude_seen:.3g}"
                                      f" -> relay amplitude {decision.amplitude:.3g}, bias "
                                      f"{decision.bias:.3g}", lp.key,
                                      data={"amplitude": decision.amplitude, "bias": decision.bias,
                                            "seen": decision.amplitude_seen}))
                elif decision.action == "converged":
                    break
                elif decision.action == "fail":
                    raise WorkflowError(f"{lp.key}: {decision.reason}")
                else:
                    rec = (f", converged, recording period {decision.periods_recorded + 1}"
                           if decision.reason == "recording" else "")
                    progress(Progress("relay", f"{lp.key}: relay running, period "
                                      f"{decision.period_s:.3g} s, amplitude "
                                      f"{decision.amplitude_seen:.3g}{rec}", lp.key,
                                      data={"period_s": decision.period_s,
                                            "seen": decision.amplitude_seen}))
                if t_s[-1] > plan.max_experiment_s:
                    raise WorkflowError(f"{lp.key}: no converged oscillation within "
                                        f"{plan.max_experiment_s:g} s")
        except (WorkflowError, KillTripped, Cancelled) as exc:
            stand.stop_recording()
            _end_experiment_log(stand, exp, {"error": str(exc), "adjustments": adjustments})
            raise
    finally:
        _end_run(stand, tag, lp)
    stand.check_kill()
    cols = stand.buffer.columns()
    sel_axis = (cols["axis"] == axis_i) & (cols["loop"] == loop_i)
    t_axis = cols["time_us"][sel_axis]
    a, b = decision.window
    tick_us = 1e6 / stand.info.loop_rate_hz
    gaps = int(np.count_nonzero(np.diff(t_axis[a:b + 1]) > 1.5 * tick_us))
    if gaps:
        msg = (f"{lp.key}: {gaps} telemetry gap(s) in the analysed periods: samples were lost "
               "on the link (the host did not keep up). Use a faster link, or a slower "
               "simulation clock for the mock.")
        _end_experiment_log(stand, exp, {"error": msg, "relay": {"adjustments": adjustments}})
        raise WorkflowError(msg)
    analysis_input = {"axis": axis_i, "loop": loop_i, "t_start_us": int(t_axis[a]),
                      "t_end_us": int(t_axis[b]), "amplitude": decision.amplitude,
                      "hysteresis": hysteresis, "bias": decision.bias, "setpoint": setpoint,
                      "sample_time_s": 1.0 / stand.info.loop_rate_hz,
                      "sampling_delay_s": SAMPLING_DELAY_TICKS / stand.info.loop_rate_hz,
                      "controller": lp.controller, "ms_target": lp.ms_target,
                      # an angle (height) is the integral of the rate its inner loop holds
                      "integrating": True if lp.loop in ("angle", "heave") else None,
                      # the window starts at a rising edge of the running relay, never at rest
                      "at_rest": False,
                      "output_limit": stand.session.values.get(f"{lp.axis}.{lp.loop}.out_limit"),
                      # the output deviation the measurement noise may cause (bounds kp and
                      # the derivative filter; see agent/analysis/tuning.py)
                      "max_output_noise": plan.output_noise_fraction * out_limit}
    summary = {"periods_after_ramp": decision.periods_after_ramp,
               "periods_recorded": decision.periods_recorded,
               "amplitude_seen": decision.amplitude_seen, "period_s": decision.period_s,
               "adjustments": adjustments, "note": decision.reason,
               "final_amplitude": decision.amplitude, "final_bias": decision.bias,
               "target_amplitude": target}
    coupling = _cross_coupling(cols, axis_i, loop_i, analysis_input)
    return {"analysis_input": analysis_input, "relay": summary, "cross_coupling": coupling,
            "columns": cols, "exp": exp, "exp_id": exp_id}


def _cross_coupling(cols: dict, axis_i: int, loop_i: int, window: dict) -> dict:
    """Half peak-to-peak of every other axis during the analysed periods, relative to the
    relay axis's (common practice, no source: a quick look at how decoupled the axes are)."""
    t = cols["time_us"]
    inwin = (t >= window["t_start_us"]) & (t <= window["t_end_us"])
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


# ---------------------------------------------------------------------------- analysis worker

_POOL: ProcessPoolExecutor | None = None
_POOL_LOCK = threading.Lock()


@contextlib.contextmanager
def _real_std_streams():
    """Starting a worker passes stderr's file descriptor to the child; a terminal UI replaces
    sys.stdout/sys.stderr with objects that have none, so use the real ones meanwhile."""
    saved = sys.stdout, sys.stderr
    sys.stdout = sys.__stdout__ or saved[0]
    sys.stderr = sys.__stderr__ or saved[1]
    try:
        yield
    finally:
        sys.stdout, sys.stderr = saved


def _ignore_sigint() -> None:
    """In the analysis worker: a terminal's Ctrl-C reaches the whole process group, but only
    the main process acts on it (it kills the stand); the worker would die with a traceback and
    break the pool."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _analysis_pool() -> ProcessPoolExecutor:
    """One worker process for the numerics: a fit can keep a CPU busy for seconds, and in this
    process it would compete for the interpreter with the link's reader and keepalive threads
    (a starved keepalive lets the board's watchdog kill an idle, armed stand)."""
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            with _real_std_streams():
                pool = ProcessPoolExecutor(max_workers=1,
                                           mp_context=multiprocessing.get_context("spawn"),
                                           initializer=_ignore_sigint)
                pool.submit(int).result()  # start the worker now, with the real streams
            _POOL = pool
            atexit.register(_POOL.shutdown, wait=False, cancel_futures=True)
        return _POOL


def identify_and_tune(record, kwargs: dict):
    """analysis.identify then analysis.tune (top level so the worker process can run it)."""
    ident = analysis.identify(record)
    return ident, analysis.tune(ident, **kwargs)


def _analyse(stand: Stand, record, kwargs: dict, stop) -> tuple:
    fut = _analysis_pool().submit(identify_and_tune, record, kwargs)
    while not fut.done():
        _wait(stand, stop, 0.05)  # kills and stop requests stay live while the worker runs
    return fut.result()


# ---------------------------------------------------------------------------- apply / verify


def gains_of(cand, lp: LoopPlan, operating_point: float = 0.0,
             stand: Stand | None = None) -> dict[str, float]:
    """The board settings for a candidate.

    With setpoint weight b < 1 the board's proportional term is kp*(b*r - y), so at an operating
    point r0 away from zero (a height on the rail) the integrator must hold kp*(1-b)*r0 on top of
    the trim: the integrator limit is raised to cover that plus the output limit (the board's own
    anti-windup still stops integration while the output saturates), within the board's bounds."""
    p = f"{lp.axis}.{lp.loop}."
    i_limit = float(cand.i_limit)
    if operating_point and cand.b < 1.0:
        out_limit = stand.session.values.get(p + "out_limit", 0.0) if stand else 0.0
        i_limit = max(i_limit, out_limit + cand.kp * (1.0 - cand.b) * abs(operating_point))
        if stand is not None and p + "i_limit" in stand.session.settings:
            i_limit = min(i_limit, stand.session.setting(p + "i_limit").maximum)
    return {p + "kp": float(cand.kp), p + "ki": float(cand.ki), p + "kd": float(cand.kd),
            p + "tf": float(cand.tf_s), p + "b": float(cand.b), p + "i_limit": i_limit}


def current_gains(stand: Stand, lp: LoopPlan) -> dict[str, float]:
    out = {}
    for k in GAIN_KEYS:
        name = f"{lp.axis}.{lp.loop}.{k}"
        if name in stand.session.settings:
            out[name] = stand.session.read(name)
    return out


def apply_gains(stand: Stand, gains: dict[str, float], progress: ProgressFn = _quiet,
                key: str | None = None) -> dict[str, float]:
    """Write gains (all checked against the board's bounds before the first write)."""
    present = {k: v for k, v in gains.items() if k in stand.session.settings}
    for name, value in present.items():
        stand.session.setting(name).check(value)
    written = stand.session.write_many(present)
    stand.log_event("gains_applied", loop=key, gains=written)
    progress(Progress("apply", f"{key}: gains written " +
                      ", ".join(f"{k.split('.')[-1]}={v:.4g}" for k, v in written.items()), key))
    return written


def judge_step(measured: dict, predicted: dict, plan: Plan, noise_std: float | None,
               step: float) -> tuple[list[str], float]:
    """The verification verdict on a step test's metrics beside the prediction: the problems
    found (none: passed) and the overshoot allowance used. Pure."""
    # What the loop does by itself (sensor noise, and on a gusty stand slow wander that the
    # smoothing keeps) moves both the peak and the final value by about its deviation from the
    # hold: the measured overshoot of a small step is uncertain by about 2 sigma/step, which
    # widens the margin (common practice, no source; seen on the invented heave rail, where
    # gusts moved a 0.05 m/s climb-rate step's overshoot to 78 %)
    allowance = (2.0 * float(noise_std) / abs(step)
                 if noise_std and noise_std > 0 and step else 0.0)
    problems = []
    if measured["overshoot"] is None or measured["rise_s"] is None:
        problems.append("the step response never reached the new setpoint")
    else:
        margin = plan.verify_overshoot_margin + allowance
        if measured["overshoot"] > (predicted["overshoot"] or 0.0) + margin:
            problems.append(f"overshoot {measured['overshoot']:.0%} exceeds the predicted "
                            f"{predicted['overshoot']:.0%} by more than {margin:.0%}"
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
                cand_period_s: float | None = None, progress: ProgressFn = _quiet,
                stop: threading.Event | None = None, exp_id: str | None = None) -> dict:
    """Step test with the applied gains; measured metrics beside the prediction.

    tune_loop asks for 1.5 times the oscillation amplitude the relay reached (a size the loop
    has just shown it handles within the limits, large enough to stand out of the noise), capped
    at the relay target; a rate step also
    integrates into an angle, so it is kept small enough for that angle to stay within half the
    angle limit over the test."""
    axis_i, loop_i = _ids(lp)
    threshold = _threshold(stand, lp, plan.limits)
    step = plan.relay_target * threshold if step is None else min(step, plan.relay_target * threshold)
    pred = cand.predicted
    rise = pred.rise_s if math.isfinite(pred.rise_s) else float("nan")
    if math.isfinite(pred.settling_s):
        settle = pred.settling_s
    elif math.isfinite(rise):
        settle = 10 * max(rise, 0.01)
    else:
        # the model predicts no settling step (a poor fit): the relay period sets the scale
        # (common practice, no source: a well-tuned loop settles within a few periods)
        period = (cand_period_s if cand_period_s and math.isfinite(cand_period_s) else 0.2)
        settle = 5.0 * period
    step_at = max(0.1, 0.2 * settle)
    duration = min(step_at + max(3.0 * settle, 5 * rise if math.isfinite(rise) else 0.0),
                   plan.max_experiment_s)
    outer = "heave" if lp.axis == "heave" else "angle"
    if lp.loop == "rate" and outer in stand.info.axes.get(lp.axis, ()):
        # on a stand a rate step integrates: keep the angle (height) within half its limit
        outer_limit = plan.limits.heave_m if lp.axis == "heave" else plan.limits.angle_rad
        step = min(step, 0.5 * outer_limit / max(duration - step_at, 1e-3))
    exp_id = exp_id or f"{lp.axis}-{lp.loop}-verify"
    exp = _start_experiment_log(stand, exp_id, _meta(stand, lp, "step", amplitude=step,
                                                     setpoint=setpoint, step_at_s=step_at,
                                                     duration_s=duration))
    _configure_telemetry(stand, lp)
    stand.buffer.start()
    progress(Progress("verify", f"{lp.key}: step of {step:.3g} with the new gains", lp.key))
    if stand.monitor is not None:
        if lp.loop == "heave":
            stand.monitor.set_reference(axis_i, loop_i, setpoint)
        stand.monitor.active = True
    tag = stand.session.start_experiment(kind=ExperimentKind.STEP, axis=axis_i, loop=loop_i,
                                         amplitude=step, setpoint=setpoint, step_at_s=step_at,
                                         duration_s=duration + 1.0, **_kill_params(plan))
    try:
        _run_for_device_time(stand, stop, axis_i, duration, 60 + 10 * duration)
    finally:
        _end_run(stand, tag, lp)
    stand.check_kill()
    cols = stand.buffer.axis(axis_i)
    sel = cols["loop"] == loop_i
    t = (cols["time_us"][sel] - cols["time_us"][sel][0]) * 1e-6
    y = cols["measurement"][sel]
    after = t >= step_at
    y0 = float(np.mean(y[~after][-max(1, int(0.5 * (~after).sum())):])) if (~after).any() else setpoint
    # with the measurement noise from the hold, the metrics are taken on a zero-phase smoothed
    # response, so noise peaks do not count as overshoot
    met = analysis.step_metrics(t[after] - step_at, y[after], y0, setpoint + step,
                                noise_std=noise_std if noise_std and noise_std > 0 else None)
    measured = {"overshoot": _f(met.overshoot), "rise_s": _f(met.rise_s),
                "settling_s": _f(met.settling_s), "iae": _f(met.iae)}
    predicted = {"overshoot": _f(pred.overshoot), "rise_s": _f(pred.rise_s),
                 "settling_s": _f(pred.settling_s), "iae": _f(pred.iae_setpoint * step)}
    problems, allowance = judge_step(measured, predicted, plan, noise_std, step)
    curve = {"t_s": [float(x) for x in pred.t_s],
             "y": [float(setpoint + step * v) for v in pred.y_setpoint], "t_offset_s": step_at}
    result = {"step": step, "setpoint": setpoint, "step_at_s": step_at, "measured": measured,
              "overshoot_allowance": allowance,
              "metrics": measured, "predicted_metrics": predicted, "predicted": curve,
              "passed": not problems, "problems": problems, "experiment": exp_id,
              "exp_id": exp_id}
    _end_experiment_log(stand, exp, result)
    return result


# ---------------------------------------------------------------------------- one loop


def tune_loop(stand: Stand, lp: LoopPlan, plan: Plan, progress: ProgressFn = _quiet,
              stop: threading.Event | None = None, inner: LoopResult | None = None) -> LoopResult:
    """Noise/trim check, relay with ramp, identification, tuning; then apply and verify as the
    plan says, rolling back to the previous gains when the verification fails. ``inner``, the
    result of this axis's rate loop when it was tuned in the same run, bounds an outer relay."""
    check_against_device(Plan(loops=(lp,)), stand.info.axes)
    res = LoopResult(lp.key, lp.axis, lp.loop, lp.controller)
    stand.emit("loop", {"key": lp.key, "status": "running"})
    if lp.axis == "heave":
        lift_off(stand, plan, progress, stop)
    noise = noise_check(stand, lp, plan, progress, stop)
    res.experiments.append(f"{lp.axis}-{lp.loop}-hold")
    res.noise_std, res.trim = noise["noise_std"], noise["trim"]
    res.hysteresis = 3.0 * res.noise_std  # 2-3 noise standard deviations (common practice)
    inner_amp = (inner.relay or {}).get("amplitude_seen") if inner is not None else None
    run = relay_experiment(stand, lp, plan, trim=res.trim, hysteresis=res.hysteresis,
                           setpoint=noise["setpoint"], inner_amplitude=inner_amp,
                           noise_std=res.noise_std,
                           progress=progress, stop=stop)
    res.experiments.append(run["exp_id"])
    res.relay, res.cross_coupling = run["relay"], run["cross_coupling"]
    progress(Progress("analysis", f"{lp.key}: identifying the loop", lp.key))
    from .logbook.records import relay_record_from_rows, tune_kwargs
    # the same two calls the offline re-analysis makes, so a log reproduces this result
    record = relay_record_from_rows(run["columns"], run["analysis_input"])
    result_doc: dict[str, Any] = {"analysis_input": run["analysis_input"], "relay": res.relay,
                                  "cross_coupling": res.cross_coupling,
                                  "noise": noise}
    try:
        res.identification, res.tuning = _analyse(stand, record,
                                                  tune_kwargs(run["analysis_input"]), stop)
    except analysis.RecordError as exc:
        result_doc["error"] = str(exc)
        _end_experiment_log(stand, run["exp"], result_doc)
        res.status, res.message = "failed", f"the relay record could not be analysed: {exc}"
        return res
    rule = res.tuning.recommended if lp.rule == "recommended" else lp.rule
    chosen = [c for c in res.tuning.candidates if c.rule == rule]
    if not chosen:
        raise WorkflowError(f"{lp.key}: the rule {rule!r} gave no candidate for a "
                            f"{lp.controller.upper()} controller")
    res.chosen = chosen[0]
    res.bandwidth_rad_s = analysis.loop_bandwidth(res.identification.model_loop, res.chosen)
    res.status = "tuned"
    result_doc.update({"identification": res.identification.to_dict(),
                       "tuning": res.tuning.to_dict(), "chosen": res.chosen.to_dict()})
    _end_experiment_log(stand, run["exp"], result_doc)
    ident = res.identification
    progress(Progress("analysis", f"{lp.key}: Ku {ident.best.ku:.4g}, Tu {ident.best.tu_s:.4g} s"
                      f" ({ident.best.method}); model {ident.model.kind}; {rule}: "
                      f"kp {res.chosen.kp:.4g} ki {res.chosen.ki:.4g} kd {res.chosen.kd:.4g}",
                      lp.key, data=res.to_dict()))
    if not plan.apply:
        return res
    res.previous_gains = current_gains(stand, lp)
    try:
        res.applied_gains = apply_gains(stand, gains_of(res.chosen, lp, noise["setpoint"], stand),
                                        progress, lp.key)
    except SessionError as exc:
        res.status, res.message = "failed", f"gains not applied: {exc}"
        return res
    res.status = "applied"
    if not plan.verify:
        return res
    _verify(stand, lp, plan, res, noise["setpoint"], progress, stop)
    fallback = (_fallback_candidate(res, run["analysis_input"])
                if lp.rule == "recommended" and res.status != "verified" else None)
    if res.status != "verified" and fallback is not None:
        # The step missed the prediction made on the model (a loop the model describes less
        # well than its fit suggests: friction, a weak actuator). Before giving up, the most
        # conservative candidate (lowest Ms) gets one step test of its own; a kill or a
        # second miss rolls back to the previous gains (common practice, no source: detune
        # and re-test).
        first = res.verification
        res.first_try = {"rule": res.chosen.rule, "gains": res.applied_gains,
                         "problems": first.get("problems", []) if first else []}
        progress(Progress("verify", f"{lp.key}: {res.chosen.rule} missed its step "
                          f"({'; '.join(res.first_try['problems'])}); trying the more "
                          f"conservative {fallback.rule} (Ms {fallback.ms:.2f})", lp.key))
        stand.log_event("fallback", loop=lp.key, from_rule=res.chosen.rule,
                        to_rule=fallback.rule, why=res.first_try["problems"])
        res.chosen = fallback
        try:
            res.applied_gains = apply_gains(stand, gains_of(fallback, lp, noise["setpoint"],
                                                            stand), progress, lp.key)
        except SessionError as exc:
            res.verification = {"passed": False, "problems": [f"fallback not applied: {exc}"]}
            _rollback(stand, res, progress)
            return res
        _verify(stand, lp, plan, res, noise["setpoint"], progress, stop,
                exp_id=f"{lp.axis}-{lp.loop}-verify-fallback")
    if res.status != "verified":
        _rollback(stand, res, progress)
    return res


FALLBACK_MS = 1.2  # robustness target of the detuned design tried after a missed step


def _fallback_candidate(res: LoopResult, analysis_input: dict):
    """The most robust alternative to the chosen gains: among the other rules' candidates
    and the constrained design redone for Ms = FALLBACK_MS (rule name ``fallback_ms1.2``), the
    one with the lowest Ms below the chosen one's and a finite predicted step; None when there
    is none."""
    from .logbook.records import tune_kwargs
    pool = [c for c in res.tuning.candidates if c is not res.chosen]
    try:
        strict = analysis.tune(res.identification,
                               **{**tune_kwargs(analysis_input), "ms_target": FALLBACK_MS})
        pool += [replace(c, rule=f"fallback_ms{FALLBACK_MS:g}") for c in strict.candidates
                 if c.rule == "ms_constrained"]
    except ValueError:
        pass
    pool = [c for c in pool if math.isfinite(c.ms) and c.ms < res.chosen.ms - 0.02
            and math.isfinite(c.predicted.rise_s)]
    return min(pool, key=lambda c: c.ms) if pool else None


def _verify(stand: Stand, lp: LoopPlan, plan: Plan, res: LoopResult, setpoint: float,
            progress: ProgressFn, stop: threading.Event | None,
            exp_id: str | None = None) -> None:
    """Step-test the applied gains; sets ``res.verification`` and, on a pass, the status."""
    try:
        res.verification = verify_step(stand, lp, plan, res.chosen, setpoint=setpoint,
                                       step=1.5 * res.relay.get("amplitude_seen", 0.0) or None,
                                       noise_std=res.noise_std,
                                       cand_period_s=res.relay.get("period_s"),
                                       progress=progress, stop=stop, exp_id=exp_id)
        res.experiments.append(res.verification["experiment"])
    except KillTripped as exc:
        res.verification = {"passed": False, "problems": [f"kill during the step: {exc}"]}
        _rollback(stand, res, progress)
        raise
    if res.verification["passed"]:
        res.status = "verified"
        progress(Progress("verify", f"{lp.key}: verification passed ({res.chosen.rule})",
                          lp.key, data=res.verification))


def _rollback(stand: Stand, res: LoopResult, progress: ProgressFn) -> None:
    res.status = "rolled_back"
    res.message = "; ".join(res.verification.get("problems", [])) if res.verification else ""
    if not res.previous_gains:
        return
    try:
        stand.session.write_many(res.previous_gains)
        stand.log_event("rollback", loop=res.key, gains=res.previous_gains, why=res.message)
        progress(Progress("rollback", f"{res.key}: rolled back to the previous gains "
                          f"({res.message})", res.key))
    except (SessionError, LinkError) as exc:
        stand.log_event("rollback_failed", loop=res.key, error=str(exc))
        progress(Progress("rollback", f"{res.key}: ROLLBACK FAILED: {exc}", res.key))


# ---------------------------------------------------------------------------- whole stand


def autotune(stand: Stand, plan: Plan, progress: ProgressFn = _quiet,
             stop: threading.Event | None = None) -> StandResult:
    """Tune every loop of the plan in cascade order, armed once. A kill ends the run."""
    check_against_device(plan, stand.info.axes)
    result = StandResult(loops=[], session_path=str(stand.log.path) if stand.log else None)
    if stand.monitor is not None:
        stand.monitor.limits = plan.limits
    total = len(plan.loops)
    progress(Progress("info", "arming (cautions confirmed)", fraction=0.0))
    stand.arm()
    try:
        for i, lp in enumerate(plan.loops):
            progress(Progress("info", f"loop {i + 1} of {total}: {lp.key}", lp.key,
                              fraction=i / total))
            inner = next((r for r in result.loops if r.axis == lp.axis and r.loop == "rate"
                          and lp.loop != "rate"), None)
            try:
                lr = tune_loop(stand, lp, plan, progress, stop, inner=inner)
            except WorkflowError as exc:
                lr = LoopResult(lp.key, lp.axis, lp.loop, lp.controller, status="failed",
                                message=str(exc))
            result.loops.append(lr)
            stand.emit("loop", {"key": lp.key, "status": lr.status})
            stand.log_event("loop_done", loop=lp.key, status=lr.status, message=lr.message)
            stand.check_kill()
        result.cascade = cascade_checks(result.loops)
        for c in result.cascade:
            progress(Progress("info", c["message"]))
        failed = [lr for lr in result.loops if lr.status in ("failed", "rolled_back")]
        result.outcome = "ok" if not failed else "partial"
        stand.disarm()
        if plan.persist and plan.apply and stand.info.capabilities & m.Capability.PERSIST:
            stand.session.persist()
            stand.log_event("persisted")
    except KillTripped as exc:
        result.outcome, result.message = "killed", str(exc)
    except Cancelled as exc:
        result.outcome, result.message = "cancelled", str(exc)
        _safe_disarm(stand)
    except (SessionError, LinkError) as exc:
        if stand.killed:  # e.g. a request refused because a kill had just latched
            info = stand.kills[-1] if stand.kills else {"reason": "device reports KILLED"}
            result.outcome, result.message = "killed", str(KillTripped(info))
        else:
            stand.kill(KillReason.HOST_LINK if isinstance(exc, LinkError)
                       else KillReason.HOST_ERROR)
            result.outcome, result.message = "failed", str(exc)
    except BaseException:
        stand.kill(KillReason.HOST_ERROR)
        raise
    result.kills = list(stand.kills)
    progress(Progress("done", f"autotune {result.outcome}"
                      + (f": {result.message}" if result.message else ""), fraction=1.0))
    return result


def _safe_disarm(stand: Stand) -> None:
    try:
        stand.disarm()
    except (SessionError, LinkError):
        stand.kill(KillReason.HOST_ERROR)


def cascade_checks(loops: list[LoopResult]) -> list[dict]:
    """Bandwidth ratio of each axis's inner (rate) loop to its outer loop."""
    by_key = {lr.key: lr for lr in loops}
    out = []
    for lr in loops:
        if lr.loop == "rate" or lr.chosen is None:
            continue
        inner = by_key.get(f"{lr.axis}.rate")
        if inner is None or inner.chosen is None:
            continue
        if inner.status not in ("verified", "applied", "tuned") or \
                lr.status not in ("verified", "applied", "tuned"):
            out.append({"axis": lr.axis, "inner": inner.key, "outer": lr.key, "ratio": None,
                        "ok": False, "message": f"{lr.axis}: bandwidth ratio not judged — "
                        f"{inner.key} is {inner.status}, {lr.key} is {lr.status}, so the gains "
                        "on the board are not the ones designed"})
            continue
        chk = analysis.cascade_check(inner.bandwidth_rad_s, lr.bandwidth_rad_s)
        out.append({"axis": lr.axis, "inner": inner.key, "outer": lr.key,
                    "ratio": _f(chk.ratio), "ok": bool(chk.ok),
                    "message": f"{lr.axis}: {chk.message}"})
    return out
