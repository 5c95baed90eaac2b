"""On-board experiments: what an ExperimentStart asks for, its checks, and the experiment level's
output each tick.

Relay output (protocol/SPEC.md 13.1): ``bias + s*amplitude`` (s = +1/-1) replaces the level's PID
output, so on a loaded loop (heave rate: gravity) the host centres the relay on the trim with
``bias``. The relay switches to +1 when the error (setpoint - measurement) rises above
``hysteresis`` and to -1 when it falls below ``-hysteresis``; a negative hysteresis switches
early. It starts at +1 if the error is >= 0. A step adds ``amplitude`` to the setpoint from
``step_at_s`` on; a hold keeps the setpoint. An outer level's output is the inner level's
setpoint (the inner level stays closed on its current gains); an inner level's output is clipped
to the actuator range by the tick.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

from protocol import messages as M
from protocol.messages import ExperimentKind, RefuseCode

from .axes import LOOP_NAME, AxisController


@dataclass
class Experiment:
    """A running on-board experiment (device side)."""

    tag: int
    kind: ExperimentKind
    axis: str
    loop: str
    amplitude: float
    hysteresis: float
    bias: float
    setpoint: float
    step_at_s: float
    duration_s: float
    kill_angle_rad: float
    kill_rate_rad_s: float
    kill_heave_m: float
    kill_saturation_s: float
    start_tick: int = 0
    relay_state: int = 0

    @classmethod
    def from_request(cls, msg: M.ExperimentStart, axis: AxisController,
                     tick: int) -> Experiment:
        """The experiment a checked request starts at ``tick`` (see :func:`check_request`)."""
        loop = LOOP_NAME[msg.loop]
        e = cls(tag=msg.tag, kind=ExperimentKind(msg.kind), axis=axis.name, loop=loop,
                amplitude=msg.amplitude, hysteresis=msg.hysteresis, bias=msg.bias,
                setpoint=msg.setpoint, step_at_s=msg.step_at_s, duration_s=msg.duration_s,
                kill_angle_rad=msg.kill_angle_rad, kill_rate_rad_s=msg.kill_rate_rad_s,
                kill_heave_m=msg.kill_heave_m, kill_saturation_s=msg.kill_saturation_s,
                start_tick=tick)
        e.relay_state = 1 if (e.setpoint - axis.levels[loop].y) >= 0 else -1
        return e


class Refusal(NamedTuple):
    """Why a request is refused: the code, a text for people, and the Refuse detail."""

    code: RefuseCode
    text: str
    detail: int = 0


_START = {f.name: i for i, f in enumerate(M.field_specs(M.ExperimentStart))}
_ADJUST = {f.name: i for i, f in enumerate(M.field_specs(M.ExperimentAdjust))}
_FLOATS = ("amplitude", "hysteresis", "bias", "setpoint", "step_at_s", "duration_s",
           "kill_angle_rad", "kill_rate_rad_s", "kill_heave_m", "kill_saturation_s")
_THRESHOLDS = _FLOATS[6:]
_KIND_CAPABILITY = {ExperimentKind.RELAY: M.Capability.RELAY, ExperimentKind.STEP:
                    M.Capability.STEP, ExperimentKind.HOLD: M.Capability.HOLD}


def check_request(msg: M.ExperimentStart, axes: dict[int, AxisController],
                  capabilities: int = ~0) -> Refusal | None:
    """The refusal of an ExperimentStart this board cannot run, or None, checked in the order of
    protocol/SPEC.md 11.3 (the detail is the offending field's position in the byte table).
    ``axes`` maps axis ids to the board's axes; the state is checked before this."""
    try:
        kind = ExperimentKind(msg.kind)
    except ValueError:
        return Refusal(RefuseCode.UNSUPPORTED, f"unknown experiment kind {msg.kind}",
                       _START["kind"])
    if not capabilities & _KIND_CAPABILITY[kind]:
        return Refusal(RefuseCode.UNSUPPORTED, f"this board cannot run {kind.name}",
                       _START["kind"])
    a = axes.get(msg.axis)
    if a is None:
        return Refusal(RefuseCode.UNSUPPORTED, f"axis {msg.axis} not on this board; axes: "
                       f"{', '.join(x.name for x in axes.values())}", _START["axis"])
    loop = LOOP_NAME.get(msg.loop)
    if loop not in a.levels:
        return Refusal(RefuseCode.UNSUPPORTED, f"{a.name} has no loop level {msg.loop}; "
                       f"levels: {', '.join(a.levels)}", _START["loop"])
    if msg.tag == 0:
        return Refusal(RefuseCode.BAD_PARAMETER, "tag must be non-zero", _START["tag"])
    for name in _FLOATS:
        if not math.isfinite(getattr(msg, name)):
            return Refusal(RefuseCode.BAD_PARAMETER, f"{name} must be a finite number",
                           _START[name])
    if msg.duration_s <= 0:
        return Refusal(RefuseCode.BAD_PARAMETER, "duration_s must be > 0", _START["duration_s"])
    if kind == ExperimentKind.RELAY and msg.amplitude <= 0:
        return Refusal(RefuseCode.BAD_PARAMETER, "relay amplitude must be > 0",
                       _START["amplitude"])
    if kind == ExperimentKind.STEP and not 0 <= msg.step_at_s < msg.duration_s:
        return Refusal(RefuseCode.BAD_PARAMETER, "step_at_s must be in [0, duration_s)",
                       _START["step_at_s"])
    for name in _THRESHOLDS:
        if getattr(msg, name) < 0:
            return Refusal(RefuseCode.BAD_PARAMETER, f"{name} must be >= 0", _START[name])
    return None


def check_adjust(msg: M.ExperimentAdjust, e: Experiment | None,
                 capabilities: int = ~0) -> Refusal | None:
    """The refusal of an ExperimentAdjust of the running experiment, or None (SPEC.md 11.3)."""
    if not capabilities & M.Capability.RELAY_ADJUST:
        return Refusal(RefuseCode.UNSUPPORTED, "this board cannot adjust a running relay",
                       int(M.Capability.RELAY_ADJUST))
    if e is None or msg.tag != e.tag or e.kind != ExperimentKind.RELAY:
        return Refusal(RefuseCode.BAD_PARAMETER, f"tag {msg.tag} names no running relay",
                       _ADJUST["tag"])
    for name in ("amplitude", "hysteresis", "bias"):
        if not math.isfinite(getattr(msg, name)):
            return Refusal(RefuseCode.BAD_PARAMETER, f"{name} must be a finite number",
                           _ADJUST[name])
    if msg.amplitude <= 0:
        return Refusal(RefuseCode.BAD_PARAMETER, "relay amplitude must be > 0",
                       _ADJUST["amplitude"])
    return None


def experiment_command(a: AxisController, e: Experiment, t: float) -> float:
    """One tick of the experiment on its level of axis ``a``, ``t`` seconds after its start;
    returns the actuator command (before the actuator's clipping)."""
    lv = a.levels[e.loop]
    r = e.setpoint
    if e.kind == ExperimentKind.RELAY:
        err = r - lv.y
        s = e.relay_state
        if s > 0:
            if err < -e.hysteresis:
                s = -1
        elif err > e.hysteresis:
            s = 1
        e.relay_state = s
        out = e.bias + s * e.amplitude
        lv.u = out
    else:
        if e.kind == ExperimentKind.STEP and t >= e.step_at_s:
            r += e.amplitude
        out = lv.u = lv.pid.update(r, lv.y)
    lv.r = r
    if lv is a.outer:
        i = a.inner
        i.r = out
        out = i.u = i.pid.update(out, i.y)
    return out
